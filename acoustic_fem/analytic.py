"""Closed-form acoustic eigenmodes of simple enclosures.

These are the reference solutions against which the finite-element results of
``acoustic_fem`` are checked.  Every function takes the speed of sound ``c``
(m/s) as a required keyword and returns natural frequencies in Hz.

Functions
---------
box_modes
    Rectangular tube (1D), rectangle (2D) or box (3D) with each face rigid or
    pressure-release (Morse & Ingard, *Theoretical Acoustics*, 1968, §9.4).
tube_modes
    1D tube with rigid or pressure-release ends (Kinsler, Frey, Coppens &
    Sanders, *Fundamentals of Acoustics*, 4th ed., 2000, §10.2).
duct_2d_modes
    2D duct rigid at x=0, y=0, y=H and pressure-release at x=L.
cylinder_modes
    Rigid closed circular cylinder, or a rigid circular disc cavity in 2D
    (zeros of J_m', Abramowitz & Stegun 1964, §9.5, Table 9.5).
sphere_modes
    Rigid sphere (zeros of the derivative of the spherical Bessel function
    j_l, Abramowitz & Stegun 1964, §10.1).

Conventions
-----------
Degenerate modes (the cos/sin partners of a cylinder mode with m > 0, the
2l+1 copies of a sphere mode) are returned as separate entries so that the
multiplicities match an FEM eigenvalue list.  Results are sorted by
frequency; frequencies equal to within a relative 1e-12 are treated as ties
and ordered by their index tuple, so the output is deterministic.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Optional

import numpy as np
from scipy import special

from ._errors import InputError

__all__ = [
    "BoxModes",
    "CylinderModes",
    "SphereModes",
    "box_modes",
    "tube_modes",
    "duct_2d_modes",
    "cylinder_modes",
    "sphere_modes",
    "spherical_jn_derivative_zeros",
]

RIGID = "rigid"
PRESSURE_RELEASE = "pressure_release"
_CONDITIONS = (RIGID, PRESSURE_RELEASE)
_AXES = "xyz"

#: Relative tolerance with which ``f <= fmax`` is tested, and with which two
#: frequencies are considered tied.
_REL_TOL = 1e-12
#: Largest index grid / mode list built in one go, to fail with a clear
#: message instead of exhausting memory.
_MAX_CANDIDATES = 20_000_000


# --------------------------------------------------------------------------
# input checking
# --------------------------------------------------------------------------
def _is_real_number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, (bool, np.bool_))


def _positive(name: str, value, unit: str, hint: str) -> float:
    if not _is_real_number(value) or not math.isfinite(float(value)) or float(value) <= 0.0:
        raise InputError(
            f"{name} must be a positive finite number in {unit}; got {value!r}. {hint}"
        )
    return float(value)


def _speed_of_sound(c) -> float:
    return _positive(
        "speed of sound c",
        c,
        "m/s",
        "Pass it explicitly, e.g. c=343.0 for air at about 20 °C (common practice).",
    )


def _length(name: str, value) -> float:
    return _positive(name, value, "metres", f"Give {name} as a length > 0 in metres.")


def _select(fmax, count) -> tuple[Optional[float], Optional[int]]:
    """Check that exactly one of fmax / count is given and that it is valid."""
    if (fmax is None) == (count is None):
        raise InputError(
            "exactly one of fmax and count must be given; got "
            f"fmax={fmax!r}, count={count!r}. Pass fmax=<Hz> for every mode up to a "
            "frequency, or count=<int> for the lowest modes."
        )
    if fmax is not None:
        if not _is_real_number(fmax) or not math.isfinite(float(fmax)) or float(fmax) < 0.0:
            raise InputError(
                f"fmax must be a finite frequency >= 0 in Hz; got {fmax!r}. "
                "Pass e.g. fmax=500.0."
            )
        return float(fmax), None
    return None, _count(count)


def _count(count) -> int:
    if (
        not isinstance(count, numbers.Integral)
        or isinstance(count, (bool, np.bool_))
        or int(count) < 1
    ):
        raise InputError(
            f"count must be a positive integer (number of modes); got {count!r}. "
            "Pass e.g. count=10."
        )
    count = int(count)
    if count > _MAX_CANDIDATES:
        raise InputError(
            f"count={count} is too large (limit {_MAX_CANDIDATES}); ask for fewer modes."
        )
    return count


def _condition(name: str, value) -> str:
    if not isinstance(value, str) or value not in _CONDITIONS:
        raise InputError(
            f"unknown boundary condition {value!r} for {name}; use one of "
            f"{', '.join(repr(c) for c in _CONDITIONS)}."
        )
    return value


def _check_budget(n: int, what: str) -> None:
    if n > _MAX_CANDIDATES:
        raise InputError(
            f"{what} would need {n} candidate modes (limit {_MAX_CANDIDATES}); "
            "lower fmax or count."
        )


# --------------------------------------------------------------------------
# ordering helpers
# --------------------------------------------------------------------------
def _tie_order(frequencies: np.ndarray, keys: Sequence[np.ndarray]) -> np.ndarray:
    """Permutation sorting by frequency, ties (rel. 1e-12) by ``keys`` in order.

    frequencies : (n,) ; keys : sequence of (n,) arrays, most significant first.
    Returns an (n,) integer permutation.
    """
    n = frequencies.shape[0]
    if n == 0:
        return np.zeros(0, dtype=np.intp)
    first = np.argsort(frequencies, kind="stable")
    fs = frequencies[first]
    gap = np.diff(fs) > _REL_TOL * np.maximum(np.abs(fs[1:]), 1e-300)
    cluster = np.empty(n, dtype=np.intp)
    cluster[first] = np.concatenate(([0], np.cumsum(gap)))
    # np.lexsort: last key is the primary one.
    return np.lexsort(tuple(reversed([cluster, *keys])))


def _lowest(enumerate_upto, count: int, f_guess: float):
    """Run ``enumerate_upto(f)`` with growing f until it holds ``count`` modes.

    ``enumerate_upto(f)`` must return (frequencies (n,), payload) holding
    *every* mode with frequency <= f, already sorted.  The count-th frequency
    is required to lie clearly below f so that no tie partner of it can be
    missing.  Returns the (frequencies, payload) of the last call.
    """
    f = max(float(f_guess), 1e-300)
    for _ in range(200):
        freqs, payload = enumerate_upto(f)
        if freqs.shape[0] >= count and freqs[count - 1] <= f * (1.0 - 1e-9):
            return freqs, payload
        f *= 1.5
    raise InputError(  # pragma: no cover - only reachable with absurd inputs
        f"could not find {count} modes; the sizes and count look inconsistent."
    )


def _readonly(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


# --------------------------------------------------------------------------
# rectangular box
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class BoxModes:
    """Modes of a rectangular tube / rectangle / box (1, 2 or 3 dimensions).

    Attributes
    ----------
    size : (dim,) float
        Edge lengths Lx[, Ly[, Lz]] in metres.
    conditions : tuple of dim pairs of str
        ``(condition at 0, condition at L)`` per axis, each "rigid" or
        "pressure_release".
    frequencies : (n,) float
        Natural frequencies in Hz, ascending.
    indices : (n, dim) int
        Mode indices n_x[, n_y[, n_z]] as used in :func:`box_modes`.
    wavenumbers : (n, dim) float
        Per-axis wavenumbers k_x[, k_y[, k_z]] in rad/m.
    kind : (n,) str
        "uniform" (the 0 Hz mode), "axial", "tangential" or "oblique": one,
        two or three nonzero wavenumber components (Morse & Ingard 1968, §9.4).
    """

    size: np.ndarray
    conditions: tuple
    frequencies: np.ndarray
    indices: np.ndarray
    wavenumbers: np.ndarray
    kind: np.ndarray

    @property
    def dim(self) -> int:
        """Number of space dimensions (1, 2 or 3)."""
        return int(self.size.shape[0])

    def __len__(self) -> int:
        return int(self.frequencies.shape[0])

    def shape(self, points) -> np.ndarray:
        """Unnormalised analytic mode shapes at ``points``.

        Parameters
        ----------
        points : (n_points, 3) array_like
            Points as rows; only the first ``dim`` columns are used, so
            (n_points, dim) is accepted too.

        Returns
        -------
        (n_points, n_modes) float
            Product over axes of cos(k x) (axis rigid at 0) or sin(k x) (axis
            pressure-release at 0), with the per-axis k of each mode.
        """
        p = np.asarray(points, dtype=float)
        if p.ndim != 2 or p.shape[1] < self.dim:
            raise InputError(
                f"points must be a 2-D array of rows (n_points, 3) with at least "
                f"{self.dim} columns; got shape {p.shape}. Pass e.g. "
                "np.array([[x, y, z], ...])."
            )
        if not np.all(np.isfinite(p[:, : self.dim])):
            raise InputError("points contain NaN or infinite coordinates; pass finite values.")
        out = np.ones((p.shape[0], len(self)), dtype=float)
        for axis in range(self.dim):
            arg = p[:, axis, None] * self.wavenumbers[None, :, axis]
            if self.conditions[axis][0] == RIGID:
                out *= np.cos(arg)
            else:
                out *= np.sin(arg)
        return out


def _axis_conditions(dim: int, walls) -> tuple:
    names = [f"{_AXES[a]}{e}" for a in range(dim) for e in (0, 1)]
    if walls is None:
        walls = {}
    if not isinstance(walls, Mapping):
        raise InputError(
            f"walls must be a mapping from face name to condition; got {walls!r}. "
            'Pass e.g. walls={"x1": "pressure_release"}.'
        )
    for key, value in walls.items():
        if key not in names:
            raise InputError(
                f"unknown wall name {key!r} for a {dim}-D box; allowed names are "
                f"{', '.join(names)} (x0 is the face x = 0, x1 the face x = Lx, ...)."
            )
        _condition(f"wall {key!r}", value)
    return tuple(
        (walls.get(f"{_AXES[a]}0", RIGID), walls.get(f"{_AXES[a]}1", RIGID))
        for a in range(dim)
    )


def _axis_k(n: np.ndarray, length: float, cond: tuple) -> np.ndarray:
    """Wavenumber (rad/m) for index array n on an axis with end conditions cond."""
    if cond[0] == cond[1]:
        return n * (math.pi / length)
    return (2 * n + 1) * (math.pi / (2.0 * length))


def _axis_index_range(k_max: float, length: float, cond: tuple) -> np.ndarray:
    """All indices n on one axis whose wavenumber is <= k_max (1-D int array)."""
    if cond[0] == cond[1]:
        top = math.floor(k_max * length / math.pi)
    else:
        top = math.floor((k_max * 2.0 * length / math.pi - 1.0) / 2.0)
    start = 1 if cond == (PRESSURE_RELEASE, PRESSURE_RELEASE) else 0
    # one spare index guards against floor() rounding; filtered out later
    return np.arange(start, max(top + 2, start), dtype=np.int64)


def _box_upto(size: np.ndarray, conds: tuple, c: float, fmax: float):
    """Every box mode with f <= fmax*(1+1e-12), sorted. Returns (f, (idx, k))."""
    dim = size.shape[0]
    limit = fmax * (1.0 + _REL_TOL)
    k_max = 2.0 * math.pi * limit / c
    ranges = [_axis_index_range(k_max, size[a], conds[a]) for a in range(dim)]
    _check_budget(int(np.prod([r.size for r in ranges], dtype=float)), "box_modes")
    grids = np.meshgrid(*ranges, indexing="ij")
    idx = np.stack([g.ravel() for g in grids], axis=1)  # (n, dim)
    k = np.stack([_axis_k(idx[:, a], size[a], conds[a]) for a in range(dim)], axis=1)
    f = c / (2.0 * math.pi) * np.sqrt(np.sum(k * k, axis=1))
    keep = f <= limit
    idx, k, f = idx[keep], k[keep], f[keep]
    order = _tie_order(f, [idx[:, a] for a in range(dim)])
    return f[order], (idx[order], k[order])


def box_modes(size, *, c, walls=None, fmax=None, count=None) -> BoxModes:
    """Natural modes of a rectangular tube, rectangle or box.

    Per axis of length L with end conditions at 0 and at L
    (Morse & Ingard, *Theoretical Acoustics*, 1968, §9.4):

    ==================  =====================  =============  ===============
    at 0 / at L         k                      n              shape
    ==================  =====================  =============  ===============
    rigid / rigid       n pi / L               0, 1, 2, ...   cos(k x)
    release / release   n pi / L               1, 2, ...      sin(k x)
    rigid / release     (2n+1) pi / (2L)       0, 1, 2, ...   cos(k x)
    release / rigid     (2n+1) pi / (2L)       0, 1, 2, ...   sin(k x)
    ==================  =====================  =============  ===============

    and ``f = c / (2 pi) * sqrt(kx**2 + ky**2 + kz**2)``.  When every axis is
    rigid/rigid the uniform 0 Hz mode (all indices 0) is included.

    Parameters
    ----------
    size : sequence of 1, 2 or 3 floats
        (Lx,), (Lx, Ly) or (Lx, Ly, Lz) in metres; the domain is
        [0, Lx] x [0, Ly] x [0, Lz].
    c : float
        Speed of sound in m/s (required keyword).
    walls : mapping, optional
        Face name -> "rigid" or "pressure_release".  Face names are "x0",
        "x1", "y0", "y1", "z0", "z1" (x0 is the face x = 0, x1 the face
        x = Lx, ...), limited to the axes present.  Missing faces are rigid.
    fmax : float, optional
        Return every mode with f <= fmax (Hz; relative tolerance 1e-12).
    count : int, optional
        Return the lowest ``count`` modes.  Exactly one of fmax / count.

    Returns
    -------
    BoxModes
        frequencies (n,), indices (n, dim), wavenumbers (n, dim), kind (n,).
    """
    arr = np.asarray(size, dtype=object) if not isinstance(size, np.ndarray) else size
    if isinstance(size, (str, bytes)) or np.ndim(arr) != 1 or not 1 <= len(arr) <= 3:
        raise InputError(
            f"size must be a sequence of 1, 2 or 3 edge lengths in metres; got {size!r}. "
            "Pass e.g. size=(5.0, 4.0, 3.0)."
        )
    dims = np.array(
        [_length(f"size[{a}] (L{_AXES[a]})", v) for a, v in enumerate(list(arr))],
        dtype=float,
    )
    c = _speed_of_sound(c)
    conds = _axis_conditions(dims.shape[0], walls)
    fmax_v, count_v = _select(fmax, count)

    if fmax_v is not None:
        f, (idx, k) = _box_upto(dims, conds, c, fmax_v)
    else:
        # Weyl-type first guess: N(f) ~ (volume of the ball part) / (cell size)
        d = dims.shape[0]
        unit_ball = (2.0, math.pi, 4.0 * math.pi / 3.0)[d - 1]
        k_guess = (count_v * (2.0**d) * math.pi**d / (unit_ball * np.prod(dims))) ** (1.0 / d)
        f_guess = c * k_guess / (2.0 * math.pi)
        f, (idx, k) = _lowest(lambda ff: _box_upto(dims, conds, c, ff), count_v, f_guess)
        f, idx, k = f[:count_v], idx[:count_v], k[:count_v]

    nonzero = np.count_nonzero(k != 0.0, axis=1)
    kind = np.array(["uniform", "axial", "tangential", "oblique"], dtype=object)[nonzero]
    return BoxModes(
        size=_readonly(dims),
        conditions=conds,
        frequencies=_readonly(f),
        indices=_readonly(idx.astype(np.int64)),
        wavenumbers=_readonly(k),
        kind=_readonly(kind.astype(str)),
    )


def tube_modes(length, *, c, ends=(RIGID, RIGID), count) -> np.ndarray:
    """Lowest natural frequencies of a 1-D tube.

    Kinsler, Frey, Coppens & Sanders, *Fundamentals of Acoustics*, 4th ed.,
    2000, §10.2: closed-closed (rigid-rigid) ``f = n c / (2L)``, n = 0, 1, ...;
    open-open (pressure_release both ends) ``f = n c / (2L)``, n = 1, 2, ...;
    closed-open ``f = (2n+1) c / (4L)``, n = 0, 1, ...

    Parameters
    ----------
    length : float
        Tube length L in metres.
    c : float
        Speed of sound in m/s (required keyword).
    ends : pair of str
        Conditions at x = 0 and x = L, each "rigid" or "pressure_release".
    count : int
        Number of frequencies to return (required keyword).

    Returns
    -------
    (count,) float
        Frequencies in Hz, ascending.
    """
    if isinstance(ends, str) or not isinstance(ends, Sequence) or len(ends) != 2:
        raise InputError(
            f"ends must be a pair (condition at x=0, condition at x=L); got {ends!r}. "
            'Pass e.g. ends=("rigid", "pressure_release").'
        )
    e0 = _condition("end x=0", ends[0])
    e1 = _condition("end x=L", ends[1])
    modes = box_modes((length,), c=c, walls={"x0": e0, "x1": e1}, count=count)
    return np.array(modes.frequencies)


def duct_2d_modes(length, height, *, c, count) -> np.ndarray:
    """Lowest frequencies of a 2-D duct, pressure-release at x = L.

    Rigid at x = 0, y = 0 and y = H; pressure-release at x = L:
    ``f = c * sqrt(((2n+1) / (4L))**2 + (m / (2H))**2)``, n, m >= 0
    (separable solution, Morse & Ingard 1968, §9.4).  Same as
    ``box_modes((length, height), c=c, walls={"x1": "pressure_release"})``.

    Parameters
    ----------
    length, height : float
        L and H in metres.
    c : float
        Speed of sound in m/s (required keyword).
    count : int
        Number of frequencies to return.

    Returns
    -------
    (count,) float
        Frequencies in Hz, ascending.
    """
    modes = box_modes(
        (length, height), c=c, walls={"x1": PRESSURE_RELEASE}, count=count
    )
    return np.array(modes.frequencies)


# --------------------------------------------------------------------------
# cylinder / disc
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class CylinderModes:
    """Modes of a rigid closed cylinder (3D) or rigid disc cavity (2D).

    Attributes
    ----------
    radius : float
        Radius a in metres.
    height : float or None
        Height h in metres; None for the 2-D disc.
    frequencies : (n,) float
        Natural frequencies in Hz, ascending.
    m : (n,) int
        Azimuthal order (cos m theta / sin m theta).
    s : (n,) int
        Radial index: s = 0 is the root j' = 0 of m = 0 (uniform radially);
        otherwise the s-th positive zero of J_m', s >= 1.  Abramowitz &
        Stegun (and DLMF) count x = 0 as j'_{0,1}, so for m = 0 this s is
        their index minus one; for m >= 1 the two agree.
    q : (n,) int or None
        Axial index, cos(q pi z / h); None for the disc.
    angular : (n,) str
        "cos" or "sin": which degenerate partner (m = 0 is always "cos").
    radial_root : (n,) float
        j'_{m,s} (dimensionless), 0 for s = 0.
    """

    radius: float
    height: Optional[float]
    frequencies: np.ndarray
    m: np.ndarray
    s: np.ndarray
    q: Optional[np.ndarray]
    angular: np.ndarray
    radial_root: np.ndarray

    def __len__(self) -> int:
        return int(self.frequencies.shape[0])


def _jnp_roots_upto(m: int, x_max: float) -> np.ndarray:
    """Positive zeros of J_m' that are <= x_max, ascending (1-D float array)."""
    nt = int(x_max / math.pi) + 3
    while True:
        z = special.jnp_zeros(m, nt)
        if z[-1] > x_max:
            return z[z <= x_max]
        nt *= 2


