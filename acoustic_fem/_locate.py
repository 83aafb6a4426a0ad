"""Point location in a simplicial mesh and point evaluation of the FE basis.

:func:`locate` finds, for each query point, a cell containing it and the
point's reference coordinates in that cell; :func:`interpolation_matrix`
turns that into the sparse (n_points, n_dofs) matrix E with
``(E @ u)[i] = u_h(x_i)`` for a DOF vector ``u``.

Search (vectorised over all points and candidates at once):

1. A k-d tree over the cell centroids gives the k nearest cells of every
   point (k = 8, then 32, then 128 for the points not yet found).
2. For every (point, candidate) pair the barycentric coordinates λ in the
   straight (vertex) simplex are computed with the precomputed inverse
   Jacobians.  The candidate's *outside distance* is estimated as
   ``max_i(-λ_i / |∇λ_i|)`` (the distance beyond the most violated face
   plane; negative inside), and the candidate with the smallest estimate
   wins.
3. Curved (second-order geometry) cells: for candidates that are curved,
   the straight-sided coordinates start a Newton iteration on the
   isoparametric P2 map x(ξ) = Σ_k N_k(ξ) X_k, which gives the exact
   reference coordinates; the outside distance is then estimated from the
   reference barycentrics with the same face-height scaling.
4. Points still not inside within the tolerance after the largest k are
   tested against every cell (in chunks), so a point inside the mesh is
   never reported outside because of a skewed centroid neighbourhood.

A point is accepted when its outside distance is at most ``tol`` (default
1e-6 of the bounding-box diagonal); its barycentric coordinates are then
clipped to [0, 1] and renormalised, i.e. a point a rounding error outside a
wall is evaluated on the wall.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from .dofs import DofMap
from .elements import reference_element
from .mesh import Mesh

__all__ = ["Location", "locate", "interpolation_matrix", "DEFAULT_RTOL"]

#: Default location tolerance, relative to the bounding-box diagonal.
DEFAULT_RTOL = 1e-6

_K_STEPS = (8, 32, 128)
_NEWTON_ITERS = 12


@dataclass(frozen=True)
class Location:
    """Where query points lie in a mesh.

    Attributes
    ----------
    cells : (n,) int array
        Containing cell of each point (-1 where outside).
    xi : (n, dim) float array
        Reference coordinates in that cell (NaN where outside).
    outside : (n,) float array
        Estimated distance outside the mesh in m (<= tol for found points;
        negative values mean strictly inside).
    """

    cells: np.ndarray
    xi: np.ndarray
    outside: np.ndarray

    @property
    def found(self) -> np.ndarray:
        return self.cells >= 0


_CACHE: "weakref.WeakKeyDictionary[Mesh, tuple]" = weakref.WeakKeyDictionary()


def _cell_data(mesh: Mesh):
    """Centroid tree, vertex x0 (E, d), inverse Jacobians (E, d, d), face gradient norms.

    Cached per mesh (weakly: dropped with the mesh).
    """
    hit = _CACHE.get(mesh)
    if hit is None:
        hit = _CACHE[mesh] = _compute_cell_data(mesh)
    return hit


def _compute_cell_data(mesh: Mesh):
    from scipy.spatial import cKDTree

    from .assembly import _curved_cells

    d = mesh.dim
    X = mesh.points[mesh.vertices, :d]  # (E, d+1, d)
    J = np.transpose(X[:, 1:, :] - X[:, :1, :], (0, 2, 1))  # (E, d, d)
    Jinv = np.linalg.inv(J)  # rows: ∇λ_1..∇λ_d
    grad0 = -Jinv.sum(axis=1)  # ∇λ_0
    gnorm = np.column_stack([np.linalg.norm(grad0, axis=1), np.linalg.norm(Jinv, axis=2)])
    tree = cKDTree(X.mean(axis=1))
    curved = _curved_cells(mesh)
    return tree, np.ascontiguousarray(X[:, 0, :]), Jinv, gnorm, curved


def _newton(mesh: Mesh, cells: np.ndarray, x: np.ndarray, xi0: np.ndarray) -> np.ndarray:
    """Reference coordinates (m, d) of points x (m, d) in curved cells, by Newton."""
    d = mesh.dim
    geo = reference_element(mesh.cell_type, 2)
    Xn = mesh.points[mesh.cells[cells], :d]  # (m, ng, d)
    xi = xi0.copy()
    for _ in range(_NEWTON_ITERS):
        N = geo.values(xi)  # (m, ng)
        dN = geo.gradients(xi)  # (m, ng, d)
        r = np.einsum("mk,mki->mi", N, Xn) - x
        J = np.einsum("mki,mka->mia", Xn, dN)
        step = np.linalg.solve(J, r[..., None])[..., 0]
        xi = xi - step
        # keep far-off candidates bounded: they lose anyway
        np.clip(xi, -2.0, 3.0, out=xi)
        if np.max(np.abs(step), initial=0.0) < 1e-13:
            break
    return xi


def _candidates(mesh: Mesh, x: np.ndarray, cand: np.ndarray):
    """Best candidate per point: (cell, xi, outside) for points x (n, d), cand (n, k)."""
    tree, x0, Jinv, gnorm, curved = _cell_data(mesh)
    n, k = cand.shape
    d = mesh.dim
    rel = x[:, None, :] - x0[cand]  # (n, k, d)
    xi = np.einsum("nkab,nkb->nka", Jinv[cand], rel)  # (n, k, d)
    lam = np.concatenate([1.0 - xi.sum(axis=2, keepdims=True), xi], axis=2)
    g = gnorm[cand]  # (n, k, d+1)
    if curved.any():
        cv = curved[cand]
        # curved candidates whose straight simplex is not hopelessly far
        near = cv & ((-lam / g).max(axis=2) < 0.5 * (1.0 / g).max(axis=2))
        if near.any():
            ii, jj = np.nonzero(near)
            xin = _newton(mesh, cand[ii, jj], x[ii], xi[ii, jj])
            xi[ii, jj] = xin
            lam[ii, jj] = np.column_stack([1.0 - xin.sum(axis=1), xin])
        far = cv & ~near
        lam[far] = -np.inf  # cannot contain the point
    out = (-lam / g).max(axis=2)  # (n, k) outside-distance estimate
    best = np.argmin(out, axis=1)
    r = np.arange(n)
    return cand[r, best], xi[r, best], out[r, best]


def locate(mesh: Mesh, points: np.ndarray, tol: float | None = None) -> Location:
    """Find the cells containing points.

    Parameters
    ----------
    mesh : Mesh
    points : (n, dim) float array
        Query points in the mesh's own coordinates (first ``dim`` columns).
    tol : float, optional
        Accepted distance outside the mesh in m (default 1e-6 of the
        bounding-box diagonal).

    Returns
    -------
    Location
        ``cells`` (n,), ``xi`` (n, dim), ``outside`` (n,).
    """
    d = mesh.dim
    x = np.ascontiguousarray(np.asarray(points, dtype=float).reshape(-1, d))
    n = len(x)
    if tol is None:
        bb = mesh.bounding_box
        tol = DEFAULT_RTOL * float(np.linalg.norm(bb[1] - bb[0]))
    tree = _cell_data(mesh)[0]
    E = mesh.n_cells
    cells = np.full(n, -1, dtype=np.int64)
    xi = np.full((n, d), np.nan)
    outside = np.full(n, np.inf)
    todo = np.arange(n)
    for k in _K_STEPS:
        if todo.size == 0:
            break
        kk = min(k, E)
        _, cand = tree.query(x[todo], k=kk)
        cand = np.asarray(cand).reshape(todo.size, kk)
        c, r, o = _candidates(mesh, x[todo], cand)
        better = o < outside[todo]
        sel = todo[better]
        cells[sel], xi[sel], outside[sel] = c[better], r[better], o[better]
        todo = todo[outside[todo] > tol]
        if kk == E:
            break
    if todo.size and E > _K_STEPS[-1]:
        # exhaustive check of the remaining points against every cell (chunks)
        chunk = max(1, 2_000_000 // max(todo.size, 1))
        for s in range(0, E, chunk):  # loop over cell chunks, each vectorised
            cand = np.broadcast_to(np.arange(s, min(s + chunk, E)), (todo.size, min(chunk, E - s)))
            c, r, o = _candidates(mesh, x[todo], np.ascontiguousarray(cand))
            better = o < outside[todo]
            sel = todo[better]
            cells[sel], xi[sel], outside[sel] = c[better], r[better], o[better]
    bad = outside > tol
    cells[bad] = -1
    xi[bad] = np.nan
    # clip to the reference simplex (points within tol outside land on the wall)
    ok = ~bad
    lam = np.column_stack([1.0 - xi[ok].sum(axis=1), xi[ok]])
    lam = np.clip(lam, 0.0, None)
    lam /= lam.sum(axis=1, keepdims=True)
    xi[ok] = lam[:, 1:]
    return Location(cells, xi, outside)


def interpolation_matrix(dofs: DofMap, loc: Location) -> sp.csr_matrix:
    """Sparse (n_points, n_dofs) point-evaluation matrix of the FE space.

    Row i holds the basis values φ_j(x_i) of the cell containing point i
    (all-zero row for a point not found).
    """
    el = reference_element(dofs.mesh.cell_type, dofs.order)
    n = len(loc.cells)
    ok = loc.found
    nb = el.n_basis
    vals = np.zeros((n, nb))
    cols = np.zeros((n, nb), dtype=np.int64)
    if ok.any():
        vals[ok] = el.values(loc.xi[ok])
        cols[ok] = dofs.cell_dofs[loc.cells[ok]]
    indptr = np.arange(n + 1) * nb
    E = sp.csr_matrix((vals.ravel(), cols.ravel(), indptr), shape=(n, dofs.n_dofs))
    E.sum_duplicates()
    E.eliminate_zeros()
    return E
