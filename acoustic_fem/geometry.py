"""Mesh builders for simple rooms: a rectangular box and an extruded floor plan.

Both builders validate every argument before any meshing, build the geometry
with gmsh's OpenCASCADE kernel, name the faces from their centres of mass,
mesh at a size derived from the highest frequency wanted and return a
:class:`~acoustic_fem.mesh.Mesh` with named surfaces and the volume ``air``.

Mesh size
---------
``h = (c / fmax) / N`` with N elements per wavelength: N = 6 for order 2 and
N = 16 for order 1 (:data:`ELEMENTS_PER_WAVELENGTH`).  gmsh is given
``MeshSizeMax = h`` and ``MeshSizeMin = 0.3 h``.  N is chosen to exceed the
resolution thresholds in :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`
(derived from the 1D dispersion of Lagrange elements) with margin.  Note that
those thresholds are stated for the *mean edge*, and gmsh's mean edge comes
out near 0.8 h to 1.3 h (measured on small boxes): for order 2 that leaves
about 5 elements per wavelength against the 3.5 needed, and for order 1
about 12-13 against 12 (which is why N is 16 there, not the 12 the
dispersion estimate alone would suggest).  P2 (the default) needs far fewer
DOFs for the same accuracy.
"""

from __future__ import annotations

import math
import numbers
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ._errors import InputError, UnknownSurfaceError
from .air import Air
from .mesh import Mesh

__all__ = [
    "BOX_FACES", "ELEMENTS_PER_WAVELENGTH", "ELEMENTS_PER_TURN", "Column", "Cuboid", "Patch",
    "box", "cylinder", "floor_plan", "mesh_size", "plan", "sphere", "tube",
]

#: Elements per wavelength at fmax used by the builders, by mesh order.
ELEMENTS_PER_WAVELENGTH = {1: 16.0, 2: 6.0}

#: Names of the box faces: x0 is the face x = 0, x1 the face x = Lx, ...
BOX_FACES = ("x0", "x1", "y0", "y1", "z0", "z1")


# --------------------------------------------------------------- validation
def _number(name, value, unit, fix, *, allow_zero=False, allow_negative=False):
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.floating, np.integer)):
        raise InputError(f"{name}={value!r} must be a number in {unit}; {fix}.")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{name}={value!r} {unit} must be finite; {fix}.")
    if not allow_negative and (v < 0 or (v == 0 and not allow_zero)):
        need = "zero or positive" if allow_zero else "positive"
        raise InputError(f"{name}={value!r} {unit} must be {need}; {fix}.")
    return v


def _order(order):
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(
            f"order={order!r} is not supported: use 1 (linear, straight cells) or 2 "
            "(quadratic, the default)."
        )
    return int(order)


def _air(air):
    if air is None:
        return Air()
    if not isinstance(air, Air):
        raise InputError(f"air={air!r} must be an acoustic_fem Air (e.g. Air(temperature=20)).")
    return air


def mesh_size(fmax, *, order=2, air=None) -> float:
    """Mesh size h = (c / fmax) / N used by the builders (N from ELEMENTS_PER_WAVELENGTH)."""
    fmax = _number("fmax", fmax, "Hz", "give the highest frequency of interest, e.g. fmax=200")
    order = _order(order)
    return _air(air).c / fmax / ELEMENTS_PER_WAVELENGTH[order]


def _box_size(size):
    if isinstance(size, (str, bytes)):
        raise InputError(f"size={size!r} must be three lengths (Lx, Ly, Lz) in metres.")
    try:
        arr = list(size)
    except TypeError:
        raise InputError(f"size={size!r} must be three lengths (Lx, Ly, Lz) in metres.") from None
    if len(arr) != 3:
        raise InputError(
            f"size={size!r} has {len(arr)} entries; give three lengths (Lx, Ly, Lz) in metres."
        )
    return tuple(
        _number(f"size[{i}]", v, "m", "every room dimension must be a positive length")
        for i, v in enumerate(arr)
    )


def _orient(a, b, c):
    """Twice the signed area of triangles (a, b, c), broadcasting over leading axes."""
    return (b[..., 0] - a[..., 0]) * (c[..., 1] - a[..., 1]) - (b[..., 1] - a[..., 1]) * (
        c[..., 0] - a[..., 0]
    )


def _on_segment(p, a, b, tol):
    """p lies on the closed segment ab (within tol, a length), elementwise."""
    ab = b - a
    L2 = np.einsum("...i,...i->...", ab, ab)
    t = np.einsum("...i,...i->...", p - a, ab) / L2
    tc = np.clip(t, 0.0, 1.0)
    d = np.linalg.norm(p - (a + tc[..., None] * ab), axis=-1)
    return d <= tol


def _fmt(p):
    return f"({p[0]:g}, {p[1]:g})"


