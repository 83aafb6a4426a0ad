"""Acoustic eigenmodes of an enclosure: :func:`solve_modes` and :class:`Modes`."""

from __future__ import annotations

import enum
import math
import numbers
import time
import warnings
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Mapping

import numpy as np

from . import _damped
from ._eigen import large_model_solver, solve_generalized
from ._errors import BudgetExceededError, ConvergenceError, InputError
from .air import Air
from .assembly import Assembly, assemble, boundary_mass, facet_measures
from .dofs import DofMap
from .impedance import Impedance
from .mesh import Mesh
from .walls import Wall, resolve_walls

__all__ = ["Modes", "solve_modes", "DampingMethod", "ResolutionWarning", "EstimateWarning",
           "MIN_ELEMENTS_PER_WAVELENGTH", "TOL_MAX_DOFS", "TOL_MAX_SECONDS"]

#: Elements (mean edge lengths) per wavelength below which the frequency error
#: is likely to exceed about 1 %: from the 1D dispersion of consistent-mass
#: Lagrange elements, relative frequency error ≈ (kh)²/24 (P1) and (kh)⁴/1440
#: (P2), which reach 1 % at λ/h ≈ 12.8 and 3.2; 3D meshes measured in this
#: project's tests behave alike with h the mean edge.
MIN_ELEMENTS_PER_WAVELENGTH = {1: 12.0, 2: 3.5}


class ResolutionWarning(UserWarning):
    """The mesh is too coarse for the highest frequency asked for."""


class EstimateWarning(UserWarning):
    """An error estimate was asked for modes the estimator does not handle (left NaN):
    damped modes from ``damping="perturbation"``."""


#: Default DOF budget of ``solve_modes(..., tol=...)``; the same figure as
#: :data:`acoustic_fem.estimate.DEFAULT_MAX_DOFS` (about 6 GB peak for P2),
#: repeated here so that this module need not import the estimator.
TOL_MAX_DOFS = 500_000
#: Default time budget of ``solve_modes(..., tol=...)`` in seconds (one hour).
TOL_MAX_SECONDS = 3600.0


class DampingMethod(str, enum.Enum):
    """How :func:`solve_modes` treats absorbing (:class:`Impedance`) walls.

    EXACT
        Solve the quadratic eigenproblem (K + ikC - k²M) x = 0 (β of a
        frequency-dependent wall at each mode's own frequency).
    PERTURBATION
        Rigid-wall modes with the first-order decay rate
        δ = (c/2) Σ Re β_s ∫_s φ² dS and frequency shift
        -(c/4π) Σ Im β_s ∫_s φ² dS (fast; accurate for small β).
    """

    EXACT = "exact"
    PERTURBATION = "perturbation"