def _cylinder_upto(a: float, h: Optional[float], c: float, fmax: float):
    limit = fmax * (1.0 + _REL_TOL)
    k_max = 2.0 * math.pi * limit / c
    x_max = k_max * a
    ms, ss, roots = [], [], []
    m = 0
    while True:
        z = _jnp_roots_upto(m, x_max) if m < x_max else np.zeros(0)
        if m == 0:
            z = np.concatenate(([0.0], z))
            s_idx = np.arange(0, z.size)
        else:
            if z.size == 0:  # j'_{m,1} grows with m: no higher order fits either
                break
            s_idx = np.arange(1, z.size + 1)
        ms.append(np.full(z.size, m, dtype=np.int64))
        ss.append(s_idx.astype(np.int64))
        roots.append(z)
        m += 1
    m_arr, s_arr, x_arr = (np.concatenate(v) for v in (ms, ss, roots))
    kr = x_arr / a
    if h is None:
        q_arr = None
        k2 = kr**2
    else:
        q_range = np.arange(0, math.floor(k_max * h / math.pi) + 2, dtype=np.int64)
        _check_budget(m_arr.size * q_range.size * 2, "cylinder_modes")
        m_arr, q_arr = (np.repeat(m_arr, q_range.size), np.tile(q_range, kr.size))
        s_arr = np.repeat(s_arr, q_range.size)
        x_arr = np.repeat(x_arr, q_range.size)
        k2 = (x_arr / a) ** 2 + (q_arr * math.pi / h) ** 2
    f = c / (2.0 * math.pi) * np.sqrt(k2)
    keep = f <= limit
    f, m_arr, s_arr, x_arr = f[keep], m_arr[keep], s_arr[keep], x_arr[keep]
    if q_arr is not None:
        q_arr = q_arr[keep]
    # degenerate partners: m > 0 once with cos, once with sin
    copies = np.where(m_arr > 0, 2, 1)
    rep = np.repeat(np.arange(f.size), copies)
    first = np.concatenate(([True], rep[1:] != rep[:-1])) if rep.size else rep.astype(bool)
    ang_code = np.where(first, 0, 1)  # 0 = cos, 1 = sin
    f, m_arr, s_arr, x_arr = f[rep], m_arr[rep], s_arr[rep], x_arr[rep]
    if q_arr is not None:
        q_arr = q_arr[rep]
    keys = [m_arr, s_arr] + ([q_arr] if q_arr is not None else []) + [ang_code]
    order = _tie_order(f, keys)
    payload = (
        m_arr[order],
        s_arr[order],
        None if q_arr is None else q_arr[order],
        ang_code[order],
        x_arr[order],
    )
    return f[order], payload


