"""Parametric studies: run a model over a grid of parameters, track its modes.

A *model* is any callable ``model(**params)`` returning either a
:class:`~acoustic_fem.modes.Modes` or a mapping of result columns (numbers or
equal-length 1-D arrays, e.g. ``{"frequency_hz": f, "spl_db": L}``).
:class:`BoxModel` is a ready-made model for the common case of a rectangular
room whose dimensions, scale and air temperature vary.

:func:`sweep` runs every variant of the parameter grid

* in worker processes on this machine (``workers``, default every core,
  started from a forkserver where the platform has one; each
  variant runs with ``blas_threads`` BLAS threads, default 1, so that the
  workers do not oversubscribe the cores and results do not depend on how
  many workers ran them), in this process for ``workers=1``, or on a Dask
  cluster when given ``client=`` (a ``dask.distributed.Client`` or a
  scheduler address; install with ``pip install 'acoustic-fem[study]'``);
* resumably: with ``cache=folder`` each finished variant is written at once
  (atomically) under the SHA-256 of a canonical JSON of the model's
  identity, its parameters, the tracking points and the acoustic_fem
  version, and a rerun computes only the variants missing there;
* with modes followed from variant to variant by MAC
  (:mod:`acoustic_fem.tracking`), so that crossing modes keep their ids.

The result is a :class:`SweepResult`: a tidy table (one row per variant and
mode, or per variant and result row), a CSV writer and :func:`plot_tracks`.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import enum
import functools
import hashlib
import inspect
import itertools
import json
import math
import numbers
import os
import pickle
import sys
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, ClassVar, Mapping, Sequence

import numpy as np

from ._atomic import atomic_path
from ._errors import InputError
from .tracking import Tracks, grid_fractions, sample_shapes, track_modes

__all__ = ["BoxModel", "Combine", "StartMethod", "SweepResult", "sweep", "plot_tracks",
           "STUDY_EXTRA"]

#: The pip command that installs the optional Dask dependency.
STUDY_EXTRA = "pip install 'acoustic-fem[study]'  (or: pip install 'dask[distributed]')"

#: Version of the cache file layout (part of every key).
_CACHE_FORMAT = 1

#: Table columns that parameters may not shadow.
_RESERVED = ("variant", "mode", "index", "frequency_hz", "decay_rate_per_s", "mac", "row")


class StartMethod(str, enum.Enum):
    """How worker processes are started (see the ``multiprocessing`` docs)."""

    #: a server process imports acoustic_fem once and forks each worker from
    #: itself (cheap, and safe: the server has no threads of the caller's);
    #: the default where available (Linux, macOS)
    FORKSERVER = "forkserver"
    #: a fresh interpreter per worker (imports everything again; Windows' only way)
    SPAWN = "spawn"
    #: fork the calling process (cheapest; unsafe if the caller runs threads)
    FORK = "fork"


#: Modules a forkserver imports before forking workers.
_PRELOAD = ["acoustic_fem.study", "acoustic_fem.modes", "acoustic_fem.geometry"]


class Combine(str, enum.Enum):
    """How the value lists of several parameters make variants."""

    #: every combination (the last parameter varies fastest)
    PRODUCT = "product"
    #: the i-th value of every list together (all lists of one length)
    ZIP = "zip"


# ------------------------------------------------------------ the box model
_WALL_KINDS = ("rigid", "pressure_release")


@dataclass(frozen=True)
class BoxModel:
    """Modes of a rectangular room whose size and air vary: a ready-made sweep model.

    Calling the model with sweep parameters builds the room with
    :func:`acoustic_fem.geometry.box` and solves it with
    :func:`acoustic_fem.modes.solve_modes`.

    Parameters
    ----------
    size : (3,) floats
        Base room size (Lx, Ly, Lz) in metres.
    fmax : float
        Every mode up to fmax (Hz) is solved for.
    mesh_fmax : float, optional
        Frequency (Hz) that sets the mesh size (default ``fmax``).
    order : int
        Element and geometry order, 1 or 2 (default 2).
    walls : mapping face -> "rigid" | "pressure_release", optional
        Face names x0, x1, y0, y1, z0, z1 (as in
        :func:`acoustic_fem.analytic.box_modes`); faces not named are rigid.

    Sweep parameters (keywords of the call)
    ---------------------------------------
    Lx, Ly, Lz : float, optional
        Replace one dimension of ``size`` (m).
    scale : float
        Factor on all three dimensions (default 1).
    temperature : float, optional
        Air temperature in °C (default that of ``Air()``, 20 °C).
    """

    size: tuple = (5.0, 4.0, 3.0)
    fmax: float = 100.0
    mesh_fmax: float | None = None
    order: int = 2
    walls: Any = None

    #: Units of the sweep parameters (axis labels of :func:`plot_tracks`).
    units: ClassVar[Mapping[str, str]] = MappingProxyType(
        {"Lx": "m", "Ly": "m", "Lz": "m", "scale": "", "temperature": "°C"})

    def __post_init__(self) -> None:
        from .geometry import BOX_FACES, _box_size, _number

        object.__setattr__(self, "size", _box_size(self.size))
        object.__setattr__(self, "fmax", _number("fmax", self.fmax, "Hz",
                                                 "give the highest frequency wanted"))
        if self.mesh_fmax is not None:
            object.__setattr__(self, "mesh_fmax", _number(
                "mesh_fmax", self.mesh_fmax, "Hz", "give the frequency that sets the mesh size"))
        if isinstance(self.order, bool) or self.order not in (1, 2):
            raise InputError(f"order={self.order!r} must be 1 or 2.")
        walls = {} if self.walls is None else self.walls
        if isinstance(walls, tuple):
            walls = dict(walls)
        if not isinstance(walls, Mapping):
            raise InputError(
                f"walls={self.walls!r} must map face names to 'rigid' or 'pressure_release', "
                "e.g. {'z1': 'pressure_release'}."
            )
        for face, kind in walls.items():
            if face not in BOX_FACES:
                raise InputError(f"walls names face {face!r}; the box faces are {BOX_FACES}.")
            if kind not in _WALL_KINDS:
                raise InputError(
                    f"walls[{face!r}]={kind!r}; use 'rigid' or 'pressure_release'.")
        object.__setattr__(self, "walls", tuple(sorted(walls.items())))

    def dimensions(self, *, Lx=None, Ly=None, Lz=None, scale=1.0) -> tuple:
        """(Lx, Ly, Lz) in metres of the variant with these parameters."""
        L = [self.size[i] if v is None else v for i, v in enumerate((Lx, Ly, Lz))]
        return tuple(float(scale) * float(v) for v in L)

    def __call__(self, *, Lx=None, Ly=None, Lz=None, scale=1.0, temperature=None):
        from .air import Air
        from .geometry import box
        from .modes import solve_modes
        from .walls import PressureRelease, Rigid

        air = Air() if temperature is None else Air(temperature=temperature)
        size = self.dimensions(Lx=Lx, Ly=Ly, Lz=Lz, scale=scale)
        mesh = box(size, fmax=self.mesh_fmax or self.fmax, order=self.order, air=air)
        walls = {f: (PressureRelease() if k == "pressure_release" else Rigid())
                 for f, k in self.walls}
        return solve_modes(mesh, walls, order=self.order, fmax=self.fmax, air=air)


# ----------------------------------------------------------------- variants
def _accepted(model) -> tuple[list[str], list[str], bool]:
    """(accepted names, required names, accepts **kwargs) of the model's call."""
    try:
        sig = inspect.signature(model)
    except (TypeError, ValueError):
        return [], [], True  # builtins without a signature: let the call decide
    names, required, var_kw = [], [], False
    for p in sig.parameters.values():
        if p.kind is p.VAR_KEYWORD:
            var_kw = True
        elif p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY):
            names.append(p.name)
            if p.default is p.empty:
                required.append(p.name)
    return names, required, var_kw