@dataclass(frozen=True, eq=False)
class Modes:
    """Eigenmodes of an enclosure.

    Attributes
    ----------
    frequencies : (n_modes,) float array
        Eigenfrequencies in Hz, ascending.  A room whose walls are all rigid
        has a 0 Hz mode (uniform pressure): it is mode 0.  With absorbing
        walls, f = c |Re k| / (2π); a room without pressure-release surfaces
        then keeps that mode as mode 0, an (almost) aperiodic decay with
        f ≈ 0 (see :mod:`acoustic_fem._damped`).
    eigenvalues : (n_modes,) float or complex array
        The Helmholtz eigenvalues k² in 1/m² (k = 2πf/c): real for rigid and
        pressure-release walls, complex (k² of the complex wavenumber) with
        absorbing walls.
    shapes : (n_dofs, n_modes) float or complex array
        Mode shapes.  Rigid and pressure-release walls: real and
        mass-normalised, ``shapes.T @ M @ shapes = I`` with M the mass matrix
        of the space (so ∫ p_i p_j dV = δ_ij).  Absorbing walls: complex,
        scaled so that ``shapes[:, j] @ M @ shapes[:, j] = 1`` (the bilinear,
        unconjugated form natural to the complex symmetric problem; they
        tend to the real ones as β -> 0), with the entry of largest modulus
        having a positive real part.  Zero on pressure-release surfaces.
    points : (n_dofs, dim) float array
        Coordinates of the degrees of freedom (rows), dim = mesh dimension.
    decay_rates : (n_modes,) float array
        Decay rate δ = c Im k in 1/s of each mode (pressure ∝ e^{-δt}); zero
        for rigid and pressure-release walls, which absorb nothing.
    wavenumbers : (n_modes,) float or complex array
        k in 1/m (p ∝ e^{ickt}, time convention e^{+iωt}): √eigenvalues for
        undamped modes; the complex root of the quadratic problem with
        absorbing walls (Re k >= 0 except possibly for mode 0).
    dofs : DofMap
        DOF numbering (mesh, order, cell-to-DOF map) for export and reuse.
    air : Air
    walls : mapping str -> Wall
        The wall condition of every surface.
    info : mapping
        What the solver did: backend, shift windows, timings; with absorbing
        walls also the damping method, the shift height τ, the reference
        frequency and the refinement of frequency-dependent walls; after
        ``solve_modes(..., tol=...)`` also ``accuracy_target`` (the budget
        stated up front, every step taken, whether the target was met).
    errors : ModeErrors or None
        The a-posteriori error estimate (:func:`acoustic_fem.estimate_errors`),
        attached by ``solve_modes(..., estimate=True)`` or ``tol=...``; None
        when no estimate was asked for.  See :attr:`frequency_errors`.

    Error-estimate convention: :attr:`frequency_errors`,
    :attr:`corrected_frequencies`, :attr:`decay_rate_errors`,
    :attr:`corrected_decay_rates` and :attr:`cell_indicators` are **None**
    when no estimate was asked for, and **NaN** where one was asked for but
    is not available (modes from ``damping="perturbation"``; the relative
    frequency error of the near-0 Hz damped mode); never a made-up number.
    """

    frequencies: np.ndarray
    eigenvalues: np.ndarray
    shapes: np.ndarray
    dofs: DofMap
    air: Air
    walls: Mapping[str, Wall]
    decay_rates: np.ndarray = None  # type: ignore[assignment]
    info: Mapping = field(default_factory=dict)
    wavenumbers: np.ndarray = None  # type: ignore[assignment]
    errors: object = None

    def __post_init__(self) -> None:
        n = len(self.frequencies)
        if self.errors is not None and len(self.errors.frequency_errors) != n:
            raise InputError(f"errors estimate {len(self.errors.frequency_errors)} modes but "
                             f"there are {n}; estimate these modes.")
        if self.decay_rates is None:
            object.__setattr__(self, "decay_rates", np.zeros(n))
        if self.wavenumbers is None:
            lam = np.asarray(self.eigenvalues)
            k = (np.sqrt(lam.astype(complex)) if np.iscomplexobj(lam)
                 else np.sqrt(np.clip(lam.astype(float), 0.0, None)))
            object.__setattr__(self, "wavenumbers", k)
        for name in ("frequencies", "eigenvalues", "shapes", "decay_rates", "wavenumbers"):
            a = np.asarray(getattr(self, name))
            real_only = name in ("frequencies", "decay_rates")
            a = np.array(a, dtype=complex if (np.iscomplexobj(a) and not real_only) else float)
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        object.__setattr__(self, "walls", MappingProxyType(dict(self.walls)))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    @property
    def points(self) -> np.ndarray:
        """(n_dofs, dim) DOF coordinates."""
        return self.dofs.points[:, : self.dofs.mesh.dim]

    @property
    def mesh(self) -> Mesh:
        return self.dofs.mesh

    @property
    def order(self) -> int:
        return self.dofs.order

    @property
    def t60(self) -> np.ndarray:
        """(n_modes,) reverberation time of each mode, 3·ln(10)/δ in s (inf if δ = 0)."""
        with np.errstate(divide="ignore"):
            return np.where(self.decay_rates > 0, 3.0 * math.log(10.0) / self.decay_rates, np.inf)

    @property
    def quality_factors(self) -> np.ndarray:
        """(n_modes,) Q = ω/(2δ) of each mode (inf if δ = 0)."""
        w = 2.0 * math.pi * self.frequencies
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.decay_rates > 0, w / (2.0 * self.decay_rates), np.inf)

    @property
    def estimated(self) -> bool:
        """True if an error estimate was asked for (it may be NaN: see the class notes)."""
        return self.errors is not None

    @property
    def frequency_errors(self) -> np.ndarray | None:
        """(n_modes,) estimated relative frequency error (f_h − f)/f, or None.

        Hierarchical P(p)→P(p+1) enrichment (Bank & Smith 1993,
        :mod:`acoustic_fem.estimate`).  None: not estimated; NaN: asked for
        but not available (damped modes).
        """
        return None if self.errors is None else self.errors.frequency_errors

    @property
    def corrected_frequencies(self) -> np.ndarray | None:
        """(n_modes,) corrected (enriched-space) frequencies in Hz, or None / NaN as above.

        Labelled *corrected*: the Rayleigh–Ritz value in P(p+1), usually far
        more accurate than :attr:`frequencies`, but not the solved value.
        """
        return None if self.errors is None else self.errors.corrected_frequencies

    @property
    def decay_rate_errors(self) -> np.ndarray | None:
        """(n_modes,) estimated relative decay-rate error |δ_h − δ|/δ, or None / NaN as above.

        0 for undamped modes (their decay rate 0 is exact).
        """
        return None if self.errors is None else self.errors.decay_rate_errors

    @property
    def corrected_decay_rates(self) -> np.ndarray | None:
        """(n_modes,) corrected decay rates c Im k_c in 1/s, or None / NaN as above."""
        return None if self.errors is None else self.errors.corrected_decay_rates

    @property
    def cell_indicators(self) -> np.ndarray | None:
        """(n_cells, n_modes) element-wise share of each mode's estimated error, or None.

        None when not estimated, when estimated without indicators, or for
        damped modes; each column sums to :attr:`frequency_errors`.
        """
        return None if self.errors is None else self.errors.cell_indicators

    def __len__(self) -> int:
        return len(self.frequencies)

    def __repr__(self) -> str:
        f = self.frequencies
        rng = f"{f[0]:.2f}–{f[-1]:.2f} Hz" if len(f) else "none"
        return f"Modes({len(f)} modes, {rng}, P{self.order}, {self.dofs.n_dofs} DOFs)"

    def elements_per_wavelength(self) -> np.ndarray:
        """(n_modes,) elements per wavelength at each mode: (c/f) / mean edge length."""
        with np.errstate(divide="ignore"):
            return np.where(
                self.frequencies > 0,
                self.air.c / np.maximum(self.frequencies, 1e-300) / self.mesh.h_mean,
                np.inf,
            )

    def table(self) -> list[dict]:
        """One dict per mode: index, frequency_hz, decay_rate_per_s, t60_s, q.

        When an error estimate is attached, also ``estimated_relative_error``,
        ``corrected_frequency_hz``, ``estimated_decay_rate_error`` and
        ``corrected_decay_rate_per_s`` (NaN where not available).
        """
        rows = [
            dict(index=i, frequency_hz=float(f), decay_rate_per_s=float(d), t60_s=float(t),
                 q=float(q))
            for i, (f, d, t, q) in enumerate(
                zip(self.frequencies, self.decay_rates, self.t60, self.quality_factors)
            )
        ]
        if self.errors is not None:
            for i, r in enumerate(rows):
                r.update({k: float(v[i]) for k, v in self.errors.columns().items()})
        return rows


