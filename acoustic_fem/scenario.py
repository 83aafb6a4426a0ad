"""Scenario files: one TOML file that describes a whole study.

A scenario names the geometry (builder parameters, a CAD file or a mesh
file), the material of every surface, the air, the sources, receivers and
seat grids, the frequency range with an accuracy target, and the outputs
wanted.  ``meshes/mixing_room.toml`` is a fully commented example; the
README's "Scenario files" section documents every key.

Reading a scenario never executes code: the file is parsed by
:mod:`tomllib`, tables of absorption or impedance by :mod:`csv`, and every
value is checked against the schema below.  Errors are
:class:`ScenarioError` (an :class:`~acoustic_fem.InputError`) whose message
names the file, the line where it could be found, the key path, the
offending value and what is allowed; an unknown key is rejected with the
closest valid key suggested.

Public names
------------
load_scenario(path) -> Scenario
Scenario, ScenarioError, GeometryKind, MaterialKind and the parts' dataclasses
build_mesh(scenario, progress=None) -> Mesh; check_on_mesh(scenario, mesh)
scenario_walls(scenario, mesh) -> dict of surface -> Wall
solve_scenario(scenario, progress=None) -> Solution
estimate_scenario_cost(scenario) -> CostEstimate
"""

from __future__ import annotations

import csv
import dataclasses
import difflib
import enum
import inspect
import math
import re
import time
import tomllib
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from ._errors import AcousticFemError, InputError
from .air import Air

__all__ = [
    "FORMAT_VERSION",
    "ScenarioError",
    "GeometryKind",
    "MaterialKind",
    "GeometrySpec",
    "MaterialSpec",
    "SourceSpec",
    "ReceiverSpec",
    "SweepSpec",
    "OutputSpec",
    "Scenario",
    "Solution",
    "CostEstimate",
    "load_scenario",
    "parse_scenario",
    "build_mesh",
    "check_on_mesh",
    "map_plane",
    "ReceiverResponse",
    "spl_db",
    "scenario_walls",
    "solve_scenario",
    "estimate_scenario_cost",
    "target_elements_per_wavelength",
    "dispersion_error",
    "inside_mesh",
    "sample_field",
]

#: The scenario format this version reads (``[scenario] format_version``).
FORMAT_VERSION = 1

#: Surface values that are wall conditions rather than materials.
RIGID = "rigid"
PRESSURE_RELEASE = "pressure_release"

#: Largest number of sweep frequencies accepted (a guard against typos such
#: as step_hz = 0.0001).
MAX_FREQUENCIES = 20000

#: gmsh's mean edge is at most about 1.3 times the size it is given (measured
#: on boxes and floor plans, geometry module notes): the builders are asked
#: for h = wavelength / (1.3 N) so that the mean edge gives at least N.
MEAN_EDGE_OVER_H = 1.3

#: Progress callback: progress(stage, done, total); stages "meshing",
#: "assembly", "modes", "sweep", "writing".
ProgressFn = Callable[[str, int, int], None]


# ==========================================================================
# errors and key paths
# ==========================================================================
class ScenarioError(InputError):
    """A scenario file is unusable; the message names file, line, key and value.

    Attributes
    ----------
    file : Path or None
    key : str
        Dotted key path, e.g. ``sources[2].position_m`` (array entries are
        counted from 1, as a reader counts ``[[sources]]`` blocks).
    line : int or None
        Line of the file where the key (or its table) was found.
    problem : str
        The message without the location.
    """

    def __init__(self, file, key: str, problem: str, line: int | None = None):
        self.file = None if file is None else Path(file)
        self.key = key
        self.line = line
        self.problem = problem
        where = "" if self.file is None else (
            f"{self.file}:{line}: " if line else f"{self.file}: ")
        super().__init__(f"{where}{key + ': ' if key else ''}{problem}")


def _fmt_path(path: Sequence) -> str:
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p + 1}]"
        else:
            out += ("." if out else "") + str(p)
    return out


def _type_name(v) -> str:
    if isinstance(v, bool):
        return "true/false"
    if isinstance(v, int):
        return "an integer"
    if isinstance(v, float):
        return "a number"
    if isinstance(v, str):
        return "a string"
    if isinstance(v, list):
        return "an array"
    if isinstance(v, dict):
        return "a table"
    return f"a {type(v).__name__}"


def _show(v) -> str:
    s = repr(v) if not isinstance(v, str) else '"' + v + '"'
    return s if len(s) <= 80 else s[:77] + "..."


_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\]]*?)\s*\]\]?\s*(#.*)?$")
_KEY = re.compile(r"""^\s*((?:[A-Za-z0-9_\-]+|"[^"]*"|'[^']*')(?:\s*\.\s*(?:[A-Za-z0-9_\-]+|"[^"]*"|'[^']*'))*)\s*=""")


def _split_key(k: str) -> list[str]:
    parts = re.findall(r"""[A-Za-z0-9_\-]+|"[^"]*"|'[^']*'""", k)
    return [p[1:-1] if p[:1] in "\"'" else p for p in parts]


def _key_lines(text: str) -> dict[tuple, int]:
    """Map every key path and table path of a TOML text to its first line (1-based).

    A light scanner (not a parser: the file was already parsed by tomllib):
    it tracks table headers, array-of-tables counters and bracket depth of
    multi-line values, and skips multi-line strings.  Used only to point
    error messages at a line.
    """
    out: dict[tuple, int] = {}
    counters: dict[tuple, int] = {}
    table: tuple = ()
    depth = 0
    in_ml = None
    for no, line in enumerate(text.splitlines(), start=1):
        if in_ml:
            if in_ml in line:
                in_ml = None
            continue
        if depth == 0:
            m = _HEADER.match(line)
            if m and not _KEY.match(line):
                names = tuple(_split_key(m.group(2)))
                if m.group(1) == "[[":
                    i = counters.get(names, -1) + 1
                    counters[names] = i
                    # entries nested under this array reset
                    for k in [k for k in counters if k[: len(names)] == names and k != names]:
                        del counters[k]
                    table = names + (i,)
                else:
                    table = _resolve_table(names, counters)
                out.setdefault(table, no)
                continue
            m = _KEY.match(line)
            if not m:
                continue  # blank, comment or (invalid) other line
            key = table + tuple(_split_key(m.group(1)))
            out.setdefault(key, no)
            rest = line[m.end():]
        else:
            rest = line
        # bracket depth of multi-line arrays / inline tables, ignoring strings
        s = re.sub(r'"""|\'\'\'', "\x00", rest)
        if s.count("\x00") % 2 == 1:
            in_ml = '"""' if '"""' in rest else "'''"
        s = re.sub(r'"(\\.|[^"\\])*"|\'[^\']*\'', "", s.split("\x00")[0])
        s = s.split("#", 1)[0]
        depth = max(depth + s.count("[") + s.count("{") - s.count("]") - s.count("}"), 0)
    return out


def _resolve_table(names: tuple, counters: dict) -> tuple:
    # [a.b] under [[a]] refers to the latest a entry
    out: list = []
    for n in names:
        out.append(n)
        key = tuple(x for x in out if not isinstance(x, int))
        if key in counters:
            out.append(counters[key])
    return tuple(out)


class _Ctx:
    """Where errors point: the file, its text and its key lines."""

    def __init__(self, file: Path | None, text: str):
        self.file = file
        self.text = text
        self._lines: dict | None = None

    def line(self, path: tuple) -> int | None:
        if self._lines is None:
            self._lines = _key_lines(self.text)
        p = tuple(path)
        while p:
            if p in self._lines:
                return self._lines[p]
            p = p[:-1]
        return None

    def error(self, path: Sequence, problem: str) -> ScenarioError:
        return ScenarioError(self.file, _fmt_path(path), problem, self.line(tuple(path)))


_REQUIRED = object()


class _Table:
    """One TOML table being read: unknown keys rejected up front, typed getters."""

    def __init__(self, ctx: _Ctx, data, path: tuple, allowed: Sequence[str], what: str):
        self.ctx, self.path, self.what = ctx, tuple(path), what
        if not isinstance(data, dict):
            raise ctx.error(path, f"{_show(data)} is {_type_name(data)}; expected a table "
                                  f"({what}).")
        self.data = data
        allowed = list(allowed)
        for key in data:
            if key not in allowed:
                close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
                hint = f"did you mean {close[0]!r}? " if close else ""
                raise ctx.error(self.path + (key,),
                                f"unknown key {key!r} in {what}; {hint}allowed keys: "
                                f"{', '.join(allowed)}.")

    def has(self, key) -> bool:
        return key in self.data

    def err(self, key, problem) -> ScenarioError:
        return self.ctx.error(self.path + ((key,) if key is not None else ()), problem)

    def _get(self, key, default):
        if key in self.data:
            return self.data[key]
        if default is _REQUIRED:
            raise self.err(None, f"missing key {key!r} ({self.what}).")
        return default

    def number(self, key, unit: str, *, default=_REQUIRED, low=None, high=None,
               low_open=False, integer=False, allow_none=False):
        v = self._get(key, default)
        if v is None and (allow_none or default is None):
            return None
        if integer:
            if isinstance(v, bool) or not isinstance(v, int):
                raise self.err(key, f"{_show(v)} is {_type_name(v)}; expected a whole number"
                                    f"{' of ' + unit if unit else ''}.")
        elif isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.err(key, f"{_show(v)} is {_type_name(v)}; expected a number in {unit}.")
        x = int(v) if integer else float(v)
        if not math.isfinite(x):
            raise self.err(key, f"{v!r} must be finite.")
        if low is not None and (x < low or (low_open and x == low)):
            rel = ">" if low_open else ">="
            raise self.err(key, f"{v!r} {unit} is out of range; allowed: {rel} {low:g}.")
        if high is not None and x > high:
            raise self.err(key, f"{v!r} {unit} is out of range; allowed: <= {high:g}.")
        return x

    def string(self, key, *, default=_REQUIRED, choices: Sequence[str] | None = None):
        v = self._get(key, default)
        if v is None and default is None:
            return None
        if not isinstance(v, str):
            raise self.err(key, f"{_show(v)} is {_type_name(v)}; expected a string.")
        if choices is not None and v not in choices:
            close = difflib.get_close_matches(v, list(choices), n=1, cutoff=0.6)
            hint = f"did you mean {close[0]!r}? " if close else ""
            raise self.err(key, f"{_show(v)} is not allowed; {hint}allowed: "
                                f"{', '.join(repr(c) for c in choices)}.")
        return v

    def boolean(self, key, *, default=_REQUIRED) -> bool:
        v = self._get(key, default)
        if not isinstance(v, bool):
            raise self.err(key, f"{_show(v)} is {_type_name(v)}; expected true or false.")
        return v

    def vector(self, key, n: int, unit: str, *, default=_REQUIRED):
        v = self._get(key, default)
        if v is None and default is None:
            return None
        ok = isinstance(v, list) and len(v) == n and all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
        if not ok:
            raise self.err(key, f"{_show(v)} is not {n} numbers; expected an array of {n} "
                                f"numbers in {unit}, e.g. {[1.0] * n}.")
        a = np.array(v, dtype=float)
        if not np.all(np.isfinite(a)):
            raise self.err(key, f"{_show(v)} must be finite.")
        return a

    def numbers(self, key, unit: str, *, default=_REQUIRED, min_len=1):
        v = self._get(key, default)
        if v is None and default is None:
            return None
        ok = isinstance(v, list) and len(v) >= min_len and all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in v)
        if not ok:
            raise self.err(key, f"{_show(v)} is not an array of numbers; expected at least "
                                f"{min_len} numbers in {unit}.")
        a = np.array(v, dtype=float)
        if not np.all(np.isfinite(a)):
            raise self.err(key, f"{_show(v)} must be finite.")
        return a

    def sub(self, key, allowed, what, *, required=False) -> "_Table | None":
        if key not in self.data:
            if required:
                raise self.err(None, f"missing table [{_fmt_path(self.path + (key,))}] ({what}).")
            return None
        return _Table(self.ctx, self.data[key], self.path + (key,), allowed, what)

    def array_of_tables(self, key, allowed, what) -> list["_Table"]:
        v = self.data.get(key, [])
        if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
            raise self.err(key, f"{_show(v)} is {_type_name(v)}; expected [[{key}]] tables "
                                f"({what}).")
        return [_Table(self.ctx, x, self.path + (key, i), allowed, what) for i, x in enumerate(v)]


