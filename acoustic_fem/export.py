"""Export of results: VTK (.vtu) files for viewers and CSV tables.

The VTU writer is our own (VTK XML, base64 binary with UInt64 headers) so
that the mode frequencies travel as ``FieldData`` in the file, which meshio's
VTU writer would drop.  Complex fields are written as three real arrays,
``<name>_real``, ``<name>_imag`` and ``<name>_abs``.
"""

from __future__ import annotations

import base64
import csv
import math
from pathlib import Path
from typing import Mapping

import numpy as np

from ._atomic import atomic_path
from ._errors import InputError
from .dofs import DofMap
from .elements import CellType

__all__ = ["write_vtk", "write_modes_csv", "write_fields_vtu", "mode_array_name"]

# VTK cell type ids (VTK file formats, "VTKCellType")
_VTK_TYPE = {
    (CellType.LINE, 1): 3, (CellType.LINE, 2): 21,
    (CellType.TRIANGLE, 1): 5, (CellType.TRIANGLE, 2): 22,
    (CellType.TETRAHEDRON, 1): 10, (CellType.TETRAHEDRON, 2): 24,
}
_VTK_DTYPE = {np.dtype("float64"): "Float64", np.dtype("int64"): "Int64",
              np.dtype("uint8"): "UInt8", np.dtype("float32"): "Float32"}


def mode_array_name(index: int, frequency: float) -> str:
    """Name of the point-data array of a mode, e.g. ``mode_003_41.250Hz``."""
    return f"mode_{index:03d}_{frequency:.3f}Hz"


def _b64(a: np.ndarray) -> str:
    a = np.ascontiguousarray(a)
    raw = a.tobytes()
    return base64.b64encode(np.uint64(len(raw)).tobytes() + raw).decode("ascii")


def _array(name: str, a: np.ndarray, ncomp: int = 1) -> str:
    a = np.asarray(a)
    if a.dtype not in _VTK_DTYPE:
        a = a.astype(np.float64)
    return (
        f'<DataArray type="{_VTK_DTYPE[a.dtype]}" Name="{name}" NumberOfComponents="{ncomp}" '
        f'format="binary">{_b64(a)}</DataArray>\n'
    )


