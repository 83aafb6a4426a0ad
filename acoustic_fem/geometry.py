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
from pathlib import Path

import numpy as np

from ._errors import InputError
from .air import Air
from .mesh import Mesh

__all__ = ["BOX_FACES", "ELEMENTS_PER_WAVELENGTH", "box", "floor_plan", "mesh_size"]

#: Elements per wavelength at fmax used by the builders, by mesh order.
ELEMENTS_PER_WAVELENGTH = {1: 16.0, 2: 6.0}

#: Names of the box faces: x0 is the face x = 0, x1 the face x = Lx, ...
BOX_FACES = ("x0", "x1", "y0", "y1", "z0", "z1")


# --------------------------------------------------------------- validation
def _number(name, value, unit, fix):
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.floating, np.integer)):
        raise InputError(f"{name}={value!r} must be a number in {unit}; {fix}.")
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise InputError(f"{name}={value!r} {unit} must be positive and finite; {fix}.")
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
    "Mesh.MeshSizeMin", "Mesh.MshFileVersion",
)


def _mesh_with_gmsh(model_name, build, classify, names, h, order):
    """Run gmsh: ``build(occ)`` makes the volume, ``classify(cx, cy, cz)`` names faces."""
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
        build(occ)
        occ.synchronize()
        vols = gmsh.model.getEntities(3)
        faces = gmsh.model.getBoundary(vols, oriented=False, combined=True)
        groups: dict[str, list[int]] = {n: [] for n in names}
        for _, tag in faces:  # a handful of geometric faces, not mesh entities
            groups[classify(*occ.getCenterOfMass(2, tag))].append(tag)
        empty = [n for n, t in groups.items() if not t]
        if empty:  # pragma: no cover - would be a bug in the builder
            raise RuntimeError(f"{model_name}: no face found for surfaces {empty}")
        for name, tags in groups.items():
            gmsh.model.addPhysicalGroup(2, tags, name=name)
        gmsh.model.addPhysicalGroup(3, [t for _, t in vols], name="air")
        gmsh.option.setNumber("Mesh.MeshSizeMax", h)
        gmsh.option.setNumber("Mesh.MeshSizeMin", 0.3 * h)
        gmsh.option.setNumber("Mesh.Algorithm3D", 10)
        gmsh.model.mesh.generate(3)
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


def box(size, *, fmax, order=2, air=None) -> Mesh:
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
    """
    L = _box_size(size)
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    lengths = np.array(L)
    tol = 1e-7 * lengths.max()

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

    return _mesh_with_gmsh("acoustic_fem_box", build, classify, BOX_FACES, h, order)


def floor_plan(polygon, height, *, fmax, order=2, air=None) -> Mesh:
    """Mesh of a room with a polygonal floor and a flat ceiling.

    The floor outline ``polygon`` (in the plane z = 0) is extruded straight
    up to z = ``height``.

    Parameters
    ----------
    polygon : sequence of (x, y)
        Vertices of a simple polygon in metres, in order around the outline,
        clockwise or counter-clockwise; non-convex outlines are allowed.
        Do not repeat the first vertex at the end.  At least 3 vertices, no
        two the same, no edges that cross or touch except neighbours at their
        shared vertex.
    height : float
        Ceiling height in metres.
    fmax : float
        Highest frequency of interest in Hz; sets the mesh size
        h = (c / fmax) / N, N = 6 for order 2 and 16 for order 1 (chosen to
        exceed :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`, derived
        from 1D dispersion, with margin; see the module notes for P1).
    order : int
        Geometry order of the mesh, 2 (default) or 1.
    air : Air, optional
        Air whose speed of sound sets the mesh size (default ``Air()``).

    Returns
    -------
    Mesh
        Surfaces ``floor`` (z = 0), ``ceiling`` (z = height) and ``wall_1``
        ... ``wall_n``: wall i is the vertical face over the edge from
        vertex i to vertex i + 1 (numbered from 1; wall n runs from vertex n
        back to vertex 1).  Volume ``air``.

    Raises
    ------
    InputError
        Fewer than 3 vertices, repeated vertices, a self-intersecting or
        zero-area outline, height or fmax not positive and finite, order not
        1 or 2, or air not an :class:`Air`.
    """
    P = _polygon(polygon)
    H = _number("height", height, "m", "give the ceiling height, e.g. height=2.8")
    h = mesh_size(fmax, order=order, air=air)
    order = _order(order)
    n = len(P)
    A, B = P, np.roll(P, -1, axis=0)
    scale = max(float(np.ptp(P, axis=0).max()), H)
    tol = 1e-7 * scale
    names = ("floor", "ceiling", *(f"wall_{i + 1}" for i in range(n)))

    def build(occ):
        pts = [occ.addPoint(float(x), float(y), 0.0) for x, y in P]
        lines = [occ.addLine(pts[i], pts[(i + 1) % n]) for i in range(n)]
        floor = occ.addPlaneSurface([occ.addCurveLoop(lines)])
        occ.extrude([(2, floor)], 0.0, 0.0, H)

    def classify(cx, cy, cz):
        if abs(cz) <= tol:
            return "floor"
        if abs(cz - H) <= tol:
            return "ceiling"
        d = np.linalg.norm(
            np.array([cx, cy]) - _closest_on_segments(np.array([cx, cy]), A, B), axis=1
        )
        i = int(np.argmin(d))
        if d[i] > tol:  # pragma: no cover - every side face stands on an edge
            raise RuntimeError(f"floor_plan: unclassified face at ({cx}, {cy}, {cz})")
        return f"wall_{i + 1}"

    return _mesh_with_gmsh("acoustic_fem_floor_plan", build, classify, names, h, order)


def _closest_on_segments(p, A, B):
    """(n, 2) closest point to p on each segment A[i]-B[i]."""
    ab = B - A
    t = np.clip(np.einsum("ij,ij->i", p - A, ab) / np.einsum("ij,ij->i", ab, ab), 0.0, 1.0)
    return A + t[:, None] * ab
