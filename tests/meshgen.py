"""Small gmsh mesh generators used as test fixtures and by the benchmarks.

Every generator builds its geometry with gmsh's OpenCASCADE kernel, meshes
it, writes a ``.msh`` file at ``path`` and returns ``str(path)``.  Named
physical groups mark the boundary pieces and the domain (always called
``air``).  Physical group tags are numbered 1, 2, 3, ... in the order the
groups are created, so they are unique within a file across dimensions.

Common keyword arguments:

``h``
    target element size (``Mesh.MeshSizeMax = h``, ``Mesh.MeshSizeMin = h/2``).
``order``
    1 (linear) or 2 (quadratic; the extra nodes are placed on the true
    curved geometry by ``gmsh.model.mesh.setOrder``).
``version``
    msh file format version, 2.2 or 4.1.

The output is deterministic: meshing runs on a single thread, so two calls
with the same arguments write byte-identical files.

Each call runs ``gmsh.initialize()`` ... ``gmsh.finalize()`` itself, so it
must not be called while the caller has its own gmsh session open.
"""

from __future__ import annotations

import os
from typing import Callable, Iterable, Sequence

import gmsh

__all__ = [
    "box_msh",
    "rect_msh",
    "line_msh",
    "cylinder_msh",
    "sphere_msh",
    "disc_msh",
    "lshape_msh",
    "unnamed_groups_msh",
    "untagged_mixed_msh",
    "LSHAPE_FLOOR",
    "LSHAPE_HEIGHT",
]

#: Floor polygon (x, y) in metres of the L-shaped test room, counter-clockwise.
LSHAPE_FLOOR = ((0.0, 0.0), (5.0, 0.0), (5.0, 2.5), (2.2, 2.5), (2.2, 4.1), (0.0, 4.1))
#: Height in metres of the L-shaped test room.
LSHAPE_HEIGHT = 2.7


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------


def _check(h: float, order: int, version: float) -> None:
    if not (isinstance(h, (int, float)) and h > 0):
        raise ValueError(f"mesh size h must be a positive number, got {h!r}")
    if order not in (1, 2):
        raise ValueError(f"order must be 1 or 2, got {order!r}")
    if version not in (2.2, 4.1):
        raise ValueError(f"msh version must be 2.2 or 4.1, got {version!r}")


def _positive(name: str, value: float) -> float:
    value = float(value)
    if not value > 0:
        raise ValueError(f"{name} must be positive, got {value!r}")
    return value