# ==========================================================================
# the parts of a scenario
# ==========================================================================
class GeometryKind(enum.Enum):
    """Where the geometry comes from."""

    BUILDER = "builder"
    MESH_FILE = "mesh_file"
    CAD_FILE = "cad_file"


class MaterialKind(enum.Enum):
    """What a surface's condition is made from."""

    RIGID = "rigid"
    PRESSURE_RELEASE = "pressure_release"
    ABSORPTION_TABLE = "absorption_table"   # octave-band (or any) α table
    IMPEDANCE_TABLE = "impedance_table"     # z(f) table from CSV
    POROUS_LAYER = "porous_layer"
    ADMITTANCE = "admittance"               # a constant normalised admittance


@dataclass(frozen=True)
class GeometrySpec:
    """The geometry of a scenario.

    Attributes
    ----------
    kind : GeometryKind
    builder : str or None
        Name of the geometry builder (``box``, ``floor_plan``, ...).
    params : mapping
        Keyword arguments of the builder (or of the CAD importer), converted
        from TOML (obstacles and patches as builder objects).
    path : Path or None
        Absolute path of the mesh or CAD file.
    rename : mapping
        Surface renames applied after meshing (old -> new).
    """

    kind: GeometryKind
    builder: str | None = None
    params: Mapping[str, Any] = field(default_factory=dict)
    path: Path | None = None
    rename: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class MaterialSpec:
    """A named surface condition.

    Attributes
    ----------
    name : str
    kind : MaterialKind
    description, source : str
    bands_hz, alpha : tuple of float (ABSORPTION_TABLE)
    incidence : "random" or "normal" (ABSORPTION_TABLE)
    table_hz, table_values : tuple (IMPEDANCE_TABLE: normalised z = Z/(ρc))
    flow_resistivity, thickness, air_gap : float (POROUS_LAYER; Pa·s/m², m, m)
    model : str (POROUS_LAYER)
    admittance : complex (ADMITTANCE)
    from_library : str or None
        The library entry or preset it came from.
    """

    name: str
    kind: MaterialKind
    description: str = ""
    source: str = ""
    bands_hz: tuple = ()
    alpha: tuple = ()
    incidence: str = "random"
    table_hz: tuple = ()
    table_values: tuple = ()
    flow_resistivity: float = 0.0
    thickness: float = 0.0
    air_gap: float = 0.0
    model: str = "miki"
    admittance: complex = 0j
    from_library: str | None = None

    def wall(self):
        """The :class:`~acoustic_fem.walls.Wall` of this material."""
        from .walls import PressureRelease, Rigid

        if self.kind is MaterialKind.RIGID:
            return Rigid()
        if self.kind is MaterialKind.PRESSURE_RELEASE:
            return PressureRelease()
        from .impedance import Impedance

        if self.kind is MaterialKind.ABSORPTION_TABLE:
            return Impedance.from_table(list(self.bands_hz), list(self.alpha), quantity="alpha",
                                        incidence=self.incidence)
        if self.kind is MaterialKind.IMPEDANCE_TABLE:
            return Impedance.from_table(list(self.table_hz), list(self.table_values),
                                        quantity="impedance")
        if self.kind is MaterialKind.POROUS_LAYER:
            return Impedance.porous_layer(self.flow_resistivity, self.thickness,
                                          air_gap=self.air_gap, model=self.model)
        return Impedance(admittance=self.admittance)

    def summary(self) -> str:
        """One line saying what the condition is."""
        k = self.kind
        if k is MaterialKind.RIGID:
            return "rigid (no absorption)"
        if k is MaterialKind.PRESSURE_RELEASE:
            return "pressure-release (p = 0, an idealised opening)"
        if k is MaterialKind.ABSORPTION_TABLE:
            bands = ", ".join(f"{f:g}: {a:.2f}" for f, a in zip(self.bands_hz, self.alpha))
            return f"absorption coefficients ({self.incidence} incidence) {{{bands}}}"
        if k is MaterialKind.IMPEDANCE_TABLE:
            return (f"impedance table, {len(self.table_hz)} points "
                    f"{self.table_hz[0]:g}–{self.table_hz[-1]:g} Hz")
        if k is MaterialKind.POROUS_LAYER:
            gap = f", air gap {self.air_gap * 1000:g} mm" if self.air_gap else ""
            return (f"porous layer σ = {self.flow_resistivity:g} Pa·s/m², "
                    f"{self.thickness * 1000:g} mm{gap} ({self.model} model)")
        return f"constant normalised admittance β = {self.admittance:.4g}"


@dataclass(frozen=True)
class SourceSpec:
    """A point source: name, position (3,) m, complex volume velocity (m³/s),
    linear gain (negative inverts the polarity) and delay (s)."""

    name: str
    position: np.ndarray
    volume_velocity: complex
    key: str = ""
    gain: float = 1.0
    delay: float = 0.0


@dataclass(frozen=True)
class ReceiverSpec:
    """A receiver (or one seat of a seat grid): name, position (3,) m, grid name or ''."""

    name: str
    position: np.ndarray
    group: str = ""
    key: str = ""


@dataclass(frozen=True)
class SweepSpec:
    """Frequency range (Hz) and accuracy target.

    Attributes
    ----------
    min_hz, max_hz, step_hz : float
    accuracy_percent : float
        Target relative error of the eigenfrequencies at max_hz from the
        discretisation (dispersion estimate), which sets the mesh size.
    error_target : float or None
        ``error_target``: accuracy target on the *a-posteriori estimated*
        relative frequency error of every mode up to max_hz (e.g. 1e-3); the
        mesh is refined until it is met (``solve_modes(..., tol=error_target)``;
        damped modes: decay-rate errors reported, not targeted).
        None (default): one solve on the mesh from ``accuracy_percent``.
    """

    min_hz: float
    max_hz: float
    step_hz: float
    accuracy_percent: float
    error_target: float | None = None

    @property
    def frequencies(self) -> np.ndarray:
        """(n_f,) sweep frequencies min_hz, min_hz + step_hz, ... <= max_hz."""
        n = int(math.floor((self.max_hz - self.min_hz) / self.step_hz + 1e-9)) + 1
        return self.min_hz + self.step_hz * np.arange(n)


@dataclass(frozen=True)
class OutputSpec:
    """What to write: VTK files, plots, the HTML report, and plot settings."""

    vtk: bool = True
    plots: bool = True
    report: bool = True
    ear_height_m: float | None = None
    mode_slices: int = 6
    map_frequencies_hz: tuple = ()
    map_spacing_m: float | None = None


@dataclass(frozen=True, eq=False)
class Scenario:
    """A validated scenario (see the module notes and README for the format).

    Attributes
    ----------
    path : Path or None
        The scenario file (absolute); None for a scenario parsed from text.
    text : str
        The file's text as read (copied into results folders).
    title, description : str
    geometry : GeometrySpec
    element_order : int
    mesh_size_m : float or None
        Explicit builder mesh size; None: from the accuracy target.
    surfaces : mapping surface -> material name
    materials : mapping material name -> MaterialSpec (only those used)
    air : Air
    sources : tuple of SourceSpec
    receivers : tuple of ReceiverSpec (single receivers, then seats)
    sweep : SweepSpec
    outputs : OutputSpec
    damping : "exact" or "perturbation"
        How absorbing walls enter the modes (``solve_modes(damping=...)``).
    response_method : "modal" or "direct"
        How the frequency sweep is solved (``solve_response(method=...)``).
    estimate_errors : bool
        ``[solver] estimate_errors``: attach the a-posteriori error estimate
        to every mode (``solve_modes(estimate=True)``): the modes table gains
        the estimated error and corrected frequency, the mode VTK files the
        element-wise indicator.  Always on with ``error_target``.
    """

    path: Path | None
    text: str
    title: str
    description: str
    geometry: GeometrySpec
    element_order: int
    mesh_size_m: float | None
    surfaces: Mapping[str, str]
    materials: Mapping[str, MaterialSpec]
    air: Air
    sources: tuple
    receivers: tuple
    sweep: SweepSpec
    outputs: OutputSpec
    damping: str = "exact"
    response_method: str = "modal"
    estimate_errors: bool = False
    _ctx: Any = field(default=None, repr=False)

    @property
    def folder(self) -> Path:
        return self.path.parent if self.path is not None else Path.cwd()

    def error(self, path: Sequence, problem: str) -> ScenarioError:
        """A ScenarioError pointing at key ``path`` of this scenario's file."""
        ctx = self._ctx or _Ctx(self.path, self.text)
        return ctx.error(path, problem)

    @property
    def receiver_positions(self) -> np.ndarray:
        """(n_r, 3) receiver positions (single receivers and seats)."""
        return np.array([r.position for r in self.receivers]).reshape(-1, 3)

    @property
    def source_positions(self) -> np.ndarray:
        """(n_s, 3) source positions."""
        return np.array([s.position for s in self.sources]).reshape(-1, 3)

    @property
    def wants_response(self) -> bool:
        return bool(self.sources) and bool(self.receivers)

    @property
    def ear_height(self) -> float:
        """Height of the SPL map and mode slices: outputs.ear_height_m, else the
        mean receiver height, else 1.2 m (a seated listener's ears, common practice)."""
        if self.outputs.ear_height_m is not None:
            return self.outputs.ear_height_m
        if self.receivers:
            return float(np.mean(self.receiver_positions[:, 2]))
        return 1.2

    def mesh_fmax(self) -> float:
        """The fmax to give a geometry builder so that it meshes at the target size."""
        from .geometry import ELEMENTS_PER_WAVELENGTH

        h = self.target_mesh_size()
        return self.air.c / (h * ELEMENTS_PER_WAVELENGTH[self.element_order])

    def target_mesh_size(self) -> float:
        """Builder mesh size h (m): mesh.size_m, or wavelength at max_hz / (1.3 N)
        with N from the accuracy target (:func:`target_elements_per_wavelength`)."""
        if self.mesh_size_m is not None:
            return self.mesh_size_m
        n = target_elements_per_wavelength(self.sweep.accuracy_percent, self.element_order)
        return self.air.c / self.sweep.max_hz / (MEAN_EDGE_OVER_H * n)