def _model_name(model) -> str:
    return getattr(model, "__qualname__", None) or type(model).__qualname__


def _variants(model, params, combine) -> tuple[list[dict], tuple[str, ...]]:
    if isinstance(params, Mapping):
        if not params:
            raise InputError(
                "the sweep is empty: params={} names no parameter; give e.g. "
                "params={'Lx': [4.0, 4.5, 5.0]}."
            )
        lists = {}
        for name, values in params.items():
            if not isinstance(name, str):
                raise InputError(f"parameter names must be strings, got {name!r}.")
            if isinstance(values, (str, bytes)) or not isinstance(values, (Sequence, np.ndarray)):
                raise InputError(
                    f"params[{name!r}]={values!r} must be a list of values to sweep over; for "
                    f"a fixed value give a one-element list [{values!r}]."
                )
            values = list(values)
            if not values:
                raise InputError(
                    f"the sweep is empty: parameter {name!r} has no values; give at least one."
                )
            lists[name] = values
        try:
            combine = Combine(combine)
        except ValueError:
            raise InputError(
                f"combine={combine!r} is not known; use 'product' (every combination) or 'zip' "
                "(values taken together)."
            ) from None
        names = tuple(lists)
        if combine is Combine.ZIP:
            lengths = {n: len(v) for n, v in lists.items()}
            if len(set(lengths.values())) > 1:
                raise InputError(
                    f"combine='zip' needs value lists of one length; got {lengths}. Use "
                    "combine='product' for every combination."
                )
            rows = zip(*lists.values())
        else:
            rows = itertools.product(*lists.values())
        variants = [dict(zip(names, r)) for r in rows]
    elif isinstance(params, Sequence) and not isinstance(params, (str, bytes)):
        variants = [dict(v) if isinstance(v, Mapping) else v for v in params]
        if not variants:
            raise InputError("the sweep is empty: the list of variants has no entries.")
        bad = [v for v in variants if not isinstance(v, dict)]
        if bad:
            raise InputError(
                f"each variant must be a mapping of parameter values, got {bad[0]!r}.")
        names = tuple(dict.fromkeys(k for v in variants for k in v))
        for i, v in enumerate(variants):
            if tuple(v) != names and set(v) != set(names):
                raise InputError(
                    f"variant {i} sets {sorted(v)} but others set {sorted(names)}; give every "
                    "variant the same parameters."
                )
        variants = [{n: v[n] for n in names} for v in variants]
    else:
        raise InputError(
            f"params={params!r} must map parameter names to lists of values (or be a list of "
            "variant mappings)."
        )
    accepted, required, var_kw = _accepted(model)
    unknown = [n for n in names if n not in accepted and not var_kw]
    if unknown:
        raise InputError(
            f"unknown parameter(s) {unknown} for model {_model_name(model)}; it accepts "
            f"{accepted}."
        )
    missing = [n for n in required if n not in names]
    if missing:
        raise InputError(
            f"model {_model_name(model)} needs parameter(s) {missing}, which the sweep does not "
            f"set; add them to params (a fixed value as a one-element list)."
        )
    clash = [n for n in names if n in _RESERVED]
    if clash:
        raise InputError(
            f"parameter name(s) {clash} clash with the result table's columns {_RESERVED}; "
            "rename them in the model."
        )
    return variants, names


