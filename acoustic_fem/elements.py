"""Lagrange P1 and P2 reference elements on lines, triangles and tetrahedra.

Local node order (the VTK/meshio order, which is also the order of gmsh's
``line3`` and ``triangle6``; meshio permutes gmsh's ``tetra10`` into it):

* line: vertices 0, 1; P2 adds the midpoint (edge 0-1).
* triangle: vertices 0, 1, 2; P2 adds the edges (0,1), (1,2), (0,2).
* tetrahedron: vertices 0..3; P2 adds the edges (0,1), (1,2), (0,2),
  (0,3), (1,3), (2,3).

Shape functions are written in barycentric coordinates λ_i:
P1: φ_i = λ_i; P2: φ_i = λ_i (2 λ_i - 1) at vertices and φ_ab = 4 λ_a λ_b
at the edge (a, b).
"""

from __future__ import annotations

import enum
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ._errors import InputError

__all__ = ["CellType", "ReferenceElement", "reference_element", "EDGES"]


class CellType(enum.Enum):
    """Simplex cell types of a mesh (the closed set this library supports)."""

    LINE = 1
    TRIANGLE = 2
    TETRAHEDRON = 3

    @property
    def dim(self) -> int:
        """Topological dimension of the cell."""
        return self.value

    @property
    def n_vertices(self) -> int:
        return self.value + 1

    @property
    def facet(self) -> "CellType | None":
        """Cell type of the facets (None for the vertex facets of a line)."""
        return None if self is CellType.LINE else CellType(self.value - 1)

    @classmethod
    def of_dim(cls, dim: int) -> "CellType":
        if dim not in (1, 2, 3):
            raise InputError(f"cell dimension {dim!r} must be 1, 2 or 3.")
        return cls(dim)


#: Local edges (pairs of local vertex numbers) in P2 node order.
EDGES = {
    CellType.LINE: np.array([[0, 1]]),
    CellType.TRIANGLE: np.array([[0, 1], [1, 2], [0, 2]]),
    CellType.TETRAHEDRON: np.array([[0, 1], [1, 2], [0, 2], [0, 3], [1, 3], [2, 3]]),
}

#: Local facets (tuples of local vertex numbers) of each cell type.
FACETS = {
    CellType.LINE: np.array([[0], [1]]),
    CellType.TRIANGLE: np.array([[0, 1], [1, 2], [2, 0]]),
    CellType.TETRAHEDRON: np.array([[0, 2, 1], [0, 1, 3], [1, 2, 3], [0, 3, 2]]),
}


def _barycentric(xi: np.ndarray) -> np.ndarray:
    """(n, dim) reference points -> (n, dim + 1) barycentric coordinates."""
    return np.column_stack([1.0 - xi.sum(axis=1), xi])


@dataclass(frozen=True)
class ReferenceElement:
    """Lagrange element of a given order on a reference simplex.

    Attributes
    ----------
    cell : CellType
    order : int
        1 or 2.
    n_basis : int
        Number of shape functions (dim+1 for P1; 3, 6, 10 for P2).
    nodes : (n_basis, dim) ndarray
        Reference coordinates of the nodes.
    """

    cell: CellType
    order: int

    @property
    def dim(self) -> int:
        return self.cell.dim

    @property
    def n_basis(self) -> int:
        nv = self.cell.n_vertices
        return nv if self.order == 1 else nv + len(EDGES[self.cell])

    @property
    def nodes(self) -> np.ndarray:
        verts = np.vstack([np.zeros(self.dim), np.eye(self.dim)])
        if self.order == 1:
            return verts
        e = EDGES[self.cell]
        return np.vstack([verts, 0.5 * (verts[e[:, 0]] + verts[e[:, 1]])])

    def values(self, xi: np.ndarray) -> np.ndarray:
        """Shape function values.

        Parameters
        ----------
        xi : (n_q, dim) reference points

        Returns
        -------
        (n_q, n_basis) ndarray
        """
        lam = _barycentric(np.asarray(xi, dtype=float))
        if self.order == 1:
            return lam
        e = EDGES[self.cell]
        return np.hstack([lam * (2.0 * lam - 1.0), 4.0 * lam[:, e[:, 0]] * lam[:, e[:, 1]]])

    def gradients(self, xi: np.ndarray) -> np.ndarray:
        """Reference gradients of the shape functions.

        Parameters
        ----------
        xi : (n_q, dim) reference points

        Returns
        -------
        (n_q, n_basis, dim) ndarray, d phi_i / d xi_a
        """
        xi = np.asarray(xi, dtype=float)
        d = self.dim
        # d lambda / d xi: (dim + 1, dim)
        dlam = np.vstack([-np.ones(d), np.eye(d)])
        nq = xi.shape[0]
        if self.order == 1:
            return np.broadcast_to(dlam, (nq, d + 1, d)).copy()
        lam = _barycentric(xi)
        gv = (4.0 * lam - 1.0)[:, :, None] * dlam[None, :, :]
        e = EDGES[self.cell]
        ge = 4.0 * (
            lam[:, e[:, 0], None] * dlam[None, e[:, 1], :]
            + lam[:, e[:, 1], None] * dlam[None, e[:, 0], :]
        )
        return np.concatenate([gv, ge], axis=1)


def reference_element(cell: CellType, order: int) -> ReferenceElement:
    """The Lagrange element of ``order`` (1 or 2) on ``cell``."""
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(
            f"element order {order!r} is not supported: use 1 (linear) or 2 (quadratic)."
        )
    return _element(CellType(cell), int(order))


@lru_cache(maxsize=None)
def _element(cell: CellType, order: int) -> ReferenceElement:
    return ReferenceElement(cell, order)