# ==========================================================================
# accuracy target
# ==========================================================================
def dispersion_error(elements_per_wavelength, order: int):
    """Relative eigenfrequency error of Lagrange elements from 1D dispersion.

    (kh)²/24 for P1 and (kh)⁴/1440 for P2 with kh = 2π / N (N elements per
    wavelength, h the mean edge): the leading terms of the consistent-mass
    dispersion relation (the same estimate as
    :data:`acoustic_fem.modes.MIN_ELEMENTS_PER_WAVELENGTH`).

    Parameters
    ----------
    elements_per_wavelength : float or (n,) array
    order : 1 or 2

    Returns
    -------
    float or (n,) array, a fraction (0.01 = 1 %).
    """
    kh = 2.0 * math.pi / np.asarray(elements_per_wavelength, dtype=float)
    return kh**2 / 24.0 if order == 1 else kh**4 / 1440.0


def target_elements_per_wavelength(accuracy_percent: float, order: int) -> float:
    """Elements (mean edges) per wavelength for a target error: the inverse of
    :func:`dispersion_error` (P2 at 1 %: 3.2; P1 at 1 %: 12.8)."""
    e = accuracy_percent / 100.0
    return 2.0 * math.pi / ((24.0 * e) ** 0.5 if order == 1 else (1440.0 * e) ** 0.25)


# ==========================================================================
# reading
# ==========================================================================
_TOP = ("scenario", "geometry", "mesh", "solver", "surfaces", "materials", "air", "sources",
        "receivers", "seat_grids", "frequencies", "outputs")

#: [solver] damping: how absorbing walls enter the modes (solve_modes' damping=)
DAMPING_METHODS = ("exact", "perturbation")
#: [solver] response_method: how the sweep is solved (solve_response's method=)
RESPONSE_METHODS = ("modal", "direct")

#: builder name -> attribute of acoustic_fem.geometry
_BUILDERS = ("box", "floor_plan", "cylinder", "sphere")
#: builder parameters the scenario supplies itself
_SUPPLIED = ("fmax", "order", "air")
_MATERIAL_KEYS = ("library", "bands_hz", "alpha", "incidence", "absorption_csv",
                  "impedance_csv", "porous_layer", "flow_resistivity_pa_s_m2", "thickness_m",
                  "air_gap_m", "model", "admittance", "impedance", "description", "source")


def load_scenario(path) -> Scenario:
    """Read and validate a scenario file.

    Parameters
    ----------
    path : str or Path
        A TOML file.  Relative paths inside it are resolved against its folder.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        Anything wrong: TOML syntax, unknown keys, wrong types or ranges,
        missing files, unknown materials, surfaces the geometry does not have
        (where the geometry tells its surfaces without meshing), receivers
        or sources outside the room (same).
    """
    p = Path(path)
    if not p.exists():
        raise ScenarioError(p, "", "scenario file does not exist; check the path.")
    if p.is_dir():
        raise ScenarioError(p, "", "is a folder; give the scenario's .toml file.")
    try:
        raw = p.read_bytes()
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ScenarioError(p, "", f"is not UTF-8 text ({exc.reason} at byte {exc.start}); "
                                   "save it as UTF-8.") from None
    except OSError as exc:
        raise ScenarioError(p, "", f"cannot be read: {exc.strerror}.") from None
    return parse_scenario(text, p.absolute())


def parse_scenario(text: str, path=None) -> Scenario:
    """Validate a scenario given as TOML text (``path`` locates relative files
    and names the file in errors; default: the current folder)."""
    file = None if path is None else Path(path)
    ctx = _Ctx(file, text)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = re.search(r"\(at line (\d+), column (\d+)\)", msg)
        line = int(m.group(1)) if m else None
        problem = re.sub(r"\s*\(at line \d+, column \d+\)", "", msg)
        col = f" column {m.group(2)}" if m else ""
        raise ScenarioError(file, "", f"TOML syntax error{col}: {problem}.", line) from None
    folder = file.parent if file is not None else Path.cwd()
    top = _Table(ctx, data, (), _TOP, "the scenario file")

    head = top.sub("scenario", ("title", "description", "format_version"), "[scenario]")
    title = (head.string("title", default=None) if head else None) or (
        file.stem if file else "scenario")
    description = (head.string("description", default="") if head else "")
    if head is not None and head.has("format_version"):
        v = head.number("format_version", "", integer=True)
        if v != FORMAT_VERSION:
            raise head.err("format_version", f"{v} is not supported; this version reads "
                                             f"format_version = {FORMAT_VERSION}.")

    air = _read_air(top)
    geometry = _read_geometry(ctx, top, folder)
    mtab = top.sub("mesh", ("element_order", "size_m"), "[mesh]")
    order = 2
    size_m = None
    if mtab is not None:
        order = mtab.number("element_order", "", default=2, integer=True)
        if order not in (1, 2):
            raise mtab.err("element_order", f"{order} is not allowed; allowed: 1 (linear) or "
                                            "2 (quadratic, the default).")
        size_m = mtab.number("size_m", "m", default=None, low=0.0, low_open=True)
    sweep = _read_sweep(top)
    stab = top.sub("solver", ("damping", "response_method", "estimate_errors"), "[solver]")
    damping = stab.string("damping", default="exact", choices=DAMPING_METHODS) if stab else "exact"
    rmethod = (stab.string("response_method", default="modal", choices=RESPONSE_METHODS)
               if stab else "modal")
    want_estimate = stab.boolean("estimate_errors", default=False) if stab else False
    materials_all = _read_materials(ctx, top, folder)
    surfaces, used = _read_surfaces(ctx, top, materials_all)
    sources = _read_sources(top)
    receivers = _read_receivers(top)
    outputs = _read_outputs(top, sweep)

    sc = Scenario(
        path=file, text=text, title=title, description=description, geometry=geometry,
        element_order=order, mesh_size_m=size_m,
        surfaces=MappingProxyType(surfaces),
        materials=MappingProxyType({n: materials_all[n] for n in used}),
        air=air, sources=tuple(sources), receivers=tuple(receivers), sweep=sweep,
        outputs=outputs, damping=damping, response_method=rmethod,
        estimate_errors=want_estimate or sweep.error_target is not None, _ctx=ctx,
    )
    if sweep.error_target is not None and damping == "perturbation":
        raise ctx.error(
            ("frequencies", "error_target"),
            f"{sweep.error_target:g} needs [solver] damping = \"exact\": modes from "
            "\"perturbation\" are first-order approximations without an error estimate. "
            "Remove one of the two keys.")
    _check_against_geometry(sc)
    return sc


def _read_air(top: _Table) -> Air:
    t = top.sub("air", ("temperature_c", "pressure_pa", "speed_of_sound_m_s", "density_kg_m3"),
                "[air]")
    if t is None:
        return Air()
    temp = t.number("temperature_c", "°C", default=20.0, low=-60.0, high=60.0)
    pres = t.number("pressure_pa", "Pa", default=101325.0, low=50000.0, high=120000.0)
    c = t.number("speed_of_sound_m_s", "m/s", default=None, low=250.0, high=400.0)
    rho = t.number("density_kg_m3", "kg/m³", default=None, low=0.5, high=2.0)
    return Air(temperature=temp, pressure=pres, c=c, rho=rho)


def _resolve_file(t: _Table, key: str, folder: Path, what: str) -> Path:
    name = t.string(key)
    if not name.strip():
        raise t.err(key, f"{what} path is empty.")
    p = Path(name).expanduser()
    if not p.is_absolute():
        p = folder / p
    if not p.exists():
        raise t.err(key, f"{what} {_show(name)} does not exist (looked for {p}); paths are "
                         "relative to the scenario file's folder.")
    if p.is_dir():
        raise t.err(key, f"{what} {_show(name)} is a folder, not a file.")
    return p


def _builder_function(name: str):
    from . import geometry as g

    return getattr(g, name, None)


def _read_geometry(ctx: _Ctx, top: _Table, folder: Path) -> GeometrySpec:
    raw = top.data.get("geometry")
    if raw is None:
        raise top.err(None, "missing table [geometry]: give builder = \"box\" (or "
                            "\"floor_plan\", ...) with its parameters, mesh_file = \"...\" or "
                            "cad_file = \"...\".")
    if not isinstance(raw, dict):
        raise ctx.error(("geometry",), f"{_show(raw)} is {_type_name(raw)}; expected a table.")
    given = [k for k in ("builder", "mesh_file", "cad_file") if k in raw]
    if len(given) != 1:
        t = _Table(ctx, {}, ("geometry",), (), "[geometry]")
        raise t.err(None, f"give exactly one of builder, mesh_file or cad_file; got "
                          f"{', '.join(given) if given else 'none'}.")
    kind = GeometryKind(given[0])
    if kind is GeometryKind.MESH_FILE:
        t = _Table(ctx, raw, ("geometry",), ("mesh_file", "rename"), "[geometry] with mesh_file")
        path = _resolve_file(t, "mesh_file", folder, "mesh file")
        return GeometrySpec(kind, path=path, rename=_read_rename(t))
    if kind is GeometryKind.CAD_FILE:
        try:
            from . import cad  # noqa: F401  (optional module)
            fn = getattr(cad, "import_cad")
        except (ImportError, AttributeError):
            t = _Table(ctx, raw, ("geometry",), list(raw), "[geometry]")
            raise t.err("cad_file", "CAD import is not available in this version of "
                                    "acoustic_fem (module acoustic_fem.cad); mesh the CAD model "
                                    "and give mesh_file instead.") from None
        t = _Table(ctx, {"cad_file": raw["cad_file"]}, ("geometry",), ("cad_file",),
                   "[geometry]")
        path = _resolve_file(t, "cad_file", folder, "CAD file")
        if path.suffix.lower() == ".stl":
            fn = getattr(cad, "import_stl", None)
        names = _signature_names(fn, skip=("path", "filename", "file") + _SUPPLIED)
        t = _Table(ctx, raw, ("geometry",), ("cad_file", "rename", *names),
                   "[geometry] with cad_file")
        params = {k: v for k, v in raw.items() if k in names and k != "surfaces"}
        if "surfaces" in raw:
            params["surfaces"] = _cad_selectors(t, raw["surfaces"], cad)
        return GeometrySpec(kind, path=path, params=params, rename=_read_rename(t))
    # builder
    name = raw["builder"]
    if not isinstance(name, str):
        raise ctx.error(("geometry", "builder"),
                        f"{_show(name)} is {_type_name(name)}; expected a string.")
    available = [b for b in _BUILDERS if _builder_function(b) is not None]
    if name not in available:
        close = difflib.get_close_matches(name, available, n=1, cutoff=0.5)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise ctx.error(("geometry", "builder"),
                        f"{_show(name)} is not a geometry builder; {hint}allowed: "
                        f"{', '.join(repr(b) for b in available)}.")
    fn = _builder_function(name)
    names = _signature_names(fn, skip=_SUPPLIED)
    t = _Table(ctx, raw, ("geometry",), ("builder", "rename", *names),
               f"[geometry] with builder = \"{name}\"")
    sig = inspect.signature(fn)
    for pname in names:  # required builder parameters
        par = sig.parameters[pname]
        if par.default is inspect.Parameter.empty and pname not in raw:
            raise t.err(None, f"missing key {pname!r} (a parameter of the {name!r} builder).")
    params = {}
    for k, v in raw.items():
        if k in ("builder", "rename"):
            continue
        if k == "obstacles":
            params[k] = tuple(_read_obstacle(t, i, o) for i, o in enumerate(_list_of_tables(t, k)))
        elif k == "patches":
            params[k] = tuple(_read_patch(t, i, o) for i, o in enumerate(_list_of_tables(t, k)))
        else:
            params[k] = v
    return GeometrySpec(kind, builder=name, params=params, rename=_read_rename(t))