# ------------------------------------------------------- identity and keys
def _canon(v):
    """JSON-ready canonical form of a parameter value (TypeError if none)."""
    if v is None or isinstance(v, (bool, str)):
        return v
    if isinstance(v, np.bool_):
        return bool(v)
    if isinstance(v, enum.Enum):
        return {"__enum__": f"{type(v).__module__}.{type(v).__qualname__}",
                "value": _canon(v.value)}
    if isinstance(v, numbers.Integral):
        return int(v)
    if isinstance(v, numbers.Real):
        return float(v)
    if isinstance(v, numbers.Complex):
        return {"__complex__": [float(v.real), float(v.imag)]}
    if isinstance(v, np.ndarray):
        return _canon(v.tolist())
    if isinstance(v, (list, tuple)):
        return [_canon(x) for x in v]
    if isinstance(v, Mapping):
        return {"__map__": sorted(([_canon(k), _canon(x)] for k, x in v.items()),
                                  key=lambda kv: json.dumps(kv[0], sort_keys=True))}
    if dataclasses.is_dataclass(v) and not isinstance(v, type):
        return {"__type__": f"{type(v).__module__}.{type(v).__qualname__}",
                "fields": {f.name: _canon(getattr(v, f.name)) for f in dataclasses.fields(v)}}
    raise TypeError(f"{type(v).__name__} value {v!r}")


def _identity(model):
    """Canonical identity of a model: module and qualified name (+ fields)."""
    ident = getattr(model, "study_identity", None)
    if callable(ident):
        return {"custom": _canon(ident())}
    if isinstance(model, functools.partial):
        return {"partial": _identity(model.func), "args": _canon(model.args),
                "keywords": _canon(model.keywords)}
    if dataclasses.is_dataclass(model) and not isinstance(model, type):
        return _canon(model)
    if inspect.isfunction(model) or inspect.isbuiltin(model) or isinstance(model, type):
        return {"callable": f"{model.__module__}.{model.__qualname__}"}
    if inspect.ismethod(model):
        return {"method": _identity(model.__func__), "self": _identity(model.__self__)}
    t = type(model)
    return {"instance": f"{t.__module__}.{t.__qualname__}"}


def _anonymous(model) -> bool:
    name = getattr(getattr(model, "func", model), "__qualname__", "")
    return "<lambda>" in name or "<locals>" in name


def _fractions_digest(F: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(F, dtype="<f8").tobytes()).hexdigest()


def _key_document(identity, version, params, F) -> str:
    from . import __version__

    doc = {"format": _CACHE_FORMAT, "model": identity, "model_version": version,
           "params": _canon(params), "acoustic_fem": __version__,
           "tracking_points": _fractions_digest(F)}
    return json.dumps(doc, sort_keys=True, separators=(",", ":"), allow_nan=True)


# -------------------------------------------------------------- one variant
@contextlib.contextmanager
def _blas_limit(n):
    if n is None:
        yield
        return
    from threadpoolctl import threadpool_limits

    from ._linalg import _have_cholmod

    _have_cholmod()  # load CHOLMOD's BLAS first so that the limit reaches it too
    with threadpool_limits(limits=int(n)):
        yield


def _payload(out, fractions) -> dict:
    from .modes import Modes

    if isinstance(out, Modes):
        d = out.mesh.dim
        F = np.asarray(fractions, dtype=float)
        if F.shape[1] > d:  # a 3D grid on a 2D or 1D model: its distinct points there
            F = np.unique(F[:, :d], axis=0)
        return {"kind": "modes", "frequencies": np.array(out.frequencies),
                "decay_rates": np.array(out.decay_rates),
                "samples": sample_shapes(out, F), "n_dofs": int(out.dofs.n_dofs)}
    if isinstance(out, Mapping):
        cols = {}
        n = None
        for name, v in out.items():
            a = np.asarray(v)
            if a.ndim > 1 or not isinstance(name, str):
                raise InputError(
                    f"the model returned column {name!r} of shape {a.shape}; return a mapping "
                    "of string names to numbers or 1-D arrays of one length."
                )
            if a.ndim == 1:
                if n is not None and a.size != n:
                    raise InputError(
                        f"the model returned columns of lengths {n} and {a.size} ({name!r}); "
                        "give every 1-D column the same length."
                    )
                n = a.size
            cols[name] = a
        n = 1 if n is None else n
        cols = {k: (np.full(n, a.item(), dtype=a.dtype) if a.ndim == 0 else a)
                for k, a in cols.items()}
        clash = [k for k in cols if k in ("variant", "row")]
        if clash:
            raise InputError(f"result column name(s) {clash} are reserved; rename them.")
        return {"kind": "values", "columns": cols}
    raise InputError(
        f"the model returned a {type(out).__name__}; return a Modes (from solve_modes) or a "
        "mapping of result columns."
    )


def _run_variant(model, params, fractions, blas_threads):
    """Run one variant: the unit of work of every executor.

    Warnings are recorded and returned with the result, to be re-issued in
    the calling process (a worker process would only print them).
    """
    t0 = time.perf_counter()
    c0 = time.process_time()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with _blas_limit(blas_threads):
            payload = _payload(model(**params), fractions)
    payload["seconds"] = time.perf_counter() - t0
    payload["cpu_seconds"] = time.process_time() - c0
    payload["warnings"] = [(_importable(w.category), str(w.message)) for w in caught]
    return payload


