"""Degrees of freedom of Lagrange P1/P2 spaces on a mesh."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .elements import EDGES, CellType, reference_element
from .mesh import Mesh, _freeze

__all__ = ["DofMap"]


@dataclass(frozen=True, eq=False)
class DofMap:
    """Numbering of the degrees of freedom of the order-``order`` space.

    P1 DOFs sit at the cell vertices; P2 adds one DOF per edge, at the
    mid-edge node (on the curved geometry for a second-order mesh).  P2 on a
    first-order mesh creates the edge DOFs at the straight midpoints.
    Vertex DOFs are numbered first (in node order), then edge DOFs (in edge
    order).

    Attributes
    ----------
    mesh : Mesh
    order : int
    cell_dofs : (n_cells, n_basis) int array
        DOFs of each cell in the local order of :mod:`acoustic_fem.elements`.
    points : (n_dofs, 3) float array
        Coordinates of the DOFs.
    """

    mesh: Mesh
    order: int

    def __post_init__(self) -> None:
        reference_element(self.mesh.cell_type, self.order)  # validates order

    @cached_property
    def _vertex_numbering(self):
        used = np.zeros(self.mesh.n_points, dtype=bool)
        used[self.mesh.vertices.ravel()] = True
        nodes = np.flatnonzero(used)
        dof_of_node = np.full(self.mesh.n_points, -1, dtype=np.int64)
        dof_of_node[nodes] = np.arange(nodes.size)
        return nodes, dof_of_node

    @property
    def n_vertex_dofs(self) -> int:
        return int(self._vertex_numbering[0].size)

    @property
    def n_dofs(self) -> int:
        n = self.n_vertex_dofs
        return n + (len(self.mesh.edges) if self.order == 2 else 0)

    @cached_property
    def cell_dofs(self) -> np.ndarray:
        _, dof_of_node = self._vertex_numbering
        vd = dof_of_node[self.mesh.vertices]
        if self.order == 1:
            return _freeze(vd)
        return _freeze(np.hstack([vd, self.n_vertex_dofs + self.mesh.cell_edges]))

    @cached_property
    def points(self) -> np.ndarray:
        nodes, _ = self._vertex_numbering
        p = self.mesh.points[nodes]
        if self.order == 2:
            p = np.vstack([p, self.mesh.edge_nodes])
        return _freeze(p)

    def facet_dofs(self, name: str) -> np.ndarray:
        """DOFs of the facets of boundary region ``name``.

        Returns
        -------
        (n_facets, n_facet_basis) int array, in the local order of the
        facet's reference element (vertices, then edges).
        """
        if name not in self.mesh.boundaries:
            raise self.mesh._unknown(name)
        f = self.mesh.boundaries[name]
        _, dof_of_node = self._vertex_numbering
        nv = self.mesh.dim  # vertices per facet
        vd = dof_of_node[f[:, :nv]]
        if self.order == 1 or self.mesh.cell_type is CellType.LINE:
            return vd
        loc = EDGES[self.mesh.cell_type.facet]
        pairs = f[:, :nv][:, loc].reshape(-1, 2)
        ed = self.mesh.edge_index(pairs).reshape(len(f), len(loc))
        return np.hstack([vd, self.n_vertex_dofs + ed])

    def boundary_dofs(self, names) -> np.ndarray:
        """Sorted unique DOFs on the named boundary regions: (n,) int array."""
        if isinstance(names, str):
            names = [names]
        parts = [self.facet_dofs(n).ravel() for n in names]
        if not parts:
            return np.zeros(0, dtype=np.int64)
        return np.unique(np.concatenate(parts))