def _cad_selectors(t: _Table, raw, cad) -> dict:
    """[geometry.surfaces] of a CAD file: name = face tag(s), {in_box = {lo, hi}} or
    {on_plane = {point, normal}}, or an array mixing them."""
    if not isinstance(raw, dict):
        raise t.err("surfaces", f"{_show(raw)} is {_type_name(raw)}; expected a table "
                                "name = selector.")
    kinds = {"in_box": getattr(cad, "FacesInBox", None),
             "on_plane": getattr(cad, "FacesOnPlane", None)}

    def one(v, path):
        if isinstance(v, int) and not isinstance(v, bool):
            return v
        if isinstance(v, dict) and len(v) == 1 and next(iter(v)) in kinds:
            k, body = next(iter(v.items()))
            if not isinstance(body, dict):
                raise t.ctx.error(path + (k,), f"{_show(body)} must be a table of the "
                                               "selector's parameters.")
            try:
                return kinds[k](**{a: tuple(b) if isinstance(b, list) else b
                                   for a, b in body.items()})
            except (TypeError, ValueError) as exc:
                raise t.ctx.error(path + (k,), str(exc)) from None
        raise t.ctx.error(path, f"{_show(v)} is not a face selector; give a face tag (an "
                                "integer), {in_box = {lo = [...], hi = [...]}}, {on_plane = "
                                "{point = [...], normal = [...]}} or an array of these.")

    out = {}
    for name, v in raw.items():
        path = t.path + ("surfaces", name)
        out[name] = [one(x, path) for x in v] if isinstance(v, list) else one(v, path)
    return out


def _signature_names(fn, skip) -> list[str]:
    out = []
    for n, p in inspect.signature(fn).parameters.items():
        if n in skip or n.startswith("_") or p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            continue
        out.append(n)
    return out


def _list_of_tables(t: _Table, key: str) -> list:
    v = t.data[key]
    if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
        raise t.err(key, f"{_show(v)} is {_type_name(v)}; expected [[geometry.{key}]] tables.")
    return v


def _dataclass_table(t: _Table, key: str, i: int, raw: dict, cls, extra=()):
    fields_ = [f for f in dataclasses.fields(cls)]
    allowed = [*extra, *(f.name for f in fields_)]
    sub = _Table(t.ctx, raw, t.path + (key, i), allowed, f"[[geometry.{key}]] ({cls.__name__})")
    kwargs = {}
    for f in fields_:
        if f.name in raw:
            kwargs[f.name] = raw[f.name]
        elif f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
            raise sub.err(None, f"missing key {f.name!r} ({cls.__name__}).")
    for f in fields_:  # TOML arrays -> tuples, the builders' own types
        if isinstance(kwargs.get(f.name), list):
            kwargs[f.name] = tuple(kwargs[f.name])
    try:
        return cls(**kwargs)
    except (TypeError, ValueError) as exc:
        raise sub.err(None, str(exc)) from None


def _read_obstacle(t: _Table, i: int, raw: dict):
    from . import geometry as g

    kinds = {n.lower(): getattr(g, n) for n in ("Cuboid", "Column") if hasattr(g, n)}
    kind = raw.get("kind")
    if kind not in kinds:
        close = difflib.get_close_matches(str(kind), list(kinds), n=1, cutoff=0.5)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise t.ctx.error(t.path + ("obstacles", i, "kind"),
                          f"{_show(kind)} is not an obstacle kind; {hint}allowed: "
                          f"{', '.join(repr(k) for k in kinds)}.")
    body = {k: v for k, v in raw.items() if k != "kind"}
    return _dataclass_table(t, "obstacles", i, body, kinds[kind], extra=("kind",))


def _read_patch(t: _Table, i: int, raw: dict):
    from . import geometry as g

    return _dataclass_table(t, "patches", i, raw, g.Patch)


def _read_rename(t: _Table) -> dict:
    if not t.has("rename"):
        return {}
    r = t.data["rename"]
    if not isinstance(r, dict):
        raise t.err("rename", f"{_show(r)} is {_type_name(r)}; expected a table "
                              "{old_name = \"new_name\", ...}.")
    for k, v in r.items():
        if not isinstance(v, str) or not v.strip() or any(ch.isspace() for ch in v):
            raise t.ctx.error(t.path + ("rename", k),
                              f"{_show(v)} must be a surface name (a word without spaces).")
    if len(set(r.values())) != len(r):
        raise t.err("rename", "two surfaces are renamed to the same name; give each its own.")
    return dict(r)


def _read_sweep(top: _Table) -> SweepSpec:
    t = top.sub("frequencies", ("min_hz", "max_hz", "step_hz", "accuracy_percent",
                                "error_target"), "[frequencies]", required=True)
    fmax = t.number("max_hz", "Hz", low=0.0, low_open=True, high=20000.0)
    fmin = t.number("min_hz", "Hz", default=min(20.0, fmax / 2), low=0.0, low_open=True)
    if fmin >= fmax:
        raise t.err("min_hz", f"{fmin:g} Hz must be below max_hz = {fmax:g} Hz.")
    step = t.number("step_hz", "Hz", default=1.0, low=0.0, low_open=True)
    n = int(math.floor((fmax - fmin) / step + 1e-9)) + 1
    if n > MAX_FREQUENCIES:
        raise t.err("step_hz", f"{step:g} Hz gives {n} frequencies from {fmin:g} to {fmax:g} Hz; "
                               f"at most {MAX_FREQUENCIES} are allowed: use a larger step.")
    acc = t.number("accuracy_percent", "%", default=0.5, low=0.01, high=20.0)
    # a relative error (not %): 1e-6 is about the limit of the eigensolver's
    # tolerance, 0.1 the point beyond which the estimate is meaningless
    target = t.number("error_target", "(relative error, e.g. 1e-3)", default=None,
                      low=1e-6, high=0.1)
    return SweepSpec(fmin, fmax, step, acc, target)