def _polygon(polygon):
    """(n, 2) float array of a simple polygon, or InputError naming the defect."""
    if isinstance(polygon, (str, bytes)):
        raise InputError(f"polygon={polygon!r} must be a list of (x, y) vertices in metres.")
    try:
        P = np.array(polygon, dtype=float)
    except (TypeError, ValueError):
        raise InputError(
            f"polygon={polygon!r} must be a list of (x, y) vertices in metres."
        ) from None
    if P.ndim != 2 or P.shape[1] != 2:
        raise InputError(
            f"polygon={polygon!r} has shape {P.shape}; give a list of (x, y) vertices, "
            "one pair per vertex."
        )
    n = len(P)
    if n < 3:
        raise InputError(
            f"polygon={polygon!r} has {n} vertices; a floor plan needs at least 3."
        )
    if not np.all(np.isfinite(P)):
        raise InputError(f"polygon={polygon!r} has NaN or infinite coordinates.")
    scale = float(np.ptp(P, axis=0).max())
    tol = 1e-9 * max(scale, 1e-300)
    # repeated vertices (any pair, consecutive or not)
    D = np.linalg.norm(P[:, None, :] - P[None, :, :], axis=2)
    iu, ju = np.triu_indices(n, k=1)
    rep = D[iu, ju] <= tol
    if np.any(rep):
        i, j = int(iu[rep][0]), int(ju[rep][0])
        hint = (
            " (the polygon closes itself: do not repeat the first vertex at the end)"
            if (i, j) == (0, n - 1)
            else ""
        )
        raise InputError(
            f"polygon vertices {i + 1} and {j + 1} are the same point {_fmt(P[i])}{hint}; "
            "give each corner once."
        )
    A = P
    B = np.roll(P, -1, axis=0)  # edge e runs from vertex e to vertex e+1
    # adjacent edges folding back on each other (collinear, opposite directions)
    t_in, t_out = A - np.roll(A, 1, axis=0), B - A
    cross = t_in[:, 0] * t_out[:, 1] - t_in[:, 1] * t_out[:, 0]
    dot = np.einsum("ij,ij->i", t_in, t_out)
    fold = (np.abs(cross) <= 1e-12 * np.linalg.norm(t_in, axis=1) * np.linalg.norm(t_out, axis=1)) & (
        dot < 0
    )
    if np.any(fold):
        v = int(np.flatnonzero(fold)[0])
        raise InputError(
            f"polygon turns back on itself at vertex {v + 1} {_fmt(P[v])}: the edges into "
            "and out of it overlap; remove the vertex or fix its coordinates."
        )
    # non-adjacent edge pairs (e < f, not sharing a vertex)
    e, f = np.triu_indices(n, k=2)
    keep = ~((e == 0) & (f == n - 1))
    e, f = e[keep], f[keep]
    if e.size:
        a, b, c, d = A[e], B[e], A[f], B[f]
        eps = 1e-12 * max(scale, 1e-300) ** 2
        o1, o2 = _orient(a, b, c), _orient(a, b, d)
        o3, o4 = _orient(c, d, a), _orient(c, d, b)
        proper = (((o1 > eps) & (o2 < -eps)) | ((o1 < -eps) & (o2 > eps))) & (
            ((o3 > eps) & (o4 < -eps)) | ((o3 < -eps) & (o4 > eps))
        )
        touch = (
            _on_segment(c, a, b, tol) | _on_segment(d, a, b, tol)
            | _on_segment(a, c, d, tol) | _on_segment(b, c, d, tol)
        )
        hit = proper | touch
        if np.any(hit):
            k = int(np.flatnonzero(hit)[0])
            i, j = int(e[k]), int(f[k])
            raise InputError(
                f"polygon is self-intersecting: edge {i + 1} {_fmt(A[i])}->{_fmt(B[i])} "
                f"meets edge {j + 1} {_fmt(A[j])}->{_fmt(B[j])}; give the vertices in order "
                "around a simple (non-crossing) outline."
            )
    area = 0.5 * float(np.sum(A[:, 0] * B[:, 1] - B[:, 0] * A[:, 1]))
    if abs(area) <= 1e-12 * scale**2:
        raise InputError(f"polygon={polygon!r} encloses no area (its vertices are collinear).")
    return P


# ----------------------------------------------------------------- meshing
_OPTIONS = (
    "General.Terminal", "General.NumThreads", "Mesh.Algorithm3D", "Mesh.MeshSizeMax",
    "Mesh.MeshSizeMin", "Mesh.MshFileVersion", "Mesh.MeshSizeFromCurvature",
)

#: Elements per full turn of a curved surface (gmsh ``Mesh.MeshSizeFromCurvature``):
#: keeps columns, cylinders and spheres smaller than the wavelength-based size
#: well represented (an edge spans at most 30 degrees of arc).
ELEMENTS_PER_TURN = 12


def _com(dim, tag):
    import gmsh

    if dim == 0:
        return tuple(gmsh.model.getValue(0, tag, []))
    return gmsh.model.occ.getCenterOfMass(dim, tag)


def _check_budget(volume, area, *, fmax, order, air, memory_budget):
    """Refuse, before any meshing, a 3D model whose estimated memory exceeds the budget.

    ``memory_budget`` in bytes (default: the memory available on this
    machine; ``math.inf`` turns the check off).  Raises ModelTooLargeError
    with the predicted cells, DOFs and memory and what to change.
    """
    from ._cost import check_memory, estimate_cost

    check_memory(estimate_cost(volume, area, fmax=fmax, order=order, air=air),
                 budget=memory_budget)