def _check_positive_int(name, value):
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputError(f"{name}={value!r} must be a positive whole number of modes.")
    if value <= 0:
        raise InputError(f"{name}={value!r} must be >= 1 (the number of modes wanted).")
    return int(value)


def _check_positive_float(name, value, unit):
    if value is None:
        return None
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name}={value!r} must be a number in {unit}.") from None
    if not math.isfinite(v) or v <= 0:
        raise InputError(f"{name}={value!r} {unit} must be positive and finite.")
    return v


def _weyl_count(mesh: Mesh, k: float, fixed_area: float, total_area: float) -> float:
    """Weyl's law estimate of the number of eigenvalues with wavenumber below k.

    3D: N ≈ V k³/(6π²) ± S k²/(16π); 2D: N ≈ A k²/(4π) ± L k/(4π); 1D:
    N ≈ L k/π (Weyl 1911; the surface terms with + for rigid and - for
    pressure-release walls, e.g. Kuttruff, Room Acoustics, §3.4).
    """
    V = mesh.measure
    s_rigid = total_area - fixed_area
    s_net = s_rigid - fixed_area
    if mesh.dim == 3:
        return V * k**3 / (6 * math.pi**2) + s_net * k**2 / (16 * math.pi)
    if mesh.dim == 2:
        return V * k**2 / (4 * math.pi) + s_net * k / (4 * math.pi)
    return V * k / math.pi + 1


def _check_damping(value) -> DampingMethod:
    try:
        return DampingMethod(value)
    except ValueError:
        raise InputError(
            f"damping={value!r} is not an option; use 'exact' (the quadratic eigenproblem of "
            "the absorbing walls) or 'perturbation' (rigid-wall modes with first-order decay)."
        ) from None


