"""What a mesh holds and how good it is: :func:`mesh_report` and :class:`MeshReport`.

The report gives the element and DOF counts per element order, the shape
quality of the cells, the measure of every named region, the resolution
reached at a frequency and the memory a solve would take.

Cell quality
------------
:func:`cell_quality` is the normalised radius ratio, 1 for the regular
simplex and tending to 0 as a cell flattens:

* tetrahedra: ``3 r_in / r_circ`` (r_in = 3V / (sum of face areas), r_circ
  the circumradius), the measure gmsh calls "gamma";
* triangles: ``2 r_in / r_circ`` (r_in = 2A / perimeter, r_circ = abc / 4A);
* line cells: 1.

:func:`cell_angles` gives the six dihedral angles of each tetrahedron (the
angle between the two faces meeting at an edge; 70.53° = arccos(1/3) for the
regular tetrahedron) or the three interior angles of each triangle.  Both
use the straight cell through the vertices (mid-edge nodes of second-order
cells are ignored).

Resolution
----------
Elements per wavelength at ``fmax`` are ``(c / fmax) / h_mean`` with
``h_mean`` the mean edge length, the measure
:func:`acoustic_fem.solve_modes` checks against
:data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`.  The number of modes
below ``fmax`` is Weyl's estimate for a rigid room,
``N = V k^3 / (6 pi^2) + S k^2 / (16 pi)`` (3D; ``A k^2 / (4 pi) + L k / (4 pi)`` in 2D),
so "DOFs per mode" is the number of unknowns paid for every mode obtained.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._cost import estimate_solve_memory, weyl_count
from ._errors import InputError
from .air import Air
from .elements import CellType
from .mesh import Mesh
from .modes import MIN_ELEMENTS_PER_WAVELENGTH

__all__ = ["MeshReport", "mesh_report", "cell_quality", "cell_angles"]


# ------------------------------------------------------------ cell measures
def _vertex_coords(mesh: Mesh) -> np.ndarray:
    """(n_cells, dim + 1, 3) vertex coordinates of every cell."""
    return mesh.points[mesh.vertices]


def _tet_parts(P: np.ndarray):
    """Volumes (E,), face areas (E, 4) and outward unit normals (E, 4, 3) of tetrahedra.

    P : (E, 4, 3).  Face k is the face opposite vertex k.
    """
    a = P[:, 1] - P[:, 0]
    b = P[:, 2] - P[:, 0]
    c = P[:, 3] - P[:, 0]
    vol = np.abs(np.einsum("ij,ij->i", a, np.cross(b, c))) / 6.0
    opp = ((1, 2, 3), (0, 2, 3), (0, 1, 3), (0, 1, 2))
    areas = np.empty((len(P), 4))
    normals = np.empty((len(P), 4, 3))
    for k, (i, j, l) in enumerate(opp):  # a loop over the 4 faces, vectorised over cells
        n = np.cross(P[:, j] - P[:, i], P[:, l] - P[:, i])
        norm = np.linalg.norm(n, axis=1)
        # outward: away from the opposite vertex k
        s = np.sign(np.einsum("ij,ij->i", n, P[:, i] - P[:, k]))
        normals[:, k] = n * (s / np.where(norm > 0, norm, 1.0))[:, None]
        areas[:, k] = 0.5 * norm
    return vol, areas, normals


def cell_quality(mesh: Mesh) -> np.ndarray:
    """Normalised radius ratio of every cell, 1 for the regular simplex.

    Parameters
    ----------
    mesh : Mesh

    Returns
    -------
    (n_cells,) float array
        ``3 r_in / r_circ`` for tetrahedra, ``2 r_in / r_circ`` for
        triangles, 1 for line cells; computed on the straight cell through
        the vertices.
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"cell_quality needs an acoustic_fem Mesh, got {type(mesh).__name__}.")
    P = _vertex_coords(mesh)
    if mesh.cell_type is CellType.LINE:
        return np.ones(mesh.n_cells)
    if mesh.cell_type is CellType.TRIANGLE:
        la = np.linalg.norm(P[:, 1] - P[:, 2], axis=1)
        lb = np.linalg.norm(P[:, 0] - P[:, 2], axis=1)
        lc = np.linalg.norm(P[:, 0] - P[:, 1], axis=1)
        area = 0.5 * np.linalg.norm(np.cross(P[:, 1] - P[:, 0], P[:, 2] - P[:, 0]), axis=1)
        # 2 r_in / r_circ = 2 (2A / (a+b+c)) / (abc / 4A) = 16 A^2 / ((a+b+c) abc)
        return 16.0 * area**2 / ((la + lb + lc) * la * lb * lc)
    vol, areas, _ = _tet_parts(P)
    r_in = 3.0 * vol / areas.sum(axis=1)
    a = P[:, 1] - P[:, 0]
    b = P[:, 2] - P[:, 0]
    c = P[:, 3] - P[:, 0]
    # circumcentre offset from vertex 0: (|a|² b×c + |b|² c×a + |c|² a×b) / (12 V)
    num = (
        np.einsum("ij,ij->i", a, a)[:, None] * np.cross(b, c)
        + np.einsum("ij,ij->i", b, b)[:, None] * np.cross(c, a)
        + np.einsum("ij,ij->i", c, c)[:, None] * np.cross(a, b)
    )
    r_circ = np.linalg.norm(num, axis=1) / (12.0 * vol)
    return 3.0 * r_in / r_circ


