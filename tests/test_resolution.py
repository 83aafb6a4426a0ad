"""The resolution warning follows the dispersion error of Lagrange elements.

Source: the 1D consistent-mass dispersion relations, relative frequency
error ≈ (kh)²/24 for P1 and ≈ (kh)⁴/1440 for P2 (e.g. Thompson & Pinsky,
Int. J. Numer. Meth. Eng. 38 (1995), from memory; also derived in
tests/test_verification.py), which reach 1 % near λ/h = 12.8 (P1) and 3.2 (P2).
"""

import warnings

import numpy as np
import pytest

import acoustic_fem as af


def _tube(n_el, length=1.0):
    x = np.linspace(0.0, length, n_el + 1)
    pts = np.column_stack([x, np.zeros_like(x), np.zeros_like(x)])
    cells = np.column_stack([np.arange(n_el), np.arange(1, n_el + 1)])
    return af.Mesh(pts, cells, af.CellType.LINE, 1, {"x0": [[0]], "x1": [[n_el]]},
                   {"air": np.arange(n_el)})


@pytest.mark.parametrize("order, coarse, fine", [(1, 6, 20), (2, 2.5, 5)])
def test_warns_below_threshold_and_error_is_real(order, coarse, fine):
    air = af.Air()
    fmax = 1000.0
    lam = air.c / fmax
    # coarse mesh: fewer elements per wavelength than the threshold -> warning
    mesh = _tube(int(round(coarse / lam)))
    with pytest.warns(af.ResolutionWarning, match=r"elements per wavelength"):
        m = af.solve_modes(mesh, order=order, fmax=fmax, air=air)
    # and the error really exceeds 1 % for the highest mode (rigid-rigid tube,
    # f_n = n c / 2L: Kinsler et al., Fundamentals of Acoustics 4th ed. §10.2)
    n = np.arange(len(m))
    exact = n * air.c / 2.0
    rel = np.abs(m.frequencies[1:] - exact[1:]) / exact[1:]
    assert rel.max() > 0.01
    # fine mesh: no warning
    mesh = _tube(int(round(fine / lam)))
    with warnings.catch_warnings():
        warnings.simplefilter("error", af.ResolutionWarning)
        af.solve_modes(mesh, order=order, fmax=fmax, air=air)
