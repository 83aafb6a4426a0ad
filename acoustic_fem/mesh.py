"""The mesh of an enclosure: simplicial cells with named regions.

A :class:`Mesh` is immutable.  Derived topology (edges, boundary facets,
cell measures) is computed once on first use and cached.  Methods that change
a mesh return a new one.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace
from functools import cached_property
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._errors import InputError, MeshError
from ._keys import row_keys
from .elements import EDGES, FACETS, CellType

__all__ = ["Mesh", "MeshWarning"]


class MeshWarning(UserWarning):
    """A mesh was usable but something in it was repaired or is suspicious."""


# Column permutations that swap local vertices 1 and 2 (reversing the
# orientation) for each cell type and geometry order.
_FLIP = {
    (CellType.LINE, 1): [1, 0],
    (CellType.LINE, 2): [1, 0, 2],
    (CellType.TRIANGLE, 1): [0, 2, 1],
    (CellType.TRIANGLE, 2): [0, 2, 1, 5, 4, 3],
    (CellType.TETRAHEDRON, 1): [0, 2, 1, 3],
    (CellType.TETRAHEDRON, 2): [0, 2, 1, 3, 6, 5, 4, 7, 9, 8],
}


def _nodes_per_cell(cell: CellType, order: int) -> int:
    return cell.n_vertices + (len(EDGES[cell]) if order == 2 else 0)


def _freeze(a: np.ndarray) -> np.ndarray:
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class Mesh:
    """Simplicial mesh of an enclosure with named boundary and volume regions.

    Parameters
    ----------
    points : (n_points, 3) float array
        Node coordinates, one node per row.  A 2D mesh lies in the plane
        z = const; a 1D mesh along the x axis.
    cells : (n_cells, n_nodes) int array
        Node numbers of each cell: the ``dim + 1`` vertices first, then (for
        second-order geometry) one node per edge in the order of
        :data:`acoustic_fem.elements.EDGES`.
    cell_type : CellType
        LINE (1D), TRIANGLE (2D) or TETRAHEDRON (3D).
    geometry_order : int
        1 for straight cells; 2 for curved (isoparametric) quadratic cells.
    boundaries : mapping str -> (n_facets, n_facet_nodes) int array
        Named boundary regions as facet connectivity (points in 1D, edges in
        2D, triangles in 3D), numbered like ``cells``.
    volumes : mapping str -> (n,) int array
        Named volume regions as cell indices.

    Notes
    -----
    Construction validates the mesh: indices in range, no degenerate cells,
    each boundary facet a facet on the boundary of the cells.  Cells of
    negative orientation are re-ordered (not an error).  Nodes that no cell
    uses are removed with a :class:`MeshWarning`.
    """

    points: np.ndarray
    cells: np.ndarray
    cell_type: CellType
    geometry_order: int = 1
    boundaries: Mapping[str, np.ndarray] = field(default_factory=dict)
    volumes: Mapping[str, np.ndarray] = field(default_factory=dict)

    # ------------------------------------------------------------------ checks
    def __post_init__(self) -> None:
        ct = CellType(self.cell_type)
        order = int(self.geometry_order)
        if order not in (1, 2):
            raise InputError(f"geometry_order {self.geometry_order!r} must be 1 or 2.")
        pts = np.asarray(self.points, dtype=float)
        if pts.ndim != 2 or pts.shape[1] != 3:
            raise MeshError(
                f"mesh points have shape {pts.shape}; expected (n_points, 3) rows of x, y, z."
            )
        if not np.all(np.isfinite(pts)):
            raise MeshError("mesh points contain NaN or infinite coordinates.")
        cells = np.asarray(self.cells)
        nn = _nodes_per_cell(ct, order)
        if cells.ndim != 2 or cells.shape[0] == 0:
            raise MeshError(
                f"the mesh has no {ct.name.lower()} cells (cells array of shape {cells.shape}): "
                "an empty mesh cannot be solved; check that the file holds the volume cells."
            )
        if cells.shape[1] != nn:
            raise MeshError(
                f"{ct.name.lower()} cells of geometry order {order} need {nn} nodes each, "
                f"got {cells.shape[1]}."
            )
        if not np.issubdtype(cells.dtype, np.integer):
            raise MeshError(f"cell node numbers must be integers, got dtype {cells.dtype}.")
        cells = cells.astype(np.int64)
        if cells.min() < 0 or cells.max() >= len(pts):
            raise MeshError(
                f"cell node numbers range over [{cells.min()}, {cells.max()}] but the mesh "
                f"has {len(pts)} points."
            )
        d = ct.dim
        if d < 3 and np.ptp(pts[:, 2]) > 1e-12 * max(np.ptp(pts), 1.0):
            raise MeshError(
                f"a {d}D mesh must lie in a plane z = const; z spans "
                f"[{pts[:, 2].min()}, {pts[:, 2].max()}]."
            )
        if d < 2 and np.ptp(pts[:, 1]) > 1e-12 * max(np.ptp(pts), 1.0):
            raise MeshError(
                f"a 1D mesh must lie along the x axis; y spans "
                f"[{pts[:, 1].min()}, {pts[:, 1].max()}]."
            )

        # orientation and degeneracy on the vertices (vectorised over cells)
        X = pts[cells[:, : d + 1], :d]
        from .assembly import _affine

        J, det = _affine(X)
        scale = np.linalg.norm(X[:, 1:, :] - X[:, :1, :], axis=2).max(axis=1)
        bad = np.abs(det) <= 1e-10 * scale**d
        if np.any(bad):
            idx = np.flatnonzero(bad)
            raise MeshError(
                f"{idx.size} degenerate {ct.name.lower()} cell(s) of zero measure, first "
                f"cell {idx[0]} with nodes {cells[idx[0], : d + 1].tolist()} "
                f"(measure {abs(det[idx[0]]):.3g} vs size {scale[idx[0]]:.3g}); remesh the geometry."
            )
        if order == 2:
            # each mid-edge node must lie near its own edge's midpoint; a far
            # one means the file's node order is not the one documented
            e = EDGES[ct]
            va = pts[cells[:, e[:, 0]]]
            vb = pts[cells[:, e[:, 1]]]
            mid = pts[cells[:, d + 1 :]]
            length = np.linalg.norm(vb - va, axis=2)
            off = np.linalg.norm(mid - 0.5 * (va + vb), axis=2) > 0.3 * length
            if np.any(off):
                c0 = int(np.flatnonzero(off.any(axis=1))[0])
                raise MeshError(
                    f"second-order cell {c0}: its mid-edge nodes do not sit on its edges "
                    "(unexpected node order or a badly curved cell); remesh or export with "
                    "first-order cells."
                )
        neg = det < 0
        if np.any(neg):
            cells = cells.copy()
            cells[neg] = cells[neg][:, _FLIP[(ct, order)]]

        boundaries = {str(k): np.asarray(v, dtype=np.int64) for k, v in dict(self.boundaries).items()}
        volumes = {str(k): np.asarray(v, dtype=np.int64).ravel() for k, v in dict(self.volumes).items()}
        nf = _nodes_per_cell(ct.facet, order) if ct.facet is not None else 1
        for name, f in boundaries.items():
            if f.ndim != 2 or f.shape[1] != nf:
                raise MeshError(
                    f"boundary region {name!r} has facet array of shape {f.shape}; "
                    f"expected (n_facets, {nf})."
                )
            if f.size and (f.min() < 0 or f.max() >= len(pts)):
                raise MeshError(f"boundary region {name!r} refers to nodes outside the mesh.")
        for name, v in volumes.items():
            if v.size and (v.min() < 0 or v.max() >= len(cells)):
                raise MeshError(f"volume region {name!r} refers to cells outside the mesh.")
        overlap = set(boundaries) & set(volumes)
        if overlap:
            raise MeshError(
                f"names {sorted(overlap)} are used for both a boundary and a volume region; "
                "give each region its own name."
            )

        # remove orphan nodes
        used = np.zeros(len(pts), dtype=bool)
        used[cells.ravel()] = True
        if not used.all():
            n_orphan = int((~used).sum())
            for name, f in boundaries.items():
                if f.size and not used[f].all():
                    raise MeshError(
                        f"boundary region {name!r} uses nodes that no cell uses: its facets "
                        "are not on the enclosure's cells."
                    )
            renum = np.cumsum(used) - 1
            pts = pts[used]
            cells = renum[cells]
            boundaries = {k: renum[f] for k, f in boundaries.items()}
            warnings.warn(
                f"removed {n_orphan} mesh node(s) that no cell uses.", MeshWarning, stacklevel=3
            )

        object.__setattr__(self, "cell_type", ct)
        object.__setattr__(self, "geometry_order", order)
        object.__setattr__(self, "points", _freeze(pts))
        object.__setattr__(self, "cells", _freeze(cells))
        object.__setattr__(self, "boundaries", MappingProxyType({k: _freeze(v) for k, v in boundaries.items()}))
        object.__setattr__(self, "volumes", MappingProxyType({k: _freeze(v) for k, v in volumes.items()}))
        self._check_boundary_facets()

    def _check_boundary_facets(self) -> None:
        if not self.boundaries:
            return
        bkeys = self.boundary_facet_keys
        nv = self.dim  # vertices per facet
        for name, f in self.boundaries.items():
            if f.size == 0:
                continue
            keys = row_keys(f[:, :nv], self.n_points)
            pos = np.searchsorted(bkeys, keys)
            pos = np.clip(pos, 0, len(bkeys) - 1)
            off = bkeys[pos] != keys
            if np.any(off):
                i = int(np.flatnonzero(off)[0])
                raise MeshError(
                    f"boundary region {name!r}: {int(off.sum())} of its {len(f)} facets are not "
                    f"on the boundary of the mesh (first: nodes {f[i, :nv].tolist()}); interior "
                    "surfaces cannot carry a wall condition — remove them from the group."
                )

    # ------------------------------------------------------------- properties
    @property
    def dim(self) -> int:
        """Topological (and spatial) dimension: 1, 2 or 3."""
        return self.cell_type.dim

    @property
    def n_points(self) -> int:
        return len(self.points)

    @property
    def n_cells(self) -> int:
        return len(self.cells)

    @property
    def surface_names(self) -> tuple[str, ...]:
        """Names of the boundary regions, sorted."""
        return tuple(sorted(self.boundaries))

    @property
    def volume_names(self) -> tuple[str, ...]:
        return tuple(sorted(self.volumes))

    @cached_property
    def vertices(self) -> np.ndarray:
        """(n_cells, dim + 1) vertex node numbers of each cell."""
        return _freeze(self.cells[:, : self.dim + 1])

    @cached_property
    def edges(self) -> np.ndarray:
        """(n_edges, 2) unique edges as sorted vertex node pairs."""
        return self._edge_data[0]

    @cached_property
    def cell_edges(self) -> np.ndarray:
        """(n_cells, n_local_edges) edge numbers of each cell, in EDGES order."""
        return self._edge_data[1]

    @cached_property
    def _edge_data(self):
        loc = EDGES[self.cell_type]
        pairs = self.vertices[:, loc]  # (E, ne, 2)
        flat = np.sort(pairs.reshape(-1, 2), axis=1)
        keys = flat[:, 0] * self.n_points + flat[:, 1]
        ukeys, first, inv = np.unique(keys, return_index=True, return_inverse=True)
        edges = flat[first]
        return _freeze(edges), _freeze(inv.reshape(len(self.cells), len(loc))), _freeze(ukeys)

    def edge_index(self, pairs: np.ndarray) -> np.ndarray:
        """Edge numbers of vertex pairs.

        Parameters
        ----------
        pairs : (m, 2) int array of vertex node numbers

        Returns
        -------
        (m,) int array of edge numbers (raises MeshError if a pair is no edge)
        """
        s = np.sort(np.asarray(pairs, dtype=np.int64), axis=1)
        keys = s[:, 0] * self.n_points + s[:, 1]
        ukeys = self._edge_data[2]
        pos = np.clip(np.searchsorted(ukeys, keys), 0, len(ukeys) - 1)
        if np.any(ukeys[pos] != keys):
            raise MeshError("vertex pairs given are not edges of the mesh.")
        return pos

    @cached_property
    def edge_nodes(self) -> np.ndarray:
        """(n_edges, 3) coordinates of the node of each edge.

        For second-order geometry these are the mid-edge nodes (on the curved
        geometry); for first-order, the straight midpoints.
        """
        if self.geometry_order == 2:
            nv = self.dim + 1
            out = np.empty((len(self.edges), 3))
            out[self.cell_edges.ravel()] = self.points[self.cells[:, nv:].ravel()]
            return _freeze(out)
        e = self.edges
        return _freeze(0.5 * (self.points[e[:, 0]] + self.points[e[:, 1]]))

    @cached_property
    def _boundary_facet_data(self):
        loc = FACETS[self.cell_type]
        f = self.vertices[:, loc].reshape(-1, loc.shape[1])
        keys = row_keys(f, self.n_points)
        u, first, counts = np.unique(keys, return_index=True, return_counts=True)
        once = counts == 1
        return _freeze(u[once]), _freeze(f[first[once]])

    @property
    def boundary_facet_keys(self) -> np.ndarray:
        """Sorted keys of the facets on the boundary (facets of exactly one cell)."""
        return self._boundary_facet_data[0]

    @property
    def boundary_facets(self) -> np.ndarray:
        """(n_boundary_facets, dim) vertex nodes of every facet on the boundary, named or not."""
        return self._boundary_facet_data[1]

    @cached_property
    def boundary_measure(self) -> float:
        """Total area (3D), length (2D) or point count (1D) of the boundary (straight facets)."""
        P = self.points[self.boundary_facets]
        if self.dim == 3:
            return float(0.5 * np.linalg.norm(np.cross(P[:, 1] - P[:, 0], P[:, 2] - P[:, 0]),
                                              axis=1).sum())
        if self.dim == 2:
            return float(np.linalg.norm(P[:, 1] - P[:, 0], axis=1).sum())
        return float(len(P))

    @cached_property
    def cell_measures(self) -> np.ndarray:
        """(n_cells,) length, area or volume of each cell (exact for curved cells)."""
        from .assembly import cell_measures

        return _freeze(cell_measures(self))

    @property
    def measure(self) -> float:
        """Total length, area or volume of the mesh."""
        return float(self.cell_measures.sum())

    def region_measure(self, name: str) -> float:
        """Volume of a named volume region, or area of a named boundary region."""
        if name in self.volumes:
            return float(self.cell_measures[self.volumes[name]].sum())
        if name in self.boundaries:
            from .assembly import facet_measures

            return float(facet_measures(self, name).sum())
        raise self._unknown(name)

    def _unknown(self, name: str):
        from ._errors import UnknownSurfaceError

        return UnknownSurfaceError(
            f"no region named {name!r} in the mesh; surfaces: {list(self.surface_names)}, "
            f"volumes: {list(self.volume_names)}."
        )

    @cached_property
    def bounding_box(self) -> np.ndarray:
        """(2, 3) lower and upper corners."""
        return _freeze(np.vstack([self.points.min(axis=0), self.points.max(axis=0)]))

    @cached_property
    def edge_lengths(self) -> np.ndarray:
        """(n_edges,) straight lengths of the edges (vertex to vertex)."""
        e = self.edges
        return _freeze(np.linalg.norm(self.points[e[:, 0]] - self.points[e[:, 1]], axis=1))

    @property
    def h_max(self) -> float:
        """Longest edge length."""
        return float(self.edge_lengths.max())

    @property
    def h_mean(self) -> float:
        """Mean edge length."""
        return float(self.edge_lengths.mean())

    def __repr__(self) -> str:
        return (
            f"Mesh({self.cell_type.name.lower()}, order {self.geometry_order}, "
            f"{self.n_cells} cells, {self.n_points} points, surfaces={list(self.surface_names)}, "
            f"volumes={list(self.volume_names)})"
        )

    # ---------------------------------------------------------------- changes
    def rename(self, mapping: Mapping[str, str]) -> "Mesh":
        """Copy with regions renamed by ``mapping`` (old -> new)."""
        for old in mapping:
            if old not in self.boundaries and old not in self.volumes:
                raise self._unknown(old)
        b = {mapping.get(k, k): v for k, v in self.boundaries.items()}
        v = {mapping.get(k, k): c for k, c in self.volumes.items()}
        return replace(self, boundaries=b, volumes=v)

    def linear(self) -> "Mesh":
        """Copy with first-order (straight) geometry: mid-edge nodes dropped."""
        if self.geometry_order == 1:
            return self
        nf = self.dim  # vertices per facet
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", MeshWarning)  # the dropped mid nodes
            return replace(
                self,
                cells=self.vertices,
                geometry_order=1,
                boundaries={k: f[:, :nf] for k, f in self.boundaries.items()},
            )