def _weyl_k(mesh, n, fixed_area, total_area) -> float:
    """Wavenumber below which Weyl's law expects n modes (bisection)."""
    lo, hi = 0.0, 1.0
    while _weyl_count(mesh, hi, fixed_area, total_area) < n and hi < 1e8:
        hi *= 2.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        if _weyl_count(mesh, mid, fixed_area, total_area) < n:
            lo = mid
        else:
            hi = mid
    return hi


def solve_modes(
    mesh: Mesh,
    walls: Mapping[str, Wall] | None = None,
    *,
    order: int = 2,
    count: int | None = None,
    fmax: float | None = None,
    air: Air | None = None,
    backend: str = "auto",
    assembly: Assembly | None = None,
    damping: str | DampingMethod = DampingMethod.EXACT,
    estimate: bool = False,
    tol: float | None = None,
    max_dofs: int | None = TOL_MAX_DOFS,
    max_seconds: float | None = TOL_MAX_SECONDS,
) -> Modes:
    """Eigenfrequencies and mode shapes of the air in an enclosure.

    Solves the Helmholtz eigenproblem ∇²p + k²p = 0 with the wall conditions
    by Lagrange finite elements: K x = k² M x.  With absorbing walls
    (:class:`~acoustic_fem.Impedance`, ∂p/∂n = -ikβp, time convention
    e^{+iωt}) the problem becomes quadratic, (K + ik Σ_s β_s B_s - k² M) x = 0,
    with complex roots k: frequency c |Re k|/(2π), decay rate δ = c Im k
    (see :mod:`acoustic_fem._damped` for the method and the choices made).

    Parameters
    ----------
    mesh : Mesh
    walls : mapping of surface name -> Rigid() / PressureRelease() / Impedance(...), optional
        Surfaces not named are rigid.
    order : int
        Element order, 1 or 2 (default 2: far more accurate per DOF).
    count : int, optional
        Number of lowest modes wanted.
    fmax : float, optional
        Every mode with frequency <= fmax (Hz).  With ``count`` too: the
        lowest ``count`` modes below fmax.
    air : Air, optional
        Default Air() (20 °C).
    backend : {"auto", "cholmod", "superlu", "petsc", "amg"}, MpiSolver or AmgSolver
        Sparse factorisation used for the shifts; or an eigensolver path for
        large models: "petsc" / :class:`~acoustic_fem.MpiSolver` (SLEPc
        Krylov–Schur, shift-invert, MUMPS, under MPI; optional PETSc/SLEPc
        install), "amg" / :class:`~acoustic_fem.AmgSolver` (LOBPCG with an
        algebraic-multigrid preconditioner, no factorisation; optional
        pyamg).  These two serve rigid and pressure-release walls, and
        absorbing walls with damping="perturbation".
    assembly : Assembly, optional
        Matrices from :func:`assemble` of the same mesh and order, to reuse.
    damping : DampingMethod or {"exact", "perturbation"}
        Used only when a wall is an Impedance.  "exact" (default) solves the
        quadratic (for frequency-dependent walls: nonlinear) eigenproblem;
        "perturbation" returns the rigid-wall modes with first-order complex
        wavenumbers (fast, accurate for |β| << 1; β of a frequency-dependent
        wall taken at the rigid frequency).  A frequency-dependent β is never
        evaluated below 1 % of c/(2 × the mesh's largest extent), which sets
        the uniform mode's admittance.
    estimate : bool
        Attach an a-posteriori error estimate of every mode (hierarchical
        P(p)→P(p+1) enrichment, Bank & Smith, SIAM J. Numer. Anal. 30(4),
        1993; :func:`acoustic_fem.estimate_errors`): ``Modes.frequency_errors``
        (n_modes,), ``corrected_frequencies`` (n_modes,) and
        ``cell_indicators`` (n_cells, n_modes); for damped modes
        (``damping="exact"``) also ``decay_rate_errors`` and
        ``corrected_decay_rates`` (n_modes,), from the same enrichment applied
        to the complex eigenpair (:mod:`acoustic_fem.estimate`).  Costs about
        0.4x the solve (bench/bench_estimate.py).  Modes from
        ``damping="perturbation"`` are not estimated: an
        :class:`EstimateWarning` is issued and the arrays are NaN.
    tol : float, optional
        Accuracy target: refine until every mode up to ``fmax`` has an
        estimated relative frequency error <= tol (e.g. 1e-3), by
        :func:`acoustic_fem.solve_to_tolerance` (P1 -> P2, then uniform
        refinement of a Mesh, or remeshing when ``mesh`` is a builder
        ``h -> Mesh``).  Needs ``fmax``; not with ``count`` or ``assembly``.
        With impedance walls the damped modes (exact damping) are judged by
        their frequency errors; decay-rate errors are estimated and reported,
        not targeted.  The returned modes (of the last mesh, ``Modes.mesh``)
        carry the estimate and
        ``info["accuracy_target"]`` (budget, steps, met); add
        ``estimate=True`` for the element-wise indicators too.
    max_dofs, max_seconds : int or None, float or None
        The budget of ``tol=``, fixed before the first solve (defaults
        :data:`TOL_MAX_DOFS` DOFs, :data:`TOL_MAX_SECONDS` s; None: no limit).
        A step predicted to exceed it is not started: a
        :class:`~acoustic_fem.BudgetExceededError` is raised whose
        ``partial`` holds the modes of the last step with their estimates.
        Ignored without ``tol``.

    Returns
    -------
    Modes
        ``frequencies`` (n_modes,), ``shapes`` (n_dofs, n_modes),
        ``points`` (n_dofs, dim); complex ``shapes``, ``eigenvalues`` and
        ``wavenumbers`` and nonzero ``decay_rates`` with absorbing walls;
        ``frequency_errors`` etc. with ``estimate=True`` or ``tol``.

    Raises
    ------
    InputError
        A bad argument (the message names it).
    ConvergenceError
        Some modes did not converge; ``partial`` holds those that did.
    BudgetExceededError
        With ``tol``: the next refinement would exceed the budget.
    """
    if not isinstance(estimate, bool):
        raise InputError(f"estimate={estimate!r} must be True or False.")
    if tol is not None:
        if _check_damping(damping) is DampingMethod.PERTURBATION:
            raise InputError("tol= needs damping='exact': modes from damping='perturbation' "
                             "are first-order approximations and have no error estimate.")
        return _solve_to_target(mesh, walls, order=order, count=count, fmax=fmax, air=air,
                                backend=backend, assembly=assembly, estimate=estimate,
                                tol=tol, max_dofs=max_dofs, max_seconds=max_seconds)
    modes = _solve_once(mesh, walls, order=order, count=count, fmax=fmax, air=air,
                        backend=backend, assembly=assembly, damping=damping)
    if estimate:
        modes = _attach_estimate(modes)
    return modes


