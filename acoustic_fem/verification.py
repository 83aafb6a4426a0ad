"""Verification report: the solver against published reference solutions, on this machine.

:func:`run_checks` solves a set of cases whose answers are known from the
literature and compares; :func:`write_report` writes the table as CSV and a
self-contained HTML page.  Every row names its source (book and equation);
tolerances come from the leading term of the discretisation error, derived
where stated.

Error model used for the tolerances (derived in tests/test_verification.py
and checked there to a few per cent on uniform 1D meshes): on elements of
size h, consistent-mass Lagrange elements raise a frequency by
(kh)²/24 (P1) and (kh)⁴/1440 (P2), k = 2πf/c.  Structured 2D/3D meshes get
a shape factor of 3 on top (common practice; the longest edge of the cells
used is up to √3 h).

Groups of checks (``groups=``):

* ``tube`` — 1D tube, rigid/pressure-release ends (Kinsler, Frey, Coppens &
  Sanders, *Fundamentals of Acoustics*, 4th ed., 2000, §10.2).
* ``duct`` — 2D duct released at one end (Morse & Ingard, *Theoretical
  Acoustics*, 1968, §9.4).
* ``box`` — rectangular rooms with every rigid / pressure-release mix per
  axis (Morse & Ingard 1968 §9.4).
* ``cylinder``, ``sphere`` — rigid cavities on curved P2 meshes (Abramowitz
  & Stegun 1964 §9.5 Table 9.5, §10.1).
* ``convergence`` — eigenvalue convergence slope 2p of degree-p elements
  (Strang & Fix, *An Analysis of the Finite Element Method*, 1973, ch. 6;
  from memory).
* ``estimate`` — effectivity of the a-posteriori error estimate
  (:mod:`acoustic_fem.estimate`): share of modes whose estimate is within a
  factor 3 of the true error (the acceptance criterion of this project).

* ``response`` — pressure-chamber limit of a rigid room (lumped compliance
  V/(ρc²), Beranek 1954 ch. 3) and reciprocity with an absorbing wall
  (Pierce 1989 §4.1), when :mod:`acoustic_fem.response` is present.
* ``damped`` — frequencies and decay rates of damped modes: a tube rigid at
  one end with an admittance at the other (Kinsler et al. 2000 §10.2:
  k_n L = nπ + i artanh β) and a box with one admittance wall (separation
  of variables as Morse & Ingard 1968 §9.4, with the wall condition
  k_x tan(k_x L_x) = i k β solved by Newton's method).

:func:`unavailable_checks` lists what is left out and why.
"""

from __future__ import annotations

import csv
import html
import itertools
import math
import platform
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._atomic import atomic_folder
from ._errors import InputError
from .air import Air
from .elements import CellType
from .mesh import Mesh

__all__ = ["CheckResult", "GROUPS", "run_checks", "write_report", "unavailable_checks"]

#: Speed of sound of every check, m/s (common practice for air near 20 °C;
#: every reference frequency scales with it).
C = 343.0

GROUPS = ("tube", "duct", "box", "cylinder", "sphere", "convergence", "estimate", "response",
          "damped")

_KFCS = "Kinsler, Frey, Coppens & Sanders, Fundamentals of Acoustics, 4th ed. (2000) §10.2"
_MI = "Morse & Ingard, Theoretical Acoustics (1968) §9.4"
_AS_J = "Abramowitz & Stegun (1964) §9.5, Table 9.5 (zeros of J_m')"
_AS_SPH = "Abramowitz & Stegun (1964) §10.1 (zeros of j_l')"
_SF = "Strang & Fix, An Analysis of the Finite Element Method (1973) ch. 6 (from memory)"
_BS = ("acceptance criterion: estimate within a factor 3 of the true error (Bank & Smith, "
       "SIAM J. Numer. Anal. 30(4), 1993, for the method)")


@dataclass(frozen=True)
class CheckResult:
    """One row of the verification table.

    Attributes
    ----------
    group, case : str
        Group (see :data:`GROUPS`) and case name, e.g. ``box`` / ``x1 released, mode 3``.
    source : str
        Where the expected value comes from (book and equation).
    quantity : str
        What is compared, with its unit.
    expected, computed : float
    error : float
        |computed/expected − 1| (relative), or |computed − expected| when the
        expected value is 0 (then in the quantity's unit).
    tolerance : float
        Largest error accepted.
    """

    group: str
    case: str
    source: str
    quantity: str
    expected: float
    computed: float
    error: float
    tolerance: float

    @property
    def passed(self) -> bool:
        return bool(math.isfinite(self.error) and self.error <= self.tolerance)