def _refinement(refine, names):
    """Validated {surface name: local mesh size in m} (names from ``names``)."""
    if refine is None:
        return {}
    if not isinstance(refine, dict):
        raise InputError(
            f"refine={refine!r} must map surface names to local mesh sizes in metres, "
            "e.g. refine={'door': 0.1}."
        )
    out = {}
    for name, size in refine.items():
        if name not in names:
            raise UnknownSurfaceError(
                f"refine names surface {name!r}, which this room does not have; its surfaces "
                f"are {sorted(names)}."
            )
        out[name] = _number(f"refine[{name!r}]", size, "m", "give a local mesh size in metres")
    return out


def _mesh_with_gmsh(model_name, build, classify, names, h, order, dim=3, budget=None,
                    refine=None):
    """Run gmsh and return the Mesh.

    ``build(occ)`` makes the domain (entities of dimension ``dim``) and may
    return a dict {boundary entity tag: name} for faces it named itself
    (patches imprinted by a fragment); every other boundary entity is named
    by ``classify(cx, cy, cz)`` from its centre of mass.  ``names`` lists
    every name that must receive at least one entity; ``refine`` maps some of
    them to a smaller local mesh size (set on the points of those surfaces,
    from which gmsh grades the size smoothly).  ``budget`` (a callable
    of the domain's measure) runs after the geometry exists and before any
    meshing, so an oversized model is refused cheaply.
    """
    import gmsh

    from .mesh_io import read_mesh

    was_init = gmsh.isInitialized()
    if not was_init:
        gmsh.initialize(interruptible=False)
    saved = {}
    prev_model = None
    added = False
    try:
        if was_init:  # leave the caller's gmsh session as it was
            saved = {k: gmsh.option.getNumber(k) for k in _OPTIONS}
            prev_model = gmsh.model.getCurrent()
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.NumThreads", 1)
        gmsh.model.add(model_name)
        added = True
        occ = gmsh.model.occ
        named = build(occ) or {}
        occ.synchronize()
        doms = gmsh.model.getEntities(dim)
        if budget is not None:
            budget(sum(occ.getMass(dim, t) for _, t in doms))
        faces = gmsh.model.getBoundary(doms, oriented=False, combined=True)
        groups: dict[str, list[int]] = {n: [] for n in names}
        for _, tag in faces:  # a handful of geometric faces, not mesh entities
            name = named.get(tag)
            if name is None:
                name = classify(*_com(dim - 1, tag))
            groups[name].append(tag)
        empty = [n for n, t in groups.items() if not t]
        if empty:
            raise InputError(
                f"{model_name}: no surface of the geometry is left for {empty} (covered by an "
                "obstacle or another patch?); move or remove it."
            )
        for name, tags in groups.items():
            gmsh.model.addPhysicalGroup(dim - 1, tags, name=name)
        gmsh.model.addPhysicalGroup(dim, [t for _, t in doms], name="air")
        for name, size in (refine or {}).items():
            pts = gmsh.model.getBoundary([(dim - 1, t) for t in groups[name]], combined=False,
                                         oriented=False, recursive=True)
            gmsh.model.mesh.setSize(pts, min(size, h))
        gmsh.option.setNumber("Mesh.MeshSizeMax", h)
        gmsh.option.setNumber("Mesh.MeshSizeMin", min([0.3 * h, *(refine or {}).values()]))
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", ELEMENTS_PER_TURN)
        gmsh.option.setNumber("Mesh.Algorithm3D", 10)
        gmsh.model.mesh.generate(dim)
        if order == 2:
            gmsh.model.mesh.setOrder(2)
        fd, tmp = tempfile.mkstemp(suffix=".msh")
        os.close(fd)
        try:
            gmsh.option.setNumber("Mesh.MshFileVersion", 4.1)
            gmsh.write(tmp)
            mesh = read_mesh(tmp)
        finally:
            Path(tmp).unlink(missing_ok=True)
    finally:
        if gmsh.isInitialized():
            if added:
                gmsh.model.setCurrent(model_name)
                gmsh.model.remove()
            for k, v in saved.items():
                gmsh.option.setNumber(k, v)
            if prev_model is not None:
                gmsh.model.setCurrent(prev_model)
        if not was_init:
            gmsh.finalize()
    return mesh