def _attach_estimate(modes: Modes) -> Modes:
    """``modes`` with the error estimate attached (NaN for damped modes, with a warning)."""
    from .estimate import ModeErrors, estimate_errors

    n = len(modes)
    damped = np.iscomplexobj(modes.shapes) or np.any(modes.decay_rates != 0)
    if damped and dict(modes.info).get("damping") == DampingMethod.PERTURBATION.value:
        warnings.warn(
            "error estimates are not available for damped modes from damping='perturbation' "
            "(first-order approximations, not discrete eigenpairs): the estimated errors are "
            "NaN. Solve with damping='exact' for an estimate.", EstimateWarning, stacklevel=3)
        nan = np.full(n, np.nan)
        errs = ModeErrors(nan, nan.copy(), nan.copy(), None,
                          info=dict(not_estimated="damping='perturbation' modes"),
                          decay_rate_errors=nan.copy(), corrected_decay_rates=nan.copy())
    else:
        errs = estimate_errors(modes, indicators=True)
    info = dict(modes.info, estimate_seconds=float(errs.info.get("seconds", 0.0)))
    return replace(modes, errors=errs, info=info)


def _solve_to_target(mesh, walls, *, order, count, fmax, air, backend, assembly, estimate,
                     tol, max_dofs, max_seconds) -> Modes:
    """The ``tol=`` branch of :func:`solve_modes` (through ``solve_to_tolerance``)."""
    from .estimate import solve_to_tolerance

    if count is not None:
        raise InputError(f"count={count!r} cannot be combined with tol=: the accuracy target "
                         "applies to every mode up to fmax; give fmax= and drop count=.")
    if fmax is None:
        raise InputError(f"tol={tol!r} needs fmax= (Hz): the target applies to every mode up "
                         "to fmax.")
    fmax = _check_positive_float("fmax", fmax, "Hz")
    if assembly is not None:
        raise InputError("assembly= cannot be reused with tol=: the mesh is refined; drop "
                         "assembly=.")
    if not isinstance(mesh, Mesh) and not callable(mesh):
        raise InputError(f"with tol=, mesh must be a Mesh or a mesh builder h -> Mesh, got "
                         f"{type(mesh).__name__}.")
    if isinstance(mesh, Mesh):
        resolve_walls(mesh, walls)  # names checked before any solve
    try:
        res = solve_to_tolerance(mesh, walls, tol=tol, fmax=fmax, order=order, air=air,
                                 max_dofs=max_dofs, max_seconds=max_seconds, backend=backend,
                                 indicators=estimate)
    except BudgetExceededError as exc:
        part = None if exc.partial is None else _with_target(exc.partial)
        raise BudgetExceededError(str(exc), partial=part, steps=exc.steps,
                                  budget=exc.budget) from None
    return _with_target(res)


