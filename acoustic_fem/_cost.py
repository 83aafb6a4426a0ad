"""Cost of a model before meshing: predicted cells, DOFs, memory and time.

Public names: :func:`estimate_cost`, :class:`CostEstimate`,
:func:`check_memory`, :func:`available_memory` (re-exported by the package).

Model
-----
Mesh counts.  For a room of volume V and boundary area S meshed at size h
by the builders' gmsh settings (``MeshSizeMax = h``, ``MeshSizeMin = 0.3 h``,
HXT), the number of tetrahedra T, vertices N and boundary triangles F_b are
each ``a V/h³ + b S/h² + c √S/h`` (a volume term, a boundary-layer term and
a term for the rounding up of the edge subdivisions, which matters for
coarse meshes), with the coefficients of :data:`MESH_COUNTS` (a relative
least-squares fit).  The edges follow from Euler's formula for a
tetrahedrised ball, N - E + F - T = 1 with F = 2T + F_b/2:
``E = N + T + F_b/2 - 1``.  P1 has N DOFs, P2 N + E.

Modes.  Weyl's estimate for a rigid room, ``V k³/(6π²) + S k²/(16π)`` at
k = 2π fmax / c (Weyl 1911; Kuttruff, Room Acoustics, §3.4), the count
:func:`acoustic_fem.solve_modes` sizes its first window with.

Memory of a solve (bytes), n DOFs, m modes:

* the stiffness and mass matrices and their copies (free-DOF submatrices,
  K - σM, the factoriser's own copy): ``6 × 12 × nnz`` with
  nnz = N + 2E for P1 (one entry per vertex pair sharing an edge) and
  ``NNZ_PER_DOF_P2 × n`` for P2 (measured);
* the sparse Cholesky factor: ``8 × FACTOR_OVERHEAD × κ n^β`` nonzeros
  (:data:`FACTOR_FILL`, fitted to CHOLMOD with METIS ordering);
* block Lanczos: the basis and its M-image, ``2 (2 nev + 5 b)`` vectors of
  n doubles (nev = 1.15 m + 10 up to 400, block b = 16), and the converged
  modes with the copies made while sorting and normalising them
  (``3 m`` vectors);
* when more than about 340 modes are wanted, later windows factorise an
  indefinite matrix with SuperLU:
  :data:`SUPERLU_BYTES_PER_CHOLESKY_NONZERO` bytes per Cholesky nonzero.

The peak is the larger of the meshing phase (gmsh and reading its file:
:data:`MESHING_BYTES_PER_CELL` per tetrahedron) and the solve phase (the
kept mesh, :data:`MESH_BYTES_PER_CELL`, plus the above), on top of
:data:`BASE_BYTES` for the interpreter and libraries.

Calibration
-----------
Measured on this project's 2-core, 24 GiB development machine (shared with
other jobs, load average about 10) on 2026-12-02 with
``python bench/bench_meshing.py --calibrate`` (results in
``bench/results/cost_calibration.json``):

* mesh counts: 28 boxes of four shapes meshed by
  :func:`acoustic_fem.geometry.box`, 803 to 1.04 M tetrahedra.  Predicted
  P2 DOFs / measured: 0.95-1.06 for the 24 meshes above 5000 tetrahedra,
  0.65-1.13 over all (coarse meshes of a few edge subdivisions deviate
  most: a 3 m cube at h = 0.71 m has 1144 tetrahedra, predicted 714);
* fill of the factor (CHOLMOD nonzeros of K + 0.01 M, METIS), K's nonzeros,
  the meshing phase: builder boxes, 2 k-57 k DOFs;
* SuperLU fill: the same matrices factorised with the project's SuperLU
  options at a positive shift (20 k and 34 k DOFs);
* peak resident memory of ``box`` + ``solve_modes(fmax=...)`` in a fresh
  process, 9 cases from 3.3 k to 57 k DOFs and 9 to 230 modes: predicted /
  measured 0.86-1.04; and the project's earlier runs of 50 modes
  (DEVELOPERS.md: 17 k-210 k P2 DOFs, 0.27-2.6 GB): 1.01-1.13;
* time: scaled to the idle-machine figure of DEVELOPERS.md (50 modes,
  17 k-210 k P2 DOFs: 0.22-0.24 ms per DOF), the nev² term from runs here.
  A rough guide only: on a loaded shared machine the measured times were
  3-20 times longer.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field, fields
from types import MappingProxyType
from typing import Mapping

from ._errors import InputError, ModelTooLargeError

__all__ = [
    "CostEstimate",
    "estimate_cost",
    "estimate_solve_memory",
    "check_memory",
    "available_memory",
    "weyl_count",
]

# ------------------------------------------------------------- constants
#: (a, b, c) of count ≈ a V/h³ + b S/h² + c √S/h for the builders' gmsh settings.
MESH_COUNTS = {
    "cells": (4.269, -0.8758, 47.82),
    "vertices": (0.6919, 0.3402, 13.76),
    "boundary_facets": (0.04384, 1.954, 15.32),
}
#: stored entries of K (= of M) per DOF for P2 tetrahedra (measured: 26.6-26.9).
NNZ_PER_DOF_P2 = 27.0
#: Cholesky factor nonzeros ≈ κ n^β per element order (CHOLMOD, METIS ordering).
FACTOR_FILL = {1: (2.41, 1.45), 2: (2.79, 1.44)}
#: bytes per factor nonzero over the 8 of its value: supernodal storage and workspace.
FACTOR_OVERHEAD = 1.5
#: bytes of a SuperLU factorisation (symmetric mode, MMD ordering) per nonzero
#: of the Cholesky factor of the same matrix (L+U has 2.9-3.3x the nonzeros).
SUPERLU_BYTES_PER_CHOLESKY_NONZERO = 90.0
#: interpreter, numpy/scipy (83 MB measured), the gmsh library (28 MB) and slack, resident.
BASE_BYTES = 120 * 2**20
#: peak bytes per tetrahedron while gmsh meshes and the builder reads its file.
MESHING_BYTES_PER_CELL = {1: 750.0, 2: 1800.0}
#: bytes per tetrahedron of the kept Mesh and DofMap with their cached topology.
MESH_BYTES_PER_CELL = {1: 250.0, 2: 400.0}
#: gmsh HXT tetrahedra per second on one thread (incl. setOrder and reading).
MESHING_CELLS_PER_SECOND = 40000.0
#: eigensolve time per DOF ≈ a · nev + b · nev² (seconds; nev = window size).
SOLVE_TIME = (3.0e-6, 2.8e-8)
#: the eigensolver's first window holds at most this many modes.
MAX_FIRST_WINDOW = 400


def weyl_count(dim: int, measure: float, boundary: float, k: float) -> float:
    """Weyl's estimate of the number of modes with wavenumber below k, rigid walls.

    3D: V k³/(6π²) + S k²/(16π); 2D: A k²/(4π) + L k/(4π); 1D: L k/π + 1
    (Weyl 1911; Kuttruff, Room Acoustics, §3.4).
    """
    if dim == 3:
        return measure * k**3 / (6 * math.pi**2) + boundary * k**2 / (16 * math.pi)
    if dim == 2:
        return measure * k**2 / (4 * math.pi) + boundary * k / (4 * math.pi)
    return measure * k / math.pi + 1


def predict_mesh(volume: float, area: float, h: float) -> dict:
    """Predicted counts of a tetrahedral mesh at size h: cells, vertices, edges, boundary facets."""
    x, y, z = volume / h**3, area / h**2, math.sqrt(area) / h
    T, N, Fb = (a * x + b * y + c * z for a, b, c in
                (MESH_COUNTS[k] for k in ("cells", "vertices", "boundary_facets")))
    # at least one tetrahedron (4 vertices, 6 edges, 4 boundary triangles)
    T, N, Fb = max(T, 1.0), max(N, 4.0), max(Fb, 4.0)
    E = N + T + 0.5 * Fb - 1.0  # Euler's formula for a tetrahedrised ball
    return dict(cells=T, vertices=N, edges=E, boundary_facets=Fb)


def _window(n_modes: float) -> int:
    return int(min(max(math.ceil(1.15 * n_modes + 8) + 2, 8), MAX_FIRST_WINDOW))


def estimate_solve_memory(n_dofs: int, order: int, n_modes: float, *, n_cells: float | None = None,
                          n_edges: float | None = None) -> dict:
    """Estimated bytes of ``solve_modes`` by part, and the peak (key ``"peak"``).

    Parameters
    ----------
    n_dofs : int
    order : int, 1 or 2
    n_modes : float
        Modes wanted (e.g. Weyl's count below fmax).
    n_cells : float, optional
        Tetrahedra, for the kept mesh (default n_dofs / 1.36 for P2,
        5.5 n_dofs for P1).
    n_edges : float, optional
        Edges, for the P1 sparsity (default 6.7 n_dofs).

    Returns
    -------
    dict of str -> int
        ``matrices``, ``factor``, ``eigen``, ``mesh``, ``base``, ``peak``.
    """
    n = float(n_dofs)
    if n_cells is None:
        n_cells = n / 1.36 if order == 2 else 5.5 * n
    if order == 1:
        nnz = n + 2.0 * (n_edges if n_edges is not None else 6.7 * n)
    else:
        nnz = NNZ_PER_DOF_P2 * n
    kappa, beta = FACTOR_FILL[order]
    factor_nnz = kappa * n**beta
    nev = _window(n_modes)
    b = 16 if nev > 24 else 8
    parts = dict(
        base=BASE_BYTES,
        mesh=MESH_BYTES_PER_CELL[order] * n_cells,
        matrices=6 * 12 * nnz,
        factor=8 * FACTOR_OVERHEAD * factor_nnz,
        eigen=8 * n * (2 * (2 * nev + 5 * b) + 3 * n_modes),
    )
    if 1.15 * n_modes + 8 > MAX_FIRST_WINDOW - 2:
        # later windows (σ > 0) factorise an indefinite matrix with SuperLU
        parts["factor"] += SUPERLU_BYTES_PER_CHOLESKY_NONZERO * factor_nnz
    parts = {k: int(v) for k, v in parts.items()}
    parts["peak"] = sum(parts.values())
    return parts


@dataclass(frozen=True)
class CostEstimate:
    """Predicted size and cost of meshing a room and solving its modes up to fmax.

    Attributes
    ----------
    volume, area : float
        Room volume (m³) and boundary area (m²) the estimate is for.
    fmax : float
        Highest frequency (Hz).
    order : int
        Element order (1 or 2).
    speed_of_sound : float
        c (m/s) used for the mesh size and the mode count.
    h : float
        Mesh size (m), :func:`acoustic_fem.geometry.mesh_size` unless given.
    n_cells, n_vertices, n_edges, n_dofs : int
        Predicted tetrahedra, vertices, edges and DOFs of the order.
    n_modes : float
        Weyl's estimate of the modes below fmax (rigid walls).
    memory : mapping str -> int
        Bytes by part: ``meshing`` (peak while gmsh meshes), ``mesh``,
        ``matrices``, ``factor``, ``eigen``, ``base``.
    peak_bytes : int
        The larger of the meshing and the solve phase.
    seconds : mapping str -> float
        Rough times: ``meshing``, ``solve``.
    """

    volume: float
    area: float
    fmax: float
    order: int
    speed_of_sound: float
    h: float
    n_cells: int
    n_vertices: int
    n_edges: int
    n_dofs: int
    n_modes: float
    memory: Mapping[str, int] = field(default_factory=dict)
    peak_bytes: int = 0
    seconds: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "memory", MappingProxyType(dict(self.memory)))
        object.__setattr__(self, "seconds", MappingProxyType(dict(self.seconds)))

    def as_dict(self) -> dict:
        """Plain dict for JSON."""
        return {f.name: (dict(getattr(self, f.name)) if isinstance(getattr(self, f.name), Mapping)
                         else getattr(self, f.name)) for f in fields(self)}

    def __str__(self) -> str:
        gib = 2**30
        mem = ", ".join(f"{k} {v / gib:.2f}" for k, v in self.memory.items())
        return (
            f"estimate for fmax {self.fmax:g} Hz, P{self.order}, h {self.h:.4g} m "
            f"(V {self.volume:.4g} m³, S {self.area:.4g} m²): {self.n_cells} tetrahedra, "
            f"{self.n_dofs} DOFs, about {self.n_modes:.0f} modes; peak memory "
            f"{self.peak_bytes / gib:.2f} GiB ({mem} GiB); roughly "
            f"{self.seconds['meshing']:.0f} s meshing + {self.seconds['solve']:.0f} s solving"
        )


def estimate_cost(volume: float, area: float | None = None, *, fmax: float, order: int = 2,
                  air=None, h: float | None = None) -> CostEstimate:
    """Predicted cells, DOFs, memory and time for a room, before meshing.

    Parameters
    ----------
    volume : float
        Air volume in m³.
    area : float, optional
        Boundary area in m²; default that of a cube of the volume,
        6 V^(2/3) (the smallest a box can have: give the real area when known).
    fmax : float
        Highest frequency in Hz.
    order : int
        1 or 2 (default).
    air : Air, optional
    h : float, optional
        Mesh size in m; default :func:`acoustic_fem.geometry.mesh_size`.

    Returns
    -------
    CostEstimate
    """
    from .geometry import _air, _number, _order, mesh_size

    V = _number("volume", volume, "m³", "give the room's air volume")
    S = 6.0 * V ** (2.0 / 3.0) if area is None else _number(
        "area", area, "m²", "give the room's boundary area")
    fmax = _number("fmax", fmax, "Hz", "give the highest frequency of interest, e.g. fmax=200")
    order = _order(order)
    air = _air(air)
    h = mesh_size(fmax, order=order, air=air) if h is None else _number(
        "h", h, "m", "give the mesh size")
    cnt = predict_mesh(V, S, h)
    n_dofs = cnt["vertices"] + (cnt["edges"] if order == 2 else 0.0)
    n_modes = weyl_count(3, V, S, 2.0 * math.pi * fmax / air.c)
    solve = estimate_solve_memory(n_dofs, order, n_modes, n_cells=cnt["cells"],
                                  n_edges=cnt["edges"])
    meshing = BASE_BYTES + MESHING_BYTES_PER_CELL[order] * cnt["cells"]
    memory = {"meshing": int(meshing), **{k: v for k, v in solve.items() if k != "peak"}}
    peak = int(max(meshing, solve["peak"]))
    nev = _window(n_modes)
    windows = max(1.0, n_modes * 1.15 / (MAX_FIRST_WINDOW - 2))
    t_solve = windows * n_dofs * (SOLVE_TIME[0] * nev + SOLVE_TIME[1] * nev**2)
    seconds = {"meshing": cnt["cells"] / MESHING_CELLS_PER_SECOND, "solve": t_solve}
    return CostEstimate(
        volume=V, area=S, fmax=fmax, order=order, speed_of_sound=air.c, h=h,
        n_cells=int(round(cnt["cells"])), n_vertices=int(round(cnt["vertices"])),
        n_edges=int(round(cnt["edges"])), n_dofs=int(round(n_dofs)), n_modes=float(n_modes),
        memory=memory, peak_bytes=peak, seconds=seconds,
    )


def available_memory() -> int | None:
    """Bytes of memory available to a new allocation now, or None if unknown.

    ``MemAvailable`` of ``/proc/meminfo`` (Linux), else free physical pages
    times the page size (``os.sysconf``).
    """
    try:
        with open("/proc/meminfo") as f:
            for line in f:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return None


def memory_budget_value(budget) -> float:
    """A memory budget in bytes: a positive number or ``math.inf`` (no limit)."""
    import numbers

    if (isinstance(budget, (numbers.Real,)) and not isinstance(budget, bool)
            and float(budget) == math.inf):
        return math.inf
    from .geometry import _number

    return _number("memory_budget", budget, "bytes",
                   "give the memory allowed in bytes (e.g. 8e9), math.inf for no limit, or "
                   "None for the machine's available memory")


def _gb(x: float) -> str:
    return f"{x / 1e9:.2f} GB"


def _fmax_that_fits(est: CostEstimate, budget: float, air) -> float | None:
    """Largest fmax (within 1 %) whose estimate fits the budget, by bisection."""
    lo, hi = 0.0, est.fmax
    small = estimate_cost(est.volume, est.area, fmax=est.fmax * 1e-3, order=est.order, air=air)
    if small.peak_bytes > budget:
        return None
    lo = est.fmax * 1e-3
    while hi - lo > 0.01 * lo:
        mid = 0.5 * (lo + hi)
        if estimate_cost(est.volume, est.area, fmax=mid, order=est.order, air=air).peak_bytes <= budget:
            lo = mid
        else:
            hi = mid
    return lo


def check_memory(estimate: CostEstimate, *, budget: float | None = None) -> CostEstimate:
    """Refuse a model whose estimated peak memory exceeds the budget.

    Parameters
    ----------
    estimate : CostEstimate
    budget : float, optional
        Bytes allowed; default :func:`available_memory` (no check when that
        is unknown).  ``math.inf`` disables the check.

    Returns
    -------
    CostEstimate
        ``estimate``, when it fits.

    Raises
    ------
    ModelTooLargeError
        With the predicted cells, DOFs, modes and memory, the budget, and
        what to change: the highest fmax that fits, or a larger budget.
    """
    from .air import Air

    if not isinstance(estimate, CostEstimate):
        raise InputError(f"check_memory needs a CostEstimate (from estimate_cost), got {estimate!r}.")
    source = "memory_budget"
    if budget is None:
        budget = available_memory()
        source = "the memory available on this machine (MemAvailable)"
        if budget is None:
            return estimate
    else:
        budget = memory_budget_value(budget)
    if estimate.peak_bytes <= budget:
        return estimate
    air = Air(c=estimate.speed_of_sound)
    f_ok = _fmax_that_fits(estimate, budget, air)
    fixes = []
    if f_ok is not None:
        fixes.append(f"lower fmax to at most about {f_ok:.0f} Hz")
    other = 3 - estimate.order
    alt = estimate_cost(estimate.volume, estimate.area, fmax=estimate.fmax, order=other, air=air)
    if alt.peak_bytes <= budget:
        fixes.append(f"use order={other} (about {_gb(alt.peak_bytes)})")
    fixes.append(("or " if fixes else "") + "pass a larger memory_budget (bytes) if more "
                 "memory is free than estimated")
    raise ModelTooLargeError(
        f"the model is too large: at fmax {estimate.fmax:g} Hz with P{estimate.order} elements "
        f"it needs about {estimate.n_cells:,} tetrahedra, {estimate.n_dofs:,} DOFs and "
        f"{estimate.n_modes:.0f} modes, an estimated {_gb(estimate.peak_bytes)} of memory, but "
        f"the budget is {_gb(budget)} ({source}); " + ", ".join(fixes) + ".",
        estimate=estimate, budget=int(budget) if math.isfinite(budget) else None,
    )