def cylinder_modes(radius, height, *, c, count=None, fmax=None) -> CylinderModes:
    """Natural modes of a rigid closed circular cylinder, or a rigid disc (2D).

    ``k**2 = (j'_{m,s} / a)**2 + (q pi / h)**2`` with j'_{m,s} the zeros of
    J_m' (Abramowitz & Stegun 1964, §9.5, Table 9.5; computed with
    ``scipy.special.jnp_zeros``) plus the root j' = 0 of m = 0 (s = 0), and
    q = 0, 1, 2, ...; ``f = c k / (2 pi)``.  The shape is
    ``J_m(j'_{m,s} r / a) * {cos, sin}(m theta) * cos(q pi z / h)``.  Modes
    with m > 0 are doubly degenerate and appear twice (angular "cos", "sin").

    Parameters
    ----------
    radius : float
        Radius a in metres.
    height : float or None
        Height h in metres; None gives the 2-D disc (no q index).
    c : float
        Speed of sound in m/s (required keyword).
    count : int, optional
        Lowest ``count`` entries (degenerate partners counted separately).
    fmax : float, optional
        Every entry with f <= fmax (Hz, relative tolerance 1e-12).
        Exactly one of count / fmax.

    Returns
    -------
    CylinderModes
        frequencies, m, s, q (or None), angular, radial_root, each (n,).
    """
    a = _length("radius", radius)
    h = None if height is None else _length("height", height)
    c = _speed_of_sound(c)
    fmax_v, count_v = _select(fmax, count)
    if fmax_v is not None:
        f, payload = _cylinder_upto(a, h, c, fmax_v)
    else:
        if h is None:  # Weyl: N ~ A k^2 / (4 pi)
            k_guess = math.sqrt(4.0 * math.pi * count_v / (math.pi * a * a))
        else:  # Weyl: N ~ V k^3 / (6 pi^2)
            k_guess = (6.0 * math.pi**2 * count_v / (math.pi * a * a * h)) ** (1.0 / 3.0)
        f, payload = _lowest(
            lambda ff: _cylinder_upto(a, h, c, ff), count_v, c * k_guess / (2.0 * math.pi)
        )
        f = f[:count_v]
        payload = tuple(None if p is None else p[:count_v] for p in payload)
    m_arr, s_arr, q_arr, ang, x_arr = payload
    return CylinderModes(
        radius=a,
        height=h,
        frequencies=_readonly(f),
        m=_readonly(m_arr),
        s=_readonly(s_arr),
        q=None if q_arr is None else _readonly(q_arr),
        angular=_readonly(np.array(["cos", "sin"])[ang]),
        radial_root=_readonly(x_arr),
    )


