"""Quadrature rules on the reference simplices.

The reference simplices are the unit interval [0, 1], the triangle with
vertices (0,0), (1,0), (0,1) and the tetrahedron with vertices (0,0,0),
(1,0,0), (0,1,0), (0,0,1).

Rules are Gauss–Legendre on the interval and collapsed (Duffy) conical
products of Gauss–Jacobi rules on the triangle and tetrahedron (Stroud,
*Approximate Calculation of Multiple Integrals*, 1971, §2.4 and the
conical product formulas): positive weights, interior points, exact for
polynomials of total degree ``degree``.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy.special import roots_jacobi, roots_legendre

from ._errors import InputError

__all__ = ["quadrature"]


def _gauss_jacobi01(n: int, alpha: float):
    """n-point Gauss–Jacobi rule on [0, 1] for weight (1 - t)^alpha."""
    x, w = roots_jacobi(n, alpha, 0.0)
    t = (x + 1.0) / 2.0
    w = w / 2.0 ** (alpha + 1.0)
    return t, w


@lru_cache(maxsize=None)
def quadrature(dim: int, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Quadrature rule on the reference simplex of dimension ``dim``.

    Parameters
    ----------
    dim : int
        1 (interval), 2 (triangle) or 3 (tetrahedron).
    degree : int
        Polynomials of total degree <= ``degree`` are integrated exactly.

    Returns
    -------
    points : (n_q, dim) ndarray
        Points in reference coordinates.
    weights : (n_q,) ndarray
        Weights; they sum to the reference measure (1, 1/2, 1/6).
    """
    if dim not in (1, 2, 3):
        raise InputError(f"quadrature dimension {dim!r} must be 1, 2 or 3.")
    if degree < 0:
        raise InputError(f"quadrature degree {degree!r} must be >= 0.")
    n = degree // 2 + 1
    if dim == 1:
        x, w = roots_legendre(n)
        pts = ((x + 1.0) / 2.0)[:, None]
        wts = w / 2.0
    elif dim == 2:
        # x = u, y = v (1 - u); Jacobian (1 - u)
        u, wu = _gauss_jacobi01(n, 1.0)
        v, wv = _gauss_jacobi01(n, 0.0)
        U, V = np.meshgrid(u, v, indexing="ij")
        W = np.outer(wu, wv)
        pts = np.column_stack([U.ravel(), (V * (1.0 - U)).ravel()])
        wts = W.ravel()
    else:
        # x = u, y = v (1-u), z = w (1-u)(1-v); Jacobian (1-u)^2 (1-v)
        u, wu = _gauss_jacobi01(n, 2.0)
        v, wv = _gauss_jacobi01(n, 1.0)
        s, ws = _gauss_jacobi01(n, 0.0)
        U, V, S = np.meshgrid(u, v, s, indexing="ij")
        W = wu[:, None, None] * wv[None, :, None] * ws[None, None, :]
        pts = np.column_stack(
            [U.ravel(), (V * (1.0 - U)).ravel(), (S * (1.0 - U) * (1.0 - V)).ravel()]
        )
        wts = W.ravel()
    pts.setflags(write=False)
    wts.setflags(write=False)
    return pts, wts