def _with_target(res) -> Modes:
    """The Modes of an AccurateModes, with its estimate and what the target loop did."""
    target = dict(tol=float(res.tol), met=bool(res.met), budget=dict(res.budget),
                  steps=[dict(s) for s in res.steps],
                  judged_errors=np.asarray(res.judged_errors, dtype=float).tolist(),
                  effectivities=np.asarray(res.effectivities, dtype=float).tolist(),
                  method=res.errors.method)
    info = dict(res.modes.info, accuracy_target=target,
                estimate_seconds=float(res.errors.info.get("seconds", 0.0)))
    return replace(res.modes, errors=res.errors, info=info)


def _solve_once(mesh, walls, *, order, count, fmax, air, backend, assembly, damping) -> Modes:
    """One solve on one mesh: the body of :func:`solve_modes` without estimate / tol."""
    t0 = time.perf_counter()
    if not isinstance(mesh, Mesh):
        raise InputError(
            f"solve_modes needs an acoustic_fem Mesh (from read_mesh or a builder), got "
            f"{type(mesh).__name__}."
        )
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(f"order={order!r} is not supported: use 1 (linear) or 2 (quadratic).")
    count = _check_positive_int("count", count)
    fmax = _check_positive_float("fmax", fmax, "Hz")
    if count is None and fmax is None:
        raise InputError(
            "say how many modes: give count= (the lowest N modes) or fmax= (every mode up to "
            "fmax Hz)."
        )
    damping = _check_damping(damping)
    air = Air() if air is None else air
    if not isinstance(air, Air):
        raise InputError(f"air must be an acoustic_fem Air, got {air!r}.")
    if fmax is not None:
        epw = air.c / fmax / mesh.h_mean
        need = MIN_ELEMENTS_PER_WAVELENGTH[order]
        if epw < need:
            warnings.warn(
                f"the mesh resolves {fmax:g} Hz with only {epw:.1f} P{order} elements per "
                f"wavelength (mean edge {mesh.h_mean:.3g} m, wavelength {air.c / fmax:.3g} m); "
                f"about {need:g} are needed for 1 % accuracy — refine the "
                f"mesh to a mean edge of {air.c / fmax / need:.3g} m or lower fmax.",
                ResolutionWarning, stacklevel=3,
            )
    full_walls = resolve_walls(mesh, walls)

    if assembly is None:
        assembly = assemble(mesh, order)
    elif assembly.dofs.mesh is not mesh or assembly.order != order:
        raise InputError("the assembly given was made for another mesh or element order.")
    t_asm = time.perf_counter() - t0
    dofs = assembly.dofs
    fixed_names = [n for n, w in full_walls.items() if w.fixes_pressure]
    fixed = dofs.boundary_dofs(fixed_names)
    free = np.setdiff1d(np.arange(dofs.n_dofs), fixed, assume_unique=True)
    if free.size == 0:
        raise InputError("every DOF lies on a pressure-release surface: no mode exists.")
    K = assembly.stiffness[free][:, free]
    M = assembly.mass[free][:, free]

    # scales for the shifts and the window sizes
    extent = float(np.ptp(mesh.points[:, : mesh.dim], axis=0).max())
    lam_guess = (math.pi / (2.0 * extent)) ** 2
    lam_max = None if fmax is None else (2 * math.pi * fmax / air.c) ** 2
    if mesh.dim > 1:
        areas = {n: float(facet_measures(mesh, n).sum()) for n in mesh.surface_names}
        fixed_area = sum(areas[n] for n in fixed_names)
        total_area = mesh.boundary_measure
    else:
        fixed_area = total_area = 0.0
    if lam_max is not None:
        n_est = int(math.ceil(1.15 * _weyl_count(mesh, math.sqrt(lam_max), fixed_area,
                                                 total_area) + 8))
    else:
        n_est = count

    absorbing = [n for n, w in full_walls.items() if isinstance(w, Impedance)
                 and not (not w.frequency_dependent and w.constant_admittance == 0)]
    if absorbing and damping is DampingMethod.EXACT and large_model_solver(backend) is not None:
        raise InputError(
            f"backend={backend!r} solves undamped eigenproblems only, but the walls "
            f"{absorbing} absorb: pass damping='perturbation' (rigid modes with first-order "
            "decay rates) or use backend='auto'.")
    if absorbing:
        return _solve_damped(
            mesh, full_walls, absorbing, dofs, free, K, M, air, count=count, fmax=fmax,
            lam_guess=lam_guess, extent=extent, n_est=n_est, fixed_area=fixed_area,
            total_area=total_area, backend=backend, damping=damping, t0=t0, t_asm=t_asm,
        )

    lam, X, rep = solve_generalized(
        K, M, count=count, lam_max=lam_max, lam_guess=lam_guess, n_estimate=n_est,
        backend=backend,
    )
    lam = np.where(np.abs(lam) < 1e-10 * max(lam_guess, 1.0), 0.0, lam)
    shapes = np.zeros((dofs.n_dofs, lam.size))
    shapes[free] = X
    freq = air.frequency(lam)
    info = dict(
        method=rep.method,
        windows=rep.windows,
        n_dofs=int(dofs.n_dofs),
        n_free_dofs=int(free.size),
        order=order,
        assembly_seconds=t_asm,
        eigen_seconds=rep.seconds,
        total_seconds=time.perf_counter() - t0,
    )
    return Modes(freq, lam, shapes, dofs, air, full_walls, info=info)