def _importable(category):
    """The warning class itself if it pickles by name, else UserWarning."""
    mod = sys.modules.get(getattr(category, "__module__", ""), None)
    return category if getattr(mod, category.__qualname__, None) is category else UserWarning


def _init_worker(blas_threads):  # pragma: no cover - runs in the worker processes
    if blas_threads is not None:
        from threadpoolctl import threadpool_limits

        from . import modes  # noqa: F401  (numpy, scipy and their BLAS)
        from ._linalg import _have_cholmod

        _have_cholmod()
        threadpool_limits(limits=int(blas_threads))


# -------------------------------------------------------------------- cache
class _Cache:
    """Folder of finished variants, one ``<sha256>.npz`` each."""

    def __init__(self, folder):
        self.folder = Path(folder)
        if self.folder.exists() and not self.folder.is_dir():
            raise InputError(f"cache={str(folder)!r} is a file; give a folder for the cache.")
        self.folder.mkdir(parents=True, exist_ok=True)

    def path(self, key: str) -> Path:
        return self.folder / f"{key}.npz"

    def load(self, key: str, document: str):
        p = self.path(key)
        if not p.exists():
            return None
        try:
            with np.load(p, allow_pickle=False) as z:
                meta = json.loads(str(z["meta"]))
                if meta.get("key") != document:
                    raise ValueError("key document differs")
                if meta["kind"] == "modes":
                    return {"kind": "modes", "frequencies": z["frequencies"],
                            "decay_rates": z["decay_rates"], "samples": z["samples"],
                            "n_dofs": int(meta["n_dofs"])}
                return {"kind": "values",
                        "columns": {n: z[f"col_{i}"] for i, n in enumerate(meta["columns"])}}
        except Exception as exc:  # a damaged entry is recomputed, not trusted
            warnings.warn(f"cache entry {p} is unreadable ({exc}); computing it again.",
                          stacklevel=3)
            return None

    def save(self, key: str, document: str, payload: dict) -> None:
        p = self.path(key)
        meta = {"key": document, "kind": payload["kind"]}
        arrays = {}
        if payload["kind"] == "modes":
            meta["n_dofs"] = payload["n_dofs"]
            arrays = {k: payload[k] for k in ("frequencies", "decay_rates", "samples")}
        else:
            names = list(payload["columns"])
            meta["columns"] = names
            arrays = {f"col_{i}": payload["columns"][n] for i, n in enumerate(names)}
        with atomic_path(p, overwrite=p.exists()) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, meta=np.array(json.dumps(meta)), **arrays)


# ---------------------------------------------------------------- executors
def _check_picklable(model, variants):
    if getattr(model, "__module__", None) == "__main__" and not hasattr(
            sys.modules.get("__main__"), "__file__"):
        raise InputError(
            f"model {_model_name(model)} is defined interactively (in __main__ without a file), "
            "which worker processes cannot import; define it in a module, or pass workers=1, "
            "or run on a Dask client."
        )
    try:
        pickle.dumps(model)
    except Exception as exc:
        raise InputError(
            f"model {_model_name(model)} cannot be sent to worker processes: it must be "
            f"picklable ({type(exc).__name__}: {exc}); define it at module level (not a lambda "
            "or nested function), or pass workers=1 to run in this process."
        ) from None
    try:
        pickle.dumps(variants)
    except Exception as exc:
        raise InputError(
            f"the parameter values cannot be sent to worker processes ({exc}); use picklable "
            "values (numbers, strings, tuples, dataclasses) or pass workers=1."
        ) from None


def _note(exc: BaseException, i: int, params: dict) -> None:
    if hasattr(exc, "add_note"):
        exc.add_note(f"(in sweep variant {i} with parameters {params})")


def _run_in_process(model, jobs, fractions, blas_threads, done):
    for i, params in jobs:
        try:
            payload = _run_variant(model, params, fractions, blas_threads)
        except Exception as exc:
            _note(exc, i, params)
            raise
        done(i, payload)


def _start_method(method) -> StartMethod:
    import multiprocessing

    if method is None:
        have = multiprocessing.get_all_start_methods()
        return StartMethod.FORKSERVER if "forkserver" in have else StartMethod.SPAWN
    try:
        m = StartMethod(method)
    except ValueError:
        raise InputError(
            f"start_method={method!r} is not known; use one of "
            f"{[x.value for x in StartMethod]}."
        ) from None
    if m.value not in multiprocessing.get_all_start_methods():
        raise InputError(f"start_method={m.value!r} is not available on this platform; use "
                         f"one of {multiprocessing.get_all_start_methods()}.")
    return m


def _run_processes(model, jobs, fractions, blas_threads, workers, done, method):
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    ctx = multiprocessing.get_context(method.value)
    if method is StartMethod.FORKSERVER:
        ctx.set_forkserver_preload(_PRELOAD)  # no effect once the server runs
    ex = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker,
                             initargs=(blas_threads,))
    clean = False
    try:
        pending = {ex.submit(_run_variant, model, p, fractions, blas_threads): (i, p)
                   for i, p in jobs}
        error = None
        while pending:
            finished, _ = wait(pending, return_when=FIRST_COMPLETED)
            for fut in finished:
                i, p = pending.pop(fut)
                if fut.cancelled():
                    continue
                exc = fut.exception()
                if exc is not None:
                    if error is None:
                        _note(exc, i, p)
                        error = exc
                        for other in pending:  # keep what is running, drop the rest
                            other.cancel()
                    continue
                done(i, fut.result())
        if error is not None:
            raise error
        clean = True
    finally:
        ex.shutdown(wait=clean, cancel_futures=True)


