"""Acoustic eigenmodes of an enclosure: :func:`solve_modes` and :class:`Modes`."""

from __future__ import annotations

import math
import numbers
import time
import warnings
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._eigen import solve_generalized
from ._errors import InputError
from .air import Air
from .assembly import Assembly, assemble, facet_measures
from .dofs import DofMap
from .mesh import Mesh
from .walls import Wall, resolve_walls

__all__ = ["Modes", "solve_modes", "ResolutionWarning", "MIN_ELEMENTS_PER_WAVELENGTH"]

#: Elements (mean edge lengths) per wavelength below which the frequency error
#: is likely to exceed about 1 %: from the 1D dispersion of consistent-mass
#: Lagrange elements, relative frequency error ≈ (kh)²/24 (P1) and (kh)⁴/1440
#: (P2), which reach 1 % at λ/h ≈ 12.8 and 3.2; 3D meshes measured in this
#: project's tests behave alike with h the mean edge.
MIN_ELEMENTS_PER_WAVELENGTH = {1: 12.0, 2: 3.5}


class ResolutionWarning(UserWarning):
    """The mesh is too coarse for the highest frequency asked for."""


@dataclass(frozen=True, eq=False)
class Modes:
    """Eigenmodes of an enclosure.

    Attributes
    ----------
    frequencies : (n_modes,) float array
        Eigenfrequencies in Hz, ascending.  A room whose walls are all rigid
        has a 0 Hz mode (uniform pressure): it is mode 0.
    eigenvalues : (n_modes,) float array
        The Helmholtz eigenvalues k² in 1/m² (k = 2πf/c).
    shapes : (n_dofs, n_modes) float array
        Mode shapes, real and mass-normalised: ``shapes.T @ M @ shapes = I``
        with M the mass matrix of the space (so ∫ p_i p_j dV = δ_ij).
        Zero on pressure-release surfaces.
    points : (n_dofs, dim) float array
        Coordinates of the degrees of freedom (rows), dim = mesh dimension.
    decay_rates : (n_modes,) float array
        Decay rate δ in 1/s of each mode (pressure ∝ e^{-δt}); zero for
        rigid and pressure-release walls, which absorb nothing.
    dofs : DofMap
        DOF numbering (mesh, order, cell-to-DOF map) for export and reuse.
    air : Air
    walls : mapping str -> Wall
        The wall condition of every surface.
    info : mapping
        What the solver did: backend, shift windows, timings.
    """

    frequencies: np.ndarray
    eigenvalues: np.ndarray
    shapes: np.ndarray
    dofs: DofMap
    air: Air
    walls: Mapping[str, Wall]
    decay_rates: np.ndarray = None  # type: ignore[assignment]
    info: Mapping = field(default_factory=dict)

    def __post_init__(self) -> None:
        n = len(self.frequencies)
        if self.decay_rates is None:
            object.__setattr__(self, "decay_rates", np.zeros(n))
        for name in ("frequencies", "eigenvalues", "shapes", "decay_rates"):
            a = np.array(getattr(self, name), dtype=float)
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
        """One dict per mode: index, frequency_hz, decay_rate_per_s, t60_s, q."""
        return [
            dict(index=i, frequency_hz=float(f), decay_rate_per_s=float(d), t60_s=float(t),
                 q=float(q))
            for i, (f, d, t, q) in enumerate(
                zip(self.frequencies, self.decay_rates, self.t60, self.quality_factors)
            )
        ]


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
) -> Modes:
    """Eigenfrequencies and mode shapes of the air in an enclosure.

    Solves the Helmholtz eigenproblem ∇²p + k²p = 0 with the wall conditions
    by Lagrange finite elements: K x = k² M x.

    Parameters
    ----------
    mesh : Mesh
    walls : mapping of surface name -> Rigid() / PressureRelease(), optional
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
    backend : {"auto", "cholmod", "superlu"}
        Sparse factorisation used for the shifts.
    assembly : Assembly, optional
        Matrices from :func:`assemble` of the same mesh and order, to reuse.

    Returns
    -------
    Modes
        ``frequencies`` (n_modes,), ``shapes`` (n_dofs, n_modes),
        ``points`` (n_dofs, dim).
    """
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
                ResolutionWarning, stacklevel=2,
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
