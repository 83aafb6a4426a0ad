"""Forced harmonic response of an enclosure: :func:`solve_response`.

Physics
-------
Time convention e^{+iωt}: p(t) = Re(p̂ e^{iωt}); k = ω/c.

A point monopole of volume-velocity amplitude Q (m³/s) at x0 enters the
linearised mass equation as a volume source, ∂ρ'/∂t + ρ ∇·u = ρ Q δ(x - x0);
with the linearised momentum equation ρ ∂u/∂t + ∇p = 0 and p = c² ρ',
taking ∂/∂t of the first and the divergence of the second gives
(1/c²) ∂²p/∂t² - ∇²p = ρ ∂(Q δ)/∂t, i.e. for a harmonic field

    -∇²p - k²p = iωρ Q δ(x - x0)                        (1)

(e.g. Pierce, *Acoustics*, 1989, §4.1 and §5.1, from memory).  A wall of
normalised admittance β = ρc/Z gives ∂p/∂n = -ikβp (see
:mod:`acoustic_fem.impedance`), a rigid wall ∂p/∂n = 0, a pressure-release
surface p = 0.  Multiplying (1) by a test function v, integrating by parts
and inserting the wall conditions:

    ∫∇p·∇v dV + ik Σ_s β_s ∫_s p v dS - k² ∫ p v dV = iωρ Σ_src Q_src v(x_src)

so with Lagrange elements (K + ik C(f) - k² M) p = f,
C(f) = Σ_s β_s(f) B_s, f = iωρ Σ_src Q_src g_src e^{-iωτ_src} φ(x_src),
where g is a source's gain and τ its delay.  Pressure-release DOFs are
fixed at 0 (removed).  In 2D the fields are per unit depth (Q in m²/s per
metre of depth) and in 1D per unit cross-section (Q in m/s: the piston
velocity of a source at a closed end).

Energy balance
--------------
The time-averaged power a monopole injects is W_in = ½ Re(p̂(x_src) Q̄_src),
the power a wall absorbs W_abs = ½ ∫ Re(p̂ ū_n) dS = (1/(2ρc)) ∫ Re(β)|p̂|² dS
(u_n = βp/(ρc)).  Discretely, with A = K + ikC - k²M and A p = f: K and M
are real symmetric, and p^H B_s p = ∫_s |p_h|² dS is real, so

    Im(p^H A p) = k Σ_s Re(β_s) ∫_s |p_h|² dS,
    Im(p^H f)   = ωρ Σ_src Re(p_h(x_src) Q̄_src).

Dividing both by 2ωρ (k/(2ωρ) = 1/(2ρc)) gives W_abs = W_in *exactly* for
the discrete solution; the imbalance measures only how well A p = f is
solved (|W_in - W_abs| = |Im(p^H r)|/(2ωρ) for the residual r).  The modal
path is a Galerkin projection with a real basis V (p = V a, Vᵀ A V a = Vᵀ f),
for which p^H A p = a^H Vᵀ A V a = a^H Vᵀ f = p^H f: the balance holds
exactly there too, so for that path it checks the small solves while the
*residual* ‖A p - f‖/‖f‖ measures the truncation.  A room without absorbing
walls takes in no power (W_in = W_abs = 0); its relative imbalance is NaN.

Methods
-------
``"direct"``: one sparse LU factorisation per frequency (SuperLU, complex,
on a nested-dissection ordering computed once for the shared pattern; see
:class:`_Pattern`).  Exact, but SuperLU's factorisation of 3D P2 matrices
grows roughly with the square of the DOF count: fine up to some 10-20 k
DOFs, slow beyond (one 101 k DOF solve with scipy's default spsolve took
34 min on the development machine).

``"modal"``: Galerkin reduced-order model.  Basis: the rigid/pressure-release
modes up to ``modal_factor`` times the highest frequency (absorbing walls
taken as rigid for the basis), plus correction vectors (orthonormalised
into the basis in the mass inner product):

* static corrections K_σ⁻¹ φ(x_src) and the next moment K_σ⁻¹ M K_σ⁻¹ φ(x_src)
  for each source, with σ = -(k_top/4)² < 0 (one Cholesky factorisation of
  the positive definite K - σM); they carry the part of the point-source
  field the truncated modes miss (the near field);
* up to ``refine`` rounds of residual corrections: the full-system
  residuals r(f) of the current model at the worst frequency of each of 8
  bands of the sweep, preconditioned by K_σ⁻¹ (real and imaginary parts);
  they carry what the rigid-wall modes miss at absorbing walls (there
  ∂p/∂n = -ikβp, not 0).  Rounds run on up to 48 sampled frequencies; the
  whole sweep is checked at the end and frequencies still above ``tol``
  join the sample.  Measured on a 7.4 k DOF P2 room with three absorbing
  walls, 40 frequencies: 11-13 rounds to tol = 1e-3, 0.002-0.005 dB from the
  direct solve below fmax/2 and 0.005-0.013 dB over the sweep; modes up to
  1.2, 1.5 or 2 x f_top all work, more modes needing fewer rounds.

K, M, each B_s and the forces are projected once; the small dense systems
are then solved for all frequencies (batched).  The relative residual of the
*full* system is evaluated at every frequency by sparse products and
reported; ``check`` compares a few frequencies with the direct solve.
"""

from __future__ import annotations

import csv
import enum
import math
import numbers
import time
import warnings
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping, Sequence

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ._atomic import atomic_path
from ._errors import InputError, SolverError
from ._locate import interpolation_matrix, locate
from .air import Air
from .assembly import Assembly, assemble, boundary_mass
from .mesh import Mesh
from .walls import PressureRelease, Rigid, Wall, resolve_walls

__all__ = [
    "P_REF", "Method", "SmoothingWindow", "PointSource", "ReceiverPlane", "Response",
    "PressureField", "receiver_line", "receiver_plane", "solve_response",
]

#: Reference sound pressure for SPL, 20 µPa (IEC 61672 / ISO 1683).
P_REF = 20e-6


class Method(str, enum.Enum):
    """How :func:`solve_response` solves the frequency sweep."""

    DIRECT = "direct"
    MODAL = "modal"


class SmoothingWindow(str, enum.Enum):
    """Frequency window of fractional-octave smoothing."""

    GAUSSIAN = "gaussian"
    RECTANGULAR = "rectangular"


def _enum(cls, value, name):
    try:
        return cls(value)
    except ValueError:
        raise InputError(
            f"{name}={value!r} is not one of {[m.value for m in cls]}."
        ) from None


def _finite_real(name, value, fix):
    if isinstance(value, bool) or not isinstance(value, (numbers.Real, np.floating, np.integer)):
        raise InputError(f"{name}={value!r} must be a real number; {fix}.")
    v = float(value)
    if not math.isfinite(v):
        raise InputError(f"{name}={value!r} must be finite; {fix}.")
    return v