def _row(group, case, source, quantity, expected, computed, tolerance):
    expected, computed = float(expected), float(computed)
    if expected == 0.0:
        err = abs(computed)
    else:
        err = abs(computed / expected - 1.0)
    if not math.isfinite(computed):
        err = math.inf
    return CheckResult(group, case, source, quantity, expected, computed, err, float(tolerance))


# ----------------------------------------------------------- structured meshes
def _named_faces(pts, cells, ct, size):
    """Mesh with boundary facets named x0, x1, y0, ... by the face they lie on."""
    m = Mesh(pts, cells, ct, 1, volumes={"air": np.arange(len(cells))})
    f = m.boundary_facets
    centre = m.points[f].mean(axis=1)
    names = {}
    scale = max(size)
    for a, L in enumerate(size):  # a loop over axes
        for side, v in (("0", 0.0), ("1", L)):
            on = np.abs(centre[:, a] - v) <= 1e-9 * scale
            names["xyz"[a] + side] = f[on]
    return Mesh(pts, cells, ct, 1, boundaries=names, volumes={"air": np.arange(len(cells))})


def structured_line(length: float, n: int) -> Mesh:
    """[0, length] in n equal segments; end points ``x0``, ``x1``."""
    x = np.linspace(0.0, length, n + 1)
    pts = np.column_stack([x, np.zeros_like(x), np.zeros_like(x)])
    cells = np.column_stack([np.arange(n), np.arange(1, n + 1)])
    return Mesh(pts, cells, CellType.LINE, 1, boundaries={"x0": [[0]], "x1": [[n]]},
                volumes={"air": np.arange(n)})


def structured_rect(size, n: int) -> Mesh:
    """Rectangle with n cells per metre, each square cut into 2 triangles; sides x0 ... y1."""
    ns = np.rint(np.asarray(size) * n).astype(int)
    x, y = (np.linspace(0.0, size[a], ns[a] + 1) for a in range(2))
    X, Y = np.meshgrid(x, y, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), np.zeros(X.size)])
    I, J = (g.ravel() for g in np.meshgrid(np.arange(ns[0]), np.arange(ns[1]), indexing="ij"))
    node = lambda i, j: i * (ns[1] + 1) + j  # noqa: E731
    a, b, c, d = node(I, J), node(I + 1, J), node(I + 1, J + 1), node(I, J + 1)
    cells = np.vstack([np.column_stack([a, b, c]), np.column_stack([a, c, d])])
    return _named_faces(pts, cells, CellType.TRIANGLE, size)


def structured_box(size, n: int) -> Mesh:
    """Box with n cells per metre, each cube cut into 6 tetrahedra (Kuhn); faces x0 ... z1."""
    ns = np.rint(np.asarray(size) * n).astype(int)
    axes = [np.linspace(0.0, size[a], ns[a] + 1) for a in range(3)]
    pts = np.column_stack([g.ravel() for g in np.meshgrid(*axes, indexing="ij")])
    stride = np.array([(ns[1] + 1) * (ns[2] + 1), ns[2] + 1, 1])
    base = np.stack(np.meshgrid(*[np.arange(k) for k in ns], indexing="ij"), -1).reshape(-1, 3)
    cells = []
    for perm in itertools.permutations(range(3)):  # the 6 tetrahedra of a cube
        corner = np.zeros(3, dtype=int)
        path = [corner.copy()]
        for axis in perm:
            corner[axis] += 1
            path.append(corner.copy())
        cells.append(np.column_stack([(base + v) @ stride for v in path]))
    return _named_faces(pts, np.vstack(cells), CellType.TETRAHEDRON, size)


# ------------------------------------------------------------------- checks
def _solve(mesh, walls, order, count=None, fmax=None):
    from .modes import ResolutionWarning, solve_modes

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResolutionWarning)
        return solve_modes(mesh, walls, order=order, count=count, fmax=fmax, air=Air(c=C))


def _p_tol(f, h, order, shape=1.0):
    kh = 2 * math.pi * np.asarray(f, float) / C * h
    lead = kh**2 / 24 if order == 1 else kh**4 / 1440
    return shape * 1.05 * lead + 1e-9


