"""Placement of low-frequency sources for even seat coverage: :func:`optimise_placement`.

What is optimised
-----------------
Given candidate source positions x_c (c = 1..n_c), seats x_r (r = 1..n_r)
and a band of frequencies f_i (i = 1..n_f), a *layout* is a choice of
``n_sources`` distinct candidates c_1..c_n with gains g_j and delays τ_j.
Its pressure at the seats is the superposition (linear system, time
convention e^{+iωt}, :mod:`acoustic_fem.response`)

    p(f_i, x_r) = Q Σ_j g_j e^{-iω_i τ_j} H(f_i, x_r, c_j),

H the transfer function (Pa per m³/s of volume velocity) from a point
monopole at candidate c to seat r, Q the common volume velocity.  With
L(f, r) = 20 log10(|p|/(√2 p_ref)) the seat SPL, the objectives are
(:class:`Objective`):

* ``"spread"``: the band mean of the seat-to-seat standard deviation,
  J = (1/n_f) Σ_i std_r L(f_i, r) in dB (ddof = 0, the same as
  :attr:`Response.spl_std`);
* ``"flat"``: the rms deviation of the seat SPL from a flat target over the
  band, J = sqrt((1/(n_f n_r)) Σ_i Σ_r (L(f_i, r) - T)²) in dB — the square
  root of the mean squared deviation, so it has the same minimiser and is
  in dB.  T is ``target_db`` if given, else the layout's own mean level
  (mean of L over band and seats), i.e. flatness regardless of level.

The band is sampled at ``n_frequencies`` points spaced evenly in log
frequency (equal weight per fraction of an octave).

How
---
1. Transfer functions, once.  The rigid/pressure-release modes up to
   ``modal_factor`` x the top frequency are computed once (absorbing walls
   taken as rigid, as in ``solve_response(method="modal")``, or a given
   :class:`Modes` is reused) and the Galerkin reduced-order model of
   :mod:`acoustic_fem.response` is built on them with *every* candidate (and
   baseline) position as a source: static corrections per source, then
   residual corrections until each source's relative residual of the full
   system is below ``tol`` at every frequency (each round adds the
   preconditioned residuals of the 4 worst sources at the worst frequency
   of each of 8 bands, from 24 sampled frequencies; the whole band is
   checked at the end).  The small dense systems are solved for all sources
   at once (one batched LU per frequency chunk), so H(f_i, x_r, c) is known
   for every frequency, seat and candidate.
2. Positions: every combination of ``n_sources`` candidates is scored with
   unit gains and no delays when there are at most ``max_exhaustive``
   (vectorised over combinations); otherwise a greedy build-up (add the
   candidate that lowers J most) followed by coordinate descent (replace one
   source at a time by the best other candidate, until no move helps).
3. Gains and delays (optional): for the ``n_polish`` best position sets,
   L-BFGS-B (scipy.optimize.minimize, analytic gradient) on the 2 n_sources
   continuous variables within ``gain_range`` and [0, ``max_delay``], from unit gains /
   zero delays and from ``n_starts`` random starts drawn from
   ``numpy.random.default_rng(seed)``: deterministic for a given seed.  A
   polished layout replaces the unit-gain one only if it scores lower.
   Since the seat SPL depends on |p| only, a common delay changes nothing:
   delays are reported with the smallest at 0.  Without a fixed target a
   common gain factor changes nothing either: gains are then reported with
   the largest at g_max (a gain of 0 switches a source off).

The seat-selection variant, :func:`optimise_seats`, keeps the sources
fixed and picks ``n_seats`` of the candidate seats by the same objectives
(same exhaustive or greedy/descent search over seat subsets).

Assumptions and limits
----------------------
* Linear acoustics, point monopole sources of equal volume velocity (before
  gains), locally reacting walls as given; what the finite element model
  of the room does not contain (furniture, wall vibration, the sources'
  own size and directivity, their frequency response) is not in the result.
* The search minimises the *modal estimate*; the reduced model agrees with
  the direct solve of the same finite element model to the residual
  tolerance (``verify=True`` re-evaluates the chosen and baseline layouts by
  direct solves and reports both in ``info``).  The test suite checks the
  optimiser against common-practice symmetric layouts by direct solves.
* Exhaustive search is global over the candidate set only; the continuous
  step finds a local optimum from each start.
* Only the sampled frequencies are seen: a narrow peak or dip between
  samples is missed, so sample the band densely enough for the room's
  mode bandwidths (the default 41 points over 20-100 Hz are 1/17 octave
  apart).
* Measured (bench/bench_placement.py: 5.0 x 3.6 x 2.4 m room, 3.5 k P2
  DOFs, 16 candidates, 9 seats, 31 frequencies): the optimiser was 8.7x
  and 11.9x (two runs on a shared 2-core machine) faster than the same
  search on transfer functions from per-candidate direct sweeps and chose
  the same pair; against common-practice symmetric
  layouts, judged by direct solves, it was 0.01-2.8 dB better (largest for
  a seat block off the room's centre, smallest where the symmetric layout
  is already near-optimal for centred seats).
* Predictions are model estimates: verify the layout by measurement in the
  room before relying on it, and keep levels within local noise-exposure
  limits and licensed practice.
"""

from __future__ import annotations

import enum
import itertools
import math
import numbers
import time
import warnings
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._errors import InputError
from .air import Air
from .assembly import Assembly
from .mesh import Mesh
from .response import _basis_modes as _response_basis_modes
from .response import (P_REF, PointSource, _N_PICK, _enum, _evaluation,
                       _finite_real, _pick, _points3, _Problem, _Reduced, _warn_resolution,
                       solve_response)
from .walls import Wall, resolve_walls

__all__ = ["Objective", "SourceLayout", "PlacementResult", "SeatResult", "optimise_placement",
           "optimise_seats", "layout_objective"]


