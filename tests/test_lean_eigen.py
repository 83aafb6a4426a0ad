"""The memory-lean eigensolver (AMG-preconditioned LOBPCG, no factorisation).

References:
* the default path of solve_modes on the same mesh (an independent solver of
  the same discrete pencil K x = λ M x: factorised shift-invert Lanczos);
* the analytic modes of a rectangular box (Morse & Ingard, *Theoretical
  Acoustics*, 1968, §9.4: f = (c/2π)|k|, k_i = n_i π / L_i rigid/rigid,
  (2 n_i + 1) π / (2 L_i) rigid/pressure-release).

Stated tolerance of the lean path (AmgSolver docstring): every wanted pair
reaches the relative residual tol = 1e-7 (default) of the shifted, scaled
pencil.  For a symmetric pencil the Rayleigh-quotient eigenvalue error is
bounded by ‖r‖²/gap (Parlett, *The Symmetric Eigenvalue Problem*, Thm 11.7.1,
in the B⁻¹ norm): here ≈ (1e-7)² μ_top² / gap ≲ 1e-12 relative, and the
eigenvector angle by ‖r‖/gap ≈ 1e-7 μ_top/gap ≲ 1e-6 (Davis–Kahan sin θ).
The tests allow 1e-9 relative on frequencies and cos θ >= 1 - 1e-8 on the
(cluster) subspaces, far below both bounds' reach yet far above round-off.
"""

import math

import numpy as np
import pytest

import acoustic_fem as af
from acoustic_fem.verification import structured_box
from modecompare import subspace_cosines

pytest.importorskip("pyamg", reason="pyamg not installed: pip install 'acoustic-fem[lean]'")

C = 343.0
AIR = af.Air(c=C)
SIZE = (1.0, 0.7, 0.5)
N = 10  # cells per metre: h = 0.1 m


@pytest.fixture(scope="module")
def box():
    return structured_box(SIZE, N)


WALLS = {
    "rigid": ({}, {}),
    "x1-released": ({"x1": af.PressureRelease()}, {"x1": "pressure_release"}),
}


@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("case", list(WALLS))
def test_lean_equals_default_path(box, order, case):
    walls, _ = WALLS[case]
    count = 12
    ref = af.solve_modes(box, walls, order=order, count=count, air=AIR)
    lean = af.solve_modes(box, walls, order=order, count=count, air=AIR, backend="amg")
    assert "LOBPCG" in lean.info["method"]
    assert lean.info["windows"][0]["max_relative_residual"] <= af.AmgSolver().tol
    f_ref, f_lean = ref.frequencies, lean.frequencies
    scale = np.where(f_ref > 0, f_ref, f_ref[f_ref > 0].min())  # the 0 Hz mode: absolute
    assert np.max(np.abs(f_lean - f_ref) / scale) <= 1e-9
    M = af.assemble(box, order).mass
    worst, signed = subspace_cosines(ref.shapes, lean.shapes, M, f_ref)
    assert worst >= 1 - 1e-8
    assert np.all(np.abs(signed) >= 1 - 1e-8)  # MAC of simple modes


@pytest.mark.parametrize("case", list(WALLS))
def test_lean_matches_morse_ingard(box, case):
    walls, ref_walls = WALLS[case]
    count = 15
    exact = af.analytic.box_modes(SIZE, c=C, walls=ref_walls, count=count).frequencies
    lean = af.solve_modes(box, walls, order=2, count=count, air=AIR, backend="amg")
    # P2 dispersion: relative frequency error ≈ (kh)⁴/1440 (1D consistent-mass
    # Lagrange elements, see modes.MIN_ELEMENTS_PER_WAVELENGTH); the Kuhn tets'
    # longest edge is √3 h, so allow (√3 kh)⁴/1440 = 9 (kh)⁴/1440, plus 1e-9
    # for the 0 Hz mode (absolute, Hz)
    kh = 2 * math.pi * exact / C * (1.0 / N)
    tol = 9 * kh**4 / 1440
    assert np.all(np.abs(lean.frequencies - exact) <= tol * exact + 1e-9)


def test_lean_fmax(box):
    # every mode up to 420 Hz: Morse & Ingard's box has 7 (the 0 Hz mode counted;
    # 383.5 < 420 < 421.5 Hz); the discrete P2 ones lie at most 0.2 % above
    # theirs (the bound of the test above), so the count is the same
    exact = af.analytic.box_modes(SIZE, c=C, fmax=420.0).frequencies
    ref = af.solve_modes(box, order=2, fmax=420.0, air=AIR)
    lean = af.solve_modes(box, order=2, fmax=420.0, air=AIR,
                          backend=af.AmgSolver(tol=1e-7, seed=3))
    assert lean.frequencies.shape == ref.frequencies.shape == exact.shape
    nz = ref.frequencies > 0
    assert np.max(np.abs(lean.frequencies[nz] / ref.frequencies[nz] - 1)) <= 1e-9


def test_lean_reports_non_convergence(box):
    with pytest.raises(af.ConvergenceError, match="max_iter"):
        af.solve_modes(box, order=2, count=12, air=AIR, backend=af.AmgSolver(max_iter=2))


@pytest.mark.parametrize("bad, match", [
    (dict(tol=0.0), "tol=0.0"), (dict(max_iter=0), "max_iter=0"), (dict(guard=-1), "guard=-1"),
])
def test_bad_options(bad, match):
    with pytest.raises(af.InputError, match=match):
        af.AmgSolver(**bad)


def test_missing_pyamg_is_a_clear_error(box, monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_pyamg(name, *args, **kwargs):
        if name == "pyamg" or name.startswith("pyamg."):
            raise ImportError("No module named 'pyamg'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_pyamg)
    with pytest.raises(af.MissingDependencyError, match="pip install"):
        af.solve_modes(box, order=1, count=4, air=AIR, backend="amg")