def box(size, *, fmax, order=2, air=None, refine=None, memory_budget=None) -> Mesh:
    """Mesh of the rectangular room [0, Lx] x [0, Ly] x [0, Lz].

    Parameters
    ----------
    size : sequence of 3 floats
        (Lx, Ly, Lz) in metres, each positive.
    fmax : float
        Highest frequency of interest in Hz; sets the mesh size
        h = (c / fmax) / N, N = 6 for order 2 and 16 for order 1 (chosen to
        exceed :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`, derived
        from 1D dispersion, with margin; see the module notes for P1).
    order : int
        Geometry order of the mesh: 2 (default, second-order cells from gmsh
        ``setOrder(2)``; the faces are flat, so the mid-edge nodes are the
        edge midpoints) or 1.
    air : Air, optional
        Air whose speed of sound sets the mesh size (default ``Air()``).
    refine : mapping of face name -> mesh size in m, optional
        Local refinement on those faces (e.g. ``{"z0": 0.1}``).
    memory_budget : float, optional
        Bytes a solve of this model may use; the estimate
        (:func:`acoustic_fem.estimate_cost`) is checked before meshing.
        Default: the memory available on this machine; ``math.inf`` disables.

    Returns
    -------
    Mesh
        Surfaces ``x0`` (face x = 0), ``x1`` (face x = Lx), ``y0`` (y = 0),
        ``y1`` (y = Ly), ``z0`` (z = 0, the floor) and ``z1`` (z = Lz, the
        ceiling) — the face names of :func:`acoustic_fem.analytic.box_modes`
        — and the volume ``air``.

    Raises
    ------
    InputError
        A size entry not positive and finite, fmax not positive and finite,
        order not 1 or 2, or air not an :class:`Air`.
    ModelTooLargeError
        The estimated memory of a solve exceeds ``memory_budget``.
    """
    L = _box_size(size)
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    lengths = np.array(L)
    tol = 1e-7 * lengths.max()
    refine = _refinement(refine, BOX_FACES)
    Lx, Ly, Lz = L
    _check_budget(Lx * Ly * Lz, 2 * (Lx * Ly + Ly * Lz + Lx * Lz), fmax=fmax, order=order,
                  air=air, memory_budget=memory_budget)

    def build(occ):
        occ.addBox(0.0, 0.0, 0.0, *L)

    def classify(cx, cy, cz):
        c = np.array([cx, cy, cz])
        lo = np.abs(c) <= tol
        hi = np.abs(c - lengths) <= tol
        if lo.sum() + hi.sum() != 1:  # pragma: no cover - a box face touches one plane
            raise RuntimeError(f"box: unclassified face at {c}")
        ax = int(np.flatnonzero(lo | hi)[0])
        return "xyz"[ax] + ("0" if lo[ax] else "1")

    return _mesh_with_gmsh("acoustic_fem_box", build, classify, BOX_FACES, h, order,
                           refine=refine)


@dataclass(frozen=True)
class Cuboid:
    """A rectangular block cut out of the air volume (a cabinet, a desk, a bass trap).

    Parameters
    ----------
    name : str
        Name of the block's surface (all its faces exposed to the air).
    lo, hi : (3,) floats
        Opposite corners (x, y, z) in metres before rotation, lo < hi in
        every coordinate.
    angle : float
        Rotation in degrees about the vertical axis through the block's
        centre (counter-clockwise seen from above), default 0.
    """

    name: str
    lo: tuple
    hi: tuple
    angle: float = 0.0

    def corners(self) -> np.ndarray:
        """(8, 3) corner points after rotation."""
        lo, hi = np.array(self.lo, float), np.array(self.hi, float)
        c = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                      for z in (lo[2], hi[2])])
        return _rotate_z(c, 0.5 * (lo + hi), self.angle)

    def contains(self, pts: np.ndarray, tol: float) -> np.ndarray:
        """(n,) bool: points (n, 3) inside or on the block (within tol)."""
        lo, hi = np.array(self.lo, float), np.array(self.hi, float)
        q = _rotate_z(np.atleast_2d(pts), 0.5 * (lo + hi), -self.angle)
        return np.all((q >= lo - tol) & (q <= hi + tol), axis=1)

    def _build(self, occ):
        lo, hi = np.array(self.lo, float), np.array(self.hi, float)
        t = occ.addBox(*lo, *(hi - lo))
        if self.angle:
            cx, cy, cz = 0.5 * (lo + hi)
            occ.rotate([(3, t)], cx, cy, cz, 0.0, 0.0, 1.0, math.radians(self.angle))
        return t

    def _check(self, where):
        lo = _vector(f"{where}.lo", self.lo, 3)
        hi = _vector(f"{where}.hi", self.hi, 3)
        if np.any(hi <= lo):
            raise InputError(
                f"{where} {self.name!r}: hi={tuple(hi.tolist())} must exceed lo={tuple(lo.tolist())} in every "
                "coordinate (opposite corners of the block)."
            )
        _number(f"{where}.angle", self.angle, "degrees", "give a rotation in degrees",
                allow_zero=True, allow_negative=True)


@dataclass(frozen=True)
class Column:
    """A vertical circular column cut out of the air volume (a pillar, a round bass trap).

    Parameters
    ----------
    name : str
        Name of the column's surface.
    centre : (2,) floats
        (x, y) of the axis in metres.
    radius : float
        Radius in metres.
    bottom, top : float
        Heights of its ends in metres; ``top=None`` (default) runs it up
        through the ceiling, ``bottom=0`` (default) stands it on the floor.
    """

    name: str
    centre: tuple
    radius: float
    bottom: float = 0.0
    top: float | None = None

    def corners(self, top: float) -> np.ndarray:
        """(64, 3) points on the rims of its two ends (for containment checks)."""
        t = np.linspace(0.0, 2 * math.pi, 32, endpoint=False)
        x = self.centre[0] + self.radius * np.cos(t)
        y = self.centre[1] + self.radius * np.sin(t)
        z1 = top if self.top is None else self.top
        return np.concatenate([np.column_stack([x, y, np.full_like(x, self.bottom)]),
                               np.column_stack([x, y, np.full_like(x, z1)])])

    def contains(self, pts: np.ndarray, tol: float, top: float) -> np.ndarray:
        pts = np.atleast_2d(pts)
        r = np.hypot(pts[:, 0] - self.centre[0], pts[:, 1] - self.centre[1])
        z1 = top if self.top is None else self.top
        return (r <= self.radius + tol) & (pts[:, 2] >= self.bottom - tol) & (pts[:, 2] <= z1 + tol)

    def _build(self, occ, top):
        z1 = top if self.top is None else self.top
        return occ.addCylinder(self.centre[0], self.centre[1], self.bottom, 0.0, 0.0,
                               z1 - self.bottom, self.radius)

    def _check(self, where):
        _vector(f"{where}.centre", self.centre, 2)
        _number(f"{where}.radius", self.radius, "m", "give the column's radius")
        _number(f"{where}.bottom", self.bottom, "m", "give the height of its lower end",
                allow_zero=True)
        if self.top is not None:
            t = _number(f"{where}.top", self.top, "m", "give the height of its upper end")
            if t <= self.bottom:
                raise InputError(
                    f"{where} {self.name!r}: top={self.top!r} m must be above "
                    f"bottom={self.bottom!r} m."
                )