def cell_angles(mesh: Mesh) -> np.ndarray:
    """Dihedral angles of tetrahedra, interior angles of triangles, in degrees.

    Parameters
    ----------
    mesh : Mesh (triangles or tetrahedra)

    Returns
    -------
    (n_cells, 6) float array for tetrahedra
        The angle between the two faces meeting at each edge, edges in the
        order of :data:`acoustic_fem.elements.EDGES`.
    (n_cells, 3) float array for triangles
        The interior angle at each vertex.
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"cell_angles needs an acoustic_fem Mesh, got {type(mesh).__name__}.")
    P = _vertex_coords(mesh)
    if mesh.cell_type is CellType.LINE:
        raise InputError("line cells have no angles; cell_angles needs triangles or tetrahedra.")
    if mesh.cell_type is CellType.TRIANGLE:
        out = np.empty((len(P), 3))
        for k in range(3):  # the 3 corners, vectorised over cells
            u = P[:, (k + 1) % 3] - P[:, k]
            v = P[:, (k + 2) % 3] - P[:, k]
            cos = np.einsum("ij,ij->i", u, v) / (np.linalg.norm(u, axis=1) * np.linalg.norm(v, axis=1))
            out[:, k] = np.degrees(np.arccos(np.clip(cos, -1.0, 1.0)))
        return out
    from .elements import EDGES

    _, _, n = _tet_parts(P)
    edges = EDGES[CellType.TETRAHEDRON]
    out = np.empty((len(P), len(edges)))
    for e, (i, j) in enumerate(edges):
        k, l = (v for v in range(4) if v not in (i, j))
        # the faces opposite k and l share edge ij; interior angle = pi - angle(n_k, n_l)
        cos = -np.einsum("ij,ij->i", n[:, k], n[:, l])
        out[:, e] = np.degrees(np.arccos(np.clip(cos, -1.0, 1.0)))
    return out


# ------------------------------------------------------------------ report
@dataclass(frozen=True)
class MeshReport:
    """Counts, quality, region measures and resolution of a mesh.

    Attributes
    ----------
    cell_type : str
        "tetrahedron", "triangle" or "line".
    geometry_order : int
    n_cells, n_vertices, n_edges, n_boundary_facets : int
    n_dofs : mapping int -> int
        Lagrange DOFs per element order: ``{1: vertices, 2: vertices + edges}``.
    quality_min, quality_mean : float
        Normalised radius ratio (:func:`cell_quality`), 1 = regular simplex.
    n_poor_cells : int
        Cells with quality below 0.1.
    angle_min_deg, angle_max_deg : float or None
        Smallest and largest dihedral angle (tetrahedra) or interior angle
        (triangles); None for line meshes.
    volumes : mapping str -> float
        Volume (area in 2D, length in 1D) of every named volume region.
    surfaces : mapping str -> float
        Area (length in 2D, point count in 1D) of every named boundary region.
    measure : float
        Total volume of the mesh.
    boundary_measure : float
        Total boundary area, named or not.
    h_min, h_mean, h_max : float
        Shortest, mean and longest edge (m).
    fmax : float or None
        Frequency the resolution figures refer to (Hz).
    speed_of_sound : float
        c used for the wavelengths (m/s).
    elements_per_wavelength : float or None
        ``(c / fmax) / h_mean``; compared with the needed value by
        :func:`acoustic_fem.solve_modes`.
    elements_per_wavelength_max_edge : float or None
        ``(c / fmax) / h_max`` (the coarsest spot).
    needed_elements_per_wavelength : mapping int -> float
        :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`.
    resolved : mapping int -> bool
        Per element order: the mesh reaches the needed resolution at fmax.
    modes_below_fmax : float or None
        Weyl's estimate of the number of modes up to fmax (rigid walls).
    dofs_per_mode : mapping int -> float
        Per element order: n_dofs / modes_below_fmax.
    solve_memory_bytes : mapping int -> int
        Per element order: estimated peak memory of ``solve_modes(fmax=fmax)``
        on this mesh (see :func:`acoustic_fem.estimate_cost`); empty without fmax.
    """

    cell_type: str
    geometry_order: int
    n_cells: int
    n_vertices: int
    n_edges: int
    n_boundary_facets: int
    n_dofs: Mapping[int, int]
    quality_min: float
    quality_mean: float
    n_poor_cells: int
    angle_min_deg: float | None
    angle_max_deg: float | None
    volumes: Mapping[str, float]
    surfaces: Mapping[str, float]
    measure: float
    boundary_measure: float
    h_min: float
    h_mean: float
    h_max: float
    fmax: float | None = None
    speed_of_sound: float = 0.0
    elements_per_wavelength: float | None = None
    elements_per_wavelength_max_edge: float | None = None
    needed_elements_per_wavelength: Mapping[int, float] = field(default_factory=dict)
    resolved: Mapping[int, bool] = field(default_factory=dict)
    modes_below_fmax: float | None = None
    dofs_per_mode: Mapping[int, float] = field(default_factory=dict)
    solve_memory_bytes: Mapping[int, int] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("n_dofs", "volumes", "surfaces", "needed_elements_per_wavelength",
                     "resolved", "dofs_per_mode", "solve_memory_bytes"):
            object.__setattr__(self, name, MappingProxyType(dict(getattr(self, name))))

    def as_dict(self) -> dict:
        """Plain dict (str keys, floats and ints) for JSON."""
        d = {}
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, Mapping):
                v = {str(k): x for k, x in v.items()}
            d[f.name] = v
        return d

    def __str__(self) -> str:
        dim_word = {"tetrahedron": ("volume", "area", "m³", "m²"),
                    "triangle": ("area", "length", "m²", "m"),
                    "line": ("length", "count", "m", "")}[self.cell_type]
        vw, sw, vu, su = dim_word
        lines = [
            f"mesh: {self.n_cells} {self.cell_type} cells (geometry order {self.geometry_order}), "
            f"{self.n_vertices} vertices, {self.n_edges} edges, "
            f"{self.n_boundary_facets} boundary facets",
            "DOFs: " + ", ".join(f"P{p} {n}" for p, n in sorted(self.n_dofs.items())),
            f"quality (radius ratio, 1 = regular): min {self.quality_min:.3f}, "
            f"mean {self.quality_mean:.3f}, {self.n_poor_cells} cells below 0.1",
        ]
        if self.angle_min_deg is not None:
            kind = "dihedral" if self.cell_type == "tetrahedron" else "interior"
            lines.append(f"{kind} angles: min {self.angle_min_deg:.2f}°, max {self.angle_max_deg:.2f}°")
        lines.append(f"edges: min {self.h_min:.4g} m, mean {self.h_mean:.4g} m, "
                     f"max {self.h_max:.4g} m")
        lines.append(f"{'region':<24} {'kind':<8} {'measure':>14}")
        for name, v in sorted(self.volumes.items()):
            lines.append(f"{name:<24} {vw:<8} {v:>12.6g} {vu}")
        for name, a in sorted(self.surfaces.items()):
            lines.append(f"{name:<24} {sw:<8} {a:>12.6g} {su}")
        lines.append(f"{'(total)':<24} {vw:<8} {self.measure:>12.6g} {vu}")
        lines.append(f"{'(boundary)':<24} {sw:<8} {self.boundary_measure:>12.6g} {su}")
        if self.fmax is not None:
            lines.append(
                f"at fmax {self.fmax:g} Hz (c {self.speed_of_sound:.2f} m/s, wavelength "
                f"{self.speed_of_sound / self.fmax:.4g} m): {self.elements_per_wavelength:.2f} "
                f"elements per wavelength (mean edge), "
                f"{self.elements_per_wavelength_max_edge:.2f} (longest edge)"
            )
            lines.append(f"modes below fmax (Weyl estimate): {self.modes_below_fmax:.1f}")
            lines.append(f"{'order':<6} {'needed':>7} {'resolved':>9} {'DOFs':>10} "
                         f"{'DOFs/mode':>10} {'solve memory':>13}")
            for p in sorted(self.n_dofs):
                mem = self.solve_memory_bytes.get(p)
                lines.append(
                    f"P{p:<5} {self.needed_elements_per_wavelength[p]:>7.1f} "
                    f"{'yes' if self.resolved[p] else 'NO':>9} {self.n_dofs[p]:>10} "
                    f"{self.dofs_per_mode[p]:>10.0f} "
                    f"{(mem / 2**30 if mem is not None else float('nan')):>10.2f} GiB"
                )
        return "\n".join(lines)


def mesh_report(mesh: Mesh, *, fmax: float | None = None, air: Air | None = None) -> MeshReport:
    """Counts, quality, region measures and resolution of ``mesh``.

    Parameters
    ----------
    mesh : Mesh
    fmax : float, optional
        Highest frequency of interest (Hz): adds elements per wavelength,
        whether each element order resolves it, Weyl's mode count, DOFs per
        mode and the estimated memory of a solve.
    air : Air, optional
        Sets the speed of sound (default ``Air()``).

    Returns
    -------
    MeshReport
        ``str(report)`` is a readable table, ``report.as_dict()`` a plain dict.

    Raises
    ------
    InputError
        mesh not a Mesh, fmax not positive and finite, air not an Air.
    """
    from .geometry import _air, _number

    if not isinstance(mesh, Mesh):
        raise InputError(f"mesh_report needs an acoustic_fem Mesh, got {type(mesh).__name__}.")
    if fmax is not None:
        fmax = _number("fmax", fmax, "Hz", "give the highest frequency of interest, e.g. fmax=200")
    air = _air(air)
    q = cell_quality(mesh)
    if mesh.cell_type is CellType.LINE:
        amin = amax = None
    else:
        ang = cell_angles(mesh)
        amin, amax = float(ang.min()), float(ang.max())
    n_vert = int(np.unique(mesh.vertices).size)
    n_edges = int(len(mesh.edges))
    dofs = {1: n_vert, 2: n_vert + n_edges}
    volumes = {n: mesh.region_measure(n) for n in mesh.volume_names}
    surfaces = {n: mesh.region_measure(n) for n in mesh.surface_names}
    L = mesh.edge_lengths
    rep = dict(
        cell_type=mesh.cell_type.name.lower(),
        geometry_order=mesh.geometry_order,
        n_cells=mesh.n_cells,
        n_vertices=n_vert,
        n_edges=n_edges,
        n_boundary_facets=int(len(mesh.boundary_facets)),
        n_dofs=dofs,
        quality_min=float(q.min()),
        quality_mean=float(q.mean()),
        n_poor_cells=int(np.count_nonzero(q < 0.1)),
        angle_min_deg=amin,
        angle_max_deg=amax,
        volumes=volumes,
        surfaces=surfaces,
        measure=mesh.measure,
        boundary_measure=mesh.boundary_measure,
        h_min=float(L.min()),
        h_mean=float(L.mean()),
        h_max=float(L.max()),
        speed_of_sound=air.c,
        needed_elements_per_wavelength=dict(MIN_ELEMENTS_PER_WAVELENGTH),
    )
    if fmax is not None:
        lam = air.c / fmax
        epw = lam / rep["h_mean"]
        n_modes = weyl_count(mesh.dim, rep["measure"], rep["boundary_measure"],
                             2.0 * math.pi * fmax / air.c)
        rep.update(
            fmax=fmax,
            elements_per_wavelength=epw,
            elements_per_wavelength_max_edge=lam / rep["h_max"],
            resolved={p: bool(epw >= MIN_ELEMENTS_PER_WAVELENGTH[p]) for p in dofs},
            modes_below_fmax=n_modes,
            dofs_per_mode={p: n / max(n_modes, 1.0) for p, n in dofs.items()},
            solve_memory_bytes=(
                {p: estimate_solve_memory(n, p, n_modes, n_cells=mesh.n_cells)["peak"]
                 for p, n in dofs.items()} if mesh.dim == 3 else {}
            ),
        )
    return MeshReport(**rep)