def _run(
    path: str | os.PathLike,
    build: Callable[[], None],
    dim: int,
    h: float,
    order: int = 1,
    version: float = 4.1,
    save_all: bool = False,
) -> str:
    """Initialise gmsh, call ``build`` (geometry + physical groups), mesh, write."""
    _check(h, order, version)
    path = os.fspath(path)
    parent = os.path.dirname(os.path.abspath(path))
    os.makedirs(parent, exist_ok=True)

    gmsh.initialize([], readConfigFiles=False, interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.Verbosity", 0)
        # single thread => reproducible meshes
        gmsh.option.setNumber("General.NumThreads", 1)
        gmsh.option.setNumber("Mesh.MaxNumThreads1D", 1)
        gmsh.option.setNumber("Mesh.MaxNumThreads2D", 1)
        gmsh.option.setNumber("Mesh.MaxNumThreads3D", 1)
        gmsh.option.setNumber("Mesh.MeshSizeMax", float(h))
        gmsh.option.setNumber("Mesh.MeshSizeMin", float(h) / 2.0)
        gmsh.option.setNumber("Mesh.Algorithm3D", 10)  # HXT
        gmsh.option.setNumber("Mesh.MshFileVersion", float(version))
        gmsh.option.setNumber("Mesh.Binary", 0)
        gmsh.option.setNumber("Mesh.SaveAll", 1 if save_all else 0)
        gmsh.model.add("meshgen")

        build()

        gmsh.model.occ.synchronize()
        gmsh.model.mesh.generate(dim)
        if order != 1:
            gmsh.model.mesh.setOrder(order)
        gmsh.write(path)
    finally:
        gmsh.finalize()
    return path


class _Groups:
    """Creates physical groups with consecutive tags 1, 2, 3, ..."""

    def __init__(self) -> None:
        self.next_tag = 1

    def add(self, dim: int, tags: Iterable[int], name: str | None = None, tag: int | None = None) -> int:
        tags = sorted(int(t) for t in tags)
        if not tags:
            raise RuntimeError(f"physical group {name!r} (dim {dim}) would be empty")
        if tag is None:
            tag = self.next_tag
        self.next_tag = max(self.next_tag, tag + 1)
        if name is None:
            gmsh.model.addPhysicalGroup(dim, tags, tag)
        else:
            gmsh.model.addPhysicalGroup(dim, tags, tag, name)
        return tag


def _entities(dim: int) -> list[int]:
    return [t for (_, t) in gmsh.model.occ.getEntities(dim)]


def _find_by_com(
    dim: int,
    where: Callable[[float, float, float], bool],
    tags: Sequence[int] | None = None,
) -> list[int]:
    """Entities of dimension ``dim`` whose centre of mass satisfies ``where``.

    Call after ``gmsh.model.occ.synchronize()``.
    """
    if tags is None:
        tags = _entities(dim)
    return [t for t in tags if where(*gmsh.model.occ.getCenterOfMass(dim, t))]


def _near(a: float, b: float, scale: float = 1.0) -> bool:
    return abs(a - b) <= 1e-7 * max(1.0, abs(scale))


def _box_faces(size: Sequence[float]) -> dict[str, list[int]]:
    """Map ``x0, x1, y0, y1, z0, z1`` to the surfaces of [0,Lx]x[0,Ly]x[0,Lz]."""
    scale = max(size)
    faces = {}
    for axis, letter in enumerate("xyz"):
        for side, value in (("0", 0.0), ("1", size[axis])):
            faces[letter + side] = _find_by_com(
                2, lambda *c, a=axis, v=value: _near(c[a], v, scale)
            )
    return faces


def _rect_sides(size: Sequence[float]) -> dict[str, list[int]]:
    scale = max(size)
    sides = {}
    for axis, letter in enumerate("xy"):
        for side, value in (("0", 0.0), ("1", size[axis])):
            sides[letter + side] = _find_by_com(
                1, lambda *c, a=axis, v=value: _near(c[a], v, scale)
            )
    return sides


def _size3(size: Sequence[float]) -> tuple[float, float, float]:
    if len(size) != 3:
        raise ValueError(f"size must be (Lx, Ly, Lz), got {size!r}")
    return tuple(_positive(n, v) for n, v in zip(("Lx", "Ly", "Lz"), size))


# ---------------------------------------------------------------------------
# generators
# ---------------------------------------------------------------------------


def box_msh(
    path: str | os.PathLike,
    size: Sequence[float] = (1.0, 1.0, 1.0),
    h: float = 0.25,
    order: int = 1,
    version: float = 4.1,
) -> str:
    """Box [0,Lx]x[0,Ly]x[0,Lz]; surfaces ``x0 x1 y0 y1 z0 z1``, volume ``air``."""
    L = _size3(size)

    def build() -> None:
        occ = gmsh.model.occ
        vol = occ.addBox(0.0, 0.0, 0.0, *L)
        occ.synchronize()
        groups = _Groups()
        for name, tags in _box_faces(L).items():
            groups.add(2, tags, name)
        groups.add(3, [vol], "air")

    return _run(path, build, 3, h, order, version)


def rect_msh(
    path: str | os.PathLike,
    size: Sequence[float] = (1.0, 1.0),
    h: float = 0.25,
    order: int = 1,
    version: float = 4.1,
) -> str:
    """Rectangle [0,Lx]x[0,Ly] in z=0; curves ``x0 x1 y0 y1``, surface ``air``."""
    if len(size) != 2:
        raise ValueError(f"size must be (Lx, Ly), got {size!r}")
    L = (_positive("Lx", size[0]), _positive("Ly", size[1]))

    def build() -> None:
        occ = gmsh.model.occ
        surf = occ.addRectangle(0.0, 0.0, 0.0, *L)
        occ.synchronize()
        groups = _Groups()
        for name, tags in _rect_sides(L).items():
            groups.add(1, tags, name)
        groups.add(2, [surf], "air")

    return _run(path, build, 2, h, order, version)


def line_msh(
    path: str | os.PathLike,
    length: float = 1.0,
    h: float = 0.1,
    order: int = 1,
    version: float = 4.1,
) -> str:
    """Segment [0, L] on the x axis; points ``x0`` and ``x1``, curve ``air``."""
    L = _positive("length", length)

    def build() -> None:
        occ = gmsh.model.occ
        p0 = occ.addPoint(0.0, 0.0, 0.0)
        p1 = occ.addPoint(L, 0.0, 0.0)
        line = occ.addLine(p0, p1)
        occ.synchronize()
        groups = _Groups()
        groups.add(0, [p0], "x0")
        groups.add(0, [p1], "x1")
        groups.add(1, [line], "air")

    return _run(path, build, 1, h, order, version)


def cylinder_msh(
    path: str | os.PathLike,
    radius: float = 0.5,
    height: float = 1.0,
    h: float = 0.2,
    order: int = 2,
    version: float = 4.1,
) -> str:
    """Cylinder r <= R, 0 <= z <= H; surfaces ``side bottom top``, volume ``air``."""
    R = _positive("radius", radius)
    H = _positive("height", height)

    def build() -> None:
        occ = gmsh.model.occ
        vol = occ.addCylinder(0.0, 0.0, 0.0, 0.0, 0.0, H, R)
        occ.synchronize()
        scale = max(R, H)
        groups = _Groups()
        # the lateral surface has its centre of mass on the axis at z = H/2
        groups.add(2, _find_by_com(2, lambda x, y, z: _near(z, 0.5 * H, scale)), "side")
        groups.add(2, _find_by_com(2, lambda x, y, z: _near(z, 0.0, scale)), "bottom")
        groups.add(2, _find_by_com(2, lambda x, y, z: _near(z, H, scale)), "top")
        groups.add(3, [vol], "air")

    return _run(path, build, 3, h, order, version)


def sphere_msh(
    path: str | os.PathLike,
    radius: float = 1.0,
    h: float = 0.3,
    order: int = 2,
    version: float = 4.1,
) -> str:
    """Ball of radius R centred at the origin; surface ``shell``, volume ``air``."""
    R = _positive("radius", radius)

    def build() -> None:
        occ = gmsh.model.occ
        vol = occ.addSphere(0.0, 0.0, 0.0, R)
        occ.synchronize()
        groups = _Groups()
        groups.add(2, _entities(2), "shell")
        groups.add(3, [vol], "air")

    return _run(path, build, 3, h, order, version)


def disc_msh(
    path: str | os.PathLike,
    radius: float = 1.0,
    h: float = 0.2,
    order: int = 2,
    version: float = 4.1,
) -> str:
    """Disc of radius R in z=0 centred at the origin; curve ``rim``, surface ``air``."""
    R = _positive("radius", radius)

    def build() -> None:
        occ = gmsh.model.occ
        surf = occ.addDisk(0.0, 0.0, 0.0, R, R)
        occ.synchronize()
        groups = _Groups()
        groups.add(1, _entities(1), "rim")
        groups.add(2, [surf], "air")

    return _run(path, build, 2, h, order, version)


def lshape_msh(
    path: str | os.PathLike,
    h: float = 0.5,
    order: int = 1,
    version: float = 4.1,
) -> str:
    """L-shaped room: ``LSHAPE_FLOOR`` extruded by ``LSHAPE_HEIGHT`` along z.

    Surfaces ``floor`` (z=0), ``ceiling`` (z=2.7), ``walls``; volume ``air``.
    """
    H = LSHAPE_HEIGHT

    def build() -> None:
        occ = gmsh.model.occ
        pts = [occ.addPoint(x, y, 0.0) for (x, y) in LSHAPE_FLOOR]
        lines = [occ.addLine(pts[i], pts[(i + 1) % len(pts)]) for i in range(len(pts))]
        loop = occ.addCurveLoop(lines)
        floor = occ.addPlaneSurface([loop])
        occ.extrude([(2, floor)], 0.0, 0.0, H)
        occ.synchronize()
        scale = 5.0
        surfaces = _entities(2)
        bottom = _find_by_com(2, lambda x, y, z: _near(z, 0.0, scale), surfaces)
        top = _find_by_com(2, lambda x, y, z: _near(z, H, scale), surfaces)
        walls = [s for s in surfaces if s not in bottom and s not in top]
        groups = _Groups()
        groups.add(2, bottom, "floor")
        groups.add(2, top, "ceiling")
        groups.add(2, walls, "walls")
        groups.add(3, _entities(3), "air")

    return _run(path, build, 3, h, order, version)


def unnamed_groups_msh(
    path: str | os.PathLike,
    h: float = 0.25,
    version: float = 4.1,
) -> str:
    """Unit box: unnamed physical surface (tag 7) on x=0, named volume ``air``."""

    def build() -> None:
        occ = gmsh.model.occ
        vol = occ.addBox(0.0, 0.0, 0.0, 1.0, 1.0, 1.0)
        occ.synchronize()
        groups = _Groups()
        groups.add(2, _box_faces((1.0, 1.0, 1.0))["x0"], name=None, tag=7)
        groups.add(3, [vol], "air", tag=1)

    return _run(path, build, 3, h, 1, version)


def untagged_mixed_msh(
    path: str | os.PathLike,
    h: float = 0.25,
    version: float = 4.1,
) -> str:
    """Unit box, ``Mesh.SaveAll = 1``, no physical groups.

    The file holds untagged points, lines, triangles and tetrahedra.
    """

    def build() -> None:
        gmsh.model.occ.addBox(0.0, 0.0, 0.0, 1.0, 1.0, 1.0)

    return _run(path, build, 3, h, 1, version, save_all=True)
