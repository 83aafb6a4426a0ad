"""Uniform (red) refinement of simplicial meshes: :func:`refine_uniform`.

Every segment splits into 2, every triangle into 4 and every tetrahedron
into 8 children by joining edge midpoints (Bey, "Tetrahedral grid
refinement", Computing 55, 1995; the inner octahedron is cut along its
shortest diagonal; from memory).  Named boundary facets and volume regions
follow their parents.

Second-order (curved) meshes: the parent's mid-edge nodes become vertices of
the children, and the children's new mid-edge nodes are placed by the
parent's isoparametric P2 map, so the refined mesh keeps the curved geometry
exactly as the parent described it (no straight-edge midpoints on a curved
wall).
"""

from __future__ import annotations

import numpy as np

from ._keys import row_keys
from .elements import EDGES, CellType, reference_element
from .mesh import Mesh

__all__ = ["refine_uniform"]

# Children as local node numbers of the parent's P2 node list (vertices, then
# the mid-edge nodes in EDGES order).
_LINE_CHILDREN = np.array([[0, 2], [2, 1]])
_TRI_CHILDREN = np.array([[0, 3, 5], [3, 1, 4], [5, 4, 2], [3, 4, 5]])
# tetrahedron: mid-edge nodes 4:(0,1) 5:(1,2) 6:(0,2) 7:(0,3) 8:(1,3) 9:(2,3)
_TET_CORNERS = np.array([[0, 4, 6, 7], [4, 1, 5, 8], [6, 5, 2, 9], [7, 8, 9, 3]])
# inner octahedron, for each of its three diagonals (m01-m23, m02-m13, m03-m12)
# the four tetrahedra around it (the other four vertices taken around a cycle)
_TET_OCTA = {
    0: np.array([[4, 9, 5, 6], [4, 9, 6, 7], [4, 9, 7, 8], [4, 9, 8, 5]]),
    1: np.array([[6, 8, 4, 5], [6, 8, 5, 9], [6, 8, 9, 7], [6, 8, 7, 4]]),
    2: np.array([[7, 5, 4, 6], [7, 5, 6, 9], [7, 5, 9, 8], [7, 5, 8, 4]]),
}
_DIAGONALS = np.array([[4, 9], [6, 8], [7, 5]])
_CHILDREN = {CellType.LINE: _LINE_CHILDREN, CellType.TRIANGLE: _TRI_CHILDREN}


def _children(cell: CellType, nodes: np.ndarray, pts: np.ndarray) -> np.ndarray:
    """(E * n_children, d + 1) child cells from the parents' P2 node lists (E, n_p2)."""
    if cell is not CellType.TETRAHEDRON:
        ch = _CHILDREN[cell]
        return nodes[:, ch].reshape(-1, ch.shape[1])
    diag = np.linalg.norm(pts[nodes[:, _DIAGONALS[:, 0]]] - pts[nodes[:, _DIAGONALS[:, 1]]],
                          axis=2)
    best = np.argmin(diag, axis=1)
    out = np.empty((len(nodes), 8, 4), dtype=np.int64)
    out[:, :4] = nodes[:, _TET_CORNERS]
    for k, table in _TET_OCTA.items():  # three diagonal choices, each vectorised
        sel = best == k
        out[sel, 4:] = nodes[sel][:, table]
    return out.reshape(-1, 4)


def _facet_children(facet: CellType | None, nodes: np.ndarray) -> np.ndarray:
    if facet is None:
        return nodes
    ch = _CHILDREN[facet]
    return nodes[:, ch].reshape(-1, ch.shape[1])


def refine_uniform(mesh: Mesh) -> Mesh:
    """Red refinement of every cell: 2, 4 or 8 children per segment, triangle, tetrahedron.

    Parameters
    ----------
    mesh : Mesh
        First- or second-order mesh.

    Returns
    -------
    Mesh
        Same geometry order, 2^dim times the cells, mesh size halved; the
        named boundary and volume regions carry over.  For a second-order
        mesh the new mid-edge nodes lie on the parent's curved P2 map.
    """
    ct = mesh.cell_type
    d = ct.dim
    pts = mesh.points
    n0 = mesh.n_points
    if mesh.geometry_order == 1:
        # P2 node lists of the parents: the new vertices are the edge midpoints
        nodes = np.hstack([mesh.vertices, n0 + mesh.cell_edges])
        pts1 = np.vstack([pts, mesh.edge_nodes])
    else:
        nodes = mesh.cells
        pts1 = pts
    n_children = 2**d
    cells = _children(ct, nodes, pts1)
    volumes = {k: (n_children * v[:, None] + np.arange(n_children)).ravel()
               for k, v in mesh.volumes.items()}

    def facet_nodes(f):
        if ct is CellType.LINE:
            return f[:, :1]
        if mesh.geometry_order == 2:
            return f
        loc = EDGES[ct.facet]
        return np.hstack([f, n0 + mesh.edge_index(f[:, loc].reshape(-1, 2)).reshape(len(f), -1)])

    boundaries = {k: _facet_children(ct.facet, facet_nodes(f)) for k, f in mesh.boundaries.items()}
    if mesh.geometry_order == 1:
        return Mesh(pts1, cells, ct, 1, boundaries=boundaries, volumes=volumes)

    # second order: mid-edge nodes of the children from the parents' P2 maps
    geo = reference_element(ct, 2)
    ref = geo.nodes  # (n_p2, d) reference coordinates of the parent's nodes
    e = EDGES[ct]
    if ct is CellType.TETRAHEDRON:
        # every possible child edge: pairs of parent nodes used by any of the layouts
        tables = [_TET_CORNERS] + list(_TET_OCTA.values())
        pairs = np.unique(np.sort(np.vstack([t[:, e].reshape(-1, 2) for t in tables]), axis=1),
                          axis=0)
    else:
        pairs = np.unique(np.sort(_CHILDREN[ct][:, e].reshape(-1, 2), axis=1), axis=0)
    xi_mid = 0.5 * (ref[pairs[:, 0]] + ref[pairs[:, 1]])  # (P, d)
    N = geo.values(xi_mid)  # (P, n_p2)
    X = np.einsum("pk,ekc->epc", N, pts[mesh.cells])  # (E, P, 3)
    gpairs = mesh.cells[:, pairs]  # (E, P, 2) global node pairs
    keys = row_keys(gpairs.reshape(-1, 2), n0)
    # only the edges of the children made (each cell uses one octahedron
    # diagonal of three), each once
    ukeys = np.unique(row_keys(cells[:, e].reshape(-1, 2), n0))
    o = np.argsort(keys, kind="stable")
    first = o[np.searchsorted(keys[o], ukeys)]
    mid_pts = X.reshape(-1, 3)[first]
    all_pts = np.vstack([pts, mid_pts])

    def mids(c):  # (m, nv) vertex nodes -> (m, n_edges) mid-node numbers
        k = row_keys(c[:, e].reshape(-1, 2), n0)
        return n0 + np.searchsorted(ukeys, k).reshape(len(c), -1)

    cells2 = np.hstack([cells, mids(cells)])
    b2 = {}
    for name, f in boundaries.items():  # a loop over regions
        if ct is CellType.LINE:
            b2[name] = f
            continue
        fe = EDGES[ct.facet]
        k = row_keys(f[:, fe].reshape(-1, 2), n0)
        b2[name] = np.hstack([f, n0 + np.searchsorted(ukeys, k).reshape(len(f), -1)])
    return Mesh(all_pts, cells2, ct, 2, boundaries=b2, volumes=volumes)
