"""Vectorised assembly of the Helmholtz stiffness and mass matrices.

K_ij = ∫ ∇φ_i · ∇φ_j dV and M_ij = ∫ φ_i φ_j dV over the enclosure, and the
boundary mass B_ij = ∫ φ_i φ_j dS over a named boundary region.

Straight (affine) cells use exact reference-element integrals scaled by the
cell's Jacobian, evaluated for all cells at once as one matrix product.
Curved (second-order) cells are integrated with a quadrature of degree
2·order + 2 over (cells x quadrature points) arrays, with the isoparametric
P2 map.  Every form ends as one COO array converted once to CSR; K and M
share one sparsity pattern.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import scipy.sparse as sp

from .dofs import DofMap
from .elements import CellType, reference_element
from .mesh import Mesh
from .quadrature import quadrature

__all__ = ["Assembly", "assemble", "boundary_mass", "cell_measures", "facet_measures"]


@dataclass(frozen=True, eq=False)
class Assembly:
    """Assembled matrices of the Helmholtz problem on a mesh.

    Attributes
    ----------
    stiffness : (n_dofs, n_dofs) scipy.sparse.csr_matrix, K = ∫ ∇φi·∇φj
    mass : (n_dofs, n_dofs) scipy.sparse.csr_matrix, M = ∫ φi φj
    dofs : DofMap
        The DOF numbering (``dofs.points`` are the DOF coordinates,
        ``dofs.cell_dofs`` the cell-to-DOF map).
    """

    stiffness: sp.csr_matrix
    mass: sp.csr_matrix
    dofs: DofMap

    @property
    def K(self) -> sp.csr_matrix:
        return self.stiffness

    @property
    def M(self) -> sp.csr_matrix:
        return self.mass

    @property
    def n_dofs(self) -> int:
        return self.dofs.n_dofs

    @property
    def order(self) -> int:
        return self.dofs.order


@lru_cache(maxsize=None)
def _reference_matrices(cell: CellType, order: int):
    """Exact reference integrals: Kref (d, d, nb, nb) and Mref (nb, nb)."""
    el = reference_element(cell, order)
    xi, w = quadrature(cell.dim, 2 * order)
    phi = el.values(xi)  # (Q, nb)
    dphi = el.gradients(xi)  # (Q, nb, d)
    kref = np.einsum("q,qia,qjb->abij", w, dphi, dphi)
    mref = np.einsum("q,qi,qj->ij", w, phi, phi)
    return kref, mref


def _affine(X: np.ndarray):
    """Jacobians of affine simplices.

    X : (E, d+1, d) vertex coordinates. Returns J (E, d, d), det (E,).
    """
    J = np.transpose(X[:, 1:, :] - X[:, :1, :], (0, 2, 1))
    return J, _det(J)


def _det(J: np.ndarray) -> np.ndarray:
    """Determinants of (E, d, d) matrices, d <= 3, by explicit formulas."""
    d = J.shape[-1]
    if d == 1:
        return J[..., 0, 0].copy()
    if d == 2:
        return J[..., 0, 0] * J[..., 1, 1] - J[..., 0, 1] * J[..., 1, 0]
    return (J[..., 0, 0] * (J[..., 1, 1] * J[..., 2, 2] - J[..., 1, 2] * J[..., 2, 1])
            - J[..., 0, 1] * (J[..., 1, 0] * J[..., 2, 2] - J[..., 1, 2] * J[..., 2, 0])
            + J[..., 0, 2] * (J[..., 1, 0] * J[..., 2, 1] - J[..., 1, 1] * J[..., 2, 0]))


def _curved_cells(mesh: Mesh) -> np.ndarray:
    """Boolean (n_cells,) mask of cells whose mid-edge nodes leave the straight edges."""
    if mesh.geometry_order == 1:
        return np.zeros(mesh.n_cells, dtype=bool)
    from .elements import EDGES

    d = mesh.dim
    e = EDGES[mesh.cell_type]
    P = mesh.points
    va, vb = P[mesh.cells[:, e[:, 0]]], P[mesh.cells[:, e[:, 1]]]
    mid = P[mesh.cells[:, d + 1 :]]
    dev = np.linalg.norm(mid - 0.5 * (va + vb), axis=2).max(axis=1)
    size = np.linalg.norm(vb - va, axis=2).max(axis=1)
    return dev > 1e-10 * size


def _local_affine(mesh: Mesh, order: int, sel):
    """Upper-triangle entries (E, nb(nb+1)/2) of local K and M for straight cells ``sel``.

    Works on the Jacobian's entries as contiguous (E,) arrays (explicit
    cofactors), then one (E, d²) x (d², n_entries) matrix product with the
    exact reference integrals.
    """
    d = mesh.dim
    kref, mref = _reference_matrices(mesh.cell_type, order)
    iu, ju = np.triu_indices(mref.shape[0])
    cells = mesh.cells[sel, : d + 1]
    P = mesh.points
    x0 = P[cells[:, 0]]
    # columns of J: J[:, i, a] = x_{a+1, i} - x_{0, i}
    col = [P[cells[:, a + 1]] - x0 for a in range(d)]
    J = [[np.ascontiguousarray(col[a][:, i]) for a in range(d)] for i in range(d)]
    if d == 1:
        det = J[0][0]
        adj = [[np.ones_like(det)]]
    elif d == 2:
        det = J[0][0] * J[1][1] - J[0][1] * J[1][0]
        adj = [[J[1][1], -J[0][1]], [-J[1][0], J[0][0]]]
    else:
        adj = [[None] * 3 for _ in range(3)]
        for a in range(3):  # cofactors: loops over matrix positions, not cells
            for b in range(3):
                r = [k for k in range(3) if k != b]
                c = [k for k in range(3) if k != a]
                adj[a][b] = (-1) ** (a + b) * (J[r[0]][c[0]] * J[r[1]][c[1]]
                                               - J[r[0]][c[1]] * J[r[1]][c[0]])
        det = J[0][0] * adj[0][0] + J[0][1] * adj[1][0] + J[0][2] * adj[2][0]
    adet = np.abs(det)
    Me = adet[:, None] * mref[iu, ju][None, :]
    if order == 1:
        # P1: ∇φ_{a+1} = row a of J⁻¹ = adj[a]/det, ∇φ_0 = -Σ_a ∇φ_{a+1};
        # K_ij = |det|/d! ∇φ_i·∇φ_j = (adj_i · adj_j) / (d! |det|)
        rows = [[-sum(adj[a][i] for a in range(d)) for i in range(d)]]
        rows += [[adj[a][i] for i in range(d)] for a in range(d)]
        scale = 1.0 / (math.factorial(d) * adet)
        Ke = np.empty((len(adet), iu.size))
        for k, (p, q) in enumerate(zip(iu, ju)):  # loop over local pairs, not cells
            Ke[:, k] = sum(rows[p][i] * rows[q][i] for i in range(d)) * scale
        return Ke, Me
    # G = |det| J⁻¹ J⁻ᵀ = adj adjᵀ / |det|, adj = det J⁻¹
    G = np.empty((len(adet), d, d))
    for a in range(d):
        for b in range(a, d):
            g = sum(adj[a][i] * adj[b][i] for i in range(d)) / adet
            G[:, a, b] = g
            G[:, b, a] = g
    Ke = G.reshape(-1, d * d) @ kref[:, :, iu, ju].reshape(d * d, iu.size)
    return Ke, Me


def _local_curved(mesh: Mesh, order: int, sel: np.ndarray):
    """Upper-triangle entries of local K and M for curved P2-geometry cells ``sel``."""
    d = mesh.dim
    el = reference_element(mesh.cell_type, order)
    geo = reference_element(mesh.cell_type, 2)
    xi, w = quadrature(d, 2 * order + 2)
    X = mesh.points[mesh.cells[sel], :d]  # (E, ng, d)
    dN = geo.gradients(xi)  # (Q, ng, d)
    J = np.einsum("eki,qka->eqia", X, dN)  # (E, Q, d, d)
    det = np.linalg.det(J)
    inv = np.linalg.inv(J)  # (E, Q, a, i)
    grad = np.einsum("qja,eqai->eqji", el.gradients(xi), inv)  # (E, Q, nb, d)
    wdet = np.abs(det) * w[None, :]
    iu, ju = np.triu_indices(el.n_basis)
    Ke = np.einsum("eq,eqkd,eqkd->ek", wdet, grad[:, :, iu, :], grad[:, :, ju, :])
    phi = el.values(xi)
    Me = wdet @ (phi[:, iu] * phi[:, ju])
    return Ke, Me


def _csr(cell_dofs: np.ndarray, n: int, *blocks: np.ndarray):
    """Sum symmetric local matrices into CSR matrices sharing one pattern.

    ``blocks`` hold the upper-triangle entries (E, nb(nb+1)/2) of each local
    matrix, in ``numpy.triu_indices(nb)`` order.  Diagonal entries are summed
    per DOF with ``bincount`` (linear time); only the strict upper triangle
    goes through one COO→CSR conversion (two matrices packed as one complex
    array), then A = U + Uᵀ + D.  That conversion and its index sort dominate
    assembly time, so it gets as few entries as possible.
    """
    E, nb = cell_dofs.shape
    iu, ju = np.triu_indices(nb)
    off = iu != ju
    idx = cell_dofs.astype(np.int32 if n < 2**31 - 1 else np.int64)
    r, c = idx[:, iu[off]], idx[:, ju[off]]
    lo, hi = np.minimum(r, c).ravel(), np.maximum(r, c).ravel()
    del r, c
    # diagonal entries summed by bincount (linear time), off-diagonal ones by
    # one COO→CSR conversion of the strict upper triangle
    dpos = np.flatnonzero(~off)
    didx = cell_dofs.ravel()  # local diagonal k belongs to local DOF k, in order
    diags = [np.bincount(didx, weights=np.asarray(b)[:, dpos].ravel(), minlength=n)
             for b in blocks]
    if len(blocks) == 2:
        data = np.empty((E, int(off.sum())), dtype=np.complex128)
        data.real = blocks[0][:, off]
        data.imag = blocks[1][:, off]
        dvals = diags[0] + 1j * diags[1]
    else:
        data = np.asarray(blocks[0], dtype=float)[:, off]
        dvals = diags[0]
    U = sp.coo_matrix((data.ravel(), (lo, hi)), shape=(n, n)).tocsr()
    del data, lo, hi
    A = (U + U.T + sp.diags_array(dvals, format="csr")).tocsr()
    A.sort_indices()  # a no-op when the sum is already canonical
    if len(blocks) == 2:
        a = sp.csr_matrix((A.data.real.copy(), A.indices, A.indptr), shape=(n, n))
        b = sp.csr_matrix((A.data.imag.copy(), A.indices, A.indptr), shape=(n, n))
        return a, b
    return (A,)


def _local_matrices(mesh: Mesh, order: int):
    curved = _curved_cells(mesh)
    if not curved.any():
        return _local_affine(mesh, order, slice(None))
    nb = reference_element(mesh.cell_type, order).n_basis
    Ke = np.empty((mesh.n_cells, nb * (nb + 1) // 2))
    Me = np.empty_like(Ke)
    straight = np.flatnonzero(~curved)
    bent = np.flatnonzero(curved)
    if straight.size:
        Ke[straight], Me[straight] = _local_affine(mesh, order, straight)
    Ke[bent], Me[bent] = _local_curved(mesh, order, bent)
    return Ke, Me


def assemble(mesh: Mesh, order: int = 2) -> Assembly:
    """Assemble the stiffness and mass matrices of the Helmholtz problem.

    Parameters
    ----------
    mesh : Mesh
    order : int
        Lagrange element order, 1 or 2.  Order 2 on a first-order mesh adds
        the edge DOFs at the straight midpoints; on a second-order mesh the
        cells are isoparametric (curved).

    Returns
    -------
    Assembly
        ``stiffness`` and ``mass`` as (n_dofs, n_dofs) CSR matrices and the
        ``dofs`` map; ``dofs.points`` is (n_dofs, 3).
    """
    dofs = DofMap(mesh, order)
    Ke, Me = _local_matrices(mesh, order)
    K, M = _csr(dofs.cell_dofs, dofs.n_dofs, Ke, Me)
    return Assembly(K, M, dofs)


# ------------------------------------------------------------ boundary forms
def _facet_geometry(mesh: Mesh, name: str, order: int):
    """Values of the facet basis and measure weights at quadrature points.

    Returns phi (Q, nbf), wdet (F, Q) with wdet = w_q * |surface Jacobian|.
    """
    f = mesh.boundaries[name]
    fct = mesh.cell_type.facet
    D = mesh.dim
    if fct is None:  # 1D: facets are points; the "integral" is evaluation
        return np.ones((1, 1)), np.ones((len(f), 1))
    d = fct.dim
    geo_order = mesh.geometry_order
    xi, w = quadrature(d, 2 * order + (2 if geo_order == 2 else 0))
    geo = reference_element(fct, geo_order)
    X = mesh.points[f, :D]  # (F, ng, D)
    J = np.einsum("eki,qka->eqia", X, geo.gradients(xi))  # (F, Q, D, d)
    JtJ = np.einsum("eqia,eqib->eqab", J, J)
    meas = np.sqrt(np.abs(np.linalg.det(JtJ))) if d > 1 else np.sqrt(JtJ[..., 0, 0])
    phi = reference_element(fct, order).values(xi)
    return phi, meas * w[None, :]


def boundary_mass(dofs: DofMap, names) -> sp.csr_matrix:
    """Boundary mass matrix B = ∫ φi φj dS over the named boundary regions.

    Parameters
    ----------
    dofs : DofMap
    names : str or sequence of str

    Returns
    -------
    (n_dofs, n_dofs) CSR matrix.
    """
    mesh = dofs.mesh
    if isinstance(names, str):
        names = [names]
    n = dofs.n_dofs
    total = sp.csr_matrix((n, n))
    for name in names:  # a loop over regions, each vectorised over facets
        fd = dofs.facet_dofs(name)
        if fd.size == 0:
            continue
        phi, wdet = _facet_geometry(mesh, name, dofs.order)
        iu, ju = np.triu_indices(phi.shape[1])
        Be = wdet @ (phi[:, iu] * phi[:, ju])
        total = total + _csr(fd, n, Be)[0]
    return total.tocsr()


def cell_measures(mesh: Mesh) -> np.ndarray:
    """(n_cells,) length, area or volume of each cell (curved cells by quadrature)."""
    d = mesh.dim
    X = mesh.points[mesh.vertices, :d]
    _, det = _affine(X)
    ref = 1.0 / np.prod(np.arange(1, d + 1))
    out = np.abs(det) * ref
    curved = _curved_cells(mesh)
    if curved.any():
        xi, w = quadrature(d, 6)
        geo = reference_element(mesh.cell_type, 2)
        Xc = mesh.points[mesh.cells[curved], :d]
        J = np.einsum("eki,qka->eqia", Xc, geo.gradients(xi))
        out[curved] = np.abs(np.linalg.det(J)) @ w
    return out


def facet_measures(mesh: Mesh, name: str) -> np.ndarray:
    """(n_facets,) area (3D), length (2D) or 1 (1D) of each facet of a boundary region."""
    _, wdet = _facet_geometry(mesh, name, 2)
    return wdet.sum(axis=1)