class Objective(str, enum.Enum):
    """What :func:`optimise_placement` minimises (module notes)."""

    SPREAD = "spread"
    FLAT = "flat"


def _ro(a, dtype=float):
    a = np.array(a, dtype=dtype)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class SourceLayout:
    """Sources of a layout.

    Attributes
    ----------
    positions : (n, 3) float array, m
    gains : (n,) float array (linear factors on the volume velocity)
    delays : (n,) float array, s (>= 0)
    candidates : (n,) int array
        Index of each position in the candidate set (-1 for a position that
        is not a candidate, e.g. of a baseline given by the user).
    """

    positions: np.ndarray
    gains: np.ndarray
    delays: np.ndarray
    candidates: np.ndarray

    def __post_init__(self) -> None:
        object.__setattr__(self, "positions", _ro(self.positions).reshape(-1, 3))
        n = len(self.positions)
        for name in ("gains", "delays"):
            object.__setattr__(self, name, _ro(getattr(self, name)).reshape(n))
        object.__setattr__(self, "candidates", _ro(self.candidates, np.int64).reshape(n))

    def __len__(self) -> int:
        return len(self.positions)

    def sources(self, volume_velocity: complex = 1e-3) -> list[PointSource]:
        """The layout as :class:`PointSource` objects (for :func:`solve_response`)."""
        return [PointSource(tuple(p), volume_velocity, gain=float(g), delay=float(d))
                for p, g, d in zip(self.positions, self.gains, self.delays)]

    def __repr__(self) -> str:
        rows = ", ".join(f"({p[0]:.3g}, {p[1]:.3g}, {p[2]:.3g}) m g={g:.3g} τ={d * 1e3:.3g} ms"
                         for p, g, d in zip(self.positions, self.gains, self.delays))
        return f"SourceLayout({rows})"


@dataclass(frozen=True, eq=False)
class PlacementResult:
    """Outcome of :func:`optimise_placement`.

    Attributes
    ----------
    objective : Objective
    layout : SourceLayout
        The chosen layout.
    value : float
        Its objective (dB; modal estimate).
    baseline : SourceLayout
        The layout compared with (the user's, or the first ``n_sources``
        candidates with unit gains and no delays).
    baseline_value : float
        Its objective (dB; modal estimate).
    frequencies : (n_f,) float array, Hz
    seats : (n_r, 3) float array, m
    spl : (n_f, n_r) float array
        Seat SPL of the chosen layout, dB re 20 µPa (modal estimate).
    baseline_spl : (n_f, n_r) float array
        Seat SPL of the baseline layout.
    target_db : float or None
        The flat target used (objective "flat"), None for the layout's own mean.
    volume_velocity : complex
        Q of every source before its gain, m³/s.
    info : mapping
        Counts (candidates, layouts scored, objective evaluations of the
        continuous step), the search used, the modal model (modes, basis
        size, largest residual), timings in s; with ``verify`` the direct
        objectives ``direct_value`` and ``direct_baseline_value``.
    """

    objective: Objective
    layout: SourceLayout
    value: float
    baseline: SourceLayout
    baseline_value: float
    frequencies: np.ndarray
    seats: np.ndarray
    spl: np.ndarray
    baseline_spl: np.ndarray
    target_db: float | None = None
    volume_velocity: complex = 1e-3
    info: Mapping = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("frequencies", "seats", "spl", "baseline_spl"):
            object.__setattr__(self, name, _ro(getattr(self, name)))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    @property
    def improvement_db(self) -> float:
        """baseline_value - value in dB (positive: the chosen layout is better)."""
        return float(self.baseline_value - self.value)

    def __repr__(self) -> str:
        return (f"PlacementResult({self.objective.value}: {self.value:.3g} dB vs baseline "
                f"{self.baseline_value:.3g} dB, improvement {self.improvement_db:.3g} dB, "
                f"{self.layout!r})")


@dataclass(frozen=True, eq=False)
class SeatResult:
    """Outcome of :func:`optimise_seats`.

    Attributes
    ----------
    objective : Objective
    seats : (n_seats,) int array
        Indices of the chosen seats in the candidate seats.
    positions : (n_seats, 3) float array, m
    value : float
        Objective of the chosen seats, dB.
    baseline : (n_b,) int array
        Indices of the baseline seats (the user's, or the first n_seats).
    baseline_value : float
    frequencies : (n_f,) float array, Hz
    spl : (n_f, n_seats) float array, dB
        SPL at the chosen seats.
    info : mapping
    """

    objective: Objective
    seats: np.ndarray
    positions: np.ndarray
    value: float
    baseline: np.ndarray
    baseline_value: float
    frequencies: np.ndarray
    spl: np.ndarray
    info: Mapping = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("positions", "frequencies", "spl"):
            object.__setattr__(self, name, _ro(getattr(self, name)))
        for name in ("seats", "baseline"):
            object.__setattr__(self, name, _ro(getattr(self, name), np.int64))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    @property
    def improvement_db(self) -> float:
        """baseline_value - value in dB."""
        return float(self.baseline_value - self.value)


# ---------------------------------------------------------------- objectives
def _spl(p: np.ndarray) -> np.ndarray:
    a = np.abs(p)
    return 20.0 * np.log10(np.maximum(a, 1e-300) / (math.sqrt(2.0) * P_REF))


def _score(L: np.ndarray, objective: Objective, target_db) -> np.ndarray:
    """Objective of SPL arrays L (..., n_f, n_r) in dB -> (...)."""
    if objective is Objective.SPREAD:
        return L.std(axis=-1).mean(axis=-1)
    t = L.mean(axis=(-2, -1), keepdims=True) if target_db is None else target_db
    return np.sqrt(np.mean((L - t) ** 2, axis=(-2, -1)))