def _dask_client(client, connect_timeout):
    try:
        import distributed
    except ImportError:
        raise InputError(
            f"running a sweep on a Dask cluster needs dask.distributed, which is not "
            f"installed: {STUDY_EXTRA}."
        ) from None
    if isinstance(client, (str, os.PathLike)):
        address = str(client)
        try:
            c = distributed.Client(address, timeout=connect_timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise InputError(
                f"no Dask scheduler answered at {address!r} within {connect_timeout:g} s "
                f"({type(exc).__name__}: {exc}); check the address (e.g. tcp://host:8786) and "
                "that the scheduler runs, or omit client= to use local worker processes."
            ) from None
        return c, True
    if isinstance(client, distributed.Client):
        return client, False
    raise InputError(
        f"client={client!r} must be a dask.distributed Client or a scheduler address "
        "such as 'tcp://127.0.0.1:8786'."
    )


# ------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class SweepResult:
    """Results of a sweep, one entry per variant, and the tracked modes.

    Attributes
    ----------
    parameter_names : tuple of str
    variants : tuple of mappings
        Parameter values of each variant, in sweep order.
    kind : str
        "modes" (the model returned Modes) or "values" (mappings).
    frequencies, decay_rates : tuple of (n_k,) float arrays
        Each variant's own modes, ascending (kind "modes").
    samples : tuple of (n_points, n_k) float arrays
        Each variant's mode shapes at the tracking points (kind "modes").
    fractions : (n_points, dim) float array
        Tracking points as fractions of each variant's bounding box.
    tracks : Tracks or None
        Modes followed through the sweep; arrays (n_variants, n_tracks).
    columns : tuple of mappings name -> (n_rows,) array
        Each variant's result columns (kind "values").
    units : mapping parameter -> unit string
    info : mapping
        ``computed`` (variant indices computed in this run), ``cached``
        (indices read from the cache), ``executor`` ("in-process",
        "processes", "dask" or "none"), ``workers``, ``start_method``,
        ``seconds`` (wall time of the sweep), ``variant_seconds`` and
        ``variant_cpu_seconds`` (wall and CPU time of each variant computed,
        NaN for cached ones), ``n_dofs``, ``track_along``.
    """

    parameter_names: tuple
    variants: tuple
    kind: str
    frequencies: tuple = ()
    decay_rates: tuple = ()
    samples: tuple = ()
    fractions: np.ndarray | None = None
    tracks: Tracks | None = None
    columns: tuple = ()
    units: Mapping = field(default_factory=dict)
    info: Mapping = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "variants",
                           tuple(MappingProxyType(dict(v)) for v in self.variants))
        object.__setattr__(self, "units", MappingProxyType(dict(self.units)))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    def __len__(self) -> int:
        return len(self.variants)

    def __repr__(self) -> str:
        extra = f", {self.tracks.n_tracks} tracked modes" if self.tracks is not None else ""
        return (f"SweepResult({len(self)} variants of {list(self.parameter_names)}, "
                f"{self.kind}{extra})")

    @property
    def n_variants(self) -> int:
        return len(self.variants)

    def parameter_values(self, name: str) -> list:
        """Value of parameter ``name`` in each variant (list of n_variants)."""
        if name not in self.parameter_names:
            raise InputError(f"no parameter {name!r}; the sweep has {list(self.parameter_names)}.")
        return [v[name] for v in self.variants]

    def table(self) -> list[dict]:
        """The tidy table: one dict per row.

        Kind "modes": one row per variant and mode, ordered by variant and
        then frequency, with columns ``variant``, each parameter, ``mode``
        (tracked id), ``index`` (position in the variant's own ascending
        list), ``frequency_hz``, ``decay_rate_per_s`` and ``mac`` (to the
        same track's previous shape; NaN where the track starts).  Kind
        "values": ``variant``, each parameter, ``row`` and the model's
        columns.
        """
        rows = []
        if self.kind == "modes":
            T = self.tracks
            for k, v in enumerate(self.variants):
                present = np.flatnonzero(T.mode_index[k] >= 0)
                present = present[np.argsort(T.mode_index[k, present], kind="stable")]
                for t in present:
                    rows.append(dict(variant=k, **v, mode=int(t),
                                     index=int(T.mode_index[k, t]),
                                     frequency_hz=float(T.frequencies[k, t]),
                                     decay_rate_per_s=float(T.decay_rates[k, t]),
                                     mac=float(T.mac[k, t])))
            return rows
        for k, (v, cols) in enumerate(zip(self.variants, self.columns)):
            n = len(next(iter(cols.values()))) if cols else 0
            for r in range(n):
                rows.append(dict(variant=k, **v, row=r,
                                 **{c: a[r].item() for c, a in cols.items()}))
        return rows

    def to_pandas(self):
        """The table as a pandas DataFrame (needs pandas: pip install pandas)."""
        try:
            import pandas as pd
        except ImportError:
            raise InputError(
                "to_pandas needs pandas, which is not installed: pip install pandas (or use "
                "table(), a list of dicts)."
            ) from None
        return pd.DataFrame(self.table())

    def write_csv(self, path, *, overwrite: bool = False) -> Path:
        """Write the table as CSV (atomically; an existing file only with overwrite=True).

        Floats are written with Python's shortest round-trip repr, so the file
        reads back to the same values.
        """
        p = Path(path)
        rows = self.table()
        if self.kind == "modes":
            head = ["variant", *self.parameter_names, "mode", "index", "frequency_hz",
                    "decay_rate_per_s", "mac"]
        else:
            head = ["variant", *self.parameter_names, "row",
                    *(self.columns[0].keys() if self.columns else ())]
        with atomic_path(p, overwrite=overwrite) as tmp:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(head)
                for r in rows:
                    w.writerow([_cell(r[h]) for h in head])
        return p