def _tube_checks(quick):
    from .walls import PressureRelease

    L, n = 0.85, 40
    mesh = structured_line(L, n)
    cases = {"closed-closed": ((), lambda j: j * C / (2 * L)),
             "closed-open": (("x1",), lambda j: (2 * j + 1) * C / (4 * L)),
             "open-open": (("x0", "x1"), lambda j: (j + 1) * C / (2 * L))}
    out = []
    for name, (released, formula) in cases.items():
        for order in (1, 2):
            modes = _solve(mesh, {r: PressureRelease() for r in released}, order, count=5)
            for j in range(5):
                exact = formula(j)
                # 1D uniform mesh: the leading dispersion term, +5 % for the next term
                tol = 1e-6 if exact == 0 else float(_p_tol(exact, L / n, order))
                out.append(_row("tube", f"{name}, P{order}, mode {j}",
                                _KFCS + (" f = (2n+1)c/4L" if name == "closed-open"
                                         else " f = nc/2L"),
                                "frequency (Hz)", exact, modes.frequencies[j], tol))
    return out


def _duct_checks(quick):
    from . import analytic
    from .walls import PressureRelease

    size, n = (1.3, 0.55), 20
    mesh = structured_rect(size, n)
    exact = analytic.duct_2d_modes(*size, c=C, count=8)
    out = []
    for order in (1, 2):
        modes = _solve(mesh, {"x1": PressureRelease()}, order, count=8)
        tol = _p_tol(exact, 1.0 / n, order, shape=3.0)
        for j in range(8):
            out.append(_row("duct", f"released at x = L, P{order}, mode {j}",
                            _MI + ": f = c sqrt(((2n+1)/4L)² + (m/2H)²)", "frequency (Hz)",
                            exact[j], modes.frequencies[j], tol[j]))
    return out


_AXIS_MIXES = {"rigid/rigid": ("rigid", "rigid"), "rigid/release": ("rigid", "pressure_release"),
               "release/release": ("pressure_release", "pressure_release")}