@dataclass(frozen=True)
class Patch:
    """A rectangle on a room surface that becomes a surface of its own (a door, a window, a panel).

    Parameters
    ----------
    name : str
        Name of the new surface.
    surface : str
        The surface it lies on: ``"floor"``, ``"ceiling"`` or ``"wall_i"``.
    lo, hi : (2,) floats
        Opposite corners in the surface's own coordinates, in metres.  On
        ``wall_i``: (u, v) with u the distance along the wall from its start
        vertex (vertex i) and v the height above the floor.  On the floor or
        ceiling: plan coordinates (x, y); a patch on a sloped ceiling is the
        vertical projection of that rectangle onto the ceiling plane.
    """

    name: str
    surface: str
    lo: tuple
    hi: tuple


def _rotate_z(pts, centre, angle_deg):
    if not angle_deg:
        return np.array(pts, float)
    a = math.radians(angle_deg)
    R = np.array([[math.cos(a), -math.sin(a), 0.0], [math.sin(a), math.cos(a), 0.0],
                  [0.0, 0.0, 1.0]])
    return (np.asarray(pts, float) - centre) @ R.T + centre


def _vector(name, value, n):
    try:
        v = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name}={value!r} must be {n} numbers (metres).") from None
    if v.shape != (n,) or not np.all(np.isfinite(v)):
        raise InputError(f"{name}={value!r} must be {n} finite numbers (metres).")
    return v


def _inside_polygon(pts, P, tol):
    """(n,) bool: plan points (n, 2) inside or on the polygon P (m, 2), within tol."""
    pts = np.atleast_2d(pts)[:, :2]
    A, B = P, np.roll(P, -1, axis=0)
    # even-odd rule, vectorised over points x edges
    x, y = pts[:, 0:1], pts[:, 1:2]
    cond = (A[None, :, 1] > y) != (B[None, :, 1] > y)
    with np.errstate(divide="ignore", invalid="ignore"):
        xint = A[None, :, 0] + (y - A[None, :, 1]) * (B[None, :, 0] - A[None, :, 0]) / (
            B[None, :, 1] - A[None, :, 1])
    inside = (np.count_nonzero(cond & (x < xint), axis=1) % 2) == 1
    on = np.zeros(len(pts), bool)
    for e in range(len(P)):  # a loop over polygon edges (a handful), vectorised over points
        on |= _on_segment(pts, A[e], B[e], tol)
    return inside | on


class _Ceiling:
    """The ceiling plane z = z1 + gx (x - x1) + gy (y - y1), (x1, y1) = vertex 1."""

    def __init__(self, P, height, slope):
        self.x1, self.y1 = P[0]
        self.h = height
        self.g = (0.0, 0.0) if slope is None else tuple(float(v) for v in slope)

    def z(self, x, y):
        return self.h + self.g[0] * (np.asarray(x) - self.x1) + self.g[1] * (np.asarray(y) - self.y1)