def _cell(x) -> str:
    if isinstance(x, (float, np.floating)):
        return repr(float(x))
    if isinstance(x, (tuple, list)):
        return " ".join(_cell(v) for v in x)
    return str(x)


# ------------------------------------------------------------------- sweep
def _fractions_arg(grid):
    if isinstance(grid, (int, np.integer)) and not isinstance(grid, bool):
        grid_fractions(int(grid), 1)  # validates
        return int(grid)
    F = np.asarray(grid, dtype=float)
    if F.ndim != 2 or F.shape[0] == 0 or not 1 <= F.shape[1] <= 3:
        raise InputError(
            f"grid={grid!r} must be a number of points per axis (e.g. 8) or an (n_points, dim) "
            "array of fractions of the bounding box."
        )
    if not np.all(np.isfinite(F)) or F.min() < 0 or F.max() > 1:
        raise InputError("grid fractions must lie in [0, 1] (fractions of the bounding box).")
    return F


def _chains(variants, names, track_along):
    if track_along is None:
        return [list(range(len(variants)))]
    if track_along not in names:
        raise InputError(
            f"track_along={track_along!r} is not a swept parameter; use one of {list(names)}.")
    groups: dict[str, list[int]] = {}
    for i, v in enumerate(variants):
        rest = {n: v[n] for n in names if n != track_along}
        try:
            key = json.dumps(_canon(rest), sort_keys=True)
        except TypeError:
            key = repr(rest)
        groups.setdefault(key, []).append(i)
    out = []
    for idx in groups.values():
        try:
            idx = sorted(idx, key=lambda i: variants[i][track_along])
        except TypeError:
            raise InputError(
                f"track_along={track_along!r} needs values that can be ordered, e.g. numbers."
            ) from None
        out.append(idx)
    return out


def _merge_tracks(n_var, chain_tracks):
    n_t = sum(t.n_tracks for _, t in chain_tracks)
    n_p = chain_tracks[0][1].shapes.shape[1]
    mi = np.full((n_var, n_t), -1, dtype=np.int64)
    fr = np.full((n_var, n_t), np.nan)
    de = np.full((n_var, n_t), np.nan)
    mc = np.full((n_var, n_t), np.nan)
    sh = np.full((n_var, n_p, n_t), np.nan,
                 dtype=np.result_type(*[t.shapes.dtype for _, t in chain_tracks]))
    ro = np.zeros((n_var, n_t), dtype=bool)
    off = 0
    for chain, t in chain_tracks:
        cols = slice(off, off + t.n_tracks)
        mi[chain, cols] = t.mode_index
        fr[chain, cols] = t.frequencies
        de[chain, cols] = t.decay_rates
        mc[chain, cols] = t.mac
        sh[chain, :, cols] = t.shapes
        ro[chain, cols] = t.rotated
        off += t.n_tracks
    for a in (mi, fr, de, mc, sh, ro):
        a.setflags(write=False)
    return Tracks(mi, fr, de, mc, sh, ro)


