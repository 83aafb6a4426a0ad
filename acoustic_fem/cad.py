"""Rooms from CAD files (STEP, BREP) and from closed STL surfaces.

:func:`import_cad` reads the solids of a STEP or BREP file with gmsh's
OpenCASCADE kernel, names the boundary faces by a mapping, checks the
estimated cost against the memory budget and meshes the air at the size the
room builders use (:func:`acoustic_fem.geometry.mesh_size`).
:func:`import_stl` does the same for a closed triangulated surface.
:func:`cad_faces` and :func:`stl_patches` list the faces (tag, centre, area,
normal) so that the mapping can be written.

Naming faces
------------
``surfaces`` maps a region name to a *selector*:

* gmsh face tags: an int or a list of ints (as listed by :func:`cad_faces`);
* :class:`FacesInBox` ``(lo, hi)``: faces whose centre of mass lies in the
  axis-aligned box;
* :class:`FacesOnPlane` ``(point, normal)``: planar faces lying in the plane;
* a list mixing the above (their union).

A face matched by two names is an error naming both; a name whose selector
matches nothing is an error listing the faces available.  Faces matched by
no name are called ``surface_<tag>`` (CAD) or ``others`` (STL, default
``"walls"``).  The air is the volume region ``air``.

Units
-----
STEP files carry their length unit; they are converted to metres
(gmsh option ``Geometry.OCCTargetUnit = "M"``, restored afterwards).  BREP
files have no unit: their coordinates are taken as metres.  STL files have
no unit either: metres.
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from ._cost import check_memory, estimate_cost, memory_budget_value
from ._errors import InputError, MeshError, MeshReadError
from .mesh import Mesh, MeshWarning

__all__ = [
    "CAD_FORMATS",
    "CadFace",
    "FacesInBox",
    "FacesOnPlane",
    "cad_faces",
    "import_cad",
    "import_stl",
    "stl_patches",
]

#: CAD file suffixes read by :func:`import_cad`, mapped to gmsh's format name.
CAD_FORMATS: dict[str, str] = {".step": "step", ".stp": "step", ".brep": "brep"}

#: Largest angle (rad) between the normals of a face's parts (or of a face
#: and a FacesOnPlane rule) for them to count as one plane: single-precision
#: STL coordinates tilt small triangles by up to about 1e-5 rad.
PLANE_ANGLE_TOL = 1e-4
#: Largest distance from its plane of a point of a face that counts as
#: planar, relative to the face's size (CAD) or the model's size (STL).
PLANE_DISTANCE_TOL = 1e-6

#: Feature angle (degrees) at which an STL surface is split into patches: the
#: value of gmsh's own STL remeshing example (common practice).
STL_FEATURE_ANGLE = 40.0


# ------------------------------------------------------------------- faces
@dataclass(frozen=True, eq=False)
class CadFace:
    """One boundary face of an imported model.

    Attributes
    ----------
    tag : int
        gmsh surface tag (CAD) or patch number (STL); use it in a selector.
    centre : (3,) float array
        Centre of mass of the face (m).
    area : float
        Area (m²).
    normal : (3,) float array or None
        Unit normal of a planar face, None for a curved one.  For STL
        patches it points out of the air; for CAD faces its sign is the one
        the CAD file gives.
    kind : str
        Surface type as gmsh reports it ("Plane", "Cylinder", "BSpline
        surface", "Discrete surface", ...).
    """

    tag: int
    centre: np.ndarray
    area: float
    normal: np.ndarray | None
    kind: str

    def __str__(self) -> str:
        n = "curved" if self.normal is None else f"normal {_fmt(self.normal)}"
        return f"face {self.tag}: centre {_fmt(self.centre)}, area {self.area:.6g} m², {n}"


def _fmt(v) -> str:
    return "(" + ", ".join(f"{float(x) + 0.0:.6g}" for x in v) + ")"


def _point3(name, value) -> np.ndarray:
    try:
        a = np.array(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name}={value!r} must be a point (x, y, z) in metres.") from None
    if a.shape != (3,) or not np.all(np.isfinite(a)):
        raise InputError(f"{name}={value!r} must be three finite coordinates (x, y, z) in metres.")
    return a


@dataclass(frozen=True, init=False)
class FacesInBox:
    """Faces whose centre of mass lies in the box ``lo <= centre <= hi``.

    Parameters
    ----------
    lo, hi : (3,) sequences of float
        Opposite corners (m); each coordinate of ``lo`` at most that of ``hi``.
    tol : float
        The box is widened by ``tol`` metres on every side (default 1e-5).
    """

    lo: tuple
    hi: tuple
    tol: float

    def __init__(self, lo, hi, tol: float = 1e-5):
        lo_a, hi_a = _point3("lo", lo), _point3("hi", hi)
        if np.any(lo_a > hi_a):
            raise InputError(
                f"FacesInBox: lo={tuple(lo_a)} exceeds hi={tuple(hi_a)} in some coordinate; "
                "give the lower corner first."
            )
        object.__setattr__(self, "lo", tuple(lo_a))
        object.__setattr__(self, "hi", tuple(hi_a))
        object.__setattr__(self, "tol", _tolerance(tol))

    def matches(self, faces: Sequence[CadFace]) -> np.ndarray:
        """(n_faces,) bool: which faces the rule selects."""
        C = np.array([f.centre for f in faces]).reshape(-1, 3)
        lo, hi = np.array(self.lo) - self.tol, np.array(self.hi) + self.tol
        return np.all((C >= lo) & (C <= hi), axis=1)


@dataclass(frozen=True, init=False)
class FacesOnPlane:
    """Planar faces lying in the plane through ``point`` with normal ``normal``.

    A face matches when it is planar, its normal is parallel to ``normal``
    (either sign, within :data:`PLANE_ANGLE_TOL` rad) and its centre lies
    within ``tol`` metres of the plane.  Curved faces never match.

    Parameters
    ----------
    point : (3,) sequence of float
        A point of the plane (m).
    normal : (3,) sequence of float
        Normal direction of the plane (any length but zero).
    tol : float
        Distance tolerance (m), default 1e-5 (binary STL files store single
        precision coordinates: about 1e-6 m at 10 m from the origin).
    """

    point: tuple
    normal: tuple
    tol: float

    def __init__(self, point, normal, tol: float = 1e-5):
        p, n = _point3("point", point), _point3("normal", normal)
        norm = float(np.linalg.norm(n))
        if norm == 0.0:
            raise InputError("FacesOnPlane: normal=(0, 0, 0) has no direction; give e.g. (0, 0, 1).")
        object.__setattr__(self, "point", tuple(p))
        object.__setattr__(self, "normal", tuple(n / norm))
        object.__setattr__(self, "tol", _tolerance(tol))

    def matches(self, faces: Sequence[CadFace]) -> np.ndarray:
        """(n_faces,) bool: which faces the rule selects."""
        n = np.array(self.normal)
        out = np.zeros(len(faces), dtype=bool)
        planar = [i for i, f in enumerate(faces) if f.normal is not None]
        if planar:
            N = np.array([faces[i].normal for i in planar])
            C = np.array([faces[i].centre for i in planar])
            parallel = np.abs(N @ n) >= math.cos(PLANE_ANGLE_TOL)
            on = np.abs((C - np.array(self.point)) @ n) <= self.tol
            out[planar] = parallel & on
        return out


def _tolerance(tol) -> float:
    from .geometry import _number

    return _number("tol", tol, "m", "give a small positive distance, e.g. tol=1e-5")


_RULES = (FacesInBox, FacesOnPlane)


def _selector_mask(name, sel, faces, tags) -> np.ndarray:
    """(n_faces,) bool mask of the faces that ``sel`` selects."""
    if isinstance(sel, _RULES):
        return sel.matches(faces)
    if isinstance(sel, np.ndarray) and sel.ndim == 1:
        sel = sel.tolist()
    if isinstance(sel, (bool, np.bool_)):
        raise InputError(f"surfaces[{name!r}]={sel!r} is not a selector; {_SELECTOR_HELP}")
    if isinstance(sel, (int, np.integer)):
        t = int(sel)
        if t not in tags:
            raise InputError(
                f"surfaces[{name!r}]: face tag {t} is not a boundary face of the model; "
                f"the faces are:\n{_face_list(faces)}"
            )
        return np.array([f.tag == t for f in faces])
    if isinstance(sel, (list, tuple)) and len(sel) > 0:
        mask = np.zeros(len(faces), dtype=bool)
        for s in sel:
            if isinstance(s, (list, tuple)):
                raise InputError(f"surfaces[{name!r}]: nested lists are not selectors; flatten {sel!r}.")
            mask |= _selector_mask(name, s, faces, tags)
        return mask
    raise InputError(f"surfaces[{name!r}]={sel!r} is not a selector; {_SELECTOR_HELP}")


_SELECTOR_HELP = (
    "give a face tag, a list of face tags, FacesInBox(lo, hi), FacesOnPlane(point, normal) "
    "or a list of these."
)


def _face_list(faces, limit=40) -> str:
    lines = [f"  {f}" for f in faces[:limit]]
    if len(faces) > limit:
        lines.append(f"  ... and {len(faces) - limit} more (see cad_faces / stl_patches)")
    return "\n".join(lines)


def _assign(faces: Sequence[CadFace], surfaces, others: str | None, reserved=("air",)):
    """Region name -> list of face tags, from the ``surfaces`` mapping."""
    if surfaces is None:
        surfaces = {}
    if not isinstance(surfaces, Mapping):
        raise InputError(
            f"surfaces={surfaces!r} must be a mapping of region name -> selector, e.g. "
            "{'floor': FacesOnPlane((0, 0, 0), (0, 0, 1))}."
        )
    if others is not None and (not isinstance(others, str) or not others):
        raise InputError(f"others={others!r} must be a non-empty region name (str) or None.")
    tags = {f.tag for f in faces}
    names = list(surfaces)
    masks = []
    for name in names:
        if not isinstance(name, str) or not name:
            raise InputError(f"surface name {name!r} must be a non-empty string.")
        if name in reserved:
            raise InputError(
                f"surface name {name!r} is the name of the volume region; choose another name."
            )
        mask = _selector_mask(name, surfaces[name], faces, tags)
        if not mask.any():
            raise InputError(
                f"surfaces[{name!r}] = {surfaces[name]!r} matches no face of the model; the "
                f"faces are:\n{_face_list(faces)}"
            )
        masks.append(mask)
    groups: dict[str, list[int]] = {}
    if masks:
        Mx = np.array(masks)
        count = Mx.sum(axis=0)
        if np.any(count > 1):
            i = int(np.flatnonzero(count > 1)[0])
            two = [names[k] for k in np.flatnonzero(Mx[:, i])]
            raise InputError(
                f"{faces[i]} is matched by both {two[0]!r} and {two[1]!r}; make the selectors "
                "disjoint (e.g. shrink a FacesInBox or list tags)."
            )
        for name, mask in zip(names, masks):
            groups[name] = [faces[i].tag for i in np.flatnonzero(mask)]
        free = np.flatnonzero(count == 0)
    else:
        free = np.arange(len(faces))
    for i in free:
        nm = others if others is not None else f"surface_{faces[i].tag}"
        if nm in reserved:
            raise InputError(f"others={nm!r} is the name of the volume region; choose another.")
        if others is None and nm in groups:
            raise InputError(
                f"surface name {nm!r} is also the default name of {faces[i]}, which no selector "
                "matches; rename the region or select that face."
            )
        groups.setdefault(nm, []).append(faces[i].tag)
    return groups


# -------------------------------------------------------------- gmsh runs
_NUM_OPTIONS = (
    "General.Terminal", "General.Verbosity", "General.NumThreads", "Mesh.Algorithm3D",
    "Mesh.MeshSizeMax", "Mesh.MeshSizeMin", "Mesh.MshFileVersion", "Mesh.Binary",
    "Mesh.SaveAll",
)


@contextlib.contextmanager
def _gmsh_model(model_name: str):
    """A fresh gmsh model; the caller's gmsh session (if any) is left as found."""
    import gmsh

    was_init = gmsh.isInitialized()
    if not was_init:
        gmsh.initialize(readConfigFiles=False, interruptible=False)
    saved, prev_model, added = {}, None, False
    unit = None
    try:
        if was_init:
            saved = {k: gmsh.option.getNumber(k) for k in _NUM_OPTIONS}
            prev_model = gmsh.model.getCurrent()
        unit = gmsh.option.getString("Geometry.OCCTargetUnit")
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.Verbosity", 0)
        gmsh.option.setNumber("General.NumThreads", 1)
        gmsh.model.add(model_name)
        added = True
        yield gmsh
    finally:
        if gmsh.isInitialized():
            if added:
                gmsh.model.setCurrent(model_name)
                gmsh.model.remove()
            if unit is not None:
                # OpenCASCADE keeps the unit in a process-wide setting that an
                # empty option does not reset: "MM" is its own default
                gmsh.option.setString("Geometry.OCCTargetUnit", "MM")
                gmsh.option.setString("Geometry.OCCTargetUnit", unit)
            for k, v in saved.items():
                gmsh.option.setNumber(k, v)
            if prev_model is not None:
                gmsh.model.setCurrent(prev_model)
        if not was_init:
            gmsh.finalize()


def _mesh_current(gmsh, h: float, order: int) -> Mesh:
    """Mesh the current model in 3D at size h (the builders' settings) and read it."""
    from .mesh_io import read_mesh

    gmsh.option.setNumber("Mesh.MeshSizeMax", h)
    gmsh.option.setNumber("Mesh.MeshSizeMin", 0.3 * h)
    gmsh.option.setNumber("Mesh.Algorithm3D", 10)
    try:
        gmsh.model.mesh.generate(3)
        if order == 2:
            gmsh.model.mesh.setOrder(2)
    except Exception as exc:  # gmsh raises a bare Exception with its last error
        raise MeshError(
            f"gmsh could not mesh the model: {str(exc)[:300]}; check the geometry for "
            "self-intersections or very small features."
        ) from None
    fd, tmp = tempfile.mkstemp(suffix=".msh")
    os.close(fd)
    try:
        gmsh.option.setNumber("Mesh.MshFileVersion", 4.1)
        gmsh.option.setNumber("Mesh.Binary", 1)
        gmsh.option.setNumber("Mesh.SaveAll", 0)
        gmsh.write(tmp)
        return read_mesh(tmp)
    finally:
        Path(tmp).unlink(missing_ok=True)


def _check_args(fmax, order, air, memory_budget):
    from .geometry import _air, _number, _order

    fmax = _number("fmax", fmax, "Hz", "give the highest frequency of interest, e.g. fmax=200")
    order = _order(order)
    air = _air(air)
    if memory_budget is not None:
        memory_budget_value(memory_budget)
    return fmax, order, air


def _existing(path, kind: str) -> Path:
    if not isinstance(path, (str, os.PathLike)):
        raise InputError(f"path={path!r} must be a file name (str or Path).")
    p = Path(path)
    if not p.exists():
        raise MeshReadError(f"{kind} file {p} does not exist; check the path.")
    if p.is_dir():
        raise MeshReadError(f"{p} is a folder, not a {kind} file.")
    return p


# ------------------------------------------------------------------- CAD
def _cad_path(path) -> tuple[Path, str]:
    p = _existing(path, "CAD")
    fmt = CAD_FORMATS.get(p.suffix.lower())
    if fmt is None:
        raise InputError(
            f"cannot import {p.name}: suffix {p.suffix!r} is not a CAD format read here; "
            f"supported: {sorted(CAD_FORMATS)}. For an STL surface use import_stl; for a volume "
            "mesh use read_mesh."
        )
    return p, fmt


def _load_cad(gmsh, path: Path, fmt: str, heal: bool):
    """Import the solids of ``path`` into the current model; returns (volumes, faces)."""
    occ = gmsh.model.occ
    if fmt == "step":
        gmsh.option.setString("Geometry.OCCTargetUnit", "M")
    try:
        occ.importShapes(str(path), highestDimOnly=True, format=fmt)
    except Exception as exc:
        raise MeshReadError(
            f"cannot read CAD file {path}: {str(exc)[:300]}; check that it is a complete "
            f"{fmt.upper()} file."
        ) from None
    occ.synchronize()
    if heal or not gmsh.model.getEntities(3):
        # a model given as faces only: sew them and make solids of closed shells
        occ.healShapes()
        occ.synchronize()
    vols = gmsh.model.getEntities(3)
    if not vols:
        n_faces = len(gmsh.model.getEntities(2))
        raise MeshError(
            f"{path} holds no solid ({n_faces} faces, which do not close a volume even after "
            "sewing); export the room as a closed solid from your CAD tool."
        )
    if len(vols) > 1:
        # touching or overlapping solids: make them share their common faces
        occ.fragment(vols[:1], vols[1:])
        occ.synchronize()
        vols = gmsh.model.getEntities(3)
    bnd = gmsh.model.getBoundary(vols, combined=True, oriented=False, recursive=False)
    tags = sorted({abs(t) for _, t in bnd})
    faces = [_cad_face(gmsh, t) for t in tags]  # a loop over CAD faces, not mesh entities
    return [t for _, t in vols], faces


def _cad_face(gmsh, tag: int) -> CadFace:
    occ = gmsh.model.occ
    centre = np.array(occ.getCenterOfMass(2, tag))
    area = float(occ.getMass(2, tag))
    kind = gmsh.model.getType(2, tag)
    lo, hi = gmsh.model.getParametrizationBounds(2, tag)
    # planar test on a 5 x 5 grid of the underlying surface: normals parallel
    # and the points on the plane through the centre
    u, v = np.meshgrid(np.linspace(lo[0], hi[0], 5), np.linspace(lo[1], hi[1], 5))
    uv = np.column_stack([u.ravel(), v.ravel()]).ravel()
    N = np.array(gmsh.model.getNormal(tag, uv)).reshape(-1, 3)
    X = np.array(gmsh.model.getValue(2, tag, uv)).reshape(-1, 3)
    normal = None
    nn = np.linalg.norm(N, axis=1)
    if np.all(nn > 0):
        N = N / nn[:, None]
        size = max(float(np.ptp(X, axis=0).max()), math.sqrt(area), 1e-300)
        if np.all(np.abs(N @ N[0]) >= math.cos(PLANE_ANGLE_TOL)) and np.all(
            np.abs((X - centre) @ N[0]) <= PLANE_DISTANCE_TOL * size
        ):
            normal = N[0]
    for a in (centre,) + ((normal,) if normal is not None else ()):
        a.setflags(write=False)
    return CadFace(int(tag), centre, area, normal, kind)


def cad_faces(path, *, heal: bool = False) -> tuple[CadFace, ...]:
    """The boundary faces of the solids in a STEP or BREP file.

    Parameters
    ----------
    path : str or Path
        ``.step``/``.stp`` (converted to metres) or ``.brep`` (metres).
    heal : bool
        Run OpenCASCADE's shape healing (sewing, small edges/faces) even if
        the file holds solids; files of faces only are always healed.  Give
        the same value to :func:`import_cad` so the tags agree.

    Returns
    -------
    tuple of CadFace
        By ascending tag: tag, centre (3,), area, normal (3,) or None.
    """
    p, fmt = _cad_path(path)
    with _gmsh_model("acoustic_fem_cad_faces") as gmsh:
        _, faces = _load_cad(gmsh, p, fmt, heal)
    return tuple(faces)


def import_cad(
    path,
    *,
    fmax: float,
    order: int = 2,
    surfaces: Mapping[str, object] | None = None,
    others: str | None = None,
    air=None,
    memory_budget: float | None = None,
    heal: bool = False,
) -> Mesh:
    """Mesh of the air inside the solids of a STEP or BREP file.

    Parameters
    ----------
    path : str or Path
        ``.step``/``.stp`` (its unit converted to metres) or ``.brep``
        (coordinates in metres).  Several solids are fused into one
        conforming mesh (their shared faces become interior).
    fmax : float
        Highest frequency of interest in Hz; sets the mesh size exactly as
        the room builders do (:func:`acoustic_fem.geometry.mesh_size`).
    order : int
        Geometry order, 2 (default; mid-edge nodes on the true curved
        faces) or 1.
    surfaces : mapping of str -> selector, optional
        Names of boundary regions: each selector is a face tag, a list of
        tags, :class:`FacesInBox`, :class:`FacesOnPlane` or a list of these
        (see :func:`cad_faces` for the tags and centres).
    others : str, optional
        Name for every face no selector matches; default: each such face is
        its own region ``surface_<tag>``.
    air : Air, optional
        Sets the speed of sound for the mesh size (default ``Air()``).
    memory_budget : float, optional
        Bytes the model may use; default the machine's available memory.
        Checked with :func:`acoustic_fem.check_memory` after reading the
        solids (volume and area from OpenCASCADE) and before meshing.
    heal : bool
        Also heal files that hold solids (see :func:`cad_faces`).

    Returns
    -------
    Mesh
        Tetrahedra with the named surfaces and the volume ``air``.

    Raises
    ------
    InputError
        fmax, order, air, memory_budget or a selector not acceptable (a
        selector matching no face, a face matched twice).
    ModelTooLargeError
        The estimated memory exceeds the budget (nothing is meshed).
    MeshReadError
        Missing or unreadable file.
    MeshError
        No closed solid in the file, or gmsh failed to mesh it.
    """
    from .geometry import mesh_size

    fmax, order, air = _check_args(fmax, order, air, memory_budget)
    p, fmt = _cad_path(path)
    h = mesh_size(fmax, order=order, air=air)
    with _gmsh_model("acoustic_fem_cad") as gmsh:
        vols, faces = _load_cad(gmsh, p, fmt, heal)
        groups = _assign(faces, surfaces, others)
        volume = sum(float(gmsh.model.occ.getMass(3, v)) for v in vols)
        area = sum(f.area for f in faces)
        check_memory(estimate_cost(volume, area, fmax=fmax, order=order, air=air),
                     budget=memory_budget)
        for name, tags in groups.items():
            gmsh.model.addPhysicalGroup(2, tags, name=name)
        gmsh.model.addPhysicalGroup(3, vols, name="air")
        return _mesh_current(gmsh, h, order)


# ------------------------------------------------------------------- STL
def _read_stl(path: Path):
    """(n, 3) points and (m, 3) triangles of an STL file (vertices merged exactly)."""
    if path.suffix.lower() != ".stl":
        raise InputError(
            f"cannot import {path.name} as STL: suffix {path.suffix!r}; give a .stl file "
            "(for STEP/BREP use import_cad, for volume meshes read_mesh)."
        )
    from .mesh_io import _meshio_read

    with warnings.catch_warnings():
        # meshio probes the binary layout of ASCII files with an overflowing product
        warnings.simplefilter("ignore", RuntimeWarning)
        m = _meshio_read(path)
    tri = [np.asarray(b.data) for b in m.cells if b.type == "triangle"]
    if not tri or sum(len(t) for t in tri) == 0:
        raise MeshError(f"{path} holds no triangles; an STL surface of the room is needed.")
    T = np.vstack(tri).astype(np.int64)
    P = np.asarray(m.points, dtype=float)[:, :3]
    if not np.all(np.isfinite(P)):
        raise MeshError(f"{path} has NaN or infinite vertex coordinates.")
    return P, T


def _edge_table(T: np.ndarray):
    """Directed edges of the triangles: (3m, 2) vertex pairs and the triangle of each."""
    E = T[:, [[0, 1], [1, 2], [2, 0]]].reshape(-1, 2)
    tri = np.repeat(np.arange(len(T)), 3)
    return E, tri


def _check_closed(P: np.ndarray, T: np.ndarray, source: str) -> np.ndarray:
    """Triangles of a closed, manifold surface, orientated consistently per shell.

    Raises MeshError for open or non-manifold edges.  Returns (m', 3) triangles
    (exactly degenerate ones — a vertex repeated — removed with a warning).
    """
    rep = (T[:, 0] == T[:, 1]) | (T[:, 1] == T[:, 2]) | (T[:, 0] == T[:, 2])
    if np.any(rep):
        warnings.warn(
            f"{source}: removed {int(rep.sum())} degenerate triangle(s) with a repeated vertex.",
            MeshWarning, stacklevel=3,
        )
        T = T[~rep]
        if len(T) == 0:
            raise MeshError(f"{source} holds only degenerate triangles.")
    E, _ = _edge_table(T)
    n = len(P)
    key = np.minimum(E[:, 0], E[:, 1]) * n + np.maximum(E[:, 0], E[:, 1])
    ukey, inv, count = np.unique(key, return_inverse=True, return_counts=True)
    open_ = count == 1
    many = count > 2
    if open_.any() or many.any():
        parts = []
        if open_.any():
            k = int(np.flatnonzero(open_)[0])
            a, b = divmod(int(ukey[k]), n)
            parts.append(
                f"{int(open_.sum())} open edge(s) (used by one triangle only), e.g. near "
                f"{_fmt(0.5 * (P[a] + P[b]))}"
            )
        if many.any():
            k = int(np.flatnonzero(many)[0])
            a, b = divmod(int(ukey[k]), n)
            parts.append(
                f"{int(many.sum())} non-manifold edge(s) (shared by more than two triangles), "
                f"e.g. near {_fmt(0.5 * (P[a] + P[b]))}"
            )
        raise MeshError(
            f"STL surface {source} is not closed: " + "; ".join(parts) + ". The surface must "
            "enclose the air completely, every edge shared by exactly two triangles; close "
            "the surface in your CAD tool (or export the room as a solid)."
        )
    return _orient_consistently(T, inv, len(ukey))


def _orient_consistently(T: np.ndarray, inv: np.ndarray, n_edges: int) -> np.ndarray:
    """Flip triangles so that neighbours traverse their shared edge in opposite directions.

    Flips propagate along a breadth-first spanning tree of the triangle
    adjacency graph; the parity of the path to the root is accumulated by
    pointer jumping (log2(depth) vectorised steps).
    """
    import scipy.sparse as sp
    from scipy.sparse.csgraph import breadth_first_order, connected_components

    m = len(T)
    E, tri = _edge_table(T)
    forward = E[:, 0] < E[:, 1]
    order = np.argsort(inv, kind="stable")  # the two occurrences of each edge, adjacent
    t1, t2 = tri[order[0::2]], tri[order[1::2]]
    same = forward[order[0::2]] == forward[order[1::2]]  # same direction: inconsistent
    G = sp.coo_matrix((np.concatenate([same, same]).astype(np.int8) + 1,
                       (np.concatenate([t1, t2]), np.concatenate([t2, t1]))), shape=(m, m)).tocsr()
    G.sum_duplicates()
    _, label = connected_components(G, directed=False)
    pred = np.full(m, -1, dtype=np.int64)
    for root in np.unique(label, return_index=True)[1]:  # one BFS per shell
        nodes, p = breadth_first_order(G, int(root), directed=False, return_predecessors=True)
        pred[nodes] = p[nodes]
    pred[pred < 0] = -1
    has = pred >= 0
    par = np.zeros(m, dtype=bool)
    idx = np.flatnonzero(has)
    par[idx] = (np.asarray(G[idx, pred[idx]]).ravel() - 1).astype(bool)
    anc = pred.copy()
    acc = par.copy()
    while np.any(anc >= 0):
        a = anc >= 0
        acc[a] ^= acc[anc[a]]
        anc_next = anc.copy()
        anc_next[a] = anc[anc[a]]
        anc = anc_next
    T = T.copy()
    T[acc] = T[acc][:, [0, 2, 1]]
    # check: now every edge is traversed once in each direction
    E2, _ = _edge_table(T)
    if np.unique(E2, axis=0).shape[0] != len(E2):
        raise MeshError(
            "the STL surface cannot be orientated consistently (a one-sided surface such as a "
            "Moebius strip); export a closed solid from your CAD tool."
        )
    return T


def _shells(P: np.ndarray, T: np.ndarray):
    """Per triangle shell label, per shell signed volume, bounding boxes, areas."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    n = len(P)
    E, _ = _edge_table(T)
    G = coo_matrix((np.ones(len(E)), (E[:, 0], E[:, 1])), shape=(n, n))
    _, vlabel = connected_components(G, directed=False)
    lab = vlabel[T[:, 0]]
    _, lab = np.unique(lab, return_inverse=True)
    k = int(lab.max()) + 1
    a, b, c = P[T[:, 0]], P[T[:, 1]], P[T[:, 2]]
    # divergence theorem: V = sum over triangles of a·(b×c)/6 (outward orientation)
    vol = np.bincount(lab, weights=np.einsum("ij,ij->i", a, np.cross(b, c)) / 6.0, minlength=k)
    area = 0.5 * np.linalg.norm(np.cross(b - a, c - a), axis=1)
    lo = np.full((k, 3), np.inf)
    hi = np.full((k, 3), -np.inf)
    for j in range(3):
        np.minimum.at(lo, lab, P[T[:, j]])
        np.maximum.at(hi, lab, P[T[:, j]])
    return lab, vol, lo, hi, area


def _stl_geometry(path: Path):
    """Checked STL: points (n, 3), triangles (m, 3) orientated out of their shell,
    shell label per triangle (m,), the outer shell, air volume and boundary area."""
    P, T = _read_stl(path)
    T = _check_closed(P, T, str(path))
    lab, vol, lo, hi, tri_area = _shells(P, T)
    # make every shell's triangles face out of the shell it bounds
    neg = vol[lab] < 0
    T[neg] = T[neg][:, [0, 2, 1]]
    vol = np.abs(vol)
    flat = vol <= 1e-12 * max(float(np.ptp(P, axis=0).max()), 1e-300) ** 3
    if np.any(flat):
        k = int(np.flatnonzero(flat)[0])
        raise MeshError(f"{path}: a closed surface encloses no volume (shell {k + 1}).")
    outer = int(np.argmax(vol))
    for k in range(len(vol)):
        if k == outer:
            continue
        inside = np.all(lo[k] >= lo[outer]) and np.all(hi[k] <= hi[outer])
        nested = any(
            j not in (k, outer) and np.all(lo[k] >= lo[j]) and np.all(hi[k] <= hi[j])
            for j in range(len(vol))
        )
        if not inside or nested:
            raise MeshError(
                f"{path} holds {len(vol)} separate closed surfaces; import_stl meshes the air "
                "inside one outer surface, optionally around obstacles inside it (not nested "
                f"in each other). Surface {k + 1} spans {_fmt(lo[k])}-{_fmt(hi[k])}; export "
                "one room per file."
            )
    volume = float(vol[outer] - (vol.sum() - vol[outer]))
    return P, T, lab, outer, volume, float(tri_area.sum())


def _classify_stl(gmsh, P, T, lab, feature_angle):
    """Put the STL into gmsh as discrete surfaces and split them into patches.

    Returns one ``(tag, triangles)`` pair per patch, triangles as (k, 3)
    indices into P (gmsh keeps the node numbers given here).
    """
    n_shell = int(lab.max()) + 1
    start = 1
    for k in range(n_shell):  # one discrete surface per shell
        s = gmsh.model.addDiscreteEntity(2)
        if k == 0:
            gmsh.model.mesh.addNodes(2, s, np.arange(1, len(P) + 1), P.ravel())
        Tk = T[lab == k]
        gmsh.model.mesh.addElementsByType(s, 2, np.arange(start, start + len(Tk)),
                                          (Tk + 1).ravel())
        start += len(Tk)
    gmsh.model.mesh.classifySurfaces(math.radians(feature_angle), True, True, math.pi)
    gmsh.model.mesh.createGeometry()
    patches = []
    for _, tag in gmsh.model.getEntities(2):  # a loop over patches, vectorised inside
        _, _, enodes = gmsh.model.mesh.getElements(2, tag)
        tri = np.concatenate([np.asarray(e, dtype=np.int64) for e in enodes]).reshape(-1, 3) - 1
        patches.append((int(tag), tri))
    return patches


def _stl_faces(P, T, lab, outer, patches):
    """CadFace of every patch (normal pointing out of the air) and the shell of each."""
    vshell = np.full(len(P), -1, dtype=np.int64)
    vshell[T.ravel()] = np.repeat(lab, 3)
    size = max(float(np.ptp(P, axis=0).max()), 1e-300)
    faces, shell = [], []
    for tag, tri in patches:
        a, b, c = P[tri[:, 0]], P[tri[:, 1]], P[tri[:, 2]]
        cr = np.cross(b - a, c - a)
        ar = 0.5 * np.linalg.norm(cr, axis=1)
        area = float(ar.sum())
        centre = ((a + b + c) / 3.0 * ar[:, None]).sum(axis=0) / area
        k = int(vshell[tri[0, 0]])
        nrm = cr[ar > 0] / (2.0 * ar[ar > 0])[:, None]
        ref = cr.sum(axis=0)  # area-weighted mean normal (the patch is orientated)
        ref = ref / max(float(np.linalg.norm(ref)), 1e-300)
        normal = None
        if np.all(np.abs(nrm @ ref) >= math.cos(PLANE_ANGLE_TOL)) and np.all(
            np.abs((a - centre) @ ref) <= PLANE_DISTANCE_TOL * size
        ):
            # gmsh may re-orientate the patch triangles: take the sign of our
            # own shell-outward triangles in the same plane
            normal = _outward_normal(P, T[lab == k], ref, centre, size)
            if k != outer:  # an obstacle's outside is the air's inside
                normal = -normal
            normal.setflags(write=False)
        centre.setflags(write=False)
        faces.append(CadFace(tag, centre, area, normal, "Discrete surface"))
        shell.append(k)
    return faces, shell


def _outward_normal(P, Tk, normal, centre, size):
    """``normal`` signed like the shell-outward triangles of ``Tk`` lying in its plane."""
    a, b, c = P[Tk[:, 0]], P[Tk[:, 1]], P[Tk[:, 2]]
    cr = np.cross(b - a, c - a)
    ar = np.linalg.norm(cr, axis=1)
    n = cr / np.where(ar > 0, ar, 1.0)[:, None]
    inplane = (np.abs(n @ normal) >= math.cos(PLANE_ANGLE_TOL)) & (
        np.abs((a - centre) @ normal) <= PLANE_DISTANCE_TOL * size)
    s = float(np.sum((n[inplane] @ normal) * ar[inplane]))
    return normal.copy() if s >= 0 else -normal


def stl_patches(path, *, feature_angle: float = STL_FEATURE_ANGLE) -> tuple[CadFace, ...]:
    """The patches an STL surface is split into (for the ``surfaces`` mapping).

    Parameters
    ----------
    path : str or Path
        A closed ``.stl`` surface (metres).
    feature_angle : float
        Triangles meeting at more than this angle (degrees) are put in
        different patches (gmsh ``classifySurfaces``); default 40.

    Returns
    -------
    tuple of CadFace
        Patch number (``tag``), centre, area and, for flat patches, the unit
        normal pointing out of the air.
    """
    angle = _feature_angle(feature_angle)
    p = _existing(path, "STL")
    P, T, lab, outer, _, _ = _stl_geometry(p)
    with _gmsh_model("acoustic_fem_stl_patches") as gmsh:
        patches = _classify_stl(gmsh, P, T, lab, angle)
        faces, _ = _stl_faces(P, T, lab, outer, patches)
    return tuple(faces)


def _feature_angle(a) -> float:
    from .geometry import _number

    v = _number("feature_angle", a, "degrees", "give an angle between 0 and 180, e.g. 40")
    if v >= 180:
        raise InputError(f"feature_angle={a!r} degrees must be below 180; e.g. 40.")
    return v


def import_stl(
    path,
    *,
    fmax: float,
    order: int = 2,
    surfaces: Mapping[str, object] | None = None,
    others: str = "walls",
    feature_angle: float = STL_FEATURE_ANGLE,
    air=None,
    memory_budget: float | None = None,
) -> Mesh:
    """Mesh of the air enclosed by a closed STL surface.

    The surface is checked first (every edge shared by exactly two
    triangles; triangles re-orientated consistently); its volume (divergence
    theorem) and area give the cost estimate, checked against the budget
    before gmsh runs.  gmsh then splits the surface into patches at
    ``feature_angle``, re-meshes them at the builders' size and fills the
    volume with tetrahedra.  Closed surfaces inside the outer one are
    obstacles (their inside is not air).

    Parameters
    ----------
    path : str or Path
        ``.stl`` file (ASCII or binary), coordinates in metres.
    fmax : float
        Highest frequency of interest in Hz; sets the mesh size
        (:func:`acoustic_fem.geometry.mesh_size`).
    order : int
        Geometry order, 2 (default) or 1.
    surfaces : mapping of str -> selector, optional
        Names of boundary regions (patch numbers from :func:`stl_patches`,
        :class:`FacesInBox`, :class:`FacesOnPlane`, or lists of these).
    others : str
        Name of the patches no selector matches (default ``"walls"``; with
        no ``surfaces`` the whole boundary).
    feature_angle : float
        Patch split angle in degrees (default 40).
    air : Air, optional
    memory_budget : float, optional
        Bytes the model may use; default the machine's available memory.

    Returns
    -------
    Mesh
        Tetrahedra, named surfaces, volume ``air``.  Flat faces stay exactly
        flat (the new surface nodes lie on the STL triangles); curved
        surfaces are as faithful as the STL triangulation.

    Raises
    ------
    MeshError
        The surface is not closed (open or non-manifold edges, with a
        location), holds separate bodies, or gmsh failed.
    InputError, ModelTooLargeError, MeshReadError
        As for :func:`import_cad`.
    """
    from .geometry import mesh_size

    fmax, order, air = _check_args(fmax, order, air, memory_budget)
    angle = _feature_angle(feature_angle)
    p = _existing(path, "STL")
    P, T, lab, outer, volume, area = _stl_geometry(p)
    check_memory(estimate_cost(volume, area, fmax=fmax, order=order, air=air),
                 budget=memory_budget)
    h = mesh_size(fmax, order=order, air=air)
    with _gmsh_model("acoustic_fem_stl") as gmsh:
        patches = _classify_stl(gmsh, P, T, lab, angle)
        faces, shell = _stl_faces(P, T, lab, outer, patches)
        groups = _assign(faces, surfaces, others)
        geo = gmsh.model.geo
        loops = {}
        for k in sorted(set(shell)):
            loops[k] = geo.addSurfaceLoop([f.tag for f, s in zip(faces, shell) if s == k])
        vol = geo.addVolume([loops[outer]] + [loops[k] for k in loops if k != outer])
        geo.synchronize()
        for name, tags in groups.items():
            gmsh.model.addPhysicalGroup(2, tags, name=name)
        gmsh.model.addPhysicalGroup(3, [vol], name="air")
        return _mesh_current(gmsh, h, order)
