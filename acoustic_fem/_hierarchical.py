"""Hierarchical enrichment of the Lagrange space P(p) by its complement in P(p+1).

Used by :mod:`acoustic_fem.estimate`.  The enriched space is V ⊕ W with V the
usual Lagrange P1 / P2 space of :mod:`acoustic_fem.dofs` and W a hierarchical
complement (Bank & Smith, "A posteriori error estimates based on hierarchical
bases", SIAM J. Numer. Anal. 30(4), 1993; Zienkiewicz, Gago & Kelly, "The
hierarchical concept in finite element analysis", Computers & Structures 16,
1983 — both from memory):

* P1 → P2: one quadratic edge bubble λ_a λ_b per edge.
* P2 → P3: one cubic per edge, λ_a λ_b (λ_a − λ_b) with a < b by global
  vertex number (so that the cells sharing the edge agree on its sign), and
  one cubic bubble λ_a λ_b λ_c per triangular face (3D: every face of the
  mesh; 2D: every cell; 1D: no face functions).

V ⊕ W spans P(p+1) on every cell exactly (dimension check: tet 10 + 6 + 4 =
20, triangle 6 + 3 + 1 = 10, line 3 + 1 = 4).  Curved (isoparametric P2)
cells map W through the same P2 geometry as V.

The assembled matrices are those of the whole enriched space with DOFs
numbered V first (as :class:`~acoustic_fem.dofs.DofMap`), then W; callers
slice the blocks they need.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property, lru_cache

import numpy as np

from ._keys import row_keys
from .assembly import _csr, _curved_cells
from .dofs import DofMap
from .elements import EDGES, CellType, reference_element
from .quadrature import quadrature

__all__ = ["Enrichment", "enrich"]

#: Curved cells integrated per batch (bounds the (cells x points x basis) arrays).
_CHUNK = 2048

#: Local faces (vertex triples) of a tetrahedron used for the face bubbles.
_TET_FACES = np.array([[0, 1, 2], [0, 1, 3], [0, 2, 3], [1, 2, 3]])


def _bary(xi: np.ndarray):
    """(Q, d) reference points -> barycentric (Q, d+1) and their constant gradients (d+1, d)."""
    d = xi.shape[1]
    lam = np.column_stack([1.0 - xi.sum(axis=1), xi])
    dlam = np.vstack([-np.ones(d), np.eye(d)])
    return lam, dlam


def _n_faces_local(cell: CellType, order: int) -> int:
    if order == 1 or cell is CellType.LINE:
        return 0
    return 1 if cell is CellType.TRIANGLE else 4


def _w_values(cell: CellType, order: int, xi: np.ndarray):
    """Values (Q, nw) and reference gradients (Q, nw, d) of the unsigned W functions.

    Edge functions use the local orientation (a, b) of EDGES; the sign that
    makes them global is applied per cell by the caller.
    """
    lam, dlam = _bary(np.asarray(xi, dtype=float))
    e = EDGES[cell]
    la, lb = lam[:, e[:, 0]], lam[:, e[:, 1]]  # (Q, ne)
    ga, gb = dlam[e[:, 0]], dlam[e[:, 1]]  # (ne, d)
    if order == 1:
        val = la * lb
        grad = la[:, :, None] * gb[None] + lb[:, :, None] * ga[None]
    else:
        val = la * lb * (la - lb)
        # d/dx [a^2 b - a b^2] = (2ab - b^2) ∇a + (a^2 - 2ab) ∇b
        grad = ((2 * la * lb - lb**2)[:, :, None] * ga[None]
                + (la**2 - 2 * la * lb)[:, :, None] * gb[None])
    nf = _n_faces_local(cell, order)
    if nf:
        f = _TET_FACES if cell is CellType.TETRAHEDRON else np.array([[0, 1, 2]])
        l0, l1, l2 = lam[:, f[:, 0]], lam[:, f[:, 1]], lam[:, f[:, 2]]
        g0, g1, g2 = dlam[f[:, 0]], dlam[f[:, 1]], dlam[f[:, 2]]
        fval = l0 * l1 * l2
        fgrad = ((l1 * l2)[:, :, None] * g0[None] + (l0 * l2)[:, :, None] * g1[None]
                 + (l0 * l1)[:, :, None] * g2[None])
        val = np.hstack([val, fval])
        grad = np.concatenate([grad, fgrad], axis=1)
    return val, grad


def _enriched_basis(cell: CellType, order: int, xi: np.ndarray):
    """Values (Q, nb) and gradients (Q, nb, d) of the V basis followed by the W basis."""
    el = reference_element(cell, order)
    wv, wg = _w_values(cell, order, xi)
    return np.hstack([el.values(xi), wv]), np.concatenate([el.gradients(xi), wg], axis=1)


@lru_cache(maxsize=None)
def _reference_matrices(cell: CellType, order: int):
    """Exact reference integrals of the enriched basis: Kref (d, d, nb, nb), Mref (nb, nb)."""
    xi, w = quadrature(cell.dim, 2 * (order + 1))
    phi, dphi = _enriched_basis(cell, order, xi)
    kref = np.einsum("q,qia,qjb->abij", w, dphi, dphi)
    mref = np.einsum("q,qi,qj->ij", w, phi, phi)
    return kref, mref


@dataclass(frozen=True, eq=False)
class Enrichment:
    """The enriched space V ⊕ W of a DofMap and its assembled matrices.

    Attributes
    ----------
    dofs : DofMap
        The space V (P1 or P2).
    n_w : int
        Number of W functions (edges, then faces for P2).
    cell_w : (n_cells, nw_local) int array
        W numbers (0-based within W) of each cell's W functions.
    signs : (n_cells, nw_local) float array
        +1/-1 orientation of each local W function (edge cubics), else +1.
    """

    dofs: DofMap

    @property
    def mesh(self):
        return self.dofs.mesh

    @property
    def order(self) -> int:
        return self.dofs.order

    @cached_property
    def _faces(self):
        """(cell face numbers (E, nf), unique face keys sorted, n_faces)."""
        mesh = self.mesh
        nf = _n_faces_local(mesh.cell_type, self.order)
        if nf == 0:
            return np.zeros((mesh.n_cells, 0), dtype=np.int64), np.zeros(0, np.int64), 0
        if mesh.cell_type is CellType.TRIANGLE:
            return (np.arange(mesh.n_cells)[:, None], None, mesh.n_cells)
        tri = mesh.vertices[:, _TET_FACES].reshape(-1, 3)
        keys = row_keys(tri, mesh.n_points)
        ukeys, inv = np.unique(keys, return_inverse=True)
        return inv.reshape(mesh.n_cells, 4), ukeys, len(ukeys)

    @property
    def n_edges(self) -> int:
        return len(self.mesh.edges)

    @property
    def n_w(self) -> int:
        return self.n_edges + self._faces[2]

    @cached_property
    def cell_w(self) -> np.ndarray:
        return np.hstack([self.mesh.cell_edges, self.n_edges + self._faces[0]])

    @cached_property
    def signs(self) -> np.ndarray:
        mesh = self.mesh
        e = EDGES[mesh.cell_type]
        v = mesh.vertices
        s = np.where(v[:, e[:, 0]] < v[:, e[:, 1]], 1.0, -1.0)
        if self.order == 1:
            s = np.ones_like(s)  # edge bubbles are symmetric
        nf = self._faces[0].shape[1]
        return np.hstack([s, np.ones((mesh.n_cells, nf))])

    def boundary_w(self, names) -> np.ndarray:
        """Sorted W numbers of the functions that do not vanish on the named surfaces.

        Parameters
        ----------
        names : sequence of str

        Returns
        -------
        (k,) int array
        """
        mesh = self.mesh
        out = []
        nv = mesh.dim
        for name in names:  # a loop over regions
            f = mesh.boundaries[name][:, :nv]
            if f.size == 0 or mesh.cell_type is CellType.LINE:
                continue  # 1D: W functions vanish at the end points
            loc = EDGES[mesh.cell_type.facet]
            out.append(mesh.edge_index(f[:, loc].reshape(-1, 2)))
            if self.order == 2 and mesh.cell_type is CellType.TETRAHEDRON:
                _, ukeys, _ = self._faces
                pos = np.searchsorted(ukeys, row_keys(f, mesh.n_points))
                out.append(self.n_edges + pos)
        if not out:
            return np.zeros(0, dtype=np.int64)
        return np.unique(np.concatenate(out))

    @cached_property
    def cell_dofs(self) -> np.ndarray:
        """(n_cells, nb) enriched DOFs of each cell: V DOFs, then n_V + W numbers."""
        return np.hstack([self.dofs.cell_dofs, self.dofs.n_dofs + self.cell_w])

    def local_matrices(self):
        """Upper-triangle local entries (E, nb(nb+1)/2) of K and M in the enriched basis."""
        mesh, order = self.mesh, self.order
        curved = _curved_cells(mesh)
        kref, mref = _reference_matrices(mesh.cell_type, order)
        nb = mref.shape[0]
        iu, ju = np.triu_indices(nb)
        Ke = np.empty((mesh.n_cells, iu.size))
        Me = np.empty_like(Ke)
        straight = np.flatnonzero(~curved)
        bent = np.flatnonzero(curved)
        d = mesh.dim
        if straight.size:
            X = mesh.points[mesh.cells[straight, : d + 1], :d]
            J = np.transpose(X[:, 1:, :] - X[:, :1, :], (0, 2, 1))  # (E, i, a)
            det = np.linalg.det(J)
            inv = np.linalg.inv(J)  # (E, a, i)
            adet = np.abs(det)
            G = np.einsum("eai,ebi->eab", inv, inv) * adet[:, None, None]
            Ke[straight] = G.reshape(-1, d * d) @ kref[:, :, iu, ju].reshape(d * d, iu.size)
            Me[straight] = adet[:, None] * mref[iu, ju][None, :]
        if bent.size:
            geo = reference_element(mesh.cell_type, 2)
            xi, w = quadrature(d, 2 * (order + 1) + 2)
            phi, dphi = _enriched_basis(mesh.cell_type, order, xi)
            dN = geo.gradients(xi)
            mm = phi[:, iu] * phi[:, ju]
            for start in range(0, bent.size, _CHUNK):  # chunks bound the memory
                sel = bent[start:start + _CHUNK]
                Xc = mesh.points[mesh.cells[sel], :d]
                J = np.einsum("eki,qka->eqia", Xc, dN)
                det = np.linalg.det(J)
                inv = np.linalg.inv(J)
                wdet = np.abs(det) * w[None, :]
                # physical gradients weighted by sqrt(w |det|): (E, nb, Q·d), then
                # one batched matrix product per cell gives the local stiffness
                grad = np.einsum("qja,eqai->ejqi", dphi,
                                 inv * np.sqrt(wdet)[:, :, None, None], optimize=True)
                grad = grad.reshape(len(sel), nb, -1)
                Ke[sel] = (grad @ grad.transpose(0, 2, 1))[:, iu, ju]
                Me[sel] = wdet @ mm
        # orientation of the edge cubics: entry (i, j) scales by s_i s_j
        nvb = self.dofs.cell_dofs.shape[1]
        s = np.hstack([np.ones((mesh.n_cells, nvb)), self.signs])
        if order == 2:
            sij = s[:, iu] * s[:, ju]
            Ke *= sij
            Me *= sij
        return Ke, Me

    def boundary_mass(self, names):
        """Enriched boundary mass B = ∫_S φ_i φ_j dS over the named surfaces.

        The traces of the W functions on a boundary facet are the W functions
        of the facet itself (edge functions of its edges, for P2 on
        tetrahedra also the face bubble), with the same global orientation;
        the others vanish there.  Curved facets are integrated through their
        P2 geometry, as in :func:`acoustic_fem.assembly.boundary_mass`.

        Parameters
        ----------
        names : sequence of str

        Returns
        -------
        (n, n) csr_matrix, n = dofs.n_dofs + n_w (V first, then W).
        """
        import scipy.sparse as sp

        from .assembly import boundary_mass as _bm

        mesh, order = self.mesh, self.order
        nv = self.dofs.n_dofs
        n = nv + self.n_w
        total = sp.csr_matrix((n, n))
        fct = mesh.cell_type.facet
        for name in names:  # a loop over regions, each vectorised over facets
            fd = self.dofs.facet_dofs(name)
            if fd.size == 0:
                continue
            if fct is None:  # 1D: the W functions vanish at the end points
                B = _bm(self.dofs, name).tocoo()
                total = total + sp.csr_matrix((B.data, (B.row, B.col)), shape=(n, n))
                continue
            f = mesh.boundaries[name]
            nf, nvf = len(f), mesh.dim  # facets, vertices per facet
            loc = EDGES[fct]
            fv = f[:, :nvf]
            w_num = [mesh.edge_index(fv[:, loc].reshape(-1, 2)).reshape(nf, len(loc))]
            sgn = [np.where(fv[:, loc[:, 0]] < fv[:, loc[:, 1]], 1.0, -1.0) if order == 2
                   else np.ones((nf, len(loc)))]
            if order == 2 and fct is CellType.TRIANGLE:  # face bubble of a tetrahedron face
                _, ukeys, _ = self._faces
                pos = np.searchsorted(ukeys, row_keys(fv, mesh.n_points))
                w_num.append(self.n_edges + pos[:, None])
                sgn.append(np.ones((nf, 1)))
            cd = np.hstack([fd, nv + np.hstack(w_num)])
            s = np.hstack([np.ones(fd.shape), *sgn])
            d, D = fct.dim, mesh.dim
            xi, w = quadrature(d, 2 * (order + 1) + (2 if mesh.geometry_order == 2 else 0))
            geo = reference_element(fct, mesh.geometry_order)
            X = mesh.points[f, :D]
            J = np.einsum("eki,qka->eqia", X, geo.gradients(xi))
            JtJ = np.einsum("eqia,eqib->eqab", J, J)
            meas = np.sqrt(np.abs(np.linalg.det(JtJ))) if d > 1 else np.sqrt(JtJ[..., 0, 0])
            phi = np.hstack([reference_element(fct, order).values(xi),
                             _w_values(fct, order, xi)[0]])
            iu, ju = np.triu_indices(phi.shape[1])
            Be = (meas * w[None, :]) @ (phi[:, iu] * phi[:, ju])
            Be *= s[:, iu] * s[:, ju]
            total = total + _csr(cd, n, Be)[0]
        return total.tocsr()

    def assemble(self):
        """Enriched stiffness and mass, (n_V + n_W) square CSR; also the local entries.

        Returns
        -------
        K, M : (n, n) csr_matrix with n = dofs.n_dofs + n_w
        Ke, Me : (n_cells, nb(nb+1)/2) local upper-triangle entries
        """
        Ke, Me = self.local_matrices()
        K, M = _csr(self.cell_dofs, self.dofs.n_dofs + self.n_w, Ke, Me)
        return K, M, Ke, Me


def enrich(dofs: DofMap) -> Enrichment:
    """The hierarchical enrichment of the space ``dofs`` (order p) to order p + 1."""
    return Enrichment(dofs)


def local_w_block(Ke: np.ndarray, nvb: int, nb: int) -> np.ndarray:
    """(E, nw, nw) symmetric W-W blocks of local matrices given as upper-triangle entries.

    Ke : (E, nb(nb+1)/2) entries in ``numpy.triu_indices(nb)`` order; the
    first ``nvb`` local functions are V's, the rest W's.
    """
    iu, ju = np.triu_indices(nb)
    sel = np.flatnonzero(iu >= nvb)  # W-W pairs (iu <= ju, so ju >= nvb too)
    nw = nb - nvb
    out = np.empty((Ke.shape[0], nw, nw))
    out[:, iu[sel] - nvb, ju[sel] - nvb] = Ke[:, sel]
    out[:, ju[sel] - nvb, iu[sel] - nvb] = Ke[:, sel]
    return out
