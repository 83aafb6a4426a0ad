"""Reading and writing meshes, through a registry keyed by file suffix.

gmsh ``.msh`` (2.2 and 4.1) is the main path: physical-group names become
the names of boundary and volume regions.  Any other format meshio reads is
accepted; its cell sets (if any) become regions.
"""

from __future__ import annotations

import contextlib
import io
from pathlib import Path
from typing import Callable

import numpy as np

from ._atomic import atomic_path
from ._errors import MeshError, MeshReadError
from .elements import CellType
from .mesh import Mesh

__all__ = ["read_mesh", "write_mesh", "from_meshio", "READERS", "WRITERS"]

# meshio cell type -> (CellType, geometry order)
_MESHIO_TYPES = {
    "line": (CellType.LINE, 1),
    "line3": (CellType.LINE, 2),
    "triangle": (CellType.TRIANGLE, 1),
    "triangle6": (CellType.TRIANGLE, 2),
    "tetra": (CellType.TETRAHEDRON, 1),
    "tetra10": (CellType.TETRAHEDRON, 2),
}
_CELL_DIM = {"vertex": 0, "line": 1, "line3": 1, "triangle": 2, "triangle6": 2, "tetra": 3,
             "tetra10": 3, "quad": 2, "quad8": 2, "quad9": 2, "hexahedron": 3, "wedge": 3,
             "pyramid": 3, "hexahedron20": 3, "hexahedron27": 3, "wedge15": 3, "pyramid13": 3}
_MESHIO_NAME = {v: k for k, v in _MESHIO_TYPES.items()}


def _meshio_read(path: Path):
    import meshio

    sink = io.StringIO()
    try:
        with contextlib.redirect_stdout(sink), contextlib.redirect_stderr(sink):
            return meshio.read(str(path))
    except SystemExit:
        raise MeshReadError(
            f"cannot read mesh file {path}: the reader gave up ({sink.getvalue().strip()[:200]!r}); "
            "check the file is a complete mesh in a format meshio knows."
        ) from None
    except Exception as exc:  # meshio raises many kinds of errors on bad files
        raise MeshReadError(
            f"cannot read mesh file {path}: {type(exc).__name__}: {str(exc)[:300]}. Check that "
            "the file is a complete mesh (gmsh .msh 2.2/4.1, .vtu, ...)."
        ) from None


def from_meshio(m, *, source: str = "mesh") -> Mesh:
    """Convert a ``meshio.Mesh`` into a :class:`Mesh`.

    The top-dimensional simplex cells form the enclosure.  gmsh physical
    groups (``cell_data['gmsh:physical']`` with ``field_data`` names) or
    meshio cell sets become named regions; a gmsh group without a name is
    called ``boundary_<tag>`` or ``volume_<tag>``.
    """
    blocks = [(b.type, np.asarray(b.data)) for b in m.cells]
    if not blocks or all(len(d) == 0 for _, d in blocks):
        raise MeshError(f"{source} holds no cells: an empty mesh cannot be solved.")
    dims = sorted({_CELL_DIM.get(t, -1) for t, d in blocks if len(d)})
    unknown = sorted({t for t, d in blocks if t not in _CELL_DIM})
    if unknown:
        raise MeshError(f"{source} holds cell types {unknown} that acoustic_fem does not know.")
    top = dims[-1]
    top_types = sorted({t for t, d in blocks if _CELL_DIM[t] == top and len(d)})
    bad = [t for t in top_types if t not in _MESHIO_TYPES]
    if bad or top == 0:
        raise MeshError(
            f"{source}: the enclosure cells are of type {top_types}; only simplices are "
            "supported (line, triangle, tetra, first or second order) — remesh with simplices."
        )
    if len(top_types) > 1:
        raise MeshError(
            f"{source} mixes cell types {top_types} of one dimension; use first- or "
            "second-order cells throughout."
        )
    ct, order = _MESHIO_TYPES[top_types[0]]

    phys = m.cell_data.get("gmsh:physical")
    names: dict[tuple[int, int], str] = {}
    for name, (tag, gdim) in {k: tuple(np.asarray(v).ravel()[:2]) for k, v in m.field_data.items()}.items():
        names[(int(gdim), int(tag))] = str(name)
    has_groups = phys is not None and any(np.any(np.asarray(p) > 0) for p in phys)
    has_sets = any(not str(k).startswith("gmsh:") for k in (getattr(m, "cell_sets", None) or {}))
    if len(dims) > 1 and not has_groups and not has_sets:
        raise MeshError(
            f"{source} holds cells of dimensions {dims} but no physical group says which form "
            "the enclosure; add a named volume group (gmsh: Physical Volume / Physical Surface "
            "in 2D) and named groups for the walls."
        )
    if has_groups:
        top_tagged = any(
            np.any(np.asarray(p) > 0) for (t, _), p in zip(blocks, phys) if _CELL_DIM[t] == top
        )
        if len(dims) > 1 and not top_tagged:
            raise MeshError(
                f"{source} has physical groups only on its {dims[:-1]}-dimensional cells and "
                f"none on its {top}-dimensional cells; add a named volume group."
            )

    # the enclosure cells
    cell_parts, cell_tags = [], []
    for i, (t, d) in enumerate(blocks):
        if _CELL_DIM[t] == top:
            cell_parts.append(d)
            cell_tags.append(np.asarray(phys[i]) if has_groups else np.zeros(len(d), int))
    cells = np.vstack(cell_parts)
    ctags = np.concatenate(cell_tags)

    volumes: dict[str, np.ndarray] = {}
    boundaries: dict[str, list] = {}
    facet_type = _MESHIO_NAME.get((ct.facet, order)) if ct.facet is not None else "vertex"
    if has_groups:
        for tag in np.unique(ctags[ctags > 0]):
            nm = names.get((top, int(tag)), f"volume_{int(tag)}")
            volumes[nm] = np.flatnonzero(ctags == tag)
        for i, (t, d) in enumerate(blocks):
            if _CELL_DIM[t] != top - 1:
                continue
            if t != facet_type:
                raise MeshError(
                    f"{source}: boundary cells of type {t!r} do not match the {top_types[0]!r} "
                    f"enclosure cells (expected {facet_type!r}); export all cells at one order."
                )
            tags = np.asarray(phys[i])
            for tag in np.unique(tags[tags > 0]):
                nm = names.get((top - 1, int(tag)), f"boundary_{int(tag)}")
                boundaries.setdefault(nm, []).append(d[tags == tag])
    elif has_sets:
        offsets = {}
        off = 0
        for i, (t, d) in enumerate(blocks):
            if _CELL_DIM[t] == top:
                offsets[i] = off
                off += len(d)
        for nm, per_block in m.cell_sets.items():
            if str(nm).startswith("gmsh:"):
                continue
            for i, idx in enumerate(per_block):
                if idx is None or len(idx) == 0:
                    continue
                t, d = blocks[i]
                if _CELL_DIM[t] == top:
                    volumes.setdefault(str(nm), [])
                    volumes[str(nm)] = np.concatenate([np.asarray(volumes[str(nm)], int),
                                                       offsets[i] + np.asarray(idx)])
                elif _CELL_DIM[t] == top - 1 and t == facet_type:
                    boundaries.setdefault(str(nm), []).append(d[np.asarray(idx)])
    if not volumes:
        volumes = {"volume": np.arange(len(cells))}
    bnd = {k: np.vstack(v) for k, v in boundaries.items()}
    return Mesh(np.asarray(m.points, dtype=float)[:, :3] if m.points.shape[1] >= 3 else
                np.hstack([m.points, np.zeros((len(m.points), 3 - m.points.shape[1]))]),
                cells, ct, order, bnd, volumes)


