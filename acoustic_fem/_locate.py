"""Point location in a simplicial mesh and point evaluation of the FE basis.

:func:`locate` finds, for each query point, a cell containing it and the
point's reference coordinates in that cell; :func:`interpolation_matrix`
turns that into the sparse (n_points, n_dofs) matrix E with
``(E @ u)[i] = u_h(x_i)`` for a DOF vector ``u``.

Search (vectorised over all points and candidates at once):

1. A k-d tree over the cell centroids gives the 8 nearest cells of every
   point; for every (point, candidate) pair the barycentric coordinates λ
   in the straight (vertex) simplex follow from precomputed inverse
   Jacobians.  The candidate's *outside distance* is estimated as
   ``max_i(-λ_i |∇λ_i|⁻¹)`` (the distance beyond the most violated face
   plane; negative inside); the smallest wins.
2. Points not inside within the tolerance after step 1 (near skewed cells,
   or outside the mesh) are tested against *every* cell that can contain
   them: a cell lies within the ball of radius r_e (farthest node from its
   centroid; x 1.25 for curved cells) about its centroid, so a ball query of
   radius max(r_e) + tol and the filter |x - c_e| <= r_e + tol give a
   complete candidate list.  A point this step does not place is outside.
3. Curved (second-order geometry) cells: candidates that are curved get
   their reference coordinates by Newton's method on the isoparametric P2
   map x(ξ) = Σ_k N_k(ξ) X_k, started from the straight-sided ones; the
   outside distance then uses the reference barycentrics with the same
   face-height scaling.

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

_K_NEAREST = 8
_NEWTON_ITERS = 12
_PAIRS_PER_CHUNK = 400_000


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
        negative means strictly inside; inf where no cell is near).
    """

    cells: np.ndarray
    xi: np.ndarray
    outside: np.ndarray

    @property
    def found(self) -> np.ndarray:
        return self.cells >= 0


_CACHE: "weakref.WeakKeyDictionary[Mesh, tuple]" = weakref.WeakKeyDictionary()


def _cell_data(mesh: Mesh):
    """Per-cell search data, cached per mesh (weakly: dropped with the mesh)."""
    hit = _CACHE.get(mesh)
    if hit is None:
        hit = _CACHE[mesh] = _compute_cell_data(mesh)
    return hit


def _compute_cell_data(mesh: Mesh):
    """Centroid tree, x0 (E, d), inverse Jacobians (E, d, d), |∇λ| (E, d+1), radii, curved."""
    from scipy.spatial import cKDTree

    from .assembly import _curved_cells

    d = mesh.dim
    X = mesh.points[mesh.vertices, :d]  # (E, d+1, d)
    J = np.transpose(X[:, 1:, :] - X[:, :1, :], (0, 2, 1))  # (E, d, d)
    Jinv = np.linalg.inv(J)  # rows: ∇λ_1..∇λ_d
    grad0 = -Jinv.sum(axis=1)  # ∇λ_0
    gnorm = np.column_stack([np.linalg.norm(grad0, axis=1), np.linalg.norm(Jinv, axis=2)])
    centroid = X.mean(axis=1)
    nodes = mesh.points[mesh.cells, :d]  # all geometry nodes (vertices and mid-edge)
    radius = np.linalg.norm(nodes - centroid[:, None, :], axis=2).max(axis=1)
    curved = _curved_cells(mesh)
    radius[curved] *= 1.25  # a curved edge may bulge a little beyond its nodes
    tree = cKDTree(centroid)
    return tree, centroid, np.ascontiguousarray(X[:, 0, :]), Jinv, gnorm, radius, curved


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
        np.clip(xi, -2.0, 3.0, out=xi)  # far-off candidates stay bounded; they lose anyway
        if np.max(np.abs(step), initial=0.0) < 1e-13:
            break
    return xi


def _score(mesh: Mesh, x: np.ndarray, cells: np.ndarray):
    """Reference coordinates (m, d) and outside distance (m,) of points x (m, d) in cells (m,)."""
    _, _, x0, Jinv, gnorm, _, curved = _cell_data(mesh)
    xi = np.einsum("mab,mb->ma", Jinv[cells], x - x0[cells])
    lam = np.column_stack([1.0 - xi.sum(axis=1), xi])
    g = gnorm[cells]
    if curved.any():
        cv = curved[cells]
        # curved candidates whose straight simplex is not far off
        near = cv & ((-lam / g).max(axis=1) < 0.5 * (1.0 / g).max(axis=1))
        if near.any():
            ii = np.flatnonzero(near)
            xin = _newton(mesh, cells[ii], x[ii], xi[ii])
            xi[ii] = xin
            lam[ii] = np.column_stack([1.0 - xin.sum(axis=1), xin])
        lam[cv & ~near] = -np.inf  # cannot contain the point
    return xi, (-lam / g).max(axis=1)


def _best(mesh, x, pt, cells, n):
    """Best cell per point over candidate pairs (pt[j], cells[j]); pairs grouped by point."""
    best_c = np.full(n, -1, dtype=np.int64)
    best_xi = np.full((n, mesh.dim), np.nan)
    best_o = np.full(n, np.inf)
    for s in range(0, pt.size, _PAIRS_PER_CHUNK):  # chunks of pairs, each vectorised
        p, c = pt[s : s + _PAIRS_PER_CHUNK], cells[s : s + _PAIRS_PER_CHUNK]
        xi, o = _score(mesh, x[p], c)
        # per point, the pair of smallest outside distance
        order = np.lexsort((o, p))
        p, c, xi, o = p[order], c[order], xi[order], o[order]
        first = np.r_[True, p[1:] != p[:-1]]
        p, c, xi, o = p[first], c[first], xi[first], o[first]
        better = o < best_o[p]
        best_c[p[better]], best_xi[p[better]], best_o[p[better]] = c[better], xi[better], o[better]
    return best_c, best_xi, best_o


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
    tree, centroid, _, _, _, radius, _ = _cell_data(mesh)
    E = mesh.n_cells
    # 1. nearest centroids
    k = min(_K_NEAREST, E)
    _, cand = tree.query(x, k=k)
    cand = np.asarray(cand, dtype=np.int64).reshape(n, k)
    cells, xi, outside = _best(mesh, x, np.repeat(np.arange(n), k), cand.ravel(), n)
    # 2. every cell that can contain the remaining points
    todo = np.flatnonzero(outside > tol)
    if todo.size:
        from scipy.spatial import cKDTree

        pairs = cKDTree(x[todo]).sparse_distance_matrix(
            tree, float(radius.max()) + tol, output_type="ndarray")
        if pairs.size:
            pt, cc = todo[pairs["i"].astype(np.int64)], pairs["j"].astype(np.int64)
            close = pairs["v"] <= radius[cc] + tol
            c2, xi2, o2 = _best(mesh, x, pt[close], cc[close], n)
            better = o2 < outside
            cells[better], xi[better], outside[better] = c2[better], xi2[better], o2[better]
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
    (an all-zero row for a point not found).
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