def layout_objective(spl, objective: str | Objective = "spread", *,
                     target_db: float | None = None) -> float:
    """Objective of a seat SPL table (module notes), in dB.

    Parameters
    ----------
    spl : (n_f, n_r) array of SPL in dB (e.g. ``Response.spl``)
    objective : {"spread", "flat"}
    target_db : float, optional (objective "flat"; default the table's mean)
    """
    obj = _enum(Objective, objective, "objective")
    L = np.asarray(spl, dtype=float)
    if L.ndim != 2 or L.size == 0:
        raise InputError(f"spl has shape {L.shape}; give an (n_f, n_r) table of dB values.")
    if target_db is not None:
        target_db = _finite_real("target_db", target_db, "give a level in dB, e.g. 85")
    return float(_score(L, obj, target_db))


# ---------------------------------------------------------------- validation
def _band(band) -> tuple[float, float]:
    try:
        lo, hi = band
    except (TypeError, ValueError):
        raise InputError(f"band={band!r} must be (f_low, f_high) in Hz, e.g. (20, 100).") from None
    lo = _finite_real("band low edge", lo, "give (f_low, f_high) in Hz, e.g. (20, 100)")
    hi = _finite_real("band high edge", hi, "give (f_low, f_high) in Hz, e.g. (20, 100)")
    if lo <= 0:
        raise InputError(f"band=({lo:g}, {hi:g}) Hz: the low edge must be > 0 Hz (the response "
                         "of a closed room at 0 Hz is not finite); e.g. (20, 100).")
    if hi <= lo:
        raise InputError(f"band=({lo:g}, {hi:g}) Hz: the high edge must exceed the low edge.")
    return lo, hi


def _count(name, value, lo, hi=None, fix=""):
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < lo \
            or (hi is not None and value > hi):
        rng = f">= {lo}" if hi is None else f"between {lo} and {hi}"
        raise InputError(f"{name}={value!r} must be a whole number {rng}{fix}.")
    return int(value)


def _frequencies(band, n_frequencies):
    lo, hi = _band(band)
    n = _count("n_frequencies", n_frequencies, 2, fix=" (frequencies sampled in the band)")
    return np.geomspace(lo, hi, n)


# ------------------------------------------------------- transfer functions
#: Frequencies sampled during the refinement rounds (the whole band is checked at the end).
_ROUND_SAMPLE = 24
#: Sources whose residual vectors are added at each picked frequency.
_SOURCES_PER_PICK = 4

def _basis_modes(pb, mesh, order, modes, modal_factor):
    """Real rigid/pressure-release modes for the reduced model: None or a Modes."""
    from .modes import Modes

    if modes is not None and not isinstance(modes, Modes):
        raise InputError(f"modes={modes!r} must be None or a Modes of this mesh "
                         "(absorbing walls as rigid).")
    return _response_basis_modes(pb, mesh, order, modes, modal_factor)