def sweep(
    model: Callable,
    params,
    *,
    combine: Combine | str = Combine.PRODUCT,
    workers: int | None = None,
    client=None,
    cache=None,
    model_version: str | None = None,
    grid=8,
    track_along: str | None = None,
    degenerate_rtol: float = 1e-3,
    min_mac: float = 0.5,
    progress: Callable[[int, int], Any] | None = None,
    blas_threads: int | None = 1,
    connect_timeout: float = 10.0,
    start_method: StartMethod | str | None = None,
) -> SweepResult:
    """Run ``model(**variant)`` for every variant of a parameter grid.

    Parameters
    ----------
    model : callable
        ``model(**params)`` returning a Modes or a mapping of result columns
        (numbers or equal-length 1-D arrays).  For worker processes it must
        be picklable: a module-level function, a :class:`BoxModel`, a
        ``functools.partial`` of one, ...
    params : mapping name -> list of values, or list of mappings
        The parameter grid (combined by ``combine``) or the variants
        themselves.  Every name must be a keyword the model accepts.
    combine : {"product", "zip"}
        Every combination (last parameter fastest), or lists taken together.
    workers : int, optional
        Worker processes (default ``os.cpu_count()``; never more than the
        variants to compute).  1 runs in this process.  Ignored with ``client``.
        With the forkserver and spawn start methods a script that sweeps
        with several workers needs the usual ``if __name__ == "__main__":``
        guard, and the model must be importable by the workers.
    client : dask.distributed.Client or str, optional
        Run on this Dask cluster (or the scheduler at this address, which must
        answer within ``connect_timeout`` seconds).
    cache : str or Path, optional
        Folder of finished variants; a rerun computes only those missing.
    model_version : str, optional
        Part of the cache key: change it when the model's code changes.
    grid : int or (n_points, dim) array
        Tracking points: n points per axis (default 8, cell-centred), or
        fractions of each variant's bounding box.
    track_along : str, optional
        Follow modes along this parameter separately for each combination of
        the others (default: along the variants in sweep order).
    degenerate_rtol, min_mac : float
        See :func:`acoustic_fem.tracking.track_modes`.
    progress : callable(done, total), optional
        Called in this process each time variants finish (cached ones first).
    blas_threads : int or None
        BLAS threads per variant (default 1); None leaves the libraries'
        settings alone.
    connect_timeout : float
        Seconds to wait for a Dask scheduler given by address (default 10).
    start_method : StartMethod or str, optional
        How worker processes start: "forkserver" (default where available:
        acoustic_fem is imported once, in the server, and later sweeps in
        the same session start their workers at once), "spawn" (default
        elsewhere) or "fork".

    Returns
    -------
    SweepResult
        ``table()`` rows, per-variant arrays and ``tracks`` (kind "modes").

    Raises
    ------
    InputError
        Unknown or missing parameter names (the message lists the accepted
        ones), an empty sweep, a model that cannot be pickled for worker
        processes, dask missing or a scheduler that does not answer.
    """
    t0 = time.perf_counter()
    if not callable(model):
        raise InputError(f"model={model!r} must be callable as model(**params).")
    variants, names = _variants(model, params, combine)
    if workers is not None and (isinstance(workers, bool) or not isinstance(
            workers, numbers.Integral) or workers < 1):
        raise InputError(f"workers={workers!r} must be a whole number >= 1 (1 runs in-process).")
    if blas_threads is not None and (isinstance(blas_threads, bool) or not isinstance(
            blas_threads, numbers.Integral) or blas_threads < 1):
        raise InputError(f"blas_threads={blas_threads!r} must be a whole number >= 1 or None.")
    if progress is not None and not callable(progress):
        raise InputError(f"progress={progress!r} must be callable as progress(done, total).")
    try:
        connect_timeout = float(connect_timeout)
        assert connect_timeout > 0 and math.isfinite(connect_timeout)
    except (TypeError, ValueError, AssertionError):
        raise InputError(f"connect_timeout={connect_timeout!r} must be a positive number of "
                         "seconds.") from None
    fr = _fractions_arg(grid)
    method = _start_method(start_method)
    chains = _chains(variants, names, track_along)
    n = len(variants)

    # the tracking points are fixed before any variant runs (they enter the key)
    if isinstance(fr, int):
        dim = _guess_dim(model)
        F = grid_fractions(fr, dim)
    else:
        F = fr

    if cache is not None and _anonymous(model) and model_version is None:
        raise InputError(
            f"model {_model_name(model)} is a lambda or nested function, whose name does not "
            "identify it for the cache; define it at module level or pass model_version='...'."
        )
    keys: list[str | None] = [None] * n
    docs: list[str | None] = [None] * n
    if cache is not None:
        identity = _identity(model)
        for i, v in enumerate(variants):
            try:
                docs[i] = _key_document(identity, model_version, v, F)
            except TypeError as exc:
                raise InputError(
                    f"variant {i}: parameter value {exc} cannot be keyed for the cache; use "
                    "numbers, strings, tuples, enums or dataclasses."
                ) from None
            keys[i] = hashlib.sha256(docs[i].encode()).hexdigest()
    store = _Cache(cache) if cache is not None else None  # created once the keys are sound

    payloads: list[dict | None] = [None] * n
    cached = []
    if store is not None:
        for i in range(n):
            payloads[i] = store.load(keys[i], docs[i])
            if payloads[i] is not None:
                cached.append(i)
    # each distinct key is computed once; its twins take its result
    twins: dict[int, list[int]] = {}
    todo = []
    first_of: dict[str, int] = {}
    for i in range(n):
        if payloads[i] is not None:
            continue
        k = keys[i]
        if k is not None and k in first_of:
            twins[first_of[k]].append(i)
            continue
        if k is not None:
            first_of[k] = i
        twins[i] = [i]
        todo.append(i)

    done_count = len(cached)
    if progress is not None and done_count:
        progress(done_count, n)
    computed = []
    seconds: dict[int, float] = {}
    cpu_seconds: dict[int, float] = {}

    def done(i, payload):
        nonlocal done_count
        seconds[i] = payload.pop("seconds", float("nan"))
        cpu_seconds[i] = payload.pop("cpu_seconds", float("nan"))
        for category, message in payload.pop("warnings", ()):
            warnings.warn(f"sweep variant {i} {variants[i]}: {message}", category, stacklevel=4)
        if store is not None:
            store.save(keys[i], docs[i], payload)
        for j in twins[i]:
            payloads[j] = payload
        computed.append(i)
        done_count += len(twins[i])
        if progress is not None:
            progress(done_count, n)

    jobs = [(i, variants[i]) for i in todo]
    executor = "none"
    n_workers = 0
    if jobs:
        if client is not None:
            c, own = _dask_client(client, connect_timeout)
            executor, n_workers = "dask", len(c.scheduler_info().get("workers", {}))
            _run_dask_jobs(c, own, model, jobs, F, blas_threads, done)
        else:
            n_workers = min((os.cpu_count() or 1) if workers is None else int(workers), len(jobs))
            if n_workers <= 1:
                executor, n_workers = "in-process", 1
                _run_in_process(model, jobs, F, blas_threads, done)
            else:
                executor = "processes"
                _check_picklable(model, [p for _, p in jobs])
                _run_processes(model, jobs, F, blas_threads, n_workers, done, method)

    kinds = {p["kind"] for p in payloads}
    if len(kinds) > 1:
        raise InputError(
            "the model returned Modes for some variants and mappings for others; return one "
            "kind throughout."
        )
    kind = kinds.pop()
    units = dict(getattr(model, "units", {}) or {})
    info = dict(computed=sorted(computed), cached=cached, executor=executor, workers=n_workers,
                start_method=method.value if executor == "processes" else None,
                seconds=time.perf_counter() - t0,
                variant_seconds=[seconds.get(i, float("nan")) for i in range(n)],
                variant_cpu_seconds=[cpu_seconds.get(i, float("nan")) for i in range(n)],
                n_dofs=[p.get("n_dofs") for p in payloads], track_along=track_along)
    if kind == "values":
        clash = sorted({c for p in payloads for c in p["columns"] if c in names})
        if clash:
            raise InputError(
                f"the model's result column(s) {clash} have the names of sweep parameters; "
                "rename them (the table holds both)."
            )
        return SweepResult(names, tuple(variants), "values",
                           columns=tuple(MappingProxyType(dict(p["columns"])) for p in payloads),
                           units=units, info=info)
    freqs = tuple(np.asarray(p["frequencies"], dtype=float) for p in payloads)
    decs = tuple(np.asarray(p["decay_rates"], dtype=float) for p in payloads)
    samp = tuple(np.array(p["samples"]) for p in payloads)
    for a in (*freqs, *decs, *samp):
        a.setflags(write=False)
    chain_tracks = [
        (chain, track_modes([freqs[i] for i in chain], [samp[i] for i in chain],
                            [decs[i] for i in chain], degenerate_rtol=degenerate_rtol,
                            min_mac=min_mac))
        for chain in chains
    ]
    tracks = _merge_tracks(n, chain_tracks)
    return SweepResult(names, tuple(variants), "modes", freqs, decs, samp, F, tracks,
                       units=units, info=info)