def floor_plan(polygon, height, *, fmax, order=2, air=None, ceiling_slope=None,
               obstacles=(), patches=(), refine=None, memory_budget=None) -> Mesh:
    """Mesh of a room with a polygonal floor and a flat or sloped planar ceiling.

    The floor outline ``polygon`` (in the plane z = 0) is closed by vertical
    walls up to the ceiling plane.

    Parameters
    ----------
    polygon : sequence of (x, y)
        Vertices of a simple polygon in metres, in order around the outline,
        clockwise or counter-clockwise; non-convex outlines are allowed.
        Do not repeat the first vertex at the end.  At least 3 vertices, no
        two the same, no edges that cross or touch except neighbours at their
        shared vertex.
    height : float
        Ceiling height in metres (at the first vertex when the ceiling slopes).
    fmax : float
        Highest frequency of interest in Hz; sets the mesh size
        h = (c / fmax) / N, N = 6 for order 2 and 16 for order 1 (chosen to
        exceed :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`, derived
        from 1D dispersion, with margin; see the module notes for P1).
    order : int
        Geometry order of the mesh, 2 (default) or 1.
    air : Air, optional
        Air whose speed of sound sets the mesh size (default ``Air()``).
    ceiling_slope : (gx, gy), optional
        A planar sloped ceiling: z = height + gx (x - x1) + gy (y - y1), with
        (x1, y1) the first vertex (gx = dz/dx, e.g. 0.25 rises 25 cm per metre
        along x).  It must stay above the floor at every vertex.
    obstacles : sequence of Cuboid / Column
        Solids cut out of the air volume; each becomes a surface named after it.
        Each must lie inside the room (it may touch the walls, floor and
        ceiling); faces it shares with the room's surfaces disappear.
    patches : sequence of Patch
        Rectangles on the floor, ceiling or a wall that become surfaces of their
        own (the rest of the host surface keeps its name).
    refine : mapping of surface name -> mesh size in m, optional
        Local refinement: a smaller element size on those surfaces (e.g.
        ``{"door": 0.1}``), graded into the rest of the mesh.
    memory_budget : float, optional
        Bytes a solve may use, checked against the estimate before meshing
        (default: the memory available; ``math.inf`` disables).

    Returns
    -------
    Mesh
        Surfaces ``floor`` (z = 0), ``ceiling`` and ``wall_1`` ... ``wall_n``:
        wall i is the vertical face over the edge from vertex i to vertex
        i + 1 (numbered from 1; wall n runs from vertex n back to vertex 1);
        then one surface per obstacle and per patch, by name.  Volume ``air``.

    Raises
    ------
    InputError
        Fewer than 3 vertices, repeated vertices, a self-intersecting or
        zero-area outline, height or fmax not positive and finite, a ceiling
        that meets the floor, an obstacle or patch outside its room or
        surface, overlapping patches, clashing names, order not 1 or 2, or
        air not an :class:`Air`.
    ModelTooLargeError
        The estimated memory of a solve exceeds ``memory_budget``.
    """
    P = _polygon(polygon)
    H = _number("height", height, "m", "give the ceiling height, e.g. height=2.8")
    if ceiling_slope is not None:
        g = _vector("ceiling_slope", ceiling_slope, 2)
        ceiling_slope = tuple(g)
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    n = len(P)
    A, B = P, np.roll(P, -1, axis=0)
    ceil = _Ceiling(P, H, ceiling_slope)
    zc = ceil.z(P[:, 0], P[:, 1])
    if np.any(zc <= 0):
        v = int(np.argmin(zc))
        raise InputError(
            f"the sloped ceiling (height={H:g} m at vertex 1, ceiling_slope={ceiling_slope}) "
            f"reaches {zc[v]:.3g} m at vertex {v + 1} {_fmt(P[v])}: it must stay above the "
            "floor; reduce the slope or raise the height."
        )
    top = float(zc.max())
    scale = max(float(np.ptp(P, axis=0).max()), top)
    tol = 1e-7 * scale
    walls = tuple(f"wall_{i + 1}" for i in range(n))
    base = ("floor", "ceiling", *walls)
    obstacles, patches = tuple(obstacles), tuple(patches)
    _check_parts(P, ceil, top, base, obstacles, patches, tol)
    names = (*base, *(o.name for o in obstacles), *(p.name for p in patches))
    refine = _refinement(refine, names)
    # volume under a planar ceiling = floor area x ceiling height at the
    # floor's centroid; area: floor + inclined ceiling + walls (trapezoids)
    x, y = P[:, 0], P[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    cross = x * yn - xn * y
    a_floor = 0.5 * abs(cross.sum())
    cx, cy = (x + xn) @ cross / (3 * cross.sum()), (y + yn) @ cross / (3 * cross.sum())
    g = ceil.g
    walls_area = float(np.sum(np.hypot(xn - x, yn - y) * 0.5 * (zc + np.roll(zc, -1))))
    _check_budget(a_floor * float(ceil.z(cx, cy)),
                  a_floor * (1 + math.hypot(*g) ** 2) ** 0.5 + a_floor + walls_area,
                  fmax=fmax, order=order, air=air, memory_budget=memory_budget)

    def build(occ):
        bot = [occ.addPoint(float(x), float(y), 0.0) for x, y in P]
        upp = [occ.addPoint(float(x), float(y), float(z)) for (x, y), z in zip(P, zc)]
        lb = [occ.addLine(bot[i], bot[(i + 1) % n]) for i in range(n)]
        lt = [occ.addLine(upp[i], upp[(i + 1) % n]) for i in range(n)]
        lv = [occ.addLine(bot[i], upp[i]) for i in range(n)]
        faces = [occ.addPlaneSurface([occ.addCurveLoop(lb)]),
                 occ.addPlaneSurface([occ.addCurveLoop(lt)])]
        for i in range(n):
            j = (i + 1) % n
            faces.append(occ.addPlaneSurface([occ.addCurveLoop([lb[i], lv[j], lt[i], lv[i]])]))
        vol = occ.addVolume([occ.addSurfaceLoop(faces)])
        dom = [(3, vol)]
        if obstacles:
            tools = [(3, o._build(occ, top + 0.1 * scale) if isinstance(o, Column)
                      else o._build(occ)) for o in obstacles]
            dom, _ = occ.cut(dom, tools)
            if not dom:
                raise InputError("the obstacles fill the whole room; no air is left.")
        named = {}
        if patches:
            tools = [(2, _patch_face(occ, p, P, ceil)) for p in patches]
            _, maps = occ.fragment(dom, tools)
            for p, m in zip(patches, maps[len(dom):]):
                for _, t in m:
                    named[t] = p.name
        return named

    def classify(cx, cy, cz):
        c = np.array([cx, cy, cz])
        if abs(cz) <= tol:
            return "floor"
        if abs(cz - float(ceil.z(cx, cy))) <= tol:
            return "ceiling"
        d = np.linalg.norm(c[:2] - _closest_on_segments(c[:2], A, B), axis=1)
        i = int(np.argmin(d))
        if d[i] <= tol:
            return f"wall_{i + 1}"
        for o in obstacles:  # a face's centre lies inside or on the solid it came from
            inside = (o.contains(c, tol, top + 0.1 * scale) if isinstance(o, Column)
                      else o.contains(c, tol))
            if inside[0]:
                return o.name
        raise RuntimeError(  # pragma: no cover - every face belongs to one of the above
            f"floor_plan: unclassified face at ({cx}, {cy}, {cz})")

    return _mesh_with_gmsh("acoustic_fem_floor_plan", build, classify, names, h, order,
                           refine=refine)


def _check_name(name, taken, where):
    if not isinstance(name, str) or not name.strip() or any(ch.isspace() for ch in name):
        raise InputError(f"{where} name {name!r} must be a non-empty word (no spaces), e.g. 'door'.")
    if name in taken or name == "air":
        raise InputError(
            f"{where} name {name!r} is already used (names in use: {sorted(taken)} and the "
            "volume 'air'); give each obstacle and patch its own name."
        )
    taken.add(name)


def _check_parts(P, ceil, top, base, obstacles, patches, tol):
    """Validate obstacles and patches against the room before any meshing."""
    taken = set(base)
    for k, o in enumerate(obstacles):
        where = f"obstacles[{k}]"
        if not isinstance(o, (Cuboid, Column)):
            raise InputError(f"{where}={o!r} must be a Cuboid or a Column.")
        _check_name(o.name, taken, where)
        o._check(where)
        pts = o.corners(top) if isinstance(o, Column) else o.corners()
        if isinstance(o, Column) and o.top is None:
            pts = pts[pts[:, 2] < top - tol]  # the upper rim runs through the ceiling
            pts = np.concatenate([pts, np.column_stack([pts[:, :2], ceil.z(pts[:, 0], pts[:, 1])])])
        inside = _inside_polygon(pts, P, tol) & (pts[:, 2] >= -tol) & (
            pts[:, 2] <= ceil.z(pts[:, 0], pts[:, 1]) + tol)
        if not inside.all():
            q = pts[np.flatnonzero(~inside)[0]]
            raise InputError(
                f"obstacle {o.name!r} is (partly) outside the room: its point "
                f"({q[0]:.3g}, {q[1]:.3g}, {q[2]:.3g}) is not inside the floor plan between the "
                "floor and the ceiling; move or shrink it."
            )
    lengths = np.linalg.norm(np.roll(P, -1, axis=0) - P, axis=1)
    rects: dict[str, list] = {}
    for k, p in enumerate(patches):
        where = f"patches[{k}]"
        if not isinstance(p, Patch):
            raise InputError(f"{where}={p!r} must be a Patch.")
        _check_name(p.name, taken, where)
        if p.surface not in base:
            raise InputError(
                f"patch {p.name!r} is on surface {p.surface!r}, which the room does not have; "
                f"its surfaces are {list(base)}."
            )
        lo, hi = _vector(f"{where}.lo", p.lo, 2), _vector(f"{where}.hi", p.hi, 2)
        if np.any(hi <= lo):
            raise InputError(
                f"patch {p.name!r}: hi={tuple(hi.tolist())} must exceed lo={tuple(lo.tolist())} in both "
                "coordinates (opposite corners of the rectangle)."
            )
        corners = np.array([[lo[0], lo[1]], [hi[0], lo[1]], [hi[0], hi[1]], [lo[0], hi[1]]])
        if p.surface.startswith("wall_"):
            i = int(p.surface[5:]) - 1
            a, b = P[i], P[(i + 1) % len(P)]
            u = corners[:, 0] / lengths[i]
            xy = a + u[:, None] * (b - a)
            ok = (corners[:, 0] >= -tol) & (corners[:, 0] <= lengths[i] + tol) & (
                corners[:, 1] >= -tol) & (corners[:, 1] <= ceil.z(xy[:, 0], xy[:, 1]) + tol)
            what = (f"within wall {i + 1} (0 <= u <= {lengths[i]:.4g} m along it, 0 <= v <= the "
                    "ceiling height above the floor)")
        else:
            ok = _inside_polygon(corners, P, tol)
            what = "inside the floor plan"
        if not ok.all():
            q = corners[np.flatnonzero(~ok)[0]]
            raise InputError(
                f"patch {p.name!r} on {p.surface!r} has a corner ({q[0]:.4g}, {q[1]:.4g}) that is "
                f"not {what}; move or shrink it."
            )
        for other, (olo, ohi) in rects.get(p.surface, []):
            if np.all(lo < ohi - tol) and np.all(olo < hi - tol):
                raise InputError(
                    f"patches {other!r} and {p.name!r} overlap on {p.surface!r}; a piece of "
                    "surface can have one condition only: separate them."
                )
        rects.setdefault(p.surface, []).append((p.name, (lo, hi)))


def _patch_face(occ, p, P, ceil):
    """Plane surface of a patch, in place on its host surface."""
    lo, hi = np.array(p.lo, float), np.array(p.hi, float)
    uv = [(lo[0], lo[1]), (hi[0], lo[1]), (hi[0], hi[1]), (lo[0], hi[1])]
    if p.surface.startswith("wall_"):
        i = int(p.surface[5:]) - 1
        a, b = P[i], P[(i + 1) % len(P)]
        t = (b - a) / np.linalg.norm(b - a)
        pts = [(a[0] + u * t[0], a[1] + u * t[1], v) for u, v in uv]
    elif p.surface == "floor":
        pts = [(x, y, 0.0) for x, y in uv]
    else:
        pts = [(x, y, float(ceil.z(x, y))) for x, y in uv]
    tags = [occ.addPoint(*map(float, q)) for q in pts]
    lines = [occ.addLine(tags[k], tags[(k + 1) % 4]) for k in range(4)]
    return occ.addPlaneSurface([occ.addCurveLoop(lines)])


def _closest_on_segments(p, A, B):
    """(n, 2) closest point to p on each segment A[i]-B[i]."""
    ab = B - A
    t = np.clip(np.einsum("ij,ij->i", p - A, ab) / np.einsum("ij,ij->i", ab, ab), 0.0, 1.0)
    return A + t[:, None] * ab


def cylinder(radius, height, *, fmax, order=2, air=None, memory_budget=None) -> Mesh:
    """Mesh of the circular cylinder r <= radius, 0 <= z <= height.

    Parameters
    ----------
    radius, height : float
        In metres, positive.
    fmax, order, air, memory_budget
        As for :func:`box`.  Order 2 places the mid-edge nodes on the true
        curved surface (isoparametric cells).

    Returns
    -------
    Mesh
        Surfaces ``side`` (the curved wall), ``bottom`` (z = 0), ``top``
        (z = height); volume ``air``.
    """
    R = _number("radius", radius, "m", "give the cylinder's radius")
    H = _number("height", height, "m", "give the cylinder's height")
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    tol = 1e-7 * max(R, H)
    _check_budget(math.pi * R**2 * H, 2 * math.pi * R * (R + H), fmax=fmax, order=order, air=air,
                  memory_budget=memory_budget)

    def build(occ):
        occ.addCylinder(0.0, 0.0, 0.0, 0.0, 0.0, H, R)

    def classify(cx, cy, cz):
        if abs(cz) <= tol:
            return "bottom"
        if abs(cz - H) <= tol:
            return "top"
        return "side"  # the lateral face has its centre of mass on the axis

    return _mesh_with_gmsh("acoustic_fem_cylinder", build, classify, ("side", "bottom", "top"),
                           h, order)


def sphere(radius, *, fmax, order=2, air=None, memory_budget=None) -> Mesh:
    """Mesh of the ball of the given radius centred at the origin.

    ``fmax``, ``order``, ``air`` and ``memory_budget`` as for :func:`box`.

    Returns
    -------
    Mesh
        Surface ``shell``; volume ``air``.  Order 2 (default) curves the cells
        onto the sphere.
    """
    R = _number("radius", radius, "m", "give the sphere's radius")
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    _check_budget(4 / 3 * math.pi * R**3, 4 * math.pi * R**2, fmax=fmax, order=order, air=air,
                  memory_budget=memory_budget)

    def build(occ):
        occ.addSphere(0.0, 0.0, 0.0, R)

    return _mesh_with_gmsh("acoustic_fem_sphere", build, lambda *c: "shell", ("shell",), h,
                           order)


def plan(polygon, *, fmax, order=2, air=None) -> Mesh:
    """2D mesh of a polygonal region (a room's floor plan for a 2D study).

    Parameters
    ----------
    polygon : sequence of (x, y)
        As for :func:`floor_plan`.
    fmax, order, air
        As for :func:`box`.

    Returns
    -------
    Mesh
        2D mesh (triangles) with boundary curves ``wall_1`` ... ``wall_n``
        (wall i runs from vertex i to vertex i + 1) and the region ``air``.
    """
    P = _polygon(polygon)
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    n = len(P)
    A, B = P, np.roll(P, -1, axis=0)
    tol = 1e-7 * float(np.ptp(P, axis=0).max())

    def build(occ):
        pts = [occ.addPoint(float(x), float(y), 0.0) for x, y in P]
        lines = [occ.addLine(pts[i], pts[(i + 1) % n]) for i in range(n)]
        occ.addPlaneSurface([occ.addCurveLoop(lines)])

    def classify(cx, cy, cz):
        d = np.linalg.norm(
            np.array([cx, cy]) - _closest_on_segments(np.array([cx, cy]), A, B), axis=1)
        i = int(np.argmin(d))
        if d[i] > tol:  # pragma: no cover - every boundary curve is an edge
            raise RuntimeError(f"plan: unclassified curve at ({cx}, {cy})")
        return f"wall_{i + 1}"

    names = tuple(f"wall_{i + 1}" for i in range(n))
    return _mesh_with_gmsh("acoustic_fem_plan", build, classify, names, h, order, dim=2)


def tube(length, *, fmax, order=2, air=None) -> Mesh:
    """1D mesh of the segment 0 <= x <= length (plane waves in a duct or tube).

    Returns
    -------
    Mesh
        1D mesh with end points ``x0`` (x = 0) and ``x1`` (x = length) and the
        region ``air``.
    """
    L = _number("length", length, "m", "give the tube's length")
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)

    def build(occ):
        occ.addLine(occ.addPoint(0.0, 0.0, 0.0), occ.addPoint(L, 0.0, 0.0))

    return _mesh_with_gmsh("acoustic_fem_tube", build,
                           lambda cx, cy, cz: "x0" if abs(cx) < 0.5 * L else "x1",
                           ("x0", "x1"), h, order, dim=1)