# --------------------------------------------------------------------------
# sphere
# --------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SphereModes:
    """Modes of a rigid sphere.

    Attributes
    ----------
    radius : float
        Radius a in metres.
    frequencies : (n,) float
        Natural frequencies in Hz, ascending.
    l : (n,) int
        Polar order of j_l and the spherical harmonic.
    n : (n,) int
        Radial index: n = 0 is the root x = 0 of l = 0 (the 0 Hz mode);
        otherwise the n-th positive zero of j_l', n >= 1.
    m : (n,) int
        Azimuthal order -l..l labelling the 2l+1 degenerate copies.
    radial_root : (n,) float
        x_{l,n}, the zero of j_l' (dimensionless).
    """

    radius: float
    frequencies: np.ndarray
    l: np.ndarray  # noqa: E741 - standard name of the polar order
    n: np.ndarray
    m: np.ndarray
    radial_root: np.ndarray

    def __len__(self) -> int:
        return int(self.frequencies.shape[0])


def _djl(x, l: int):
    return special.spherical_jn(l, x, derivative=True)


def spherical_jn_derivative_zeros(l: int, x_max: float, step: float = 0.05) -> np.ndarray:
    """Positive zeros of j_l'(x) in (0, x_max], ascending.

    Sign changes of ``scipy.special.spherical_jn(l, x, derivative=True)`` are
    bracketed on a grid of spacing ``step`` and refined with
    ``scipy.optimize.brentq``.  The grid starts at sqrt(l(l+1)): at a zero of
    j_l' the spherical Bessel equation gives
    ``j_l'' = -(1 - l(l+1)/x**2) j_l``, and below sqrt(l(l+1)) j_l is still
    rising from 0, so no zero lies there.  Consecutive zeros are about pi
    apart, far wider than ``step``.  The root x = 0 of l = 0 is *not* included.

    Parameters
    ----------
    l : int >= 0
    x_max : float
    step : float
        Grid spacing used for bracketing.

    Returns
    -------
    (n_zeros,) float
    """
    if not isinstance(l, numbers.Integral) or isinstance(l, bool) or l < 0:
        raise InputError(f"l must be an integer >= 0; got {l!r}.")
    l = int(l)
    if not _is_real_number(x_max) or not math.isfinite(float(x_max)):
        raise InputError(f"x_max must be a finite number; got {x_max!r}.")
    step = _positive("step", step, "units of x", "Pass e.g. step=0.05 (zeros are ~pi apart).")
    x0 = math.sqrt(l * (l + 1)) if l > 0 else 1e-3
    if x_max <= x0:
        return np.zeros(0)
    # A fixed grid x0 + i*step (extended past x_max, roots filtered below) so
    # that each root is refined from the same bracket whatever x_max is, and
    # results with different fmax / count agree bit for bit.
    npts = int(math.ceil((x_max - x0) / step)) + 2
    x = x0 + step * np.arange(npts)
    y = _djl(x, l)
    roots = list(x[1:][y[1:] == 0.0])
    from scipy.optimize import brentq  # lazily: scipy.optimize costs ~0.25 s of import

    change = np.nonzero(np.signbit(y[:-1]) != np.signbit(y[1:]))[0]
    for i in change:
        lo, hi = x[i], x[i + 1]
        if y[i] == 0.0 or y[i + 1] == 0.0:
            continue  # exact grid hit, recorded above (or y[0] at x0, impossible)
        roots.append(brentq(_djl, lo, hi, args=(l,), xtol=1e-15))
    roots = np.sort(np.array(roots, dtype=float))
    return roots[roots <= x_max]