def _read_any(path: Path) -> Mesh:
    return from_meshio(_meshio_read(path), source=str(path))


def _write_msh(path: Path, mesh: Mesh) -> None:
    """gmsh MSH 2.2 ASCII (its $PhysicalNames keeps every region name)."""
    import meshio

    top = mesh.dim
    ctype = _MESHIO_NAME[(mesh.cell_type, mesh.geometry_order)]
    ftype = (
        _MESHIO_NAME[(mesh.cell_type.facet, mesh.geometry_order)] if mesh.cell_type.facet
        else "vertex"
    )
    field_data = {}
    cells, phys = [], []
    tag = 0
    region_of_cell = np.zeros(mesh.n_cells, dtype=int)
    for name in mesh.volume_names:
        tag += 1
        field_data[name] = np.array([tag, top])
        region_of_cell[mesh.volumes[name]] = tag
    if np.any(region_of_cell == 0):
        tag += 1
        field_data["volume_unassigned"] = np.array([tag, top])
        region_of_cell[region_of_cell == 0] = tag
    for t in np.unique(region_of_cell):
        cells.append((ctype, mesh.cells[region_of_cell == t]))
        phys.append(np.full(int((region_of_cell == t).sum()), t))
    for name in mesh.surface_names:
        tag += 1
        field_data[name] = np.array([tag, top - 1])
        f = mesh.boundaries[name]
        cells.append((ftype, f))
        phys.append(np.full(len(f), tag))
    m = meshio.Mesh(
        mesh.points, cells,
        cell_data={"gmsh:physical": phys, "gmsh:geometrical": [p.copy() for p in phys]},
        field_data=field_data,
    )
    sink = io.StringIO()
    with contextlib.redirect_stdout(sink):
        meshio.write(str(path), m, file_format="gmsh22", binary=False)


#: readers by file suffix; anything else goes to meshio's own detection
READERS: dict[str, Callable[[Path], Mesh]] = {".msh": _read_any}
#: writers by file suffix
WRITERS: dict[str, Callable[[Path, Mesh], None]] = {".msh": _write_msh}


def read_mesh(path) -> Mesh:
    """Read a mesh file into a :class:`Mesh`.

    Parameters
    ----------
    path : str or Path
        A gmsh ``.msh`` (2.2 or 4.1) or any file meshio reads.

    Returns
    -------
    Mesh
        Physical-group names become boundary regions (points in 1D, edges in
        2D, triangles in 3D) and volume regions.

    Raises
    ------
    MeshReadError
        Missing or unreadable file.
    MeshError
        Unusable mesh (degenerate cells, facets tagged off the boundary, ...).
    """
    p = Path(path)
    if not p.exists():
        raise MeshReadError(f"mesh file {p} does not exist; check the path.")
    if p.is_dir():
        raise MeshReadError(f"{p} is a folder, not a mesh file.")
    reader = READERS.get(p.suffix.lower(), _read_any)
    return reader(p)


def write_mesh(path, mesh: Mesh, *, overwrite: bool = False) -> Path:
    """Write ``mesh`` to ``path`` (``.msh``, gmsh 2.2 ASCII) keeping every region name.

    The file is written atomically; an existing file is replaced only with
    ``overwrite=True``.
    """
    p = Path(path)
    writer = WRITERS.get(p.suffix.lower())
    if writer is None:
        from ._errors import InputError

        raise InputError(f"cannot write meshes as {p.suffix!r}; supported: {sorted(WRITERS)}.")
    with atomic_path(p, overwrite=overwrite) as tmp:
        tmp_msh = tmp.with_suffix(p.suffix)
        try:
            writer(tmp_msh, mesh)
            tmp_msh.replace(tmp)
        finally:
            if tmp_msh.exists():
                tmp_msh.unlink()
    return p