# ------------------------------------------------------------------ sources
@dataclass(frozen=True)
class PointSource:
    """A point monopole.

    Parameters
    ----------
    position : sequence of 1 to 3 floats
        Location in m; shorter tuples (for 2D/1D meshes) are padded with
        zeros to (x, y, z).
    volume_velocity : complex
        Volume-velocity amplitude Q in m³/s (complex: its phase is the
        source's phase).  In 2D per metre of depth (m²/s), in 1D per unit
        cross-section (m/s).
    gain : float
        Linear factor applied to Q (default 1; negative inverts polarity).
    delay : float
        Delay τ >= 0 in s: the source term is multiplied by e^{-iωτ}.
    """

    position: tuple
    volume_velocity: complex
    gain: float = 1.0
    delay: float = 0.0

    def __post_init__(self) -> None:
        pos = np.asarray(self.position, dtype=object).ravel()
        if pos.size < 1 or pos.size > 3:
            raise InputError(
                f"source position {self.position!r} must have 1 to 3 coordinates (x, y, z) in m."
            )
        xyz = [_finite_real("source position coordinate", c, "give the point in metres")
               for c in pos]
        xyz += [0.0] * (3 - len(xyz))
        q = self.volume_velocity
        if isinstance(q, bool) or not isinstance(q, numbers.Number):
            raise InputError(
                f"volume_velocity={q!r} must be a (complex) number in m³/s, e.g. 1e-3."
            )
        q = complex(q)
        if not (math.isfinite(q.real) and math.isfinite(q.imag)):
            raise InputError(f"volume_velocity={self.volume_velocity!r} must be finite.")
        gain = _finite_real("gain", self.gain, "give a linear factor such as 1.0 or 0.5")
        delay = _finite_real("delay", self.delay, "give the delay in seconds")
        if delay < 0:
            raise InputError(f"delay={delay!r} s must be >= 0 (a delay, not an advance).")
        object.__setattr__(self, "position", tuple(xyz))
        object.__setattr__(self, "volume_velocity", q)
        object.__setattr__(self, "gain", gain)
        object.__setattr__(self, "delay", delay)

    def amplitude(self, frequencies) -> np.ndarray:
        """(n_f,) complex effective strength Q·g·e^{-iωτ} at frequencies (Hz)."""
        w = 2.0 * math.pi * np.asarray(frequencies, dtype=float)
        return self.volume_velocity * self.gain * np.exp(-1j * w * self.delay)


# ---------------------------------------------------------------- receivers
def _points3(name, value) -> np.ndarray:
    """(n, 3) float rows from an (n, d<=3) or (d,) array-like (padded with zeros)."""
    try:
        a = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be an (n, 3) array of points in m, got {value!r}.") from None
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2 or a.shape[1] < 1 or a.shape[1] > 3:
        raise InputError(
            f"{name} has shape {a.shape}; expected (n, 3) rows of x, y, z in m "
            "((n, 2) or (n, 1) for 2D/1D meshes)."
        )
    if a.shape[0] == 0:
        raise InputError(f"{name} is empty: give at least one point.")
    if not np.all(np.isfinite(a)):
        i = int(np.flatnonzero(~np.all(np.isfinite(a), axis=1))[0])
        raise InputError(f"{name}: point {i} {a[i].tolist()} has a NaN or infinite coordinate.")
    if a.shape[1] < 3:
        a = np.hstack([a, np.zeros((a.shape[0], 3 - a.shape[1]))])
    return np.ascontiguousarray(a)


def receiver_line(start, end, count: int) -> np.ndarray:
    """``count`` points evenly spaced from ``start`` to ``end`` (both included).

    Parameters
    ----------
    start, end : sequence of 1 to 3 floats (m)
    count : int >= 2 (1 gives ``start``)

    Returns
    -------
    (count, 3) float array.
    """
    a = _points3("start", start)
    b = _points3("end", end)
    if len(a) != 1 or len(b) != 1:
        raise InputError("start and end must each be one point (x, y, z).")
    if isinstance(count, bool) or not isinstance(count, numbers.Integral) or count < 1:
        raise InputError(f"count={count!r} must be a whole number >= 1 of points on the line.")
    t = np.linspace(0.0, 1.0, int(count))[:, None] if count > 1 else np.zeros((1, 1))
    return a + t * (b - a)