def _sphere_upto(a: float, c: float, fmax: float):
    limit = fmax * (1.0 + _REL_TOL)
    x_max = 2.0 * math.pi * limit / c * a
    ls, ns, xs = [np.zeros(1, dtype=np.int64)], [np.zeros(1, dtype=np.int64)], [np.zeros(1)]
    l = 0
    while l == 0 or math.sqrt(l * (l + 1)) < x_max:
        z = spherical_jn_derivative_zeros(l, x_max)
        ls.append(np.full(z.size, l, dtype=np.int64))
        ns.append(np.arange(1, z.size + 1, dtype=np.int64))
        xs.append(z)
        l += 1
    l_arr, n_arr, x_arr = (np.concatenate(v) for v in (ls, ns, xs))
    f = c * x_arr / (2.0 * math.pi * a)
    keep = f <= limit
    f, l_arr, n_arr, x_arr = f[keep], l_arr[keep], n_arr[keep], x_arr[keep]
    copies = 2 * l_arr + 1
    _check_budget(int(copies.sum()), "sphere_modes")
    rep = np.repeat(np.arange(f.size), copies)
    starts = np.repeat(np.cumsum(copies) - copies, copies)
    m_arr = np.arange(rep.size) - starts - l_arr[rep]  # -l..l within each group
    f, l_arr, n_arr, x_arr = f[rep], l_arr[rep], n_arr[rep], x_arr[rep]
    order = _tie_order(f, [l_arr, n_arr, m_arr])
    return f[order], (l_arr[order], n_arr[order], m_arr[order], x_arr[order])