def _box_checks(quick):
    from . import analytic
    from .walls import PressureRelease

    size, n, order, count = (1.2, 0.9, 0.6), 10, 2, 8
    mesh = structured_box(size, n)
    from .assembly import assemble

    asm = assemble(mesh, order)
    mixes = list(itertools.product(_AXIS_MIXES, repeat=3))
    if quick:  # all-rigid, one axis of each kind, all released
        mixes = [m for m in mixes if len(set(m)) == 1 or m in (
            ("rigid/rigid", "rigid/release", "release/release"),
            ("release/release", "rigid/rigid", "rigid/release"))]
    out = []
    from .modes import solve_modes

    for mix in mixes:
        walls, ref_walls = {}, {}
        for a, key in enumerate(mix):
            for side, cond in zip("01", _AXIS_MIXES[key]):
                if cond == "pressure_release":
                    walls["xyz"[a] + side] = PressureRelease()
                    ref_walls["xyz"[a] + side] = "pressure_release"
        exact = analytic.box_modes(size, c=C, walls=ref_walls, count=count).frequencies
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            modes = solve_modes(mesh, walls, order=order, count=count, air=Air(c=C),
                                assembly=asm)
        tol = np.where(exact == 0, 1e-6, _p_tol(exact, 1.0 / n, order, shape=3.0))
        label = ", ".join(f"{'xyz'[a]}: {k}" for a, k in enumerate(mix))
        for j in (0, count // 2, count - 1):
            out.append(_row("box", f"{label}; mode {j}", _MI + ": f = (c/2π)|k|, k per axis",
                            "frequency (Hz)", exact[j], modes.frequencies[j], tol[j]))
    return out


def _curved_checks(which, quick):
    from . import analytic, geometry

    air = Air(c=C)
    if which == "cylinder":
        a, H = 0.45, 1.1
        mesh = geometry.cylinder(a, H, fmax=600.0 if quick else 900.0, air=air)
        exact = analytic.cylinder_modes(a, H, c=C, count=12).frequencies
        src = _AS_J + "; k² = (j'_ms/a)² + (qπ/H)²"
    else:
        R = 0.6
        mesh = geometry.sphere(R, fmax=600.0 if quick else 900.0, air=air)
        exact = analytic.sphere_modes(R, c=C, count=12).frequencies
        src = _AS_SPH + "; k = x_ln/a"
    modes = _solve(mesh, None, 2, count=12)
    out = []
    for j in range(12):
        # isoparametric P2 keeps the O(h⁴) rate with the geometry error
        # included (Strang & Fix 1973 ch. 4; from memory): tolerance 4x the
        # 1D leading term at the builder's mesh size, floor 1e-6 Hz at 0 Hz
        h = geometry.mesh_size(600.0 if quick else 900.0, order=2, air=air)
        tol = 1e-6 if exact[j] == 0 else float(_p_tol(exact[j], h, 2, shape=4.0))
        out.append(_row(which, f"rigid {which}, P2 curved, mode {j}", src, "frequency (Hz)",
                        exact[j], modes.frequencies[j], tol))
    return out


_CONVERGENCE = {
    ("triangle", 1): ((1.0, 0.75), (1, 1), [8, 16, 32]),
    ("triangle", 2): ((1.0, 0.75), (1, 1), [4, 8, 16]),
    ("tetrahedron", 1): ((1.0, 0.75, 0.5), (1, 1, 1), [8, 12, 16]),
    ("tetrahedron", 2): ((1.0, 0.75, 0.5), (1, 1, 1), [8, 12, 16]),
}


def _convergence_checks(quick):
    out = []
    for (cell, order), (size, target, levels) in _CONVERGENCE.items():
        if quick and cell == "tetrahedron" and order == 2:
            levels = levels[:2]
        from . import analytic

        lam_exact = sum((n * math.pi / L) ** 2 for n, L in zip(target, size))
        ref = analytic.box_modes(size, c=C, count=30)
        idx = [tuple(r) for r in ref.indices.tolist()].index(tuple(target))
        hs, errs = [], []
        for n in levels:
            mesh = structured_rect(size, n) if cell == "triangle" else structured_box(size, n)
            modes = _solve(mesh, None, order, count=idx + 4)
            # the FE mode is picked by its shape (largest M-weighted MAC with the
            # analytic cos·cos·cos shape), not by its position or value, so
            # pre-asymptotic reordering cannot mislead the fit
            from .assembly import assemble

            M = assemble(mesh, order).mass
            pts = np.zeros((modes.dofs.n_dofs, 3))
            pts[:, : mesh.dim] = modes.points
            a = ref.shape(pts)[:, idx]
            S = modes.shapes
            mac = (a @ (M @ S)) ** 2 / ((a @ (M @ a)) * np.einsum("ij,ij->j", S, M @ S))
            j = int(np.argmax(mac))
            hs.append(1.0 / n)
            errs.append(modes.eigenvalues[j] / lam_exact - 1.0)
        slope = float(np.polyfit(np.log(hs), np.log(np.abs(errs)), 1)[0])
        # ±10 % of the slope covers the pre-asymptotic O(h^(2p+2)) term
        # (measured 1.95-1.99 for P1, 3.84-3.91 for P2 in the test suite)
        out.append(_row("convergence", f"{cell} P{order}, mode {target}, n = {levels}",
                        _SF + ": eigenvalue error O(h^2p)", "log-log slope",
                        2.0 * order, slope, 0.1))
    return out


def _estimate_checks(quick):
    from . import analytic, geometry
    from .estimate import estimate_errors
    from .walls import PressureRelease

    out = []
    air = Air(c=C)
    size = (1.2, 0.9, 0.6)
    cases = [("rigid box", structured_box(size, 8), None,
              analytic.box_modes(size, c=C, fmax=700.0).frequencies, 700.0),
             ("box, x1 released", structured_box(size, 8), {"x1": PressureRelease()},
              analytic.box_modes(size, c=C, walls={"x1": "pressure_release"},
                                 fmax=700.0).frequencies, 700.0)]
    if not quick:
        cases.append(("rigid sphere", geometry.sphere(0.6, fmax=600.0, air=air), None,
                      analytic.sphere_modes(0.6, c=C, fmax=600.0).frequencies, 600.0))
    for name, mesh, walls, exact, fmax in cases:
        modes = _solve(mesh, walls, 2, fmax=fmax)
        err = estimate_errors(modes, indicators=False)
        n = min(len(modes), len(exact))
        nz = exact[:n] > 0
        true = modes.frequencies[:n][nz] / exact[:n][nz] - 1.0
        est = err.frequency_errors[:n][nz]
        big = np.abs(true) > 1e-6
        ratio = est[big] / np.abs(true[big])
        share = float(np.mean((ratio >= 1 / 3) & (ratio <= 3))) if ratio.size else 0.0
        # expected share 1; the criterion accepts >= 95 % (tolerance 0.05)
        out.append(_row("estimate", f"{name}, P2, {int(big.sum())} modes <= {fmax:g} Hz",
                        _BS, "share of modes with estimate/true in [1/3, 3]", 1.0, share, 0.05))
    return out


def _have_response() -> bool:
    try:
        from .response import PointSource, solve_response  # noqa: F401
    except ImportError:
        return False
    return True


def _response_checks(quick):
    """Pressure-chamber limit and reciprocity of the forced response."""
    if not _have_response():
        return []
    from .impedance import Impedance
    from .response import PointSource, solve_response

    air = Air(c=C)
    size = (1.2, 0.9, 0.6)
    mesh = structured_box(size, 5)
    V = math.prod(size)
    q = 1e-4  # m³/s
    src = (0.3, 0.25, 0.2)
    rec = np.array([[0.9, 0.7, 0.45], [1.0, 0.2, 0.5]])
    out = []
    # Pressure-chamber limit: far below the first mode (142.9 Hz) a rigid room
    # is a lumped acoustic compliance C_A = V/(ρc²) (Beranek, Acoustics, 1954,
    # ch. 3; Kinsler et al. 2000 §10.8 — both from memory), so the pressure is
    # uniform, p = Q / (iω C_A) = -i ρ c² Q / (ω V).  The modes above add a
    # relative (f/f_1)² = 1.2e-3 at 5 Hz plus a near-field term ~ V k² / (4π r)
    # ~ 1e-3 at r >= 0.5 m: tolerance 1e-2.
    for f in (5.0,):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = solve_response(mesh, None, sources=PointSource(src, q), receivers=rec,
                               frequencies=[f], order=2, air=air)
        w = 2 * math.pi * f
        expected = -1j * air.rho * C**2 * q / (w * V)
        for i in range(len(rec)):
            p = complex(r.pressure[0, i])
            err = abs(p / expected - 1.0)
            out.append(CheckResult(
                "response", f"pressure-chamber limit, rigid box, {f:g} Hz, receiver {i}",
                "acoustic compliance V/(ρc²): Beranek, Acoustics (1954) ch. 3 (from memory)",
                "|p| (Pa), phase checked too", abs(expected), abs(p), err, 1e-2))
    # Reciprocity: swapping source and receiver leaves the pressure unchanged
    # (Rayleigh's reciprocity theorem, e.g. Pierce, Acoustics, 1989, §4.1; from
    # memory), also with an absorbing wall; the discrete system is complex
    # symmetric, so only rounding separates the two (tolerance 1e-8).
    walls = {"x1": Impedance(admittance=0.3 + 0.1j)}
    a, b = np.array(src), rec[0]
    for f in (60.0, 170.0):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            pab = solve_response(mesh, walls, sources=PointSource(tuple(a), q), receivers=b[None],
                                 frequencies=[f], order=2, air=air).pressure[0, 0]
            pba = solve_response(mesh, walls, sources=PointSource(tuple(b), q), receivers=a[None],
                                 frequencies=[f], order=2, air=air).pressure[0, 0]
        out.append(CheckResult(
            "response", f"reciprocity, box with an absorbing wall, {f:g} Hz",
            "Rayleigh reciprocity: Pierce, Acoustics (1989) §4.1 (from memory)",
            "|p_AB| vs |p_BA| (Pa), complex ratio checked", abs(pab), abs(pba),
            abs(pba / pab - 1.0), 1e-8))
    return out


def _impedance_box_roots(beta, kmax, size, nmax=8):
    """Roots k (Re k <= kmax, ascending) of a box rigid except x = L_x, admittance β there.

    p = cos(k_x x) cos(k_y y) cos(k_z z), k_y, k_z = nπ/L (rigid walls), and
    ∂p/∂x = −ikβp at x = L_x: k_x sin(k_x L_x) = i k β cos(k_x L_x), k² = k_x² +
    k_y² + k_z² (e^{+iωt}).  Newton's method continued from β = 0 in 40 steps;
    the uniform mode is the tube root i artanh(β)/L_x.
    """
    Lx, Ly, Lz = size
    out = []
    for nx, ny, nz in itertools.product(range(nmax), repeat=3):  # a loop over index triples
        q2 = (ny * math.pi / Ly) ** 2 + (nz * math.pi / Lz) ** 2
        if nx == 0 and q2 == 0:
            out.append(1j * np.arctanh(complex(beta)) / Lx)
            continue
        kx = complex(nx * math.pi / Lx)
        for step, t in enumerate(np.linspace(0.0, 1.0, 41)[1:]):
            b = t * beta
            if nx == 0 and step == 0:  # k_x² L_x ≈ i k β for small k_x
                kx = np.sqrt(1j * math.sqrt(q2) * b / Lx)
            for _ in range(60):
                k = np.sqrt(kx * kx + q2)
                F = kx * np.sin(kx * Lx) - 1j * k * b * np.cos(kx * Lx)
                dF = (np.sin(kx * Lx) + kx * Lx * np.cos(kx * Lx)
                      - 1j * b * (kx / k * np.cos(kx * Lx) - k * Lx * np.sin(kx * Lx)))
                kx = kx - F / dF
                if abs(F / dF) < 1e-14 * max(1.0, abs(kx)):
                    break
        k = np.sqrt(kx * kx + q2)
        if k.real <= kmax:
            out.append(k)
    out = np.array(out)
    return out[np.argsort(out.real)]


def _damped_checks(quick):
    """Damped tube and box: frequencies and decay rates against exact roots."""
    from .impedance import Impedance

    out = []
    # tube: P2, 40 elements; frequency tolerance the 1D dispersion term (+5 %);
    # the decay rate carries about 4x that (derived for P1 in
    # tests/test_damped.py, measured 3.8x at P2): 5x
    L, n, beta = 0.85, 40, 0.2 + 0.1j
    modes = _solve(structured_line(L, n), {"x1": Impedance(admittance=beta)}, 2, count=6)
    k = (np.arange(6) * math.pi + 1j * np.arctanh(beta)) / L
    src = _KFCS + ": impedance-terminated tube, k_n L = nπ + i artanh β"
    for j in range(6):
        fe, de = C * abs(k[j].real) / (2 * math.pi), C * k[j].imag
        ft = float(_p_tol(max(fe, C * k[1].real / (2 * math.pi)), L / n, 2))
        if j:
            out.append(_row("damped", f"tube, admittance {beta:g} at x = L, P2, mode {j}",
                            src, "frequency (Hz)", fe, modes.frequencies[j], ft))
        out.append(_row("damped", f"tube, admittance {beta:g} at x = L, P2, mode {j}", src,
                        "decay rate (1/s)", de, modes.decay_rates[j], 5 * ft))
    # box, one admittance wall, P2 structured (10 cells/m): frequency tolerance
    # as the rigid box (shape factor 3); decay rates 4x that, as in the tube
    size, nb = (1.2, 0.9, 0.6), 10
    mesh = structured_box(size, nb)
    for beta in ((0.1,) if quick else (0.1, 0.3 + 0.2j)):
        modes = _solve(mesh, {"x1": Impedance(admittance=beta)}, 2, count=8)
        ref = _impedance_box_roots(beta, 2 * math.pi * 1.5 * float(modes.frequencies[-1]) / C,
                                   size)
        src = (_MI + " separation of variables with k_x tan(k_x L_x) = i k β at the "
               "admittance wall (Newton)")
        f1 = C * abs(ref[1].real) / (2 * math.pi)
        for j in (0, 1, 4, 7):
            kr = ref[np.argmin(np.abs(ref - modes.wavenumbers[j]))]
            fe, de = C * abs(kr.real) / (2 * math.pi), C * kr.imag
            ft = float(_p_tol(max(fe, f1), 1.0 / nb, 2, shape=3.0))
            case = f"box, x1 admittance {beta:g}, P2, mode {j}"
            if j:
                out.append(_row("damped", case, src, "frequency (Hz)", fe,
                                modes.frequencies[j], ft))
            out.append(_row("damped", case, src, "decay rate (1/s)", de,
                            modes.decay_rates[j], 4 * ft))
    return out


_RUNNERS = {
    "tube": _tube_checks,
    "duct": _duct_checks,
    "box": _box_checks,
    "cylinder": lambda q: _curved_checks("cylinder", q),
    "sphere": lambda q: _curved_checks("sphere", q),
    "convergence": _convergence_checks,
    "estimate": _estimate_checks,
    "response": _response_checks,
    "damped": _damped_checks,
}


def unavailable_checks() -> list[tuple[str, str]]:
    """Checks named by the project that this report does not run: (name, reason)."""
    out = []
    if not _have_response():
        out.append(("pressure-chamber limit, reciprocity",
                    "acoustic_fem.response (solve_response) is not part of this version"))
    return out


def run_checks(*, quick: bool = True, groups=None) -> list[CheckResult]:
    """Run the verification checks.

    Parameters
    ----------
    quick : bool
        Smaller sets (a few minutes on 2 cores) instead of the full one.
    groups : sequence of str, optional
        Subset of :data:`GROUPS` (default all).

    Returns
    -------
    list of CheckResult, one per compared value.
    """
    if groups is None:
        groups = GROUPS
    if isinstance(groups, str):
        groups = (groups,)
    unknown = [g for g in groups if g not in _RUNNERS]
    if unknown:
        raise InputError(f"unknown verification group(s) {unknown}; choose from {list(GROUPS)}.")
    results: list[CheckResult] = []
    for g in groups:  # a loop over check groups
        results.extend(_RUNNERS[g](bool(quick)))
    return results


_CSV_COLUMNS = ("group", "case", "source", "quantity", "expected", "computed", "error",
                "tolerance", "passed")


def write_report(results, folder, *, overwrite: bool = False, title: str = "acoustic_fem "
                 "verification report") -> Path:
    """Write the checks as ``verification.csv`` and ``verification.html`` in ``folder``.

    The folder is written atomically (complete or not at all) and an existing
    one is replaced only with ``overwrite=True``.

    Parameters
    ----------
    results : sequence of CheckResult
    folder : str or Path

    Returns
    -------
    Path of the folder.
    """
    results = list(results)
    if not all(isinstance(r, CheckResult) for r in results):
        raise InputError("write_report needs the CheckResult list from run_checks.")
    from . import __version__

    dest = Path(folder)
    n_fail = sum(not r.passed for r in results)
    missing = unavailable_checks()
    with atomic_folder(dest, overwrite=overwrite) as tmp:
        with open(tmp / "verification.csv", "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(_CSV_COLUMNS)
            for r in results:
                w.writerow([r.group, r.case, r.source, r.quantity, f"{r.expected:.12g}",
                            f"{r.computed:.12g}", f"{r.error:.6g}", f"{r.tolerance:.6g}",
                            "pass" if r.passed else "FAIL"])
        rows = []
        for r in results:
            cls = "pass" if r.passed else "fail"
            rows.append(
                f'<tr class="{cls}"><td>{html.escape(r.group)}</td><td>{html.escape(r.case)}</td>'
                f"<td>{html.escape(r.source)}</td><td>{html.escape(r.quantity)}</td>"
                f"<td>{r.expected:.9g}</td><td>{r.computed:.9g}</td><td>{r.error:.3g}</td>"
                f"<td>{r.tolerance:.3g}</td><td>{'pass' if r.passed else 'FAIL'}</td></tr>")
        status = ("all checks passed" if n_fail == 0 else f"{n_fail} of {len(results)} checks "
                  "FAILED")
        notes = "".join(f"<li>{html.escape(n)}: {html.escape(why)}</li>"
                        for n, why in missing)
        colour = "#186a1c" if n_fail == 0 else "#b00020"
        page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>
body {{ font-family: sans-serif; margin: 1.5em; }}
table {{ border-collapse: collapse; font-size: 0.9em; }}
td, th {{ border: 1px solid #bbb; padding: 0.25em 0.5em; text-align: left; }}
tr.pass td:last-child {{ color: #186a1c; font-weight: bold; }}
tr.fail {{ background: #fbe3e3; }}
tr.fail td:last-child {{ color: #b00020; font-weight: bold; }}
.summary {{ font-size: 1.2em; font-weight: bold; color: {colour}; }}
</style></head><body>
<h1>{html.escape(title)}</h1>
<p class="summary">{status} ({len(results)} checks)</p>
<p>acoustic_fem {__version__}, Python {platform.python_version()},
{html.escape(platform.platform())}, {time.strftime('%Y-%m-%d %H:%M')}.
Speed of sound {C:g} m/s in every case. Error: |computed/expected − 1|,
or |computed − expected| where the expected value is 0.</p>
{('<p>Not run:</p><ul>' + notes + '</ul>') if notes else ''}
<table><thead><tr>{''.join(f'<th>{c}</th>' for c in _CSV_COLUMNS)}</tr></thead><tbody>
{chr(10).join(rows)}
</tbody></table></body></html>
"""
        (tmp / "verification.html").write_text(page, encoding="utf-8")
    return dest