@dataclass(frozen=True, eq=False)
class ReceiverPlane:
    """Receivers on a regular grid in a plane, only those inside the enclosure.

    Attributes
    ----------
    points : (n, 3) float array
        The receivers kept (inside the enclosure), in grid order.
    x, y : (nx,), (ny,) float arrays
        Grid lines.
    height : float
        z of the plane (the mesh plane's z for a 2D mesh).
    index : (n, 2) int array
        (iy, ix) grid position of each receiver.
    """

    points: np.ndarray
    x: np.ndarray
    y: np.ndarray
    height: float
    index: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx) of the grid."""
        return (len(self.y), len(self.x))

    def grid(self, values) -> np.ndarray:
        """Scatter per-receiver values onto the grid.

        Parameters
        ----------
        values : (..., n) array, one value per receiver in the last axis

        Returns
        -------
        (..., ny, nx) float array, NaN at grid points outside the enclosure.
        """
        v = np.asarray(values)
        if v.shape[-1] != len(self.points):
            raise InputError(
                f"values have {v.shape[-1]} entries in the last axis; the plane has "
                f"{len(self.points)} receivers."
            )
        out = np.full(v.shape[:-1] + self.shape, np.nan, dtype=np.result_type(v.dtype, float))
        out[..., self.index[:, 0], self.index[:, 1]] = v
        return out


def receiver_plane(mesh: Mesh, *, spacing: float, height: float | None = None,
                   margin: float = 0.0) -> ReceiverPlane:
    """Grid of receivers in the horizontal plane z = ``height`` over the room.

    The grid covers the mesh's bounding box in x and y (shrunk by
    ``margin`` on every side of the box) with the given spacing, centred in
    the box; only points inside the enclosure (within the location
    tolerance, so points on a wall count as inside) are kept.

    Parameters
    ----------
    mesh : Mesh (3D, or 2D: then the mesh's own plane and ``height`` None)
    spacing : float, m
    height : float, m (required for 3D meshes: e.g. ear height 1.2)
    margin : float, m, >= 0

    Returns
    -------
    ReceiverPlane with ``points`` (n, 3).
    """
    if not isinstance(mesh, Mesh):
        raise InputError(f"receiver_plane needs an acoustic_fem Mesh, got {type(mesh).__name__}.")
    if mesh.dim == 1:
        raise InputError("receiver_plane needs a 2D or 3D mesh; for a 1D mesh use receiver_line.")
    spacing = _finite_real("spacing", spacing, "give the grid spacing in m, e.g. 0.25")
    margin = _finite_real("margin", margin, "give a distance in m, e.g. 0")
    if spacing <= 0:
        raise InputError(f"spacing={spacing!r} m must be positive.")
    if margin < 0:
        raise InputError(f"margin={margin!r} m must be >= 0.")
    bb = mesh.bounding_box
    if mesh.dim == 3:
        if height is None:
            raise InputError("give height= (z of the plane in m, e.g. 1.2 for ear height).")
        height = _finite_real("height", height, "give z of the plane in m")
        if not (bb[0, 2] <= height <= bb[1, 2]):
            raise InputError(
                f"height={height!r} m is outside the room's z range [{bb[0, 2]:g}, {bb[1, 2]:g}] m."
            )
    else:
        z0 = float(bb[0, 2])
        if height is not None and abs(float(height) - z0) > 1e-9 * max(1.0, abs(z0)):
            raise InputError(f"a 2D mesh lies in z = {z0:g}; leave height=None.")
        height = z0
    axes = []
    for a in range(2):
        lo, hi = bb[0, a] + margin, bb[1, a] - margin
        if hi < lo:
            raise InputError(f"margin={margin!r} m leaves no room in the {'xy'[a]} direction.")
        n = int(math.floor((hi - lo) / spacing + 1e-9)) + 1
        start = lo + 0.5 * ((hi - lo) - (n - 1) * spacing)
        axes.append(start + spacing * np.arange(n))
    X, Y = np.meshgrid(axes[0], axes[1])  # (ny, nx)
    iy, ix = np.meshgrid(np.arange(len(axes[1])), np.arange(len(axes[0])), indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), np.full(X.size, height)])
    loc = locate(mesh, pts[:, : mesh.dim])
    keep = loc.found
    if not keep.any():
        raise InputError(
            f"no grid point of the plane z = {height:g} m with spacing {spacing:g} m lies "
            "inside the enclosure; reduce the spacing or check the height."
        )
    idx = np.column_stack([iy.ravel(), ix.ravel()])[keep]
    return ReceiverPlane(pts[keep], axes[0], axes[1], float(height), idx)


# ---------------------------------------------------------------- response
def _ro(a):
    a = np.asarray(a)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class Response:
    """Sound pressure at receivers over a frequency sweep.

    Attributes
    ----------
    frequencies : (n_f,) float array, Hz
    receivers : (n_r, 3) float array, m
    pressure : (n_f, n_r) complex array
        Complex pressure amplitude p̂ in Pa (e^{+iωt}; p(t) = Re(p̂ e^{iωt})).
    residuals : (n_f,) float array
        Relative residual ‖(K + ikC - k²M) p - f‖ / ‖f‖ of the full
        discrete system at each frequency.
    power_in : (n_f,) float array
        W_in = ½ Σ_src Re(p̂(x_src) Q̄_src), W (per metre in 2D).
    power_absorbed : (n_f,) float array
        W_abs = (1/(2ρc)) Σ_s ∫_s Re(β_s)|p̂|² dS.
    info : mapping
        What was done: method, sizes, timings, basis size, check results.
    layout : ReceiverPlane or None
        The plane the receivers came from (enables :meth:`spl_map`).
    field : PressureField or None
        The pressure on every DOF at the ``field_frequencies`` asked of
        :func:`solve_response` (None when none were asked for).
    """

    frequencies: np.ndarray
    receivers: np.ndarray
    pressure: np.ndarray
    residuals: np.ndarray
    power_in: np.ndarray
    power_absorbed: np.ndarray
    info: Mapping = field(default_factory=dict)
    layout: ReceiverPlane | None = None
    field: "PressureField | None" = None

    def __post_init__(self) -> None:
        for name in ("frequencies", "receivers", "residuals", "power_in", "power_absorbed"):
            object.__setattr__(self, name, _ro(np.array(getattr(self, name), dtype=float)))
        object.__setattr__(self, "pressure", _ro(np.array(self.pressure, dtype=complex)))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    # ---------------------------------------------------------------- levels
    @property
    def spl(self) -> np.ndarray:
        """(n_f, n_r) SPL in dB re 20 µPa of the rms pressure |p̂|/√2."""
        with np.errstate(divide="ignore"):
            return 20.0 * np.log10(np.abs(self.pressure) / (math.sqrt(2.0) * P_REF))

    @property
    def energy_imbalance(self) -> np.ndarray:
        """(n_f,) |W_in - W_abs| / W_in (NaN where nothing absorbs: W_in = 0)."""
        w = self.power_in
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.power_absorbed > 0,
                            np.abs(w - self.power_absorbed) / np.abs(w), np.nan)

    @property
    def spl_mean(self) -> np.ndarray:
        """(n_f,) arithmetic mean over the receivers of the SPL in dB."""
        return self.spl.mean(axis=1)

    @property
    def spl_energy_mean(self) -> np.ndarray:
        """(n_f,) level of the mean-square pressure averaged over the receivers, dB.

        10 log10(mean_r(|p̂_r|²/2) / p_ref²): the energy mean; it is >= the
        mean of the dB values (Jensen's inequality) and weights the loud seats.
        """
        ms = 0.5 * np.mean(np.abs(self.pressure) ** 2, axis=1)
        with np.errstate(divide="ignore"):
            return 10.0 * np.log10(ms / P_REF**2)

    @property
    def spl_std(self) -> np.ndarray:
        """(n_f,) spatial standard deviation of the SPL in dB across receivers (ddof=0)."""
        return self.spl.std(axis=1)

    def nearest_index(self, frequency: float) -> int:
        """Index of the computed frequency closest to ``frequency`` (Hz)."""
        f = _finite_real("frequency", frequency, "give a frequency in Hz")
        return int(np.argmin(np.abs(self.frequencies - f)))

    def smoothed_spl(self, fraction: float = 3, *, window: str = "gaussian") -> np.ndarray:
        """SPL smoothed over 1/``fraction`` octave, (n_f, n_r) dB.

        At each frequency f the mean-square pressure is averaged over the
        computed frequencies f' with weights w(log2(f'/f)) · Δf', Δf' the
        share of the frequency axis each sample stands for (half the
        distance to each neighbour), i.e. an energy average per Hz over the
        window, then converted to dB:

        * ``"rectangular"``: w = 1 for |log2(f'/f)| <= 1/(2N), the
          1/N-octave band centred on f (base-2 octaves);
        * ``"gaussian"``: w = exp(-½ (log2(f'/f)/s)²) with s = 1/(N √(2π)),
          whose equivalent rectangular width is 1/N octave.

        Parameters
        ----------
        fraction : float > 0
            N of 1/N octave (e.g. 3, 6, 12, 24).
        window : {"gaussian", "rectangular"}
        """
        N = _finite_real("fraction", fraction, "give N of 1/N octave, e.g. 3 or 6")
        if N <= 0:
            raise InputError(f"fraction={fraction!r} must be positive (N of 1/N octave).")
        win = _enum(SmoothingWindow, window, "window")
        order = np.argsort(self.frequencies, kind="stable")
        fs = self.frequencies[order]
        if fs.size > 1:
            d = np.diff(fs)
            share = 0.5 * (np.concatenate([[d[0]], d]) + np.concatenate([d, [d[-1]]]))
        else:
            share = np.ones(1)
        share = np.maximum(share, 1e-300)
        D = np.log2(fs[None, :] / fs[:, None])  # (n_f, n_f) octaves from the centre
        if win is SmoothingWindow.RECTANGULAR:
            W = (np.abs(D) <= 0.5 / N + 1e-12).astype(float)
        else:
            s = 1.0 / (N * math.sqrt(2.0 * math.pi))
            W = np.exp(-0.5 * (D / s) ** 2)
        W *= share[None, :]
        W /= W.sum(axis=1, keepdims=True)
        ms = 0.5 * np.abs(self.pressure[order]) ** 2
        out = np.empty_like(ms)
        out[order] = W @ ms
        with np.errstate(divide="ignore"):
            return 10.0 * np.log10(out / P_REF**2)

    def spl_map(self, frequency: float, *, fraction: float | None = None,
                window: str = "gaussian") -> np.ndarray:
        """SPL on the receiver plane at the computed frequency nearest ``frequency``.

        Needs receivers from :func:`receiver_plane`.  With ``fraction`` the
        map is of the 1/N-octave smoothed SPL (see :meth:`smoothed_spl`).

        Returns
        -------
        (ny, nx) float array in dB, NaN outside the enclosure.
        """
        if self.layout is None:
            raise InputError(
                "spl_map needs receivers from receiver_plane(...); these receivers were "
                "given as points."
            )
        i = self.nearest_index(frequency)
        levels = self.spl if fraction is None else self.smoothed_spl(fraction, window=window)
        return self.layout.grid(levels[i])

    def write_csv(self, path, *, overwrite: bool = False):
        """Write a CSV table, one row per (frequency, receiver).

        Columns: frequency_hz, receiver, x_m, y_m, z_m, p_real_pa, p_imag_pa,
        spl_db.  Written atomically; an existing file is kept unless
        ``overwrite``.
        """
        from pathlib import Path

        p = Path(path)
        spl = self.spl
        with atomic_path(p, overwrite=overwrite) as tmp:
            with open(tmp, "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh)
                w.writerow(["frequency_hz", "receiver", "x_m", "y_m", "z_m", "p_real_pa",
                            "p_imag_pa", "spl_db"])
                for i, f in enumerate(self.frequencies):  # rows of a text file
                    for r, x in enumerate(self.receivers):
                        pr = self.pressure[i, r]
                        w.writerow([f"{f:.9g}", r, f"{x[0]:.9g}", f"{x[1]:.9g}", f"{x[2]:.9g}",
                                    f"{pr.real:.9e}", f"{pr.imag:.9e}", f"{spl[i, r]:.6f}"])
        return p

    def __repr__(self) -> str:
        f = self.frequencies
        return (f"Response({len(f)} frequencies {f.min():.4g}–{f.max():.4g} Hz, "
                f"{len(self.receivers)} receivers, method {self.info.get('method')})")


@dataclass(frozen=True, eq=False)
class PressureField:
    """Complex sound pressure on every DOF at a few frequencies.

    Attributes
    ----------
    frequencies : (n_k,) float array, Hz
    pressure : (n_k, n_dofs) complex array, Pa
        Amplitudes p̂ at the DOFs of ``dofs`` (e^{+iωt}); 0 on
        pressure-release surfaces.
    dofs : DofMap
        The P1/P2 DOFs; their points are ``dofs.points`` (n_dofs, 3).
    """

    frequencies: np.ndarray
    pressure: np.ndarray
    dofs: object

    def __post_init__(self) -> None:
        object.__setattr__(self, "frequencies", _ro(np.array(self.frequencies, dtype=float)))
        P = _ro(np.array(self.pressure, dtype=complex))
        if P.shape != (self.frequencies.size, self.dofs.n_dofs):
            raise InputError(f"pressure has shape {P.shape}; expected "
                             f"({self.frequencies.size}, {self.dofs.n_dofs}).")
        object.__setattr__(self, "pressure", P)

    @property
    def magnitude(self) -> np.ndarray:
        """(n_k, n_dofs) |p̂| in Pa."""
        return np.abs(self.pressure)

    @property
    def spl(self) -> np.ndarray:
        """(n_k, n_dofs) SPL in dB re 20 µPa of |p̂|/√2; NaN where p̂ = 0 exactly
        (pressure-release DOFs), which has no level."""
        a = np.abs(self.pressure)
        with np.errstate(divide="ignore"):
            L = 20.0 * np.log10(a / (math.sqrt(2.0) * P_REF))
        return np.where(a > 0, L, np.nan)

    def sample(self, points) -> np.ndarray:
        """Pressure at points by the element interpolation.

        Parameters
        ----------
        points : (n, 3) array of points in m ((n, 2) / (n, 1) for 2D / 1D)

        Returns
        -------
        (n_k, n) complex array, Pa; InputError for points outside the enclosure.
        """
        pts = _points3("points", points)
        E = _evaluation(self.dofs.mesh, self.dofs, pts, "point")
        return np.asarray(E @ self.pressure.T).T

    def __repr__(self) -> str:
        return (f"PressureField({self.frequencies.size} frequencies, "
                f"{self.dofs.n_dofs} DOFs)")


def _field_indices(value, freqs: np.ndarray) -> np.ndarray:
    """Indices into ``freqs`` of the field frequencies asked for (sorted, unique)."""
    if value is None:
        return np.zeros(0, dtype=np.int64)
    try:
        want = np.atleast_1d(np.asarray(value, dtype=float))
    except (TypeError, ValueError):
        raise InputError(f"field_frequencies must be a list of frequencies in Hz, got "
                         f"{value!r}.") from None
    if want.ndim != 1:
        raise InputError(f"field_frequencies has shape {want.shape}; give a 1D list of Hz.")
    out = []
    for w in want:
        j = int(np.argmin(np.abs(freqs - w))) if math.isfinite(w) else 0
        if not (math.isfinite(w) and abs(freqs[j] - w) <= 1e-9 * max(abs(w), 1.0)):
            raise InputError(
                f"field_frequencies: {w:g} Hz is not one of the frequencies solved; the nearest "
                f"is {freqs[j]:g} Hz — give frequencies taken from frequencies=."
            )
        out.append(j)
    return np.unique(np.array(out, dtype=np.int64))


def _full_field(pb: "_Problem", fields: dict, idx: np.ndarray):
    """PressureField on every DOF from free-DOF vectors {frequency index: (n_free,)}."""
    if idx.size == 0:
        return None
    P = np.zeros((idx.size, pb.assembly.dofs.n_dofs), complex)
    for j, i in enumerate(idx):
        P[j, pb.free] = fields[int(i)]
    return PressureField(pb.f[idx], P, pb.assembly.dofs)


# ------------------------------------------------------------ the problem
class _Problem:
    """Matrices of the free DOFs, sources and receivers of one response solve."""

    def __init__(self, mesh, walls, order, air, assembly, sources, receivers, frequencies):
        self.air = air
        self.f = frequencies
        self.k = 2.0 * math.pi * frequencies / air.c
        self.w = 2.0 * math.pi * frequencies
        t0 = time.perf_counter()
        if assembly is None:
            assembly = assemble(mesh, order)
        elif not isinstance(assembly, Assembly) or assembly.dofs.mesh is not mesh \
                or assembly.order != order:
            raise InputError("the assembly given was made for another mesh or element order.")
        self.assembly = assembly
        dofs = assembly.dofs
        self.walls = walls
        fixed_names = [n for n, w in walls.items() if w.fixes_pressure]
        self.fixed_names = fixed_names
        fixed = dofs.boundary_dofs(fixed_names)
        free = np.setdiff1d(np.arange(dofs.n_dofs), fixed, assume_unique=True)
        if free.size == 0:
            raise InputError("every DOF lies on a pressure-release surface: the field is zero.")
        self.free = free
        self.K = assembly.stiffness[free][:, free].tocsr()
        self.M = assembly.mass[free][:, free].tocsr()
        # absorbing walls: anything with an admittance (Impedance and relatives)
        self.absorbing = []
        betas, Bs = [], []
        for name, wall in walls.items():  # loop over surfaces
            if wall.fixes_pressure or not hasattr(wall, "admittance_at"):
                continue
            beta = np.asarray(wall.admittance_at(frequencies, air), dtype=complex).reshape(-1)
            if beta.shape != frequencies.shape:
                raise InputError(
                    f"wall {name!r}: admittance_at returned shape {beta.shape} for "
                    f"{frequencies.size} frequencies; it must return one value per frequency."
                )
            if not np.all(np.isfinite(beta)):
                i = int(np.flatnonzero(~np.isfinite(beta))[0])
                raise InputError(
                    f"wall {name!r}: admittance at {frequencies[i]:g} Hz is {beta[i]!r}, not "
                    "finite; check the wall data over the whole frequency range."
                )
            if np.any(beta.real < 0):
                i = int(np.flatnonzero(beta.real < 0)[0])
                warnings.warn(
                    f"wall {name!r} has Re(β) = {beta[i].real:.3g} < 0 at {frequencies[i]:g} Hz: "
                    "it generates energy (check the e^{+iωt} convention of the data).",
                    stacklevel=3,
                )
            self.absorbing.append(name)
            betas.append(beta)
            Bs.append(boundary_mass(dofs, name)[free][:, free].tocsr())
        self.beta = np.array(betas).reshape(len(betas), frequencies.size)  # (n_w, n_f)
        self.B = Bs
        self.t_assembly = time.perf_counter() - t0

        t0 = time.perf_counter()
        self.E_rec = _evaluation(mesh, dofs, receivers, "receiver")[:, free].tocsr()
        src_pts = np.array([s.position for s in sources])
        self.E_src = _evaluation(mesh, dofs, src_pts, "source")[:, free].tocsr()
        self.t_locate = time.perf_counter() - t0
        # effective source strengths (n_f, n_s) and the force scale iωρ
        self.q = np.column_stack([s.amplitude(frequencies) for s in sources])
        self.fscale = 1j * self.w * air.rho  # (n_f,)
        G = (self.E_src @ self.E_src.T).toarray()  # (n_s, n_s) Gram of the φ(x_src)
        qq = np.einsum("fi,ij,fj->f", self.q.conj(), G, self.q).real
        self.f_norm = np.abs(self.fscale) * np.sqrt(np.maximum(qq, 0.0))  # ‖f‖ per frequency

    @property
    def n(self) -> int:
        return self.free.size

    def rhs(self, i: np.ndarray) -> np.ndarray:
        """(n_free, len(i)) force vectors at frequency indices i."""
        return np.asarray(self.E_src.T @ (self.q[i] * self.fscale[i, None]).T)

    def energy(self, p_src: np.ndarray, wall_sq: np.ndarray, i) -> tuple[np.ndarray, np.ndarray]:
        """W_in, W_abs from p at the sources (m, n_s) and ∫_s|p|² (n_w, m)."""
        w_in = 0.5 * np.sum((p_src * self.q[i].conj()).real, axis=1)
        if wall_sq.size:
            w_abs = np.sum(self.beta[:, i].real * wall_sq, axis=0) / (2.0 * self.air.impedance)
        else:
            w_abs = np.zeros(len(np.atleast_1d(i)))
        return w_in, w_abs

    def residual_norms(self, P: np.ndarray, i: np.ndarray) -> np.ndarray:
        """Relative residuals ‖A(f_i) p_i - f_i‖/‖f_i‖ of columns P (n_free, m)."""
        k = self.k[i]
        R = self.K @ P - (self.M @ P) * (k**2)[None, :]
        for b, B in zip(self.beta, self.B):
            R += (B @ P) * (1j * k * b[i])[None, :]
        R -= self.rhs(i)
        nr = np.linalg.norm(R, axis=0)
        fn = self.f_norm[i]
        # no force (Q = 0, or every source on a pressure-release surface): absolute
        return np.where(fn > 0, nr / np.where(fn > 0, fn, 1.0), nr)


def _evaluation(mesh: Mesh, dofs, pts3: np.ndarray, what: str) -> sp.csr_matrix:
    """Point-evaluation matrix (n, n_dofs); InputError for points outside the enclosure."""
    d = mesh.dim
    bb = mesh.bounding_box
    diag = float(np.linalg.norm(bb[1] - bb[0]))
    tol = 1e-6 * diag
    pts3 = np.asarray(pts3, dtype=float)
    # a 2D/1D mesh lies in a plane / on a line: the other coordinates must match
    off = np.zeros(len(pts3))
    if d < 3:
        plane = bb[0, d:]
        off = np.abs(pts3[:, d:] - plane[None, :]).max(axis=1)
    loc = locate(mesh, pts3[:, :d], tol=tol)
    bad = ~loc.found | (off > tol)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        lo, hi = bb[0], bb[1]
        box = (f"({', '.join(f'{c:.6g}' for c in lo)}) to "
               f"({', '.join(f'{c:.6g}' for c in hi)}) m")
        beyond = float(np.linalg.norm(np.maximum(np.maximum(lo - pts3[i], pts3[i] - hi), 0.0)))
        where = (f"{beyond:.3g} m outside the room's bounding box {box}" if beyond > tol else
                 f"inside the room's bounding box {box} but in no cell of the mesh, e.g. in a "
                 "cut-out corner, a column or beside a 2D/1D mesh's plane")
        raise InputError(
            f"{what} {i} at ({', '.join(f'{c:.6g}' for c in pts3[i])}) m lies outside the "
            f"enclosure: {where}; {int(bad.sum())} {what}(s) outside in all — move the "
            "point inside."
        )
    return interpolation_matrix(dofs, loc)


# ------------------------------------------------------------ direct path
class _Pattern:
    """K, M and the B_s as data arrays on one shared, fill-reducing permuted pattern.

    The sparsity pattern is the same at every frequency, so the ordering is
    computed once: nested dissection (METIS, through CHOLMOD's analysis)
    when scikit-sparse is installed, else SuperLU's own COLAMD per
    factorisation.  SuperLU then factorises A[P][:, P] with its natural
    column order and its default partial pivoting; on 3D P2 rooms this was
    7x less CPU time than SuperLU's default COLAMD at 4.8 k DOFs (and its
    symmetric mode with minimum degree was slower still).
    """

    def __init__(self, K, M, Bs):
        n = K.shape[0]
        S = abs(K) + abs(M)
        for B in Bs:
            S = S + abs(B)
        S = S.tocsr()
        S.sort_indices()
        rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(S.indptr))
        keys = rows * n + S.indices
        self.n = n

        def on(A):
            A = A.tocoo()
            pos = np.searchsorted(keys, A.row.astype(np.int64) * n + A.col)
            out = np.zeros(keys.size)
            np.add.at(out, pos, A.data)
            return out

        self.K, self.M = on(K), on(M)
        self.B = [on(B) for B in Bs]
        perm = _nested_dissection(S)
        self.perm = perm
        if perm is None:
            self.take = None
            self.indptr, self.indices = S.indptr, S.indices
        else:
            # permute the pattern once; ``take`` maps permuted entries to S's
            T = sp.csr_matrix((np.arange(1, keys.size + 1, dtype=float), S.indices, S.indptr),
                              shape=(n, n))[perm][:, perm].tocsr()
            T.sort_indices()
            self.take = T.data.astype(np.int64) - 1
            self.indptr, self.indices = T.indptr, T.indices

    def matrix(self, k: float, betas) -> sp.csc_matrix:
        """A = K + ik Σ β_s B_s - k² M in the permuted order, (n, n) CSC."""
        data = self.K - k * k * self.M + 0j
        for b, Bd in zip(betas, self.B):
            data = data + (1j * k * b) * Bd
        if self.take is not None:
            data = data[self.take]
        # the matrix is symmetric: its CSR arrays are also its CSC arrays
        return sp.csc_matrix((data, self.indices, self.indptr), shape=(self.n, self.n))

    def solve(self, A: sp.csc_matrix, b: np.ndarray, freq: float) -> np.ndarray:
        """Solve A p = b (b in the original order); returns p in the original order."""
        try:
            if self.perm is None:
                lu = spla.splu(A)
            else:
                lu = spla.splu(A, permc_spec="NATURAL")
        except RuntimeError as exc:
            raise SolverError(
                f"the system at {freq:g} Hz is singular ({exc}): the frequency sits on an "
                "undamped eigenfrequency; add absorption or shift the frequency slightly."
            ) from None
        if self.perm is None:
            return lu.solve(b)
        x = np.empty_like(b)
        x[self.perm] = lu.solve(b[self.perm])
        return x


def _nested_dissection(S) -> np.ndarray | None:
    """METIS fill-reducing permutation of a symmetric pattern, or None without CHOLMOD."""
    from ._linalg import _have_cholmod

    if not _have_cholmod():
        return None
    try:
        from sksparse.cholmod import analyze

        A = sp.csc_matrix((np.ones(S.nnz), S.indices, S.indptr), shape=S.shape)
        A = A + sp.eye(S.shape[0], format="csc") * S.shape[0]  # definite, same pattern
        return np.asarray(analyze(A, ordering_method="metis").P(), dtype=np.int64)
    except Exception:  # METIS not compiled in, or another CHOLMOD failure: SuperLU's own
        return None


def _solve_direct(pb: _Problem, idx: np.ndarray, fields: dict | None = None):
    """Direct solves at frequency indices idx: pressure at receivers, sources, walls.

    ``fields``: a dict whose keys are frequency indices; the free-DOF
    solution (n_free,) at each of them is stored as its value.
    """
    pat = _Pattern(pb.K, pb.M, pb.B)
    m = len(idx)
    p_rec = np.empty((m, pb.E_rec.shape[0]), complex)
    p_src = np.empty((m, pb.E_src.shape[0]), complex)
    wall_sq = np.zeros((len(pb.B), m))
    res = np.empty(m)
    for j, i in enumerate(idx):  # one factorisation per frequency
        A = pat.matrix(pb.k[i], pb.beta[:, i])
        b = pb.rhs(np.array([i]))[:, 0]
        p = pat.solve(A, b, pb.f[i])
        if fields is not None and int(i) in fields:
            fields[int(i)] = p
        res[j] = pb.residual_norms(p[:, None], np.array([i]))[0]
        p_rec[j] = pb.E_rec @ p
        p_src[j] = pb.E_src @ p
        for w, B in enumerate(pb.B):
            wall_sq[w, j] = np.vdot(p, B @ p).real
    return p_rec, p_src, wall_sq, res, ("METIS + SuperLU" if pat.perm is not None
                                        else "SuperLU (COLAMD)")


# ------------------------------------------------------------- modal path
def _m_orthonormal_extend(V0: np.ndarray, Z: np.ndarray, M, rtol=1e-10) -> np.ndarray:
    """Columns of Z made M-orthonormal to V0 and among themselves (rank-revealing)."""
    if Z.shape[1] == 0:
        return Z
    # normalise columns first so the rank test is scale free
    nz = np.sqrt(np.maximum(np.einsum("ij,ij->j", Z, M @ Z), 1e-300))
    Z = Z / nz
    for _ in range(2):  # classical Gram-Schmidt, twice
        if V0.shape[1]:
            Z = Z - V0 @ (V0.T @ (M @ Z))
    G = Z.T @ (M @ Z)
    s, U = np.linalg.eigh(0.5 * (G + G.T))
    keep = s > rtol * max(s.max(initial=0.0), 1e-300)
    if not keep.any():
        return Z[:, :0]
    Z = Z @ (U[:, keep] / np.sqrt(s[keep]))
    if V0.shape[1]:
        Z = Z - V0 @ (V0.T @ (M @ Z))
    # one more pass among themselves
    G = Z.T @ (M @ Z)
    L = np.linalg.cholesky(0.5 * (G + G.T))
    return sla.solve_triangular(L, Z.T, lower=True).T


class _Reduced:
    """Galerkin projection of the problem on a real M-orthonormal basis V.

    The basis grows by blocks (:meth:`extend`); only the new rows and
    columns of the projected matrices are computed.  V is kept in one
    preallocated (n_free, capacity) array.
    """

    def __init__(self, pb: _Problem, Phi: np.ndarray, lam: np.ndarray, capacity: int):
        n, m0 = Phi.shape
        self.pb = pb
        self._V = np.empty((n, max(capacity, m0)))
        self._V[:, :m0] = Phi
        self.m = m0
        # Φᵀ K Φ = Λ and Φᵀ M Φ = I for the (mass-normalised) eigenvectors
        self.Kr = np.diag(lam).astype(float)
        self.walls = []
        for B in pb.B:
            rows = np.unique(B.indices)  # DOFs of the wall
            self.walls.append((rows, B[rows][:, rows].tocsr()))
        self.Br = [Vb.T @ (Bb @ Vb) for rows, Bb in self.walls for Vb in [Phi[rows]]]
        self.Sr = np.asarray(pb.E_src @ Phi).reshape(pb.E_src.shape[0], m0)
        self.Rr = np.asarray(pb.E_rec @ Phi).reshape(pb.E_rec.shape[0], m0)

    @property
    def V(self) -> np.ndarray:
        return self._V[:, : self.m]

    def extend(self, Z: np.ndarray) -> int:
        """Add the columns of Z, made M-orthonormal to V; returns how many were kept."""
        pb = self.pb
        Z = _m_orthonormal_extend(self.V, Z, pb.M)
        z = Z.shape[1]
        if z == 0:
            return 0
        if self.m + z > self._V.shape[1]:
            grown = np.empty((self._V.shape[0], self.m + z + max(64, self.m // 4)))
            grown[:, : self.m] = self.V
            self._V = grown
        m = self.m
        self._V[:, m : m + z] = Z
        V = self._V[:, : m + z]
        cols = V.T @ (pb.K @ Z)  # (m + z, z): Vᵀ K Z
        Kr = np.empty((m + z, m + z))
        Kr[:m, :m] = self.Kr
        Kr[:, m:] = cols
        Kr[m:, :m] = cols[:m].T
        self.Kr = 0.5 * (Kr + Kr.T)
        for w, (rows, Bb) in enumerate(self.walls):
            BZ = Bb @ Z[rows]
            c = V[rows].T @ BZ
            Br = np.empty((m + z, m + z))
            Br[:m, :m] = self.Br[w]
            Br[:, m:] = c
            Br[m:, :m] = c[:m].T
            self.Br[w] = 0.5 * (Br + Br.T)
        self.Sr = np.hstack([self.Sr, np.asarray(pb.E_src @ Z)])
        self.Rr = np.hstack([self.Rr, np.asarray(pb.E_rec @ Z)])
        self.m = m + z
        return z

    def solve(self, idx: np.ndarray, chunk_bytes=64e6) -> np.ndarray:
        """Reduced coordinates a (m, len(idx)) at frequency indices idx (batched solves).

        A_r(f) = Kr - k² I + ik Σ_s β_s(f) Br_s is formed for a chunk of
        frequencies at once as real matrix products (coefficients x the
        stacked Br_s), then solved by one batched LU.
        """
        pb, m = self.pb, self.m
        out = np.empty((m, len(idx)), complex)
        if m == 0:  # no force reaches the free DOFs: the field is zero
            return out
        step = max(1, int(chunk_bytes // (16 * m * m)))
        diag = np.arange(m)
        nw = len(self.Br)
        Bflat = np.stack(self.Br).reshape(nw, m * m) if nw else None
        for s in range(0, len(idx), step):  # frequency chunks, each one batched solve
            ii = idx[s : s + step]
            k = pb.k[ii]
            A = np.empty((len(ii), m, m), complex)
            if nw:
                coef = (1j * k)[:, None] * pb.beta[:, ii].T  # (c, n_w)
                A.real = (coef.real @ Bflat).reshape(len(ii), m, m) + self.Kr[None]
                A.imag = (coef.imag @ Bflat).reshape(len(ii), m, m)
            else:
                A[:] = self.Kr[None]
            A[:, diag, diag] -= (k**2)[:, None]
            F = (pb.q[ii] * pb.fscale[ii, None]) @ self.Sr  # (c, m)
            out[:, s : s + step] = np.linalg.solve(A, F[..., None])[..., 0].T
        return out

    def residuals(self, a: np.ndarray, idx: np.ndarray, chunk_bytes=256e6) -> np.ndarray:
        """Full-system relative residuals of p = V a at frequency indices idx."""
        pb = self.pb
        step = max(1, int(chunk_bytes // (16 * 3 * pb.n)))
        res = np.empty(len(idx))
        V = self.V
        for s in range(0, len(idx), step):  # frequency chunks
            P = V @ a[:, s : s + step]
            res[s : s + step] = pb.residual_norms(P, idx[s : s + step])
        return res

    def residual_vectors(self, a: np.ndarray, idx: np.ndarray) -> np.ndarray:
        """(n_free, len(idx)) complex residuals A p - f of p = V a."""
        pb = self.pb
        P = self.V @ a
        k = pb.k[idx]
        R = pb.K @ P - (pb.M @ P) * (k**2)[None, :]
        for b, B in zip(pb.beta, pb.B):
            R += (B @ P) * (1j * k * b[idx])[None, :]
        return R - pb.rhs(idx)


def _pick(res: np.ndarray, tol: float, n_pick: int) -> np.ndarray:
    """Frequency indices to enrich at: the worst residual in each of n_pick bins, if > tol."""
    bins = np.array_split(np.arange(res.size), min(n_pick, res.size))
    out = [b[np.argmax(res[b])] for b in bins if b.size and res[b].max() > tol]
    return np.array(sorted(out), dtype=np.int64)


#: Frequencies enriched per refinement round (one per band of the sweep).
_N_PICK = 8
#: Frequencies sampled while refining (the whole sweep is checked at the end).
_N_SAMPLE = 48


def _basis_modes(pb: _Problem, mesh, order, modes, modal_factor):
    """The real rigid/pressure-release modes of the reduced model's basis.

    modes : Modes (checked against the mesh, order and pressure-release
    surfaces of ``pb``), an int (that many lowest modes) or None (every mode
    up to ``modal_factor`` times the highest frequency of ``pb``).
    """
    from .modes import Modes, ResolutionWarning, solve_modes

    f_top = float(pb.f.max())
    if isinstance(modes, Modes):
        if modes.dofs.mesh is not mesh or modes.order != order:
            raise InputError("the Modes given were computed on another mesh or element order.")
        m_fixed = sorted(n for n, w in modes.walls.items() if w.fixes_pressure)
        if m_fixed != sorted(pb.fixed_names):
            raise InputError(
                f"the Modes given have pressure-release surfaces {m_fixed}, the walls here "
                f"{sorted(pb.fixed_names)}; compute the modes with the same pressure-release "
                "surfaces (absorbing walls as rigid)."
            )
        if np.any(np.asarray(modes.decay_rates) > 0):
            raise InputError("the Modes given are damped; the modal basis needs the real modes "
                             "of the rigid/pressure-release problem.")
        return modes
    basis_walls = {n: (PressureRelease() if w.fixes_pressure else Rigid())
                   for n, w in pb.walls.items()}
    size = dict(fmax=modal_factor * f_top) if modes is None else dict(count=int(modes))
    with warnings.catch_warnings():
        # modes above the mesh's resolution are fine as basis vectors
        warnings.simplefilter("ignore", ResolutionWarning)
        return solve_modes(mesh, basis_walls, order=order, air=pb.air, assembly=pb.assembly,
                           **size)


def _solve_modal(pb: _Problem, mesh, order, modes, modal_factor, refine, tol, backend,
                 fields: dict | None = None):
    from ._linalg import factorize

    info = {}
    t0 = time.perf_counter()
    f_top = float(pb.f.max())
    md = _basis_modes(pb, mesh, order, modes, modal_factor)
    Phi = np.ascontiguousarray(md.shapes[pb.free])
    lam = np.asarray(md.eigenvalues, dtype=float)
    info.update(n_modes=int(lam.size), modes_top_hz=float(md.frequencies.max(initial=0.0)),
                modes_seconds=time.perf_counter() - t0)

    t0 = time.perf_counter()
    k_top = 2.0 * math.pi * f_top / pb.air.c
    # σ = -(k_top/4)²: measured on a 7.4 k DOF room with three absorbing
    # walls, σ between -0.01 and -0.1 k_top² needed 11-13 refinement rounds,
    # σ = -k_top² 13-17 and -4 k_top² 17-24 (closer to the band's low end the
    # shifted inverse resolves the low-frequency residuals better).
    sigma = -((0.25 * k_top) ** 2)
    fac = factorize((pb.K - sigma * pb.M).tocsc(), definite=True, backend=backend)
    n_s = pb.E_src.shape[0]
    red = _Reduced(pb, Phi, lam, capacity=lam.size + 2 * n_s + 4 * _N_PICK)
    Z1 = fac.solve(pb.E_src.T.toarray())  # static correction per source
    Z2 = fac.solve(pb.M @ Z1)  # next moment
    n_static = red.extend(np.hstack([Z1, Z2]))
    all_idx = np.arange(pb.f.size)
    # refinement on a sample of the sweep (the small dense solves at every
    # frequency dominate a round); the whole sweep is checked at the end and
    # frequencies still above tol join the sample
    if pb.f.size <= _N_SAMPLE:
        sample = all_idx
    else:
        sample = np.unique(np.round(np.linspace(0, pb.f.size - 1, _N_SAMPLE)).astype(np.int64))
    rounds = []
    while True:
        a = red.solve(sample)
        res = red.residuals(a, sample)
        if res.max() <= tol or len(rounds) >= refine:
            if sample.size < all_idx.size:
                a_all = red.solve(all_idx)
                res_all = red.residuals(a_all, all_idx)
                if res_all.max() > tol and len(rounds) < refine:
                    new = np.setdiff1d(all_idx[res_all > tol], sample)
                    # (no new index: rounding moved a sampled residual across tol;
                    # continue on the whole sweep so every pass makes progress)
                    sample = np.union1d(sample, new) if new.size else all_idx
                    continue
                a, res = a_all, res_all
            break
        pick = sample[_pick(res, tol, _N_PICK)]
        R = red.residual_vectors(red.solve(pick), pick)
        added = red.extend(fac.solve(np.hstack([R.real, R.imag])))
        rounds.append(dict(frequencies_hz=pb.f[pick].tolist(),
                           max_residual_before=float(res.max()), added=added))
        if added == 0:
            if sample.size < all_idx.size:
                a = red.solve(all_idx)
                res = red.residuals(a, all_idx)
            break
    p_rec = (red.Rr @ a).T
    p_src = (red.Sr @ a).T
    for i in (fields or {}):  # a covers the whole sweep here: p = V a
        fields[i] = red.V @ a[:, i]
    wall_sq = np.array([np.einsum("im,ij,jm->m", a.conj(), Br, a).real for Br in red.Br]
                       ).reshape(len(red.Br), a.shape[1])
    info.update(method="modal", n_basis=int(red.m), n_static_corrections=int(n_static),
                n_residual_corrections=int(red.m - lam.size - n_static),
                sigma_per_m2=sigma, factor_backend=fac.backend, refine_rounds=rounds,
                tol=tol, converged=bool(res.max() <= tol),
                reduced_seconds=time.perf_counter() - t0, modal_factor=modal_factor)
    if res.max() > tol:
        warnings.warn(
            f"modal response: the largest relative residual is {res.max():.2g} after "
            f"{len(rounds)} refinement rounds (tol {tol:g}); raise refine=, modal_factor= "
            "or use method='direct'.", stacklevel=3,
        )
    return p_rec, p_src, wall_sq, res, info


# --------------------------------------------------------------- validate
def _frequencies(value) -> np.ndarray:
    try:
        f = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"frequencies must be an array of numbers in Hz, got {value!r}.") from None
    f = np.atleast_1d(f)
    if f.ndim != 1:
        raise InputError(f"frequencies have shape {f.shape}; give a 1D array of Hz values.")
    if f.size == 0:
        raise InputError("frequencies is empty: give at least one frequency in Hz, e.g. [50.0].")
    bad = ~np.isfinite(f) | (f <= 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"frequency {i} is {float(f[i]):g} Hz: every frequency must be positive and finite "
            "(the response at 0 Hz of a closed room is not finite)."
        )
    return np.ascontiguousarray(f)


def _sources(value) -> list[PointSource]:
    if isinstance(value, PointSource):
        return [value]
    try:
        srcs = list(value)
    except TypeError:
        raise InputError(f"sources must be a PointSource or a list of them, got {value!r}.") from None
    if not srcs:
        raise InputError("sources is empty: give at least one PointSource.")
    for i, s in enumerate(srcs):
        if not isinstance(s, PointSource):
            raise InputError(f"sources[{i}] is {s!r}; use acoustic_fem.PointSource(position, "
                             "volume_velocity).")
    return srcs


def solve_response(
    mesh: Mesh,
    walls: Mapping[str, Wall] | None = None,
    *,
    sources: PointSource | Sequence[PointSource],
    receivers,
    frequencies,
    order: int = 2,
    air: Air | None = None,
    method: str = "direct",
    modes=None,
    modal_factor: float = 1.5,
    refine: int = 20,
    tol: float = 1e-3,
    check: int = 0,
    assembly: Assembly | None = None,
    backend: str = "auto",
    field_frequencies=None,
) -> Response:
    """Complex sound pressure at receivers for point sources over frequencies.

    Solves (K + ik C(f) - k² M) p = iωρ Σ Q g e^{-iωτ} φ(x_src) (see the
    module notes) and evaluates p at the receivers.

    Parameters
    ----------
    mesh : Mesh
    walls : mapping surface name -> Rigid() / PressureRelease() / Impedance(...)
        Surfaces not named are rigid.
    sources : PointSource or sequence of PointSource
        Their fields add up (with each source's gain and delay).
    receivers : (n_r, 3) array of points, or a ReceiverPlane
        (n_r, 2) / (n_r, 1) for 2D / 1D meshes.
    frequencies : (n_f,) array of positive floats, Hz
    order : int, 1 or 2
    air : Air, optional (default Air())
    method : {"direct", "modal"}
        "direct": a sparse LU per frequency.  "modal": reduced-order model
        (module notes); far faster for long sweeps.
    modes : None, int or Modes (modal method)
        None: the rigid/pressure-release modes up to ``modal_factor`` x the
        highest frequency are computed; an int: that many lowest modes; a
        :class:`Modes` of this mesh (absorbing walls rigid) is reused.
    modal_factor : float > 1
        Basis modes up to this multiple of the highest frequency (default
        1.5: with the residual corrections, more modes cost more than they
        gain — measured in the module notes).
    refine : int >= 0
        Most rounds of residual corrections added to the modal basis
        (default 20); each round adds up to 16 vectors.
    tol : float > 0
        Refinement stops once every frequency's relative residual is below
        ``tol`` (default 1e-3); otherwise a warning says how far it got.
    check : int >= 0
        Compare this many frequencies (spread over the sweep) with the
        direct solve; results in ``info["check"]`` (modal method; the direct
        method ignores it).
    assembly : Assembly, optional
        K and M of this mesh and order, to reuse.
    backend : {"auto", "cholmod", "superlu"}
        Factorisation of the positive definite K - σM (modal method).
    field_frequencies : (n_k,) array of Hz, optional
        Frequencies, each one of ``frequencies``, at which the pressure on
        every DOF is kept as well (``Response.field``), e.g. for VTK files of
        the whole field; a few only: each costs n_dofs complex values.

    Returns
    -------
    Response
        ``pressure`` (n_f, n_r) complex Pa, ``spl`` (n_f, n_r) dB,
        ``residuals`` (n_f,), ``power_in`` / ``power_absorbed`` (n_f,),
        ``field`` (a :class:`PressureField`, (n_k, n_dofs)) or None.
    """
    t_start = time.perf_counter()
    if not isinstance(mesh, Mesh):
        raise InputError(
            f"solve_response needs an acoustic_fem Mesh (from read_mesh or a builder), got "
            f"{type(mesh).__name__}."
        )
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(f"order={order!r} is not supported: use 1 (linear) or 2 (quadratic).")
    air = Air() if air is None else air
    if not isinstance(air, Air):
        raise InputError(f"air must be an acoustic_fem Air, got {air!r}.")
    meth = _enum(Method, method, "method")
    freqs = _frequencies(frequencies)
    field_idx = _field_indices(field_frequencies, freqs)
    srcs = _sources(sources)
    layout = receivers if isinstance(receivers, ReceiverPlane) else None
    rec = _points3("receivers", receivers.points if layout is not None else receivers)
    for name, v, lo in (("refine", refine, 0), ("check", check, 0)):
        if isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < lo:
            raise InputError(f"{name}={v!r} must be a whole number >= {lo}.")
    tol = _finite_real("tol", tol, "e.g. 1e-3")
    if tol <= 0:
        raise InputError(f"tol={tol!r} must be positive (a relative residual, e.g. 1e-3).")
    modal_factor = _finite_real("modal_factor", modal_factor, "e.g. 1.5")
    if modal_factor <= 1.0:
        raise InputError(f"modal_factor={modal_factor!r} must exceed 1 (modes above the top "
                         "frequency are needed).")
    if modes is not None and not isinstance(modes, numbers.Integral):
        from .modes import Modes

        if not isinstance(modes, Modes):
            raise InputError(f"modes={modes!r} must be None, a number of modes or a Modes.")
    if isinstance(modes, numbers.Integral) and (isinstance(modes, bool) or modes < 1):
        raise InputError(f"modes={modes!r} must be a positive number of modes.")
    full_walls = resolve_walls(mesh, walls)
    _warn_resolution(mesh, order, air, float(freqs.max()))

    pb = _Problem(mesh, full_walls, order, air, assembly, srcs, rec, freqs)
    info = dict(n_dofs=int(pb.assembly.n_dofs), n_free_dofs=int(pb.n), order=order,
                n_sources=len(srcs), n_receivers=len(rec), n_frequencies=int(freqs.size),
                absorbing_walls=list(pb.absorbing), assembly_seconds=pb.t_assembly,
                locate_seconds=pb.t_locate)
    all_idx = np.arange(freqs.size)
    t0 = time.perf_counter()
    fields = {int(i): None for i in field_idx}
    if meth is Method.DIRECT:
        p_rec, p_src, wall_sq, res, solver = _solve_direct(pb, all_idx, fields)
        info.update(method="direct", solver=solver)
    else:
        p_rec, p_src, wall_sq, res, minfo = _solve_modal(pb, mesh, order, modes, modal_factor,
                                                         refine, tol, backend, fields)
        info.update(minfo)
        if check:
            ci = np.unique(np.round(np.linspace(0, freqs.size - 1, min(check, freqs.size)))
                           .astype(int))
            pr_d, *_ = _solve_direct(pb, ci)
            with np.errstate(divide="ignore", invalid="ignore"):
                db = np.abs(20 * np.log10(np.abs(p_rec[ci]) / np.abs(pr_d)))
                rel = np.abs(p_rec[ci] - pr_d) / np.abs(pr_d)
            info["check"] = dict(frequencies_hz=freqs[ci].tolist(),
                                 max_db_error=float(np.nanmax(db)),
                                 max_relative_error=float(np.nanmax(rel)),
                                 db_error_per_frequency=np.nanmax(db, axis=1).tolist())
    info["solve_seconds"] = time.perf_counter() - t0
    w_in, w_abs = pb.energy(p_src, wall_sq, all_idx)
    info["max_residual"] = float(res.max())
    info["total_seconds"] = time.perf_counter() - t_start
    return Response(freqs, rec, p_rec, res, w_in, w_abs, info=info, layout=layout,
                    field=_full_field(pb, fields, field_idx))


def _warn_resolution(mesh, order, air, f_top):
    from .modes import MIN_ELEMENTS_PER_WAVELENGTH, ResolutionWarning

    epw = air.c / f_top / mesh.h_mean
    need = MIN_ELEMENTS_PER_WAVELENGTH[order]
    if epw < need:
        warnings.warn(
            f"the mesh resolves {f_top:g} Hz with only {epw:.1f} P{order} elements per "
            f"wavelength (mean edge {mesh.h_mean:.3g} m); about {need:g} are needed for 1 % "
            f"accuracy — refine the mesh to a mean edge of {air.c / f_top / need:.3g} m or "
            "lower the top frequency.",
            ResolutionWarning, stacklevel=3,
        )