def sphere_modes(radius, *, c, count=None, fmax=None) -> SphereModes:
    """Natural modes of a rigid spherical cavity.

    ``k = x_{l,n} / a`` with x_{l,n} the zeros of j_l' (spherical Bessel
    function of the first kind, Abramowitz & Stegun 1964, §10.1), including
    x = 0 for l = 0 (the 0 Hz mode); ``f = c k / (2 pi)``.  The shape is
    ``j_l(k r) Y_l^m(theta, phi)``; each (l, n) has multiplicity 2l+1 and
    appears 2l+1 times (m = -l..l).

    Parameters
    ----------
    radius : float
        Radius a in metres.
    c : float
        Speed of sound in m/s (required keyword).
    count : int, optional
        Lowest ``count`` entries (degenerate copies counted separately).
    fmax : float, optional
        Every entry with f <= fmax (Hz, relative tolerance 1e-12).
        Exactly one of count / fmax.

    Returns
    -------
    SphereModes
        frequencies, l, n, m, radial_root, each (n,).
    """
    a = _length("radius", radius)
    c = _speed_of_sound(c)
    fmax_v, count_v = _select(fmax, count)
    if fmax_v is not None:
        f, payload = _sphere_upto(a, c, fmax_v)
    else:
        volume = 4.0 / 3.0 * math.pi * a**3
        k_guess = (6.0 * math.pi**2 * count_v / volume) ** (1.0 / 3.0)
        f, payload = _lowest(
            lambda ff: _sphere_upto(a, c, ff), count_v, c * k_guess / (2.0 * math.pi)
        )
        f = f[:count_v]
        payload = tuple(p[:count_v] for p in payload)
    l_arr, n_arr, m_arr, x_arr = payload
    return SphereModes(
        radius=a,
        frequencies=_readonly(f),
        l=_readonly(l_arr),
        n=_readonly(n_arr),
        m=_readonly(m_arr),
        radial_root=_readonly(x_arr),
    )