def _reduced_all(red: _Reduced, pb: _Problem, idx: np.ndarray, chunk_bytes=64e6) -> np.ndarray:
    """Reduced coordinates (len(idx), m, n_s) of every unit source at frequency indices idx."""
    m, n_s = red.m, pb.E_src.shape[0]
    out = np.empty((len(idx), m, n_s), complex)
    step = max(1, int(chunk_bytes // (16 * m * (m + n_s))))
    diag = np.arange(m)
    nw = len(red.Br)
    Bflat = np.stack(red.Br).reshape(nw, m * m) if nw else None
    for s in range(0, len(idx), step):  # frequency chunks, each one batched solve
        ii = idx[s: s + step]
        k = pb.k[ii]
        A = np.empty((len(ii), m, m), complex)
        if nw:
            coef = (1j * k)[:, None] * pb.beta[:, ii].T
            A.real = (coef.real @ Bflat).reshape(len(ii), m, m) + red.Kr[None]
            A.imag = (coef.imag @ Bflat).reshape(len(ii), m, m)
        else:
            A[:] = red.Kr[None]
        A[:, diag, diag] -= (k**2)[:, None]
        F = pb.fscale[ii, None, None] * red.Sr.T[None]  # (c, m, n_s): unit Q per source
        out[s: s + step] = np.linalg.solve(A, F)
    return out


def _wall_groups(pb):
    """Walls of identical admittance at every frequency merged: [(beta (n_f,), B)]."""
    groups = []
    for b, B in zip(pb.beta, pb.B):
        for j, (b0, B0) in enumerate(groups):
            if np.array_equal(b0, b):
                groups[j] = (b0, B0 + B)
                break
        else:
            groups.append((b, B))
    return [(b, B.tocsr()) for b, B in groups]


def _residuals_all(red, pb, a, idx, src_norm, groups, chunk_bytes=128e6):
    """Relative full-system residuals (len(idx), n_s) of every unit source's p = V a."""
    n_s = a.shape[2]
    V = red.V
    E = pb.E_src.tocoo()  # (n_s, n) unit forces without iωρ: sparse rows
    out = np.empty((len(idx), n_s))
    step = max(1, int(chunk_bytes // (16 * 3 * pb.n * n_s)))
    for s in range(0, len(idx), step):  # frequency chunks
        ii = idx[s: s + step]
        c = len(ii)
        P = V @ a[s: s + step].transpose(1, 0, 2).reshape(red.m, c * n_s)  # (n, c*n_s)
        k = np.repeat(pb.k[ii], n_s)
        R = pb.K @ P
        R -= (pb.M @ P) * (k**2)[None, :]
        for b, B in groups:
            R += (B @ P) * (1j * k * np.repeat(b[ii], n_s))[None, :]
        fs = np.repeat(pb.fscale[ii], n_s)
        cols = (np.arange(c)[:, None] * n_s + E.row[None, :]).ravel()  # column of (i, s)
        R[np.tile(E.col, c), cols] -= np.tile(E.data, c) * fs[cols]
        out[s: s + step] = (np.linalg.norm(R, axis=0) / (np.abs(fs) * np.tile(src_norm, c))
                            ).reshape(c, n_s)
    return out


def _residual_vectors(red, pb, pairs):
    """Full residuals (n, len(pairs)) of unit source s at frequency index i, pairs [(i, s)]."""
    ii = np.array([p[0] for p in pairs])
    ss = np.array([p[1] for p in pairs])
    a = _reduced_all(red, pb, ii)  # (len, m, n_s)
    A = a[np.arange(len(pairs)), :, ss].T  # (m, len)
    P = red.V @ A
    k = pb.k[ii]
    R = pb.K @ P - (pb.M @ P) * (k**2)[None, :]
    for b, B in zip(pb.beta, pb.B):
        R += (B @ P) * (1j * k * b[ii])[None, :]
    R -= pb.E_src.T.toarray()[:, ss] * pb.fscale[ii][None, :]
    return R


def _transfer(mesh, walls, order, air, assembly, points, seats, freqs, modes, modal_factor,
              refine, tol, backend):
    """H (n_f, n_r, n_p): seat pressure per unit volume velocity at each point; info."""
    from ._linalg import factorize

    t0 = time.perf_counter()
    srcs = [PointSource(tuple(p), 1.0) for p in points]
    pb = _Problem(mesh, walls, order, air, assembly, srcs, seats, freqs)
    md = _basis_modes(pb, mesh, order, modes, modal_factor)
    Phi = np.ascontiguousarray(md.shapes[pb.free])
    lam = np.asarray(md.eigenvalues, dtype=float)
    t_modes = time.perf_counter() - t0

    t0 = time.perf_counter()
    n_s = len(points)
    k_top = 2.0 * math.pi * float(freqs.max()) / air.c
    sigma = -((0.25 * k_top) ** 2)  # the shift of response._solve_modal (measured there)
    fac = factorize((pb.K - sigma * pb.M).tocsc(), definite=True, backend=backend)
    red = _Reduced(pb, Phi, lam, capacity=lam.size + 2 * n_s
                   + 2 * _N_PICK * _SOURCES_PER_PICK * refine)
    Z1 = fac.solve(pb.E_src.T.toarray())
    n_static = red.extend(np.hstack([Z1, fac.solve(pb.M @ Z1)]))
    groups = _wall_groups(pb)
    src_norm = np.sqrt(np.asarray(pb.E_src.multiply(pb.E_src).sum(axis=1)).ravel())
    src_norm = np.where(src_norm > 0, src_norm, 1.0)
    all_idx = np.arange(freqs.size)
    sample = all_idx if freqs.size <= _ROUND_SAMPLE else np.unique(
        np.round(np.linspace(0, freqs.size - 1, _ROUND_SAMPLE)).astype(np.int64))
    rounds = 0
    while True:
        a = _reduced_all(red, pb, sample)
        res = _residuals_all(red, pb, a, sample, src_norm, groups)
        worst = res.max(axis=1)  # per frequency, over sources
        if worst.max() <= tol or rounds >= refine:
            if sample.size < all_idx.size:
                a = _reduced_all(red, pb, all_idx)
                res = _residuals_all(red, pb, a, all_idx, src_norm, groups)
                worst = res.max(axis=1)
                if worst.max() > tol and rounds < refine:
                    new = np.setdiff1d(all_idx[worst > tol], sample)
                    sample = np.union1d(sample, new) if new.size else all_idx
                    continue
            break
        pick = _pick(worst, tol, _N_PICK)  # one frequency per band of the sweep
        # at each picked frequency, the sources of largest residual
        pairs = [(int(sample[j]), int(s)) for j in pick
                 for s in np.argsort(res[j])[::-1][:_SOURCES_PER_PICK] if res[j, s] > tol]
        R = _residual_vectors(red, pb, pairs)
        added = red.extend(fac.solve(np.hstack([R.real, R.imag])))
        rounds += 1
        if added == 0:
            if sample.size < all_idx.size:
                a = _reduced_all(red, pb, all_idx)
                res = _residuals_all(red, pb, a, all_idx, src_norm, groups)
            break
    H = np.einsum("rm,fms->frs", red.Rr, a)
    max_res = float(res.max())
    if max_res > tol:
        warnings.warn(
            f"placement transfer functions: the largest relative residual is {max_res:.2g} "
            f"after {rounds} refinement rounds (tol {tol:g}); raise refine= or modal_factor=.",
            stacklevel=3,
        )
    info = dict(n_modes=int(lam.size), n_basis=int(red.m), n_static_corrections=int(n_static),
                refine_rounds=rounds, max_residual=max_res, tol=tol,
                n_dofs=int(pb.assembly.n_dofs), modes_seconds=t_modes,
                transfer_seconds=time.perf_counter() - t0, factor_backend=fac.backend)
    return H, info


# -------------------------------------------------------------------- search
def _subsets_exhaustive(T, k, objective, target_db, chunk_bytes=64e6):
    """Best subset of k columns of T (n_f, n_r, n) summed (unit weights); (best, value, n)."""
    n_f, n_r, n = T.shape
    combos = np.array(list(itertools.combinations(range(n), k)), dtype=np.int64)
    step = max(1, int(chunk_bytes // (16 * n_f * n_r * k)))
    vals = np.empty(len(combos))
    for s in range(0, len(combos), step):  # chunks of combinations, each vectorised
        c = combos[s: s + step]
        P = T[:, :, c].sum(axis=-1)  # (n_f, n_r, b)
        vals[s: s + step] = _score(_spl(P).transpose(2, 0, 1), objective, target_db)
    vals = np.where(np.isfinite(vals), vals, np.inf)
    order = np.argsort(vals, kind="stable")
    return combos[order], vals[order], len(combos)


def _subsets_greedy(T, k, objective, target_db):
    """Greedy build-up then coordinate descent over k of n columns; (sets, values, n_scored)."""
    n = T.shape[2]
    chosen: list[int] = []
    scored = 0
    acc = np.zeros(T.shape[:2], complex)
    for _ in range(k):  # add one source at a time
        rest = np.array([c for c in range(n) if c not in chosen])
        P = acc[:, :, None] + T[:, :, rest]
        v = _score(_spl(P).transpose(2, 0, 1), objective, target_db)
        scored += len(rest)
        j = int(rest[np.argmin(np.where(np.isfinite(v), v, np.inf))])
        chosen.append(j)
        acc = acc + T[:, :, j]
    best = float(_score(_spl(acc), objective, target_db))
    improved = True
    while improved:  # coordinate descent: swap one source for another candidate
        improved = False
        for pos in range(k):
            others = [c for i, c in enumerate(chosen) if i != pos]
            base = T[:, :, others].sum(axis=-1)
            rest = np.array([c for c in range(n) if c not in chosen])
            if rest.size == 0:
                continue
            v = _score(_spl(base[:, :, None] + T[:, :, rest]).transpose(2, 0, 1), objective,
                       target_db)
            scored += len(rest)
            v = np.where(np.isfinite(v), v, np.inf)
            j = int(np.argmin(v))
            if v[j] < best - 1e-12:
                chosen[pos] = int(rest[j])
                best = float(v[j])
                improved = True
    return np.array([sorted(chosen)]), np.array([best]), scored


def _layout_pressure(Hs, w, gains, delays):
    """(n_f, n_r) pressure of sources with transfer Hs (n_f, n_r, n), angular w (n_f,)."""
    ph = gains[None, :] * np.exp(-1j * w[:, None] * delays[None, :])  # (n_f, n)
    return np.einsum("frn,fn->fr", Hs, ph)


def _value_and_gradient(Hs, w, g, d, objective, target_db):
    """Objective of gains g (n,) and delays d (n,) and its gradient (dJ/dg, dJ/dd).

    p = Σ_j g_j e^{-iωτ_j} H_j, L = 10 log10|p|² + const, so
    dL/dx = (20/ln 10) Re(conj(p) ∂p/∂x)/|p|² with ∂p/∂g_j = e^{-iωτ_j} H_j and
    ∂p/∂τ_j = -iω g_j e^{-iωτ_j} H_j.  "spread": dJ/dL = (L - mean_r L)/(n_f n_r std_r L);
    "flat": dJ/dL = (L - T)/(n_f n_r J) (with T the mean level the T-term
    cancels since Σ(L - T) = 0).
    """
    e = np.exp(-1j * w[:, None] * d[None, :])  # (n_f, n)
    G = Hs * e[:, None, :]  # (n_f, n_r, n): ∂p/∂g_j
    p = G @ g  # (n_f, n_r)
    L = _spl(p)
    n_f, n_r = L.shape
    if objective is Objective.SPREAD:
        sd = L.std(axis=1)
        v = float(sd.mean())
        with np.errstate(divide="ignore", invalid="ignore"):
            dJ = (L - L.mean(axis=1, keepdims=True)) / (n_f * n_r * sd[:, None])
        dJ = np.where(sd[:, None] > 0, dJ, 0.0)
    else:
        t = L.mean() if target_db is None else target_db
        v = float(np.sqrt(np.mean((L - t) ** 2)))
        dJ = (L - t) / (n_f * n_r * v) if v > 0 else np.zeros_like(L)
    c = (20.0 / math.log(10.0)) * dJ / np.maximum(np.abs(p) ** 2, 1e-300)  # (n_f, n_r)
    W = c[:, :, None] * np.conj(p)[:, :, None] * G  # (n_f, n_r, n)
    dg = np.einsum("frn->n", W).real
    dd = (np.einsum("frn,f->n", W, -1j * w) * g).real
    return v, dg, dd


def _polish(Hs, w, objective, target_db, gain_range, max_delay, use_gains, use_delays, rng,
            n_starts):
    """L-BFGS-B on gains/delays of one position set; (gains, delays, value, n_evaluations)."""
    from scipy.optimize import minimize

    n = Hs.shape[2]
    g0, d0 = np.ones(n), np.zeros(n)
    n_evals = [0]

    # delays are optimised in units of max_delay (gains and delays then both
    # range over O(1) and L-BFGS-B's steps suit both)
    scale = max_delay if max_delay > 0 else 1.0

    def split(x):
        g = np.asarray(x[:n]) if use_gains else g0
        d = scale * np.asarray(x[n:] if use_gains else x) if use_delays else d0
        return g, d

    def fun(x):
        n_evals[0] += 1
        g, d = split(x)
        if not np.any(g > 0):  # silent
            return 1e6, np.zeros(len(x))
        v, dg, dd = _value_and_gradient(Hs, w, g, d, objective, target_db)
        grad = np.concatenate([dg if use_gains else [], scale * dd if use_delays else []])
        if not (math.isfinite(v) and np.all(np.isfinite(grad))):
            return 1e6, np.zeros(len(x))
        return v, grad

    bounds = ([gain_range] * n if use_gains else []) + ([(0.0, max_delay / scale)] * n
                                                         if use_delays else [])
    x_unit = np.concatenate([np.ones(n if use_gains else 0), np.zeros(n if use_delays else 0)])
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    starts = [x_unit] + [lo + (hi - lo) * rng.random(len(bounds))  # seeded random starts
                         for _ in range(n_starts)]
    best_x, best_v = x_unit, fun(x_unit)[0]
    for x0 in starts:
        r = minimize(fun, x0, jac=True, method="L-BFGS-B", bounds=bounds,
                     options=dict(maxiter=200))
        if r.fun < best_v - 1e-12:
            best_x, best_v = np.asarray(r.x), float(r.fun)
    g, d = split(best_x)
    g, d = np.array(g, float), np.array(d, float)
    # |p| does not change with a common delay, and without a fixed target
    # the objectives do not change with a common gain factor either: report
    # the smallest delay as 0 and then the largest gain as g_max
    d = d - d.min()
    if use_gains and (objective is Objective.SPREAD or target_db is None):
        g = g * (gain_range[1] / g.max())
    v = float(_score(_spl(_layout_pressure(Hs, w, g, d)), objective, target_db))
    return g, d, v, n_evals[0]


# -------------------------------------------------------------------- public
def _baseline_layout(baseline, n_sources, cand):
    """(positions (n_b, 3), gains, delays, candidate index or -1) of the baseline."""
    if baseline is None:
        idx = np.arange(n_sources)
        return cand[idx], np.ones(n_sources), np.zeros(n_sources), idx
    if isinstance(baseline, PointSource):
        baseline = [baseline]
    if isinstance(baseline, SourceLayout):
        return baseline.positions, baseline.gains, baseline.delays, baseline.candidates
    items = list(baseline) if not isinstance(baseline, np.ndarray) else None
    if items and all(isinstance(s, PointSource) for s in items):
        pos = np.array([s.position for s in items])
        return pos, np.array([s.gain for s in items]), np.array([s.delay for s in items]), \
            np.full(len(items), -1)
    if items is not None and any(isinstance(s, PointSource) for s in items):
        raise InputError("baseline mixes PointSource objects and coordinates; give one kind.")
    pos = _points3("baseline", baseline)
    return pos, np.ones(len(pos)), np.zeros(len(pos)), np.full(len(pos), -1)


def optimise_placement(
    mesh: Mesh,
    walls: Mapping[str, Wall] | None = None,
    *,
    candidates,
    seats,
    n_sources: int,
    band=(20.0, 100.0),
    n_frequencies: int = 41,
    objective: str | Objective = "spread",
    target_db: float | None = None,
    gains: bool = True,
    delays: bool = True,
    gain_range=(0.0, 1.0),
    max_delay: float | None = None,
    baseline=None,
    volume_velocity: complex = 1e-3,
    max_exhaustive: int = 20000,
    n_polish: int = 3,
    n_starts: int = 4,
    seed: int = 0,
    order: int = 2,
    air: Air | None = None,
    modes=None,
    modal_factor: float = 1.5,
    refine: int = 20,
    tol: float = 1e-3,
    verify: bool = False,
    assembly: Assembly | None = None,
    backend: str = "auto",
) -> PlacementResult:
    """Choose source positions (and gains, delays) for even low-frequency seat coverage.

    Method, objectives and assumptions in the module notes.

    Parameters
    ----------
    mesh : Mesh
    walls : mapping surface name -> wall, optional (unnamed surfaces rigid)
        Give some absorption (:class:`Impedance`) so responses are finite.
    candidates : (n_c, 3) array of candidate source positions, m
    seats : (n_r, 3) array of seat (receiver) positions, m (n_r >= 2 for "spread")
    n_sources : int, 1 <= n_sources <= n_c
    band : (f_low, f_high) in Hz, 0 < f_low < f_high
    n_frequencies : int >= 2, log-spaced samples of the band
    objective : {"spread", "flat"} or Objective
    target_db : float, optional
        Flat target of objective "flat" (dB re 20 µPa); default: the layout's
        own mean level.
    gains, delays : bool
        Optimise per-source gains / delays after the position search.
    gain_range : (g_min, g_max), 0 <= g_min <= 1 <= g_max, g_min < g_max
    max_delay : float, s (default one period of the band's low edge)
    baseline : None, (n_b, 3) positions, PointSource list or SourceLayout
        Layout to compare with (its positions, gains and delays; every
        source radiates ``volume_velocity`` before its gain); default the
        first ``n_sources`` candidates with unit gains and no delays.
    volume_velocity : complex, m³/s
        Q of every source before its gain (matters only with ``target_db``).
    max_exhaustive : int
        Score every combination when there are at most this many; else
        greedy + coordinate descent.
    n_polish, n_starts, seed : int
        Position sets given the continuous step, random starts per set, seed.
    modes : None or Modes
        A :class:`Modes` of this mesh and order with absorbing walls taken as
        rigid, to reuse; None computes them (up to ``modal_factor`` x f_high).
    order, air, modal_factor, refine, tol, assembly, backend
        As for ``solve_response(method="modal")``; ``tol`` applies to every
        source's residual.
    verify : bool
        Also solve the chosen and baseline layouts directly
        (``solve_response(method="direct")``) and put their objectives in
        ``info``.

    Returns
    -------
    PlacementResult
        ``layout`` (positions (n_sources, 3), gains, delays), ``value``,
        ``baseline_value``, ``improvement_db``, ``spl`` (n_f, n_r), ``info``.
    """
    t_start = time.perf_counter()
    if not isinstance(mesh, Mesh):
        raise InputError(f"optimise_placement needs an acoustic_fem Mesh, got "
                         f"{type(mesh).__name__}.")
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(f"order={order!r} is not supported: use 1 (linear) or 2 (quadratic).")
    air = Air() if air is None else air
    if not isinstance(air, Air):
        raise InputError(f"air must be an acoustic_fem Air, got {air!r}.")
    obj = _enum(Objective, objective, "objective")
    freqs = _frequencies(band, n_frequencies)
    cand = _points3("candidates", candidates)
    seat_pts = _points3("seats", seats)
    n_c = len(cand)
    n_sources = _count("n_sources", n_sources, 1, fix="")
    if n_sources > n_c:
        raise InputError(f"n_sources={n_sources} exceeds the {n_c} candidate position(s); "
                         "give more candidates or fewer sources.")
    if obj is Objective.SPREAD and len(seat_pts) < 2:
        raise InputError("objective 'spread' needs at least 2 seats (the spread across one "
                         "seat is 0); give more seats or use objective='flat'.")
    if target_db is not None:
        target_db = _finite_real("target_db", target_db, "give a level in dB, e.g. 85")
    for name, v in (("gains", gains), ("delays", delays), ("verify", verify)):
        if not isinstance(v, (bool, np.bool_)):
            raise InputError(f"{name}={v!r} must be True or False.")
    try:
        g_lo, g_hi = (float(g) for g in gain_range)
    except (TypeError, ValueError):
        raise InputError(f"gain_range={gain_range!r} must be (g_min, g_max), e.g. (0, 1)."
                         ) from None
    if not (math.isfinite(g_lo) and math.isfinite(g_hi) and 0 <= g_lo <= 1.0 <= g_hi
            and g_lo < g_hi):
        raise InputError(f"gain_range={gain_range!r} must satisfy 0 <= g_min <= 1 <= g_max, "
                         "g_min < g_max (the position search uses unit gains), e.g. (0, 1).")
    max_delay = 1.0 / freqs[0] if max_delay is None else _finite_real(
        "max_delay", max_delay, "give the longest delay in s, e.g. 0.02")
    if max_delay < 0:
        raise InputError(f"max_delay={max_delay!r} s must be >= 0.")
    q = volume_velocity
    if isinstance(q, bool) or not isinstance(q, numbers.Number) or q == 0 \
            or not math.isfinite(abs(complex(q))):
        raise InputError(f"volume_velocity={q!r} must be a non-zero finite number in m³/s.")
    q = complex(q)
    max_exhaustive = _count("max_exhaustive", max_exhaustive, 1)
    refine = _count("refine", refine, 0, fix=" (rounds of residual corrections, e.g. 20)")
    tol = _finite_real("tol", tol, "e.g. 1e-3")
    if tol <= 0:
        raise InputError(f"tol={tol!r} must be positive (a relative residual, e.g. 1e-3).")
    modal_factor = _finite_real("modal_factor", modal_factor, "e.g. 1.5")
    if modal_factor <= 1.0:
        raise InputError(f"modal_factor={modal_factor!r} must exceed 1 (modes above the top "
                         "frequency are needed).")
    n_polish = _count("n_polish", n_polish, 0)
    n_starts = _count("n_starts", n_starts, 0)
    seed = _count("seed", seed, 0)
    full_walls = resolve_walls(mesh, walls)
    b_pos, b_g, b_d, b_c = _baseline_layout(baseline, n_sources, cand)
    if np.any(b_d < 0) or not (np.all(np.isfinite(b_g)) and np.all(np.isfinite(b_d))):
        raise InputError("baseline gains and delays must be finite and delays >= 0.")
    # positions outside the enclosure: the checks of solve_response, with our names
    from .assembly import assemble

    if assembly is None:
        assembly = assemble(mesh, order)
    elif not isinstance(assembly, Assembly) or assembly.dofs.mesh is not mesh \
            or assembly.order != order:
        raise InputError("the assembly given was made for another mesh or element order.")
    _evaluation(mesh, assembly.dofs, cand, "candidate")
    _evaluation(mesh, assembly.dofs, seat_pts, "seat")
    _evaluation(mesh, assembly.dofs, b_pos, "baseline source")
    _warn_resolution(mesh, order, air, float(freqs.max()))

    # transfer functions of candidates and baseline positions not among them
    extra = np.flatnonzero(b_c < 0)
    points = np.vstack([cand, b_pos[extra]])
    H, tinfo = _transfer(mesh, full_walls, order, air, assembly, points, seat_pts, freqs,
                         modes, modal_factor, refine, tol, backend)
    H = H * q
    w = 2.0 * math.pi * freqs
    b_cols = b_c.copy()
    b_cols[extra] = n_c + np.arange(extra.size)
    Hc = H[:, :, :n_c]

    t0 = time.perf_counter()
    n_combos = math.comb(n_c, n_sources)
    if n_combos <= max_exhaustive:
        sets, vals, n_scored = _subsets_exhaustive(Hc, n_sources, obj, target_db)
        search = "exhaustive"
    else:
        sets, vals, n_scored = _subsets_greedy(Hc, n_sources, obj, target_db)
        search = "greedy + coordinate descent"
    best_set, best_val = sets[0], float(vals[0])
    best_g, best_d = np.ones(n_sources), np.zeros(n_sources)
    n_evals = 0
    if (gains or delays) and n_polish > 0:
        rng = np.random.default_rng(seed)
        for s_i in range(min(n_polish, len(sets))):  # the best position sets
            g, d, v, ne = _polish(Hc[:, :, sets[s_i]], w, obj, target_db, (g_lo, g_hi),
                                  max_delay, bool(gains), bool(delays), rng, n_starts)
            n_evals += ne
            if v < best_val - 1e-12:
                best_set, best_val, best_g, best_d = sets[s_i], v, g, d
    t_search = time.perf_counter() - t0

    layout = SourceLayout(cand[best_set], best_g, best_d, best_set)
    spl = _spl(_layout_pressure(Hc[:, :, best_set], w, best_g, best_d))
    b_spl = _spl(_layout_pressure(H[:, :, b_cols], w, b_g, b_d))
    b_layout = SourceLayout(b_pos, b_g, b_d, b_c)
    value = float(_score(spl, obj, target_db))
    b_value = float(_score(b_spl, obj, target_db))
    info = dict(tinfo, n_candidates=n_c, n_position_sets=n_combos, n_layouts_scored=n_scored,
                n_continuous_evaluations=n_evals, search=search, seed=seed,
                search_seconds=t_search)
    if verify:
        for key, lay in (("direct_value", layout), ("direct_baseline_value", b_layout)):
            r = solve_response(mesh, full_walls, sources=lay.sources(q), receivers=seat_pts,
                               frequencies=freqs, order=order, air=air, method="direct",
                               assembly=assembly)
            info[key] = float(_score(r.spl, obj, target_db))
    info["total_seconds"] = time.perf_counter() - t_start
    return PlacementResult(obj, layout, value, b_layout, b_value, freqs, seat_pts, spl, b_spl,
                           target_db, q, info)


def optimise_seats(
    mesh: Mesh,
    walls: Mapping[str, Wall] | None = None,
    *,
    sources,
    seat_candidates,
    n_seats: int,
    band=(20.0, 100.0),
    n_frequencies: int = 41,
    objective: str | Objective = "spread",
    target_db: float | None = None,
    baseline=None,
    max_exhaustive: int = 20000,
    order: int = 2,
    air: Air | None = None,
    modes=None,
    modal_factor: float = 1.5,
    tol: float = 1e-3,
    assembly: Assembly | None = None,
) -> SeatResult:
    """Choose ``n_seats`` of the candidate seats where fixed sources cover most evenly.

    The sources' field at every candidate seat is computed once by
    ``solve_response(method="modal")``; seat subsets are then scored
    exhaustively (at most ``max_exhaustive`` of them) or by greedy build-up
    and coordinate descent, by the objectives of the module notes.

    Parameters
    ----------
    mesh, walls : as for :func:`optimise_placement`
    sources : PointSource or sequence of PointSource (fixed)
    seat_candidates : (n_c, 3) array of candidate seat positions, m
    n_seats : int, 2 <= n_seats <= n_c (1 allowed for "flat")
    band, n_frequencies, objective, target_db, max_exhaustive : as for
        :func:`optimise_placement`
    baseline : None or sequence of seat indices (default the first n_seats)
    order, air, modes, modal_factor, tol, assembly : as for ``solve_response``

    Returns
    -------
    SeatResult
        ``seats`` (n_seats,) indices, ``positions`` (n_seats, 3), ``value``,
        ``baseline_value``, ``spl`` (n_f, n_seats).
    """
    t_start = time.perf_counter()
    obj = _enum(Objective, objective, "objective")
    freqs = _frequencies(band, n_frequencies)
    cand = _points3("seat_candidates", seat_candidates)
    n_c = len(cand)
    lo = 2 if obj is Objective.SPREAD else 1
    n_seats = _count("n_seats", n_seats, lo, fix=" (the spread needs 2 seats or more)"
                     if lo == 2 else "")
    if n_seats > n_c:
        raise InputError(f"n_seats={n_seats} exceeds the {n_c} candidate seat(s); give more "
                         "candidates or fewer seats.")
    if target_db is not None:
        target_db = _finite_real("target_db", target_db, "give a level in dB, e.g. 85")
    max_exhaustive = _count("max_exhaustive", max_exhaustive, 1)
    if baseline is None:
        base = np.arange(n_seats)
    else:
        base = np.asarray(baseline)
        if base.ndim != 1 or base.size < lo or not np.issubdtype(base.dtype, np.integer) \
                or base.min() < 0 or base.max() >= n_c or np.unique(base).size != base.size:
            raise InputError(f"baseline={baseline!r} must be {lo} or more distinct seat indices "
                             f"in 0..{n_c - 1}.")
    r = solve_response(mesh, walls, sources=sources, receivers=cand, frequencies=freqs,
                       order=order, air=air, method="modal", modes=modes,
                       modal_factor=modal_factor, tol=tol, assembly=assembly)
    P = np.asarray(r.pressure)  # (n_f, n_c)
    t0 = time.perf_counter()
    L = _spl(P)
    n_sets = math.comb(n_c, n_seats)
    if n_sets <= max_exhaustive:
        combos = np.array(list(itertools.combinations(range(n_c), n_seats)), dtype=np.int64)
        vals = np.empty(len(combos))
        step = max(1, int(64e6 // (8 * L.shape[0] * n_seats)))
        for s in range(0, len(combos), step):  # chunks of seat sets, each vectorised
            c = combos[s: s + step]
            vals[s: s + step] = _score(L[:, c].transpose(1, 0, 2), obj, target_db)
        j = int(np.argmin(np.where(np.isfinite(vals), vals, np.inf)))
        chosen, best, n_scored, search = combos[j], float(vals[j]), len(combos), "exhaustive"
    else:
        chosen, best, n_scored = _seats_greedy(L, n_seats, obj, target_db)
        search = "greedy + coordinate descent"
    b_val = float(_score(L[:, base], obj, target_db))
    info = dict(r.info, n_candidates=n_c, n_seat_sets=n_sets, n_sets_scored=n_scored,
                search=search, search_seconds=time.perf_counter() - t0,
                total_seconds=time.perf_counter() - t_start)
    return SeatResult(obj, np.sort(chosen), cand[np.sort(chosen)], best, base, b_val, freqs,
                      L[:, np.sort(chosen)], info)


def _seats_greedy(L, k, objective, target_db):
    """Greedy + coordinate descent over seat subsets of SPL columns L (n_f, n_c)."""
    n = L.shape[1]
    # start from the pair (or single seat) that is best, then add seats
    if k >= 2:
        pairs = np.array(list(itertools.combinations(range(n), 2)))
        v = _score(L[:, pairs].transpose(1, 0, 2), objective, target_db)
        chosen = [int(x) for x in pairs[int(np.argmin(v))]]
        scored = len(pairs)
    else:
        chosen, scored = [], 0
    while len(chosen) < k:  # add one seat at a time
        rest = np.array([c for c in range(n) if c not in chosen])
        sets = np.column_stack([np.tile(chosen, (len(rest), 1)), rest]) if chosen else rest[:, None]
        v = _score(L[:, sets].transpose(1, 0, 2), objective, target_db)
        scored += len(rest)
        chosen.append(int(rest[int(np.argmin(v))]))
    best = float(_score(L[:, chosen], objective, target_db))
    improved = True
    while improved:  # swap one seat for another candidate
        improved = False
        for pos in range(k):
            rest = np.array([c for c in range(n) if c not in chosen])
            if rest.size == 0:
                continue
            sets = np.tile(chosen, (len(rest), 1))
            sets[:, pos] = rest
            v = _score(L[:, sets].transpose(1, 0, 2), objective, target_db)
            scored += len(rest)
            j = int(np.argmin(v))
            if v[j] < best - 1e-12:
                chosen[pos], best, improved = int(rest[j]), float(v[j]), True
    return np.array(chosen), best, scored