def _guess_dim(model) -> int:
    """Space dimension of the model's meshes for a default grid (3 unless it says)."""
    return int(getattr(model, "dim", 3))


def _run_dask_jobs(client, own, model, jobs, fractions, blas_threads, done):
    import distributed

    futures = []
    try:
        meta = {}
        for i, p in jobs:
            f = client.submit(_run_variant, model, p, fractions, blas_threads, pure=False)
            futures.append(f)
            meta[f.key] = (i, p)
        for fut in distributed.as_completed(futures, loop=client.loop):
            i, p = meta[fut.key]
            try:
                payload = fut.result()
            except Exception as exc:
                _note(exc, i, p)
                raise
            done(i, payload)
    finally:
        for f in futures:
            f.cancel()
        if own:
            client.close()


# -------------------------------------------------------------------- plots
def plot_tracks(result: SweepResult, path, *, x: str | None = None, overwrite: bool = False,
                title: str | None = None, units: Mapping[str, str] | None = None) -> Path:
    """Plot frequency against a swept parameter, one line per tracked mode.

    Parameters
    ----------
    result : SweepResult
        Of kind "modes".
    path : str or Path
        Image file (format from the suffix, e.g. .png, .svg, .pdf); written
        atomically, an existing file only with ``overwrite=True``.
    x : str, optional
        Parameter on the horizontal axis (default: the sweep's
        ``track_along``, else its one varying parameter).
    title : str, optional
    units : mapping parameter -> unit, optional
        Axis-label units (default the model's ``units``).

    Returns
    -------
    Path
    """
    if not isinstance(result, SweepResult) or result.kind != "modes":
        raise InputError("plot_tracks needs the SweepResult of a sweep whose model returns Modes.")
    names = result.parameter_names
    if x is None:
        x = result.info.get("track_along")
    if x is None:
        varying = [n for n in names if len({json.dumps(_canon_or_repr(v)) for v in
                                            result.parameter_values(n)}) > 1]
        if len(varying) != 1:
            raise InputError(
                f"say which parameter goes on the horizontal axis: x= one of {list(names)}.")
        x = varying[0]
    xs = result.parameter_values(x)
    try:
        xv = np.array([float(v) for v in xs])
    except (TypeError, ValueError):
        raise InputError(f"parameter {x!r} is not numeric; choose a numeric x for the plot.") \
            from None
    p = Path(path)
    fmt = p.suffix.lstrip(".").lower() or "png"
    from matplotlib.figure import Figure  # no pyplot: no GUI backend, no global state

    T = result.tracks
    fig = Figure(figsize=(7.0, 4.5), dpi=120)
    ax = fig.add_subplot(1, 1, 1)
    many = T.n_tracks > 20
    for t in range(T.n_tracks):
        rows = np.flatnonzero(T.mode_index[:, t] >= 0)
        o = rows[np.argsort(xv[rows], kind="stable")]
        ax.plot(xv[o], T.frequencies[o, t], marker=".", linewidth=1.2,
                label=None if many else f"mode {t}")
    u = dict(result.units)
    u.update(units or {})
    unit = u.get(x, "")
    ax.set_xlabel(f"{x} ({unit})" if unit else x)
    ax.set_ylabel("frequency (Hz)")
    if title:
        ax.set_title(title)
    ax.grid(True, alpha=0.3)
    if not many:
        ax.legend(fontsize="small", ncol=2 if T.n_tracks > 10 else 1, loc="best")
    fig.tight_layout()
    with atomic_path(p, overwrite=overwrite) as tmp:
        fig.savefig(tmp, format=fmt)
    return p


def _canon_or_repr(v):
    try:
        return _canon(v)
    except TypeError:
        return repr(v)