def _solve_damped(mesh, full_walls, absorbing, dofs, free, K, M, air, *, count, fmax,
                  lam_guess, extent, n_est, fixed_area, total_area, backend, damping, t0,
                  t_asm):
    """The absorbing-wall branch of :func:`solve_modes` (arguments as computed there)."""
    t_eig = time.perf_counter()
    terms = [_damped.WallTerm(name, full_walls[name],
                              boundary_mass(dofs, name)[free][:, free].tocsr())
             for name in absorbing]
    f_floor = 0.01 * air.c / (2.0 * extent)
    pencil = _damped.Pencil(K, M, terms, air, f_floor)
    has_static = free.size == dofs.n_dofs
    kmax = None if fmax is None else 2 * math.pi * fmax / air.c
    freq_dep = pencil.frequency_dependent
    info = dict(n_dofs=int(dofs.n_dofs), n_free_dofs=int(free.size), order=dofs.order,
                assembly_seconds=t_asm, damping=damping.value,
                absorbing_surfaces=list(absorbing))

    # candidates: a margin past fmax / count when β depends on frequency (the
    # refinement moves the modes) or for the first-order shifts
    margin = freq_dep or damping is DampingMethod.PERTURBATION
    c_count = None if count is None else (count + max(4, math.ceil(0.15 * count)) if margin
                                          else count)
    c_kmax = None if kmax is None else (1.1 * kmax if margin else kmax)
    c_est = n_est if kmax is None else max(n_est, int(math.ceil(1.1**mesh.dim * n_est)))

    if damping is DampingMethod.PERTURBATION:
        lam, Phi, rep = solve_generalized(
            K, M, count=c_count, lam_max=None if c_kmax is None else c_kmax**2,
            lam_guess=lam_guess, n_estimate=c_est, backend=backend)
        lam = np.where(np.abs(lam) < 1e-10 * max(lam_guess, 1.0), 0.0, lam)
        ks, X, zero = _damped.first_order(pencil, lam, Phi)
        bad = np.zeros(ks.size, dtype=bool)
        res = None
        info.update(method="rigid modes (" + rep.method + ") + first-order perturbation",
                    windows=rep.windows)
    else:
        if freq_dep:
            if fmax is not None:
                f_ref = 0.5 * fmax
            else:
                k_c = _weyl_k(mesh, count, fixed_area, total_area)
                f_ref = 0.5 * air.c * k_c / (2 * math.pi)
            f_ref = max(f_ref, f_floor)
        else:
            f_ref = f_floor  # any: β is constant
        beta_ref = pencil.betas(np.array([f_ref]))[:, 0]
        ones = np.ones(free.size)
        vol = float(ones @ (M @ ones))
        c00 = complex(sum(b * float(ones @ (t.B @ ones)) for b, t in zip(beta_ref, terms)) / vol)
        tau = max(math.sqrt(0.1 * lam_guess), 2.5 * abs(c00))
        k_guess = c_kmax
        if c_count is not None:
            k_c = _weyl_k(mesh, c_count, fixed_area, total_area)
            k_guess = k_c if k_guess is None else min(k_guess, k_c)

        def n_below(k):
            return _weyl_count(mesh, k, fixed_area, total_area)

        try:
            # frequency-dependent walls: the frozen-β roots only start the refinement,
            # which moves them by O(Δβ): a looser Krylov tolerance serves
            lin = _damped.solve_linear(pencil, beta_ref, count=c_count, kmax=c_kmax,
                                       n_estimate=c_est, tau=tau, has_static=has_static,
                                       backend=backend, spectrum=(k_guess, n_below),
                                       tol=_damped.FROZEN_TOL if freq_dep else 1e-12)
        except ConvergenceError as exc:
            ks_p, X_p = exc.partial
            zero_p = np.zeros(ks_p.size, dtype=bool)
            partial = _damped_modes(pencil, ks_p, X_p, zero_p, dofs, free, air, full_walls,
                                    dict(info, note="partial"))
            raise ConvergenceError(str(exc), partial=partial) from None
        ks, X, zero = lin.ks, lin.X, lin.zero_mode
        info.update(method=lin.method, windows=lin.windows, shift_height_tau=tau,
                    reference_frequency_hz=f_ref if freq_dep else None)
        betas = np.repeat(beta_ref[:, None], ks.size, axis=1)
        res = pencil.residuals(ks, X, betas)
        bad = res > _damped.RESIDUAL_TOL
        if freq_dep and ks.size:
            ks, X, res, rinfo = _damped.refine_nonlinear(pencil, ks, X,
                                                         lin.first_solver.precondition,
                                                         count=count, fmax=fmax)
            bad = res > _damped.REFINE_TOL
            info["refinement"] = rinfo
        if ks.size and float(ks.imag.max()) > 2.0 * tau:
            warnings.warn(
                f"a mode decays faster (Im k = {float(ks.imag.max()):.3g} 1/m) than the "
                f"strip 0 <= Im k <= 2τ = {2 * tau:.3g} 1/m in which the damped solver "
                "guarantees to find every mode; strongly damped modes may be missing. "
                "Check with damping='perturbation' or fewer absorbing surfaces.",
                stacklevel=4,
            )

    # order by frequency and select
    freq = pencil.frequency(ks)
    o = np.argsort(freq, kind="stable")
    ks, X, zero, bad, freq = ks[o], X[:, o], zero[o], bad[o], freq[o]
    sel = np.ones(ks.size, dtype=bool) if fmax is None else freq <= fmax
    idx = np.flatnonzero(sel)
    if count is not None:
        idx = idx[:count]
    ks, X, zero, bad = ks[idx], X[:, idx], zero[idx], bad[idx]
    if res is not None:  # of the modes returned (candidates past them may be held less)
        res = res[o][idx]
        info["max_backward_error"] = float(res.max()) if res.size else 0.0
    info["eigen_seconds"] = time.perf_counter() - t_eig
    info["total_seconds"] = time.perf_counter() - t0
    if bad.any():
        good = ~bad
        partial = _damped_modes(pencil, ks[good], X[:, good], zero[good], dofs, free, air,
                                full_walls, dict(info, note="partial"))
        tol = _damped.REFINE_TOL if "refinement" in info else _damped.RESIDUAL_TOL
        raise ConvergenceError(
            f"{int(bad.sum())} of {ks.size} damped modes did not converge (their backward "
            f"error exceeds {tol:g}); the converged ones are in .partial. Refine the mesh or "
            "ask for fewer modes.",
            partial=partial,
        )
    return _damped_modes(pencil, ks, X, zero, dofs, free, air, full_walls, info)


def _damped_modes(pencil, ks, X, zero, dofs, free, air, full_walls, info) -> Modes:
    o = np.argsort(pencil.frequency(ks), kind="stable")
    ks, X, zero = ks[o], X[:, o], zero[o]
    X, n_herm = _damped.normalise(X, pencil.M)
    shapes = np.zeros((dofs.n_dofs, ks.size), dtype=complex)
    shapes[free] = X
    info = dict(info)
    info["zero_mode"] = int(np.flatnonzero(zero)[0]) if zero.any() else None
    if n_herm:
        info["hermitian_normalised"] = n_herm
    return Modes(pencil.frequency(ks), ks**2, shapes, dofs, air, full_walls,
                 decay_rates=air.c * ks.imag, info=info, wavenumbers=ks)