def _split_complex(fields: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    out = {}
    for name, v in fields.items():
        v = np.asarray(v)
        if np.iscomplexobj(v):
            out[f"{name}_real"] = v.real
            out[f"{name}_imag"] = v.imag
            out[f"{name}_abs"] = np.abs(v)
        else:
            out[name] = v.astype(float)
    return out


def write_fields_vtu(path, dofs: DofMap, point_data: Mapping[str, np.ndarray], *,
                     field_data: Mapping[str, np.ndarray] | None = None,
                     cell_data: Mapping[str, np.ndarray] | None = None,
                     overwrite: bool = False) -> Path:
    """Write fields on the DOFs of ``dofs`` as a VTK unstructured grid.

    Parameters
    ----------
    path : str or Path (``.vtu``)
    dofs : DofMap
        Points are ``dofs.points`` (n_dofs, 3); cells are ``dofs.cell_dofs``
        as linear or quadratic VTK cells.
    point_data : mapping name -> (n_dofs,) array
        Complex arrays are written as ``_real``, ``_imag`` and ``_abs``.
    field_data : mapping name -> (k,) array, optional
        Whole-dataset values (e.g. the mode frequencies).
    cell_data : mapping name -> (n_cells,) real array, optional
        One value per cell (e.g. the element-wise error indicator).
    """
    n = dofs.n_dofs
    pd = _split_complex(point_data)
    for name, v in pd.items():
        if v.shape != (n,):
            raise InputError(f"point data {name!r} has shape {v.shape}; expected ({n},).")
    cd = {k: np.asarray(v, dtype=float) for k, v in (cell_data or {}).items()}
    for name, v in cd.items():
        if v.shape != (dofs.mesh.n_cells,):
            raise InputError(f"cell data {name!r} has shape {v.shape}; expected "
                             f"({dofs.mesh.n_cells},).")
    cells = dofs.cell_dofs.astype(np.int64)
    nc, npc = cells.shape
    vtk_type = _VTK_TYPE[(dofs.mesh.cell_type, dofs.order)]
    parts = ['<?xml version="1.0"?>\n',
             '<VTKFile type="UnstructuredGrid" version="1.0" byte_order="LittleEndian" '
             'header_type="UInt64">\n<UnstructuredGrid>\n']
    if field_data:
        parts.append("<FieldData>\n")
        for name, v in field_data.items():
            v = np.atleast_1d(np.asarray(v, dtype=float))
            parts.append(_array(name, v).replace(
                'format="binary"', f'NumberOfTuples="{v.size}" format="binary"'))
        parts.append("</FieldData>\n")
    parts.append(f'<Piece NumberOfPoints="{n}" NumberOfCells="{nc}">\n<Points>\n')
    parts.append(_array("Points", dofs.points.astype(np.float64), 3))
    parts.append("</Points>\n<Cells>\n")
    parts.append(_array("connectivity", cells.ravel()))
    parts.append(_array("offsets", np.arange(1, nc + 1, dtype=np.int64) * npc))
    parts.append(_array("types", np.full(nc, vtk_type, dtype=np.uint8)))
    parts.append("</Cells>\n<PointData>\n")
    for name, v in pd.items():
        parts.append(_array(name, v.astype(np.float64)))
    parts.append("</PointData>\n")
    if cd:
        parts.append("<CellData>\n")
        parts += [_array(name, v) for name, v in cd.items()]
        parts.append("</CellData>\n")
    parts.append("</Piece>\n</UnstructuredGrid>\n</VTKFile>\n")
    p = Path(path)
    with atomic_path(p, overwrite=overwrite) as tmp:
        tmp.write_text("".join(parts), encoding="ascii")
    return p


def write_vtk(path, modes, *, overwrite: bool = False) -> Path:
    """Write mode shapes to a ``.vtu`` file a VTK viewer opens.

    Each mode is a real point-data array named by :func:`mode_array_name`
    (index and frequency); the frequencies (Hz) are also stored as the
    field-data array ``frequencies_hz`` (and ``decay_rates_per_s``).  Modes
    with an error estimate (``solve_modes(estimate=True)``) also carry
    ``estimated_relative_errors`` and ``corrected_frequencies_hz`` as field
    data and, per mode, the element-wise indicator as a real cell-data array
    ``error_mode_NNN_F.FFFHz`` (the share of that mode's estimated relative
    error in each cell).

    Parameters
    ----------
    path : str or Path
        Destination; ``.vtu`` is appended if missing.
    modes : Modes
    overwrite : bool
        Replace an existing file (otherwise OutputExistsError).
    """
    p = Path(path)
    if p.suffix.lower() != ".vtu":
        p = p.with_name(p.name + ".vtu")
    shapes = modes.shapes
    pd = {mode_array_name(i, f): shapes[:, i] for i, f in enumerate(modes.frequencies)}
    fd = {"frequencies_hz": modes.frequencies, "decay_rates_per_s": modes.decay_rates}
    cd = None
    errors = getattr(modes, "errors", None)
    if errors is not None:
        fd["estimated_relative_errors"] = errors.frequency_errors
        fd["corrected_frequencies_hz"] = errors.corrected_frequencies
        fd["estimated_decay_rate_errors"] = errors.decay_rate_errors
        fd["corrected_decay_rates_per_s"] = errors.corrected_decay_rates
        if errors.cell_indicators is not None:
            cd = errors.cell_data(modes.frequencies)
    return write_fields_vtu(p, modes.dofs, pd, field_data=fd, cell_data=cd,
                            overwrite=overwrite)


def write_modes_csv(path, modes, *, overwrite: bool = False) -> Path:
    """Write the modes table as CSV.

    Columns: index, frequency_hz, eigenvalue_per_m2 (k²), decay_rate_per_s,
    t60_s, q, elements_per_wavelength.
    """
    p = Path(path)
    epw = modes.elements_per_wavelength()
    with atomic_path(p, overwrite=overwrite) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["index", "frequency_hz", "eigenvalue_per_m2", "decay_rate_per_s",
                        "t60_s", "q", "elements_per_wavelength"])
            for i in range(len(modes)):
                w.writerow([
                    i, f"{modes.frequencies[i]:.9g}", f"{modes.eigenvalues[i]:.12g}",
                    f"{modes.decay_rates[i]:.9g}", _num(modes.t60[i]),
                    _num(modes.quality_factors[i]), _num(epw[i]),
                ])
    return p


def _num(x: float) -> str:
    return "inf" if math.isinf(x) else f"{x:.6g}"