def _read_csv_table(t: _Table, key: str, folder: Path, columns: Sequence[str]):
    """Rows of a CSV with a header naming ``columns`` (any order, more allowed)."""
    p = _resolve_file(t, key, folder, "table")
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise t.err(key, f"cannot read {p}: {exc}.") from None
    lines = [(i, ln) for i, ln in enumerate(text.splitlines(), start=1)
             if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise t.err(key, f"{p} is empty; expected a header row {', '.join(columns)} and data.")
    rows = list(csv.reader([ln for _, ln in lines]))
    header = [h.strip().lower() for h in rows[0]]
    missing = [c for c in columns if c not in header]
    if missing:
        raise t.err(key, f"{p.name}:{lines[0][0]}: the header {rows[0]} lacks column(s) "
                         f"{missing}; the first row must name the columns "
                         f"{', '.join(columns)}.")
    idx = [header.index(c) for c in columns]
    out = []
    for (no, _), row in zip(lines[1:], rows[1:]):
        vals = []
        for c, j in zip(columns, idx):
            try:
                vals.append(float(row[j]))
            except (ValueError, IndexError):
                cell = row[j] if j < len(row) else ""
                raise t.err(key, f"{p.name}:{no}: {cell!r} in column {c} is not a number.") \
                    from None
            if not math.isfinite(vals[-1]):
                raise t.err(key, f"{p.name}:{no}: column {c} must be finite.")
        out.append(vals)
    if len(out) < 2:
        raise t.err(key, f"{p.name} has {len(out)} data row(s); a table needs at least two "
                         "frequencies.")
    a = np.array(out)
    if np.any(a[:, 0] <= 0) or np.any(np.diff(a[:, 0]) <= 0):
        raise t.err(key, f"{p.name}: frequencies must be positive and strictly increasing.")
    return a


def _read_materials(ctx: _Ctx, top: _Table, folder: Path) -> dict[str, MaterialSpec]:
    from .materials import LIBRARY, POROUS_PRESETS

    out: dict[str, MaterialSpec] = {}
    for name, m in LIBRARY.items():
        out[name] = MaterialSpec(name, MaterialKind.ABSORPTION_TABLE, m.description, m.source,
                                 bands_hz=m.bands_hz, alpha=m.alpha, incidence=m.incidence,
                                 from_library=name)
    for name, p in POROUS_PRESETS.items():
        out[name] = MaterialSpec(name, MaterialKind.POROUS_LAYER, p.description, p.source,
                                 flow_resistivity=p.flow_resistivity, thickness=p.thickness,
                                 air_gap=p.air_gap, from_library=name)
    raw = top.data.get("materials", {})
    if not isinstance(raw, dict):
        raise ctx.error(("materials",), f"{_show(raw)} is {_type_name(raw)}; expected "
                                        "[materials.NAME] tables.")
    for name, body in raw.items():
        if name in (RIGID, PRESSURE_RELEASE):
            raise ctx.error(("materials", name), f"{name!r} is a built-in wall condition; give "
                                                 "your material another name.")
        t = _Table(ctx, body, ("materials", name), _MATERIAL_KEYS, f"[materials.{name}]")
        out[name] = _read_material(t, name, folder)
    return out


def _read_material(t: _Table, name: str, folder: Path) -> MaterialSpec:
    from .materials import LIBRARY, POROUS_PRESETS

    groups = {
        "library": ("library",),
        "absorption": ("bands_hz", "alpha"),
        "absorption_csv": ("absorption_csv",),
        "impedance_csv": ("impedance_csv",),
        "porous": ("porous_layer", "flow_resistivity_pa_s_m2", "thickness_m"),
        "admittance": ("admittance",),
        "impedance": ("impedance",),
    }
    present = [g for g, keys in groups.items() if any(t.has(k) for k in keys)]
    if len(present) != 1:
        raise t.err(None, "give exactly one of: library = \"...\"; bands_hz + alpha; "
                          "absorption_csv; impedance_csv; porous_layer (a preset) or "
                          "flow_resistivity_pa_s_m2 + thickness_m; admittance; impedance — got "
                          f"{', '.join(present) if present else 'none'}.")
    g = present[0]
    desc = t.string("description", default="")
    src = t.string("source", default="")
    inc_given = t.has("incidence")
    incidence = t.string("incidence", default="random", choices=("random", "normal"))
    if inc_given and g not in ("library", "absorption", "absorption_csv"):
        raise t.err("incidence", "applies only to absorption coefficients (library, bands_hz + "
                                 "alpha, absorption_csv).")
    porous_keys = ("air_gap_m", "model")
    if g != "porous":
        for k in porous_keys:
            if t.has(k):
                raise t.err(k, "applies only to porous layers.")
    if g == "library":
        lib = t.string("library")
        if lib in LIBRARY:
            m = LIBRARY[lib]
            return MaterialSpec(name, MaterialKind.ABSORPTION_TABLE, desc or m.description,
                                src or m.source, bands_hz=m.bands_hz, alpha=m.alpha,
                                incidence=incidence if inc_given else m.incidence,
                                from_library=lib)
        if lib in POROUS_PRESETS:
            raise t.err("library", f"{lib!r} is a porous-layer preset: write porous_layer = "
                                   f"\"{lib}\".")
        close = difflib.get_close_matches(lib, list(LIBRARY), n=1, cutoff=0.5)
        hint = f"did you mean {close[0]!r}? " if close else ""
        raise t.err("library", f"{_show(lib)} is not in the material library; {hint}known: "
                               f"{', '.join(sorted(LIBRARY))}.")
    if g in ("absorption", "absorption_csv"):
        if g == "absorption":
            f = t.numbers("bands_hz", "Hz", min_len=2)
            a = t.numbers("alpha", "", min_len=2)
            if len(a) != len(f):
                raise t.err("alpha", f"has {len(a)} values for {len(f)} bands; give one per band.")
            if np.any(f <= 0) or np.any(np.diff(f) <= 0):
                raise t.err("bands_hz", f"{f.tolist()} must be positive and increasing.")
        else:
            tab = _read_csv_table(t, "absorption_csv", folder, ("frequency_hz", "alpha"))
            f, a = tab[:, 0], tab[:, 1]
        key = "alpha" if g == "absorption" else "absorption_csv"
        limit = 0.9512 if incidence == "random" else 1.0
        bad = np.flatnonzero((a < 0) | (a >= limit))
        if bad.size:
            i = int(bad[0])
            why = ("random-incidence coefficients of a locally reacting surface reach at most "
                   "0.951 (Paris' formula with a real impedance)" if incidence == "random"
                   else "an absorption coefficient must be >= 0 and < 1")
            raise t.err(key, f"alpha {a[i]:g} at {f[i]:g} Hz is not allowed: {why}.")
        return MaterialSpec(name, MaterialKind.ABSORPTION_TABLE, desc, src,
                            bands_hz=tuple(float(x) for x in f), alpha=tuple(float(x) for x in a),
                            incidence=incidence)
    if g == "impedance_csv":
        tab = _read_csv_table(t, "impedance_csv", folder, ("frequency_hz", "real", "imag"))
        z = tab[:, 1] + 1j * tab[:, 2]
        if np.any(tab[:, 1] < 0):
            i = int(np.flatnonzero(tab[:, 1] < 0)[0])
            raise t.err("impedance_csv", f"Re z = {tab[i, 1]:g} at {tab[i, 0]:g} Hz is negative: "
                                         "the wall would generate energy (data in the e^{-iωt} "
                                         "convention must be conjugated).")
        return MaterialSpec(name, MaterialKind.IMPEDANCE_TABLE, desc, src,
                            table_hz=tuple(float(x) for x in tab[:, 0]),
                            table_values=tuple(complex(x) for x in z))
    if g == "porous":
        model = t.string("model", default="miki",
                         choices=("miki", "delany-bazley", "allard-champoux"))
        if t.has("porous_layer"):
            for k in ("flow_resistivity_pa_s_m2", "thickness_m"):
                if t.has(k):
                    raise t.err(k, "give either porous_layer = \"preset\" or "
                                   "flow_resistivity_pa_s_m2 + thickness_m, not both.")
            pre = t.string("porous_layer")
            if pre not in POROUS_PRESETS:
                close = difflib.get_close_matches(pre, list(POROUS_PRESETS), n=1, cutoff=0.5)
                hint = f"did you mean {close[0]!r}? " if close else ""
                raise t.err("porous_layer", f"{_show(pre)} is not a porous-layer preset; {hint}"
                                            f"known: {', '.join(sorted(POROUS_PRESETS))}.")
            pl = POROUS_PRESETS[pre]
            gap = t.number("air_gap_m", "m", default=pl.air_gap, low=0.0)
            return MaterialSpec(name, MaterialKind.POROUS_LAYER, desc or pl.description,
                                src or pl.source, flow_resistivity=pl.flow_resistivity,
                                thickness=pl.thickness, air_gap=gap, model=model,
                                from_library=pre)
        sigma = t.number("flow_resistivity_pa_s_m2", "Pa·s/m²", low=0.0, low_open=True)
        d = t.number("thickness_m", "m", low=0.0, low_open=True)
        gap = t.number("air_gap_m", "m", default=0.0, low=0.0)
        return MaterialSpec(name, MaterialKind.POROUS_LAYER, desc, src, flow_resistivity=sigma,
                            thickness=d, air_gap=gap, model=model)
    # constant admittance or impedance, [re, im]
    key = g
    v = t.vector(key, 2, "(real, imaginary) parts")
    c = complex(v[0], v[1])
    if key == "impedance":
        if c == 0:
            raise t.err(key, "z = 0 is a pressure-release surface: write the surface as "
                             "\"pressure_release\".")
        c = 1.0 / c
    if c.real < 0:
        raise t.err(key, f"{v.tolist()} has a negative real part of the admittance: the wall "
                         "would generate energy (e^{+iωt} convention; conjugate e^{-iωt} data).")
    return MaterialSpec(name, MaterialKind.ADMITTANCE, desc, src, admittance=c)


def _read_surfaces(ctx: _Ctx, top: _Table, materials: Mapping[str, MaterialSpec]):
    raw = top.data.get("surfaces", {})
    if not isinstance(raw, dict):
        raise ctx.error(("surfaces",), f"{_show(raw)} is {_type_name(raw)}; expected a table "
                                       "surface = \"material\".")
    names = [RIGID, PRESSURE_RELEASE, *materials]
    surfaces, used = {}, []
    for surf, mat in raw.items():
        if not isinstance(mat, str):
            raise ctx.error(("surfaces", surf), f"{_show(mat)} is {_type_name(mat)}; expected "
                                                "a material name (a string).")
        if mat not in names:
            close = difflib.get_close_matches(mat, names, n=1, cutoff=0.5)
            hint = f"did you mean {close[0]!r}? " if close else ""
            raise ctx.error(("surfaces", surf),
                            f"unknown material {_show(mat)}; {hint}give \"rigid\", "
                            "\"pressure_release\", a [materials.NAME] of this file or a library "
                            "entry (acoustic-fem materials lists them).")
        surfaces[surf] = mat
        if mat not in (RIGID, PRESSURE_RELEASE) and mat not in used:
            used.append(mat)
    return surfaces, used


def _read_sources(top: _Table) -> list[SourceSpec]:
    out = []
    seen = set()
    for i, t in enumerate(top.array_of_tables(
            "sources", ("name", "position_m", "volume_velocity_m3_s", "phase_deg", "gain",
                        "delay_ms"), "[[sources]]")):
        name = t.string("name", default=f"source_{i + 1}")
        if name in seen:
            raise t.err("name", f"{name!r} is used by another source; give each its own name.")
        seen.add(name)
        pos = t.vector("position_m", 3, "m")
        q = t.number("volume_velocity_m3_s", "m³/s", default=1e-3, low=0.0, low_open=True)
        ph = t.number("phase_deg", "degrees", default=0.0, low=-360.0, high=360.0)
        gain = t.number("gain", "", default=1.0, low=-100.0, high=100.0)
        delay = t.number("delay_ms", "ms", default=0.0, low=0.0, high=1000.0)
        out.append(SourceSpec(name, pos, q * complex(math.cos(math.radians(ph)),
                                                     math.sin(math.radians(ph))),
                              key=_fmt_path(t.path), gain=gain, delay=delay / 1000.0))
    return out


def _read_receivers(top: _Table) -> list[ReceiverSpec]:
    out: list[ReceiverSpec] = []
    seen: set = set()

    def add(r: ReceiverSpec, t: _Table, key):
        if r.name in seen:
            raise t.err(key, f"receiver name {r.name!r} is used twice; give each its own name.")
        seen.add(r.name)
        out.append(r)

    for t in top.array_of_tables("receivers", ("name", "position_m"), "[[receivers]]"):
        i = t.path[-1]
        name = t.string("name", default=f"receiver_{i + 1}")
        add(ReceiverSpec(name, t.vector("position_m", 3, "m"), "", _fmt_path(t.path)), t, "name")
    for t in top.array_of_tables("seat_grids", ("name", "first_seat_m", "last_seat_m", "rows",
                                                "columns"), "[[seat_grids]]"):
        name = t.string("name")
        a = t.vector("first_seat_m", 3, "m")
        b = t.vector("last_seat_m", 3, "m")
        rows = t.number("rows", "", default=1, integer=True, low=1, high=100)
        cols = t.number("columns", "", default=1, integer=True, low=1, high=100)
        if cols == 1 and a[0] != b[0]:
            raise t.err("last_seat_m", "with one column, first and last seat need the same x.")
        if rows == 1 and a[1] != b[1]:
            raise t.err("last_seat_m", "with one row, first and last seat need the same y.")
        xs = np.linspace(a[0], b[0], cols)
        ys = np.linspace(a[1], b[1], rows)
        zs = np.linspace(a[2], b[2], rows)  # a raked (tiered) grid rises row by row
        for r in range(rows):
            for c in range(cols):
                add(ReceiverSpec(f"{name}_r{r + 1}c{c + 1}", np.array([xs[c], ys[r], zs[r]]),
                                 name, _fmt_path(t.path)), t, "name")
    return out


def _read_outputs(top: _Table, sweep: SweepSpec) -> OutputSpec:
    t = top.sub("outputs", ("vtk", "plots", "report", "ear_height_m", "mode_slices",
                            "map_frequencies_hz", "map_spacing_m"), "[outputs]")
    if t is None:
        return OutputSpec()
    mf = t.numbers("map_frequencies_hz", "Hz", default=None, min_len=1)
    if mf is not None:
        bad = [f for f in mf if not sweep.min_hz <= f <= sweep.max_hz]
        if bad:
            raise t.err("map_frequencies_hz", f"{bad[0]:g} Hz is outside the sweep "
                                              f"[{sweep.min_hz:g}, {sweep.max_hz:g}] Hz.")
        if len(mf) > 6:
            raise t.err("map_frequencies_hz", f"{len(mf)} maps asked for; at most 6.")
    return OutputSpec(
        vtk=t.boolean("vtk", default=True),
        plots=t.boolean("plots", default=True),
        report=t.boolean("report", default=True),
        ear_height_m=t.number("ear_height_m", "m", default=None, low=0.0, low_open=True),
        mode_slices=t.number("mode_slices", "", default=6, integer=True, low=0, high=24),
        map_frequencies_hz=tuple(float(f) for f in mf) if mf is not None else (),
        map_spacing_m=t.number("map_spacing_m", "m", default=None, low=0.005, high=10.0),
    )


# ==========================================================================
# checks against the geometry, before meshing where the geometry allows
# ==========================================================================
def _analytic_room(geo: GeometrySpec):
    """(surface names, inside(points) -> bool array) of a builder geometry, or None.

    Known without meshing for ``box`` and ``floor_plan`` (with its sloped
    ceiling, obstacles and patches); other geometries are checked on the mesh.
    """
    if geo.kind is not GeometryKind.BUILDER:
        return None
    p = geo.params
    try:
        if geo.builder == "box":
            L = np.array(p["size"], dtype=float)
            if L.shape != (3,) or np.any(~np.isfinite(L)) or np.any(L <= 0):
                return None
            names = ["x0", "x1", "y0", "y1", "z0", "z1"]

            def inside(x):
                return np.all((x >= 0) & (x <= L), axis=1)

        elif geo.builder == "floor_plan":
            P = np.array(p["polygon"], dtype=float)
            H = float(p["height"])
            if P.ndim != 2 or P.shape[1] != 2 or len(P) < 3:
                return None
            g = p.get("ceiling_slope")
            g = (0.0, 0.0) if g is None else tuple(float(v) for v in g)
            obstacles = tuple(p.get("obstacles", ()))
            patches = tuple(p.get("patches", ()))
            names = ["floor", "ceiling", *(f"wall_{i + 1}" for i in range(len(P))),
                     *(o.name for o in obstacles), *(q.name for q in patches)]
            top = H + g[0] * (P[:, 0] - P[0, 0]) + g[1] * (P[:, 1] - P[0, 1])
            scale = max(float(np.ptp(P, axis=0).max()), float(top.max()))
            tol = 1e-7 * scale

            def inside(x):
                ok = _in_polygon(x[:, :2], P)
                zc = H + g[0] * (x[:, 0] - P[0, 0]) + g[1] * (x[:, 1] - P[0, 1])
                ok &= (x[:, 2] >= 0) & (x[:, 2] <= zc)
                for o in obstacles:
                    c = o.contains(x, -tol, float(top.max()) + scale) \
                        if type(o).__name__ == "Column" else o.contains(x, -tol)
                    ok &= ~np.asarray(c, dtype=bool)
                return ok
        else:
            return None
    except (KeyError, TypeError, ValueError, AttributeError):
        return None  # the builder will name the defect
    if geo.rename:
        names = [geo.rename.get(n, n) for n in names]
    return names, inside


def _in_polygon(xy: np.ndarray, P: np.ndarray) -> np.ndarray:
    """(n,) bool: points (n, 2) inside the polygon P (m, 2) by the even-odd rule."""
    A, B = P, np.roll(P, -1, axis=0)
    x, y = xy[:, 0:1], xy[:, 1:2]
    cond = (A[None, :, 1] > y) != (B[None, :, 1] > y)
    with np.errstate(divide="ignore", invalid="ignore"):
        xint = A[None, :, 0] + (y - A[None, :, 1]) * (B[None, :, 0] - A[None, :, 0]) / (
            B[None, :, 1] - A[None, :, 1])
    return (np.count_nonzero(cond & (x < xint), axis=1) % 2) == 1


def _check_surface_names(sc: Scenario, names: Sequence[str]) -> None:
    for surf in sc.surfaces:
        if surf not in names:
            close = difflib.get_close_matches(surf, list(names), n=1, cutoff=0.6)
            hint = f"did you mean {close[0]!r}? " if close else ""
            raise sc.error(("surfaces", surf),
                           f"the geometry has no surface {surf!r}; {hint}its surfaces are: "
                           f"{', '.join(names)}.")


def _point_error(sc: Scenario, which: str, idx: int, where: str) -> ScenarioError:
    items = sc.sources if which == "source" else sc.receivers
    item = items[idx]
    x = item.position
    key = item.key
    m = re.match(r"^(\w+)\[(\d+)\]$", key)
    path = (m.group(1), int(m.group(2)) - 1) if m else (key,)
    grid = isinstance(item, ReceiverSpec) and bool(item.group)
    field_ = "first_seat_m" if grid else "position_m"
    extra = f" (seat {item.name})" if grid else ""
    return sc.error((*path, field_),
                    f"{which} {item.name!r}{extra} at ({x[0]:g}, {x[1]:g}, {x[2]:g}) m is "
                    f"outside the room{where}; move it inside the air volume.")


def _check_against_geometry(sc: Scenario) -> None:
    room = _analytic_room(sc.geometry)
    if room is None:
        return
    names, inside = room
    _check_surface_names(sc, names)
    for which, pts in (("source", sc.source_positions), ("receiver", sc.receiver_positions)):
        if len(pts):
            ok = inside(pts)
            if not ok.all():
                raise _point_error(sc, which, int(np.flatnonzero(~ok)[0]), "")


# ==========================================================================
# point location and field sampling on a mesh
# ==========================================================================
def inside_mesh(mesh, points: np.ndarray) -> np.ndarray:
    """(n,) bool: which points (n, 3) lie in the mesh (point location of
    :mod:`acoustic_fem._locate`, default tolerance)."""
    from ._locate import locate

    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    if len(pts) == 0:
        return np.zeros(0, dtype=bool)
    return locate(mesh, pts[:, : mesh.dim]).found


def sample_field(dofs, values: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Values of P1/P2 fields at arbitrary points.

    Parameters
    ----------
    dofs : DofMap
    values : (n_dofs,) or (n_dofs, k) array (real or complex)
    points : (n, 3) array

    Returns
    -------
    (n,) or (n, k) array; NaN at points outside the mesh.
    """
    from ._locate import interpolation_matrix, locate

    pts = np.asarray(points, dtype=float).reshape(-1, 3)
    loc = locate(dofs.mesh, pts[:, : dofs.mesh.dim])
    E = interpolation_matrix(dofs, loc)
    v = np.asarray(values)
    out = np.asarray(E @ v, dtype=np.result_type(v.dtype, float))
    out[~loc.found] = np.nan
    return out


# ==========================================================================
# building and solving
# ==========================================================================
def _call_checked(sc: Scenario, fn, kwargs, where: tuple):
    """Call a builder/importer; its InputError is re-raised naming the scenario key
    (the builder parameter its message names first, else ``where``)."""
    try:
        return fn(**kwargs)
    except ScenarioError:
        raise
    except InputError as exc:
        msg = str(exc)
        hits = [(m.start(), k) for k in sc.geometry.params
                for m in [re.search(rf"(?<![\w.]){re.escape(k)}(?:\[\d+\])?[=.\s]", msg)]
                if m is not None]
        key = where[:1] + (min(hits)[1],) if hits else where
        raise sc.error(key, msg) from None


def build_mesh(sc: Scenario, progress: ProgressFn | None = None, *, coarse: bool = False):
    """The mesh of a scenario (built, imported or read), surfaces renamed.

    Parameters
    ----------
    sc : Scenario
    progress : callable(stage, done, total), optional
    coarse : bool
        Builders and CAD files: mesh with straight cells at about half the
        room's size (a handful of cells) — the builder or importer validates
        every parameter and builds the exact geometry, for checks and estimates.

    Returns
    -------
    Mesh
    """
    from .mesh_io import read_mesh

    geo = sc.geometry
    if progress:
        progress("meshing", 0, 1)
    if geo.kind is GeometryKind.MESH_FILE:
        try:
            mesh = read_mesh(geo.path)
        except AcousticFemError as exc:
            raise sc.error(("geometry", "mesh_file"), str(exc)) from None
    elif geo.kind is GeometryKind.CAD_FILE:
        from . import cad

        stl = geo.path.suffix.lower() == ".stl"
        fn = cad.import_stl if stl else cad.import_cad
        kwargs = {"fmax": sc.mesh_fmax(), "order": sc.element_order, "air": sc.air}
        if coarse:  # a size from the total face area: a handful of cells
            from .geometry import ELEMENTS_PER_WAVELENGTH

            faces = _call_checked(sc, lambda: (cad.stl_patches(geo.path) if stl
                                               else cad.cad_faces(geo.path)), {},
                                  ("geometry", "cad_file"))
            hc = 0.5 * math.sqrt(max(sum(f.area for f in faces), 1e-6) / 6.0)
            kwargs.update(fmax=sc.air.c / (hc * ELEMENTS_PER_WAVELENGTH[1]), order=1)
        sig = inspect.signature(fn).parameters
        kwargs = {k: v for k, v in kwargs.items() if k in sig}
        mesh = _call_checked(sc, lambda **kw: fn(geo.path, **kw),
                             {**kwargs, **geo.params}, ("geometry", "cad_file"))
    else:
        fn = _builder_function(geo.builder)
        kwargs = dict(geo.params)
        kwargs.update(fmax=sc.mesh_fmax(), order=sc.element_order, air=sc.air)
        if coarse:
            from .geometry import ELEMENTS_PER_WAVELENGTH

            va = _builder_measures(geo)
            hc = 0.5 * va[0] ** (1.0 / 3.0) if va else 1.0
            kwargs.update(fmax=sc.air.c / (hc * ELEMENTS_PER_WAVELENGTH[1]), order=1)
        mesh = _call_checked(sc, fn, kwargs, ("geometry", "builder"))
    if geo.rename:
        for old in geo.rename:
            if old not in mesh.boundaries:
                raise sc.error(("geometry", "rename", old),
                               f"the geometry has no surface {old!r} to rename; its surfaces: "
                               f"{', '.join(mesh.surface_names)}.")
        mesh = mesh.rename(geo.rename)
    if mesh.dim != 3:
        raise sc.error(("geometry",), f"the geometry is {mesh.dim}-dimensional; scenarios are "
                                      "for 3D rooms.")
    if progress:
        progress("meshing", 1, 1)
    return mesh


def check_on_mesh(sc: Scenario, mesh) -> None:
    """Surface names and source/receiver positions checked on the actual mesh."""
    _check_surface_names(sc, mesh.surface_names)
    for which, pts in (("source", sc.source_positions), ("receiver", sc.receiver_positions)):
        if len(pts):
            bad = np.flatnonzero(~inside_mesh(mesh, pts))
            if bad.size:
                raise _point_error(sc, which, int(bad[0]), " (not inside any cell of the mesh)")


def scenario_walls(sc: Scenario, mesh) -> dict:
    """Wall condition of every surface of ``mesh`` (unlisted surfaces rigid).

    Returns
    -------
    dict surface name -> Wall
    """
    from .walls import PressureRelease, Rigid

    _check_surface_names(sc, mesh.surface_names)
    out = {}
    for surf in mesh.surface_names:
        mat = sc.surfaces.get(surf, RIGID)
        if mat == RIGID:
            out[surf] = Rigid()
        elif mat == PRESSURE_RELEASE:
            out[surf] = PressureRelease()
        else:
            try:
                out[surf] = sc.materials[mat].wall()
            except InputError as exc:
                raise sc.error(("surfaces", surf), f"material {mat!r}: {exc}") from None
    return out


def absorbing_surfaces(walls: Mapping) -> list[str]:
    """Names of the surfaces whose wall absorbs (an Impedance)."""
    from .impedance import Impedance

    return [n for n, w in walls.items() if isinstance(w, Impedance)]


@dataclass(frozen=True, eq=False)
class Solution:
    """Everything a run computed, for the results folder.

    Attributes
    ----------
    scenario : Scenario
    mesh : Mesh
    walls : mapping surface -> Wall
    modes : Modes
    response : ReceiverResponse or None
        The sweep at the receivers (``pressure`` (n_f, n_r) complex, ``spl``
        (n_f, n_r) dB); None without sources or receivers.
    frequencies : (n_f,) array, Hz (the sweep)
    plane : ReceiverPlane
        Grid at ear height of the SPL map and the mode slices.
    map_pressure : (n_f, n_plane) complex array or None
    timings : mapping stage -> seconds
    notes : tuple of str
        Warnings raised during the run and facts the report should state.
    field : PressureField or None
        The pressure on every DOF at the SPL-map frequencies
        (:func:`map_frequencies`), for the response VTK files; None without
        a response.
    """

    scenario: Scenario
    mesh: Any
    walls: Mapping
    modes: Any
    response: Any
    frequencies: np.ndarray
    plane: Any
    map_pressure: Any
    timings: Mapping
    notes: tuple
    field: Any = None


def map_frequencies(sc: Scenario, mode_frequencies, frequencies) -> list[float]:
    """Frequencies of the SPL maps and of the response VTK files.

    ``outputs.map_frequencies_hz``, else the three lowest nonzero
    eigenfrequencies in the sweep; each moved to the nearest sweep
    frequency (duplicates dropped).

    Parameters
    ----------
    sc : Scenario
    mode_frequencies : (n_modes,) array, Hz
    frequencies : (n_f,) array, Hz (the sweep)

    Returns
    -------
    list of float, Hz, each one of ``frequencies``.
    """
    f = np.asarray(frequencies, dtype=float)
    want = list(sc.outputs.map_frequencies_hz)
    if not want:
        fm = [float(x) for x in np.asarray(mode_frequencies, dtype=float)
              if sc.sweep.min_hz <= x <= sc.sweep.max_hz and x > 0]
        want = fm[:3]
    out = []
    for w in want:
        v = float(f[np.argmin(np.abs(f - w))])
        if v not in out:
            out.append(v)
    return out


def map_plane(sc: Scenario, mesh):
    """The horizontal grid of the SPL map and mode slices at ear height.

    Spacing ``outputs.map_spacing_m``, default the room's larger plan
    extent / 60; only points inside the room are kept
    (:func:`acoustic_fem.response.receiver_plane`).

    Returns
    -------
    ReceiverPlane (``points`` (n, 3), grid lines ``x``, ``y``, ``grid(values)``)
    """
    from .response import receiver_plane

    bb = mesh.bounding_box
    spacing = sc.outputs.map_spacing_m
    if spacing is None:
        spacing = float(max(bb[1, 0] - bb[0, 0], bb[1, 1] - bb[0, 1])) / 60.0
    z = min(max(sc.ear_height, float(bb[0, 2])), float(bb[1, 2]))
    return receiver_plane(mesh, spacing=spacing, height=z)


def _response_api():
    try:
        from . import response
    except ImportError:
        return None
    if not hasattr(response, "solve_response") or not hasattr(response, "PointSource"):
        return None
    return response


def solve_scenario(sc: Scenario, progress: ProgressFn | None = None) -> Solution:
    """Mesh, assemble and solve a scenario: modes, and the response at the receivers.

    Parameters
    ----------
    sc : Scenario
    progress : callable(stage, done, total), optional
        Called as stages start and advance ("meshing", "assembly", "modes",
        "sweep"); the library itself never prints.

    Returns
    -------
    Solution

    Notes
    -----
    The run uses :data:`SCENARIO_BLAS_THREADS` BLAS threads unless the
    environment sets a thread count itself (``OMP_NUM_THREADS``,
    ``OPENBLAS_NUM_THREADS``, ``MKL_NUM_THREADS``): measured on the demo
    (3 k DOFs) on 2 cores shared with other jobs (load average 9), the
    library's default of one BLAS thread per core took 32-46 s, one thread
    2.6-3.4 s, the results being the same algorithms' (the busy-waiting
    threads of the BLAS compete with the other jobs for the cores).
    """
    import os

    from threadpoolctl import threadpool_limits

    own = any(os.environ.get(v) for v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                                          "MKL_NUM_THREADS"))
    with threadpool_limits(limits=None if own else SCENARIO_BLAS_THREADS, user_api="blas"):
        return _solve_scenario(sc, progress)


#: BLAS threads of a scenario run (see :func:`solve_scenario`).
SCENARIO_BLAS_THREADS = 1


def _solve_scenario(sc: Scenario, progress: ProgressFn | None = None) -> Solution:
    from .assembly import assemble
    from .modes import solve_modes

    notes: list[str] = []
    timings: dict[str, float] = {}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t = time.perf_counter()
        mesh = build_mesh(sc, progress)
        timings["meshing"] = time.perf_counter() - t
        check_on_mesh(sc, mesh)
        walls = scenario_walls(sc, mesh)
        if progress:
            progress("assembly", 0, 1)
        t = time.perf_counter()
        asm = assemble(mesh, sc.element_order)
        timings["assembly"] = time.perf_counter() - t
        if progress:
            progress("assembly", 1, 1)
            progress("modes", 0, 1)
        t = time.perf_counter()
        kw = {}
        if "damping" in inspect.signature(solve_modes).parameters:
            kw["damping"] = sc.damping
        target = sc.sweep.error_target
        if target is None:
            if sc.estimate_errors:
                kw["estimate"] = True
            modes = solve_modes(mesh, walls, order=sc.element_order, fmax=sc.sweep.max_hz,
                                air=sc.air, assembly=asm, **kw)
        else:
            # the accuracy target refines the mesh (uniformly, keeping its surfaces):
            # the response and every output below use the last mesh
            modes = solve_modes(mesh, walls, order=sc.element_order, fmax=sc.sweep.max_hz,
                                air=sc.air, tol=target, estimate=True)
            acc = dict(modes.info)["accuracy_target"]
            notes.append(
                f"Accuracy target {target:g} (a-posteriori estimate) met after "
                f"{len(acc['steps'])} solve(s): {acc['steps'][-1]['n_dofs']} DOFs, largest "
                f"estimated error {acc['steps'][-1]['max_error']:.2g} (budget stated before "
                f"the first solve: {acc['budget']['max_dofs']} DOFs, "
                f"{acc['budget']['max_seconds']} s).")
            if modes.mesh is not mesh:
                mesh = modes.mesh
                walls = scenario_walls(sc, mesh)
                asm = assemble(mesh, sc.element_order)
        timings["modes"] = time.perf_counter() - t
        if progress:
            progress("modes", 1, 1)
        absorbing = absorbing_surfaces(walls)
        if absorbing and len(modes) and not np.any(np.asarray(modes.decay_rates) > 0):
            notes.append(
                "The surfaces " + ", ".join(absorbing) + " absorb, but this version's modal "
                "solver treated them as rigid (every decay rate is 0): the mode table shows "
                "undamped modes.")
        response = None
        field = None
        plane = map_plane(sc, mesh)
        map_p = None
        freqs = sc.sweep.frequencies
        if sc.wants_response:
            api = _response_api()
            if api is None:
                notes.append("Sources and receivers are given, but the frequency-response "
                             "solver (acoustic_fem.response) is not available in this "
                             "version: only the modes were computed.")
            else:
                t = time.perf_counter()
                response, map_p, field = _sweep(
                    api, sc, mesh, walls, freqs, plane.points, progress, asm,
                    field_hz=map_frequencies(sc, modes.frequencies, freqs))
                timings["sweep"] = time.perf_counter() - t
    for w in caught:
        msg = str(w.message)
        if msg not in notes:
            notes.append(msg)
    return Solution(sc, mesh, MappingProxyType(walls), modes, response, freqs, plane,
                    map_p, MappingProxyType(timings), tuple(notes), field)


def _sweep(api, sc: Scenario, mesh, walls, freqs, map_pts, progress, asm, field_hz=()):
    """Run the response solver over the sweep for the receivers followed by the
    map points; returns (response at the receivers, map pressure (n_f, n_m),
    the PressureField on every DOF at ``field_hz`` (sweep frequencies) or None).

    The direct method runs in chunks of frequencies so that progress can be
    reported; the modal method solves the whole sweep at once (its basis is
    built for the whole range).
    """
    sources = [api.PointSource(tuple(s.position), s.volume_velocity, gain=s.gain,
                               delay=s.delay) for s in sc.sources]
    recv = sc.receiver_positions
    allpts = np.vstack([recv, map_pts]) if len(map_pts) else recv
    nr = len(recv)
    if progress:
        progress("sweep", 0, len(freqs))
    chunks = (np.array_split(freqs, min(len(freqs), 20)) if sc.response_method == "direct"
              else [freqs])
    parts = []
    done = 0
    field_hz = np.asarray(field_hz, dtype=float)
    for ch in chunks:
        here = field_hz[np.isin(field_hz, ch)]
        r = api.solve_response(mesh, walls, sources=sources, receivers=allpts, frequencies=ch,
                               order=sc.element_order, air=sc.air, method=sc.response_method,
                               assembly=asm, **({"field_frequencies": here} if here.size else {}))
        parts.append(r)
        done += len(ch)
        if progress:
            progress("sweep", done, len(freqs))
    P = np.concatenate([np.asarray(r.pressure) for r in parts], axis=0)   # (n_f, nr + n_m)
    res = np.concatenate([np.asarray(r.residuals) for r in parts])
    imb = np.concatenate([np.asarray(r.energy_imbalance) for r in parts])
    rr = ReceiverResponse(freqs, P[:, :nr], res, imb, dict(parts[0].info))
    got = [r.field for r in parts if getattr(r, "field", None) is not None]
    field = None
    if got:
        field = api.PressureField(np.concatenate([g.frequencies for g in got]),
                                  np.vstack([g.pressure for g in got]), got[0].dofs)
    return rr, (P[:, nr:] if len(map_pts) else None), field


@dataclass(frozen=True, eq=False)
class ReceiverResponse:
    """The sweep at the receivers.

    Attributes
    ----------
    frequencies : (n_f,) Hz
    pressure : (n_f, n_r) complex Pa (e^{+iωt})
    residuals : (n_f,) relative residual of the full system (solver's check)
    energy_imbalance : (n_f,) |W_in - W_abs| / W_in (NaN where nothing absorbs)
    info : mapping (the solver's info of the first call)
    """

    frequencies: np.ndarray
    pressure: np.ndarray
    residuals: np.ndarray
    energy_imbalance: np.ndarray
    info: Mapping

    @property
    def spl(self) -> np.ndarray:
        """(n_f, n_r) SPL in dB re 20 µPa of the rms pressure |p|/√2."""
        return spl_db(self.pressure)


def spl_db(p) -> np.ndarray:
    """SPL in dB re 20 µPa of complex pressure amplitudes p (any shape): 20 log10(|p|/√2 / 20e-6)."""
    a = np.abs(np.asarray(p)) / math.sqrt(2.0)
    with np.errstate(divide="ignore"):
        return 20.0 * np.log10(np.maximum(a, 1e-30) / 20e-6)


# ==========================================================================
# cost estimate (check)
# ==========================================================================
@dataclass(frozen=True)
class CostEstimate:
    """What a run will cost, estimated before any heavy work.

    Attributes
    ----------
    dofs : int
        Degrees of freedom of the element order's space.
    cells : int
    memory_bytes : int
        Estimated peak memory of the process.
    seconds : float
        Rough time estimate (modes and sweep) on a 2-core machine.
    modes : int
        Weyl estimate of the number of modes up to max_hz.
    frequencies : int
    basis : str
        How the numbers were obtained.
    mesh_size_m : float
    """

    dofs: int
    cells: int
    memory_bytes: int
    seconds: float
    modes: int
    frequencies: int
    basis: str
    mesh_size_m: float


#: Bytes a run adds to the solver's estimate for the results: matplotlib and
#: the report (measured: about 60 MB resident after drawing the plots).
_RESULTS_BYTES = 60 * 2**20


def estimate_scenario_cost(sc: Scenario, *, mesh=None, mesh_below_cells: int = 40000
                           ) -> CostEstimate | None:
    """DOFs, memory and time of a scenario, and its checks on the geometry, before
    any heavy work.

    Mesh files are read (exact counts).  Builder geometries whose predicted
    mesh (:func:`acoustic_fem._cost.estimate_cost` from volume, boundary area
    and mesh size) has fewer than ``mesh_below_cells`` cells are meshed and
    counted exactly (well under a second); larger ones are built once at a
    very coarse size (a handful of cells: the builder validates every
    parameter, and the coarse mesh gives the exact volume and area, obstacles
    included) and estimated from those.  Either way the surfaces and the
    source and receiver positions are checked on the mesh built.

    Memory: the mode solve's peak (:func:`acoustic_fem._cost.estimate_solve_memory`;
    the factor and eigen parts doubled for the complex arithmetic of absorbing
    walls) or the sweep's if larger, plus the plotting.  Time: rough, from the
    cost model's mode-solve time (tripled for absorbing walls with
    damping = "exact") and the sweep (a modal basis to twice max_hz, or one
    complex factorisation per frequency).

    Returns
    -------
    CostEstimate, or None when the size cannot be found without meshing.

    Raises
    ------
    ScenarioError
        The geometry rejects a parameter, a surface or point does not fit.
    """
    from ._cost import estimate_cost, estimate_solve_memory, weyl_count

    nf = len(sc.sweep.frequencies) if sc.wants_response else 0
    h = sc.target_mesh_size()
    order = sc.element_order
    geo = sc.geometry
    basis = ""
    pred = None
    if mesh is None and geo.kind is GeometryKind.MESH_FILE:
        mesh = build_mesh(sc)
        basis = "counted on the mesh file"
    elif mesh is None and geo.kind is GeometryKind.CAD_FILE:
        coarse = build_mesh(sc, coarse=True)
        check_on_mesh(sc, coarse)
        pred = estimate_cost(coarse.measure, coarse.boundary_measure, fmax=sc.sweep.max_hz,
                             order=order, air=sc.air, h=h)
        if pred.n_cells < mesh_below_cells:
            mesh = build_mesh(sc)
            basis = "counted on the mesh (small model, meshed)"
    elif mesh is None and geo.kind is GeometryKind.BUILDER:
        va = _builder_measures(geo)
        if va is not None:
            pred = estimate_cost(va[0], va[1], fmax=sc.sweep.max_hz, order=order, air=sc.air,
                                 h=h)
        if pred is not None and pred.n_cells < mesh_below_cells:
            mesh = build_mesh(sc)
            basis = "counted on the mesh (small model, meshed)"
        else:
            coarse = build_mesh(sc, coarse=True)
            check_on_mesh(sc, coarse)
            pred = estimate_cost(coarse.measure, coarse.boundary_measure,
                                 fmax=sc.sweep.max_hz, order=order, air=sc.air, h=h)
    if mesh is not None:
        from .dofs import DofMap

        check_on_mesh(sc, mesh)
        dofs = DofMap(mesh, order).n_dofs
        cells, edges = mesh.n_cells, len(mesh.edges)
        vol, area = mesh.measure, mesh.boundary_measure
        basis = basis or "counted on the mesh"
    elif pred is not None:
        dofs, cells, edges = pred.n_dofs, pred.n_cells, pred.n_edges
        vol, area = pred.volume, pred.area
        basis = (f"estimated from the volume {vol:.3g} m³, area {area:.3g} m² and mesh size "
                 f"{h:.3g} m")
    else:
        return None
    k = 2 * math.pi * sc.sweep.max_hz / sc.air.c
    n_modes = max(weyl_count(3, vol, area, k), 1.0)
    parts = estimate_solve_memory(dofs, order, n_modes, n_cells=cells, n_edges=edges)
    absorbing = any(m.kind not in (MaterialKind.RIGID, MaterialKind.PRESSURE_RELEASE)
                    for m in sc.materials.values())
    solve = parts["peak"] + ((parts["factor"] + parts["eigen"]) if absorbing else 0)
    sweep = 0
    if nf:
        if sc.response_method == "direct":
            # a complex LU per frequency: SuperLU's fill over the Cholesky factor's
            sweep = parts["base"] + parts["matrices"] + 2 * 4.0 * parts["factor"]
        else:
            # modal basis up to twice max_hz (real vectors) and its projections
            n_basis = weyl_count(3, vol, area, 2 * k) + 3 * len(sc.sources) + 8
            sweep = parts["peak"] + 8 * dofs * n_basis * 3
    mem = max(solve, sweep) + _RESULTS_BYTES
    scale = dofs / max(estimate_cost(vol, area, fmax=sc.sweep.max_hz, order=order, air=sc.air,
                                     h=h).n_dofs, 1)
    t_modes = estimate_cost(vol, area, fmax=sc.sweep.max_hz, order=order, air=sc.air,
                            h=h).seconds["solve"] * scale
    if absorbing and sc.damping == "exact":
        t_modes *= 3.0
    t_sweep = 0.0
    if nf:
        if sc.response_method == "direct":
            # SciPy's SuperLU on P2 tetrahedra: about 0.5 s at 2400 complex
            # unknowns on this project's 2-core machine, growing as n² (measured)
            t_sweep = nf * 0.5 * (dofs / 2400.0) ** 2
        else:
            t_sweep = estimate_cost(vol, area, fmax=2 * sc.sweep.max_hz, order=order,
                                    air=sc.air, h=h).seconds["solve"] * scale + 0.01 * nf
    return CostEstimate(int(dofs), int(cells), int(mem), float(t_modes + t_sweep),
                        int(round(n_modes)), int(nf), basis, float(h))


def _builder_measures(geo: GeometrySpec) -> tuple[float, float] | None:
    """(volume m³, boundary area m²) of a builder geometry, or None if not known."""
    p = geo.params
    try:
        if geo.builder == "box":
            L = np.array(p["size"], dtype=float)
            return float(np.prod(L)), float(2 * (L[0] * L[1] + L[1] * L[2] + L[0] * L[2]))
        if geo.builder == "floor_plan":
            vol = _builder_volume(geo)
            if vol is None:
                return None
            P = np.array(p["polygon"], dtype=float)
            Q = np.roll(P, -1, axis=0)
            floor = 0.5 * abs(float(np.sum(P[:, 0] * Q[:, 1] - Q[:, 0] * P[:, 1])))
            g = p.get("ceiling_slope") or (0.0, 0.0)
            H = float(p["height"])
            zc = H + g[0] * (P[:, 0] - P[0, 0]) + g[1] * (P[:, 1] - P[0, 1])
            walls = float(np.sum(np.linalg.norm(Q - P, axis=1) * 0.5 * (zc + np.roll(zc, -1))))
            ceiling = floor * math.sqrt(1.0 + g[0] ** 2 + g[1] ** 2)
            extra = 0.0
            for o in p.get("obstacles", ()):  # exposed faces add area (volume change ignored)
                if hasattr(o, "lo"):
                    d = np.array(o.hi, float) - np.array(o.lo, float)
                    extra += 2 * (d[0] * d[1] + d[1] * d[2] + d[0] * d[2])
            return vol, floor + ceiling + walls + extra
        if geo.builder == "cylinder":
            r, H = float(p["radius"]), float(p["height"])
            return math.pi * r * r * H, 2 * math.pi * r * (r + H)
        if geo.builder == "sphere":
            r = float(p["radius"])
            return 4.0 / 3.0 * math.pi * r**3, 4 * math.pi * r * r
    except (KeyError, TypeError, ValueError):
        return None
    return None


def _builder_volume(geo: GeometrySpec) -> float | None:
    p = geo.params
    try:
        if geo.builder == "box":
            return float(np.prod(np.array(p["size"], dtype=float)))
        if geo.builder == "floor_plan":
            P = np.array(p["polygon"], dtype=float)
            Q = np.roll(P, -1, axis=0)
            cross = P[:, 0] * Q[:, 1] - Q[:, 0] * P[:, 1]
            signed = 0.5 * float(np.sum(cross))
            if signed == 0:
                return None
            g = p.get("ceiling_slope") or (0.0, 0.0)
            # a planar ceiling's mean height over the floor is its height at the
            # floor's centroid (shoelace centroid formula, signed area)
            cx = float(np.sum((P[:, 0] + Q[:, 0]) * cross)) / (6 * signed)
            cy = float(np.sum((P[:, 1] + Q[:, 1]) * cross)) / (6 * signed)
            H = float(p["height"]) + g[0] * (cx - P[0, 0]) + g[1] * (cy - P[0, 1])
            return abs(signed) * H
        if geo.builder == "cylinder":
            return math.pi * float(p["radius"]) ** 2 * float(p["height"])
        if geo.builder == "sphere":
            return 4.0 / 3.0 * math.pi * float(p["radius"]) ** 3
    except (KeyError, TypeError, ValueError):
        return None
    return None
