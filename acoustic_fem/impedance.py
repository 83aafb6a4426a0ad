"""Locally reacting absorbing walls: :class:`Impedance`.

Time convention
---------------
e^{+iωt}: p(x, t) = Re(p̂(x) e^{iωt}).  A plane wave travelling in +x is
e^{-ikx}; in a lossy medium it decays when Im k < 0.

A wall of specific acoustic impedance Z (Pa·s/m: pressure over the normal
particle velocity *into* the wall) gives the Robin condition

    ∂p/∂n = -ik β p   on the surface,

with the outward normal n, k = ω/c and β = ρc/Z the normalised specific
admittance (z = Z/(ρc) = 1/β the normalised impedance).  A passive wall has
Re(β) >= 0 (equivalently Re(z) >= 0).  In this convention a stiffness
(a closed air layer, a spring) has Im z < 0 and a mass has Im z > 0.

Data in the other convention
----------------------------
Impedances and admittances given in the e^{-iωt} convention (common in
physics texts, where a lossy wave is e^{ikx} with Im k > 0) must be
complex-conjugated before use: ``Impedance(impedance=np.conj(z_data))``.
Absorption coefficients are the same in both conventions (|R|² does not
change under conjugation).

What this module provides
-------------------------
* :class:`Impedance` from a constant or callable admittance / impedance, an
  absorption coefficient (normal incidence per ISO 10534-2, or random
  incidence via Paris' formula), a table over frequency
  (:meth:`Impedance.from_table`), or a porous layer on a rigid backing with
  an optional air gap (:meth:`Impedance.porous_layer`: Delany–Bazley 1970,
  Miki 1990, and the Allard–Champoux form of the Delany–Bazley fit).
* :func:`absorption_coefficient`, :func:`impedance_from_absorption`,
  :func:`random_incidence_maximum`, :func:`porous_characteristics`,
  :func:`porous_layer_impedance`.
"""

from __future__ import annotations

import enum
import functools
import math
import numbers
import warnings
from dataclasses import dataclass, field
from typing import Callable, Mapping

import numpy as np

from ._errors import InputError
from .air import Air
from .walls import Wall

__all__ = [
    "Impedance",
    "Incidence",
    "PorousModel",
    "OutsideRange",
    "TableQuantity",
    "absorption_coefficient",
    "impedance_from_absorption",
    "random_incidence_maximum",
    "porous_characteristics",
    "porous_layer_impedance",
]


# --------------------------------------------------------------------------
# closed option sets
# --------------------------------------------------------------------------


class Incidence(str, enum.Enum):
    """Sound field an absorption coefficient refers to.

    NORMAL: plane wave at normal incidence, α_n = 1 − |(z−1)/(z+1)|²
    (ISO 10534-2, impedance tube).  RANDOM: diffuse field on a locally
    reacting surface, Paris' formula α = ∫_0^{π/2} α(θ) sin 2θ dθ.
    """

    NORMAL = "normal"
    RANDOM = "random"


class PorousModel(str, enum.Enum):
    """Empirical one-parameter models of a fibrous absorber (flow resistivity σ).

    DELANY_BAZLEY: Delany & Bazley (1970), power laws in f/σ.
    MIKI: Miki (1990), the modification that keeps the effective medium
    passive to lower f/σ.  ALLARD_CHAMPOUX: the refit of the Delany–Bazley
    data in X = ρ0 f/σ used by Allard & Champoux (1992).
    """

    DELANY_BAZLEY = "delany-bazley"
    MIKI = "miki"
    ALLARD_CHAMPOUX = "allard-champoux"


class OutsideRange(str, enum.Enum):
    """What a table does at frequencies outside its range.

    HOLD: the end value is used (a warning is issued once per wall).
    ERROR: an :class:`InputError` is raised.
    """

    HOLD = "hold"
    ERROR = "error"


class TableQuantity(str, enum.Enum):
    """What the values of a frequency table are."""

    IMPEDANCE = "impedance"   # z = Z/(ρc), complex
    ADMITTANCE = "admittance"  # β = ρc/Z, complex
    ALPHA = "alpha"           # absorption coefficient, real in [0, 1)


def _option(enum_cls, value, name):
    if isinstance(value, enum_cls):
        return value
    if isinstance(value, str):
        key = value.strip().lower().replace("_", "-").replace(" ", "-")
        for member in enum_cls:
            if member.value == key:
                return member
    choices = ", ".join(repr(m.value) for m in enum_cls)
    raise InputError(f"{name}={value!r} is not one of {choices}; give one of those.")


# --------------------------------------------------------------------------
# small validators
# --------------------------------------------------------------------------


def _complex(name, value):
    if isinstance(value, bool) or not isinstance(value, numbers.Number):
        raise InputError(f"{name}={value!r} must be a (complex) number.")
    v = complex(value)
    if not (math.isfinite(v.real) and math.isfinite(v.imag)):
        raise InputError(f"{name}={value!r} must be finite.")
    return v


def _positive(name, value, unit, *, allow_zero=False):
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InputError(f"{name}={value!r} must be a real number in {unit}.")
    v = float(value)
    ok = math.isfinite(v) and (v >= 0 if allow_zero else v > 0)
    if not ok:
        need = "zero or positive" if allow_zero else "positive"
        raise InputError(f"{name}={value!r} {unit} must be {need} and finite; give a {need} value.")
    return v


def _frequencies(frequencies) -> np.ndarray:
    try:
        f = np.asarray(frequencies, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"frequencies={frequencies!r} must be a real number or an array of real numbers (Hz)."
        ) from exc
    bad = ~(np.isfinite(f) & (f > 0))
    if bad.any():
        first = f[bad].flat[0]
        raise InputError(
            f"frequency {float(first)!r} Hz is not usable: frequencies must be positive and finite "
            "(an absorber's admittance at 0 Hz is not defined, and tables interpolate in "
            "log-frequency); give frequencies > 0 Hz."
        )
    return f


def _air(air):
    if air is None:
        return Air()
    if not isinstance(air, Air):
        raise InputError(f"air={air!r} must be an acoustic_fem.Air instance (or None for Air()).")
    return air


# --------------------------------------------------------------------------
# absorption coefficients
# --------------------------------------------------------------------------

_GL_NODES = 32


@functools.lru_cache(maxsize=1)
def _gauss_legendre_01():
    x, w = np.polynomial.legendre.leggauss(_GL_NODES)
    return 0.5 * (x + 1.0), 0.5 * w


def _alpha_random(z: np.ndarray) -> np.ndarray:
    """Paris' formula for a locally reacting surface of normalised impedance z.

    α = ∫_0^{π/2} α(θ) sin 2θ dθ with α(θ) = 1 − |(z cosθ − 1)/(z cosθ + 1)|²
      = 8a ∫_0^1 u² / (|z|² u² + 2a u + 1) du            (u = cos θ, z = a + ib)
      = (8a/|z|²) [1 − (a/|z|²) ln|1+z|² + (a² − b²)/(|z|² |b|) arctan(|b|/(1+a))]

    (the last term → −(1 − 2a²/|z|²)/(1+a) as b → 0).  For |z| < 1/2 the
    closed form loses digits to cancellation and the integral over u, whose
    integrand is analytic well beyond [0, 1] there (poles at u = −1/z,
    |u| > 2), is taken by 32-point Gauss–Legendre instead.
    """
    z = np.asarray(z, dtype=complex)
    a, b = z.real, np.abs(z.imag)
    m = a * a + b * b
    out = np.zeros(z.shape)
    finite = np.isfinite(z)
    big = finite & (m >= 0.25)
    small = finite & (m < 0.25) & (m > 0)
    if big.any():
        ab, bb, mb = a[big], b[big], m[big]
        t = bb / (1.0 + ab)
        tt = np.where(t > 0, t, 1.0)
        ratio = np.where(t > 0, np.arctan(tt) / tt, 1.0)        # arctan(t)/t
        j = ratio / (1.0 + ab)                                   # arctan(|b|/(1+a))/|b|
        bracket = 1.0 - (ab / mb) * np.log1p(2.0 * ab + mb) - (1.0 - 2.0 * ab * ab / mb) * j
        out[big] = 8.0 * ab / mb * bracket
    if small.any():
        u, w = _gauss_legendre_01()
        as_, ms = a[small][:, None], m[small][:, None]
        out[small] = 8.0 * a[small] * ((u * u / (ms * u * u + 2.0 * as_ * u + 1.0)) @ w)
    return out


def _alpha_normal_from_admittance(beta: np.ndarray) -> np.ndarray:
    # 1 − |(z−1)/(z+1)|² = 4 Re z / |1+z|² = 4 Re β / |1+β|²  (β = 1/z)
    return 4.0 * beta.real / np.abs(1.0 + beta) ** 2


def absorption_coefficient(impedance, incidence="normal") -> np.ndarray:
    """Absorption coefficient of a locally reacting surface.

    Parameters
    ----------
    impedance : complex or array of any shape
        Normalised specific impedance z = Z/(ρc), Re z >= 0.  ``np.inf``
        (rigid) and 0 (pressure release) give α = 0.
    incidence : Incidence or "normal" / "random"
        NORMAL: α_n = 1 − |(z−1)/(z+1)|² (ISO 10534-2).  RANDOM: Paris'
        formula α = ∫_0^{π/2} α(θ) sin 2θ dθ with
        α(θ) = 1 − |(z cosθ − 1)/(z cosθ + 1)|², evaluated in closed form.

    Returns
    -------
    float array of the shape of ``impedance`` (0-d for a scalar).
    """
    inc = _option(Incidence, incidence, "incidence")
    z = np.asarray(impedance, dtype=complex)
    if np.isnan(z).any():
        raise InputError("impedance contains NaN; give finite values (or inf for a rigid wall).")
    if (z.real < 0).any():
        first = z[z.real < 0].flat[0]
        raise InputError(
            f"impedance {complex(first)!r} has a negative real part (an active surface); "
            "a passive wall has Re z >= 0 (data in the e^{-iωt} convention: conjugate them)."
        )
    if inc is Incidence.NORMAL:
        with np.errstate(divide="ignore", invalid="ignore"):
            beta = np.where(np.isinf(z), 0.0, 1.0 / np.where(z == 0, 1.0, z))
        out = np.where(z == 0, 0.0, _alpha_normal_from_admittance(beta))
        return np.asarray(out, dtype=float)
    return _alpha_random(np.where(np.isinf(z), np.inf, z))


@functools.lru_cache(maxsize=1)
def random_incidence_maximum() -> tuple[float, float]:
    """Largest random-incidence absorption coefficient of a real impedance.

    Returns
    -------
    (alpha_max, z_at_max) : floats
        max over real z of Paris' formula, ≈ 0.9512 at z ≈ 1.567.  A real z
        above z_at_max (the stiff branch) reaches every α in (0, alpha_max].
    """
    from scipy.optimize import minimize_scalar

    res = minimize_scalar(
        lambda z: -float(_alpha_random(np.array([z]))[0]),
        bounds=(1.0, 3.0), method="bounded", options={"xatol": 1e-12},
    )
    return float(-res.fun), float(res.x)


def _alpha_random_real_admittance(beta: np.ndarray) -> np.ndarray:
    # Paris' formula for real z = 1/β written in β (finite at β = 0):
    # (8/z²)[z + z/(1+z) − 2 ln(1+z)] = 8β[1 + β/(1+β) − 2β ln((1+β)/β)]
    with np.errstate(divide="ignore", invalid="ignore"):
        val = 8.0 * beta * (1.0 + beta / (1.0 + beta) - 2.0 * beta * (np.log1p(beta) - np.log(beta)))
    return np.where(beta > 0, val, 0.0)


def _check_alpha(alpha, inc: Incidence, where="alpha") -> np.ndarray:
    a = np.asarray(alpha)
    if np.iscomplexobj(a):
        if np.any(a.imag != 0):
            raise InputError(f"{where} must be real; got complex values {a!r}.")
        a = a.real
    try:
        a = np.asarray(a, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{where}={alpha!r} must be a real number or array of real numbers.") from exc
    bad = ~(np.isfinite(a) & (a >= 0) & (a < 1))
    if bad.any():
        first = a[bad].flat[0]
        raise InputError(
            f"{where}={float(first)!r} is outside [0, 1): an absorption coefficient must be >= 0 and < 1. "
            "α = 1 is the branch point where the stiff (z > 1) and soft (z < 1) solutions meet and "
            "cannot be inverted on the stiff branch; for a matched wall give impedance=1 directly."
        )
    if inc is Incidence.RANDOM:
        amax, zmax = random_incidence_maximum()
        if (a > amax).any():
            first = a[a > amax].flat[0]
            raise InputError(
                f"{where}={float(first)!r} exceeds the largest random-incidence absorption coefficient of a "
                f"locally reacting surface with real impedance, {amax:.4f} (at z = {zmax:.4f}); "
                "give alpha <= that maximum, or use incidence='normal'."
            )
    return a


def _admittance_from_absorption(alpha: np.ndarray, inc: Incidence) -> np.ndarray:
    """Real β on the stiff branch (z >= 1, resp. z >= z_at_max) for validated α."""
    a = np.asarray(alpha, dtype=float)
    if inc is Incidence.NORMAL:
        # α = 1 − r², r = (z−1)/(z+1) >= 0  →  β = (1−r)/(1+r) = α/(1+r)²
        r = np.sqrt(1.0 - a)
        return a / (1.0 + r) ** 2
    # random: α(β) increases monotonically on 0 <= β <= 1/z_at_max; bisection,
    # all values at once (64 halvings of an interval < 1 reach below 1e-19).
    _, zmax = random_incidence_maximum()
    lo = np.zeros_like(a)
    hi = np.full_like(a, 1.0 / zmax)
    for _ in range(64):
        mid = 0.5 * (lo + hi)
        low = _alpha_random_real_admittance(mid) < a
        lo = np.where(low, mid, lo)
        hi = np.where(low, hi, mid)
    return np.where(a == 0, 0.0, 0.5 * (lo + hi))


def impedance_from_absorption(alpha, incidence="normal") -> np.ndarray:
    """Real normalised impedance on the stiff branch with a given absorption coefficient.

    Assumption: the impedance is real (purely resistive) and z >= 1 at
    normal incidence (z >= z_at_max ≈ 1.567 at random incidence, see
    :func:`random_incidence_maximum`), i.e. the wall is stiffer than air.
    Normal incidence: z = (1 + √(1−α)) / (1 − √(1−α)).  Random incidence:
    Paris' formula inverted numerically.

    Parameters
    ----------
    alpha : float or array of any shape, in [0, 1) (random: <= alpha_max)
    incidence : Incidence or "normal" / "random"

    Returns
    -------
    float array of the shape of ``alpha``; ``inf`` where α = 0 (rigid).
    """
    inc = _option(Incidence, incidence, "incidence")
    a = _check_alpha(alpha, inc)
    beta = _admittance_from_absorption(a, inc)
    with np.errstate(divide="ignore"):
        return np.where(beta > 0, 1.0 / np.where(beta > 0, beta, 1.0), np.inf)


# --------------------------------------------------------------------------
# porous layers
# --------------------------------------------------------------------------

# Coefficients of the empirical models: (a, p, b, q, c, r, d, s) in
#   Zc/(ρ0c0) = 1 + a Y^-p − i b Y^-q,   k/(ω/c0) = 1 + c Y^-r − i d Y^-s,
# written for e^{+iωt}.  Y = 1000 f/σ for Delany–Bazley and Miki (f in Hz,
# σ in Pa·s/m², the factor 1000 a relic of the cgs flow resistivity of the
# original papers), Y = ρ0 f/σ for the Allard–Champoux form.
# Delany & Bazley, Applied Acoustics 3 (1970) 105-116; Miki, J. Acoust. Soc.
# Jpn (E) 11 (1990) 19-24; Allard & Champoux, JASA 91 (1992) 3346-3353.
# The original papers were not consulted: the values were recalled (from
# memory) and cross-checked against a secondary summary of the two models on
# the web, which also states the e^{+jωt} convention and the range
# 0.01 < f/σ < 1.
_MODELS = {
    PorousModel.DELANY_BAZLEY: (9.08, 0.75, 11.9, 0.73, 10.8, 0.70, 10.3, 0.59),
    PorousModel.MIKI: (5.50, 0.632, 8.43, 0.632, 7.81, 0.618, 11.41, 0.618),
    PorousModel.ALLARD_CHAMPOUX: (0.0571, 0.754, 0.0870, 0.732, 0.0978, 0.700, 0.1890, 0.595),
}

#: Range of f/σ (ρ0 f/σ for ALLARD_CHAMPOUX) of the measurements the models
#: were fitted to, as stated by Delany & Bazley (0.01 < f/σ < 1, f in Hz, σ in
#: Pa·s/m²); Miki fitted the same data and did not extend the range.  A warning
#: is issued outside it.  Beyond the range the effective media turn active
#: (bulk modulus K = ω Zc/k with Im K < 0 in e^{+iωt}) below f/σ ≈ 0.0107
#: (Delany–Bazley), f/σ ≈ 0.00105 (Miki) and ρ0 f/σ ≈ 0.0141 (Allard–Champoux)
#: (computed from the expressions above, not published values); an active
#: surface impedance makes :meth:`Impedance.admittance_at` raise.
VALIDITY = {
    PorousModel.DELANY_BAZLEY: (0.01, 1.0),
    PorousModel.MIKI: (0.01, 1.0),
    PorousModel.ALLARD_CHAMPOUX: (0.01, 1.0),
}

#: Passive floor of Miki's medium in a wall (:meth:`Impedance.porous_layer`):
#: below f/σ = 0.0012 (just above the 0.00105 where its bulk modulus turns
#: active) the wall holds the medium's normalised characteristic impedance
#: and propagation factor, zc and k/k0, at their values there (a
#: frequency-independent, passive medium), so the layer stays passive at any
#: frequency: the 0 Hz mode of a closed room is evaluated at a fraction of a
#: hertz, far below every fitted range.  For σ = 10 kPa·s/m² the floor is at
#: 12 Hz.  Delany–Bazley and Allard–Champoux turn active near the low end of
#: their fitted range (about 107 Hz at that σ), too high for such a repair:
#: their walls raise instead and name Miki's model.
MIKI_PASSIVE_FLOOR = 0.0012


def _model_parameter(f, sigma, model, air):
    return f * air.rho / sigma if model is PorousModel.ALLARD_CHAMPOUX else f / sigma


def porous_characteristics(frequencies, flow_resistivity, *, model="miki", air=None):
    """Characteristic impedance and wavenumber of a fibrous absorber (e^{+iωt}).

    Zc/(ρ0c0) = 1 + a Y^-p − i b Y^-q and k = (ω/c0)(1 + c Y^-r − i d Y^-s),
    Y = 1000 f/σ (Delany–Bazley 1970, Miki 1990) or Y = ρ0 f/σ
    (Allard–Champoux form).  Re Zc > ρ0c0 and Im k < 0 (the wave e^{-ikx}
    decays); both tend to air's values as f/σ → ∞.

    Parameters
    ----------
    frequencies : float or array of any shape, Hz (> 0)
    flow_resistivity : float, Pa·s/m² (> 0)
    model : PorousModel or "delany-bazley" / "miki" / "allard-champoux"
    air : Air, optional (default Air())

    Returns
    -------
    (zc, k) : complex arrays of the shape of ``frequencies``
        zc = Zc/(ρ0c0) normalised, k in rad/m.
    """
    f = _frequencies(frequencies)
    sigma = _positive("flow_resistivity", flow_resistivity, "Pa·s/m²")
    mod = _option(PorousModel, model, "model")
    return _characteristics(f, sigma, mod, _air(air))


def _characteristics(f, sigma, model, air, floor=None):
    """zc (normalised) and k (rad/m); with ``floor``, f/σ is held at >= floor in the factors."""
    a, p, b, q, c, r, d, s = _MODELS[model]
    x = _model_parameter(f, sigma, model, air)
    if floor is not None:
        x = np.maximum(x, floor)
    y = x if model is PorousModel.ALLARD_CHAMPOUX else 1000.0 * x
    zc = 1.0 + a * y ** -p - 1j * b * y ** -q
    k = (2.0 * np.pi * f / air.c) * (1.0 + c * y ** -r - 1j * d * y ** -s)
    return zc, k


def _layer_impedance(f, sigma, thickness, gap, model, air, floor=None):
    zc, k = _characteristics(f, sigma, model, air, floor)
    t = np.tan(k * thickness)          # bounded: Im(k d) < 0 strictly, |t| -> 1 for thick layers
    if gap == 0.0:
        # rigid backing: Zs = −i Zc cot(k d)
        return -1j * zc / t
    # air gap of depth D on a rigid wall: z_gap = −i cot(k0 D) = N/M, N = −i cos, M = sin;
    # translated through the layer, z = zc (z_gap + i zc t)/(zc + i z_gap t), multiplied
    # through by M so that no pole of cot(k0 D) is evaluated.
    k0d = 2.0 * np.pi * f / air.c * gap
    n, m = -1j * np.cos(k0d), np.sin(k0d)
    return zc * (n + 1j * zc * m * t) / (zc * m + 1j * n * t)


def porous_layer_impedance(frequencies, flow_resistivity, thickness, *, air_gap=0.0,
                           model="miki", air=None) -> np.ndarray:
    """Normalised surface impedance of a porous layer on a rigid backing (e^{+iωt}).

    Layer of thickness d (characteristic impedance Zc, wavenumber k from
    :func:`porous_characteristics`), optionally with an air gap of depth D
    between it and the rigid wall, at normal incidence, locally reacting:

    * no gap: Zs = −i Zc cot(k d)
    * gap:    Z_gap = −i ρ0c0 cot(k0 D),
              Zs = Zc (Z_gap + i Zc tan(k d)) / (Zc + i Z_gap tan(k d))

    (the impedance translation of a uniform layer, from p = A e^{-ikx} +
    B e^{ikx}).  D → 0 gives the rigid-backed layer, d → 0 the gap alone.

    Parameters
    ----------
    frequencies : float or array of any shape, Hz (> 0)
    flow_resistivity : float, Pa·s/m² (> 0)
    thickness : float, m (> 0)
    air_gap : float, m (>= 0)
    model : PorousModel or "delany-bazley" / "miki" / "allard-champoux"
    air : Air, optional (default Air())

    Returns
    -------
    complex array of the shape of ``frequencies``: z = Zs/(ρ0c0).  No
    warning outside the model's range here (the wall from
    :meth:`Impedance.porous_layer` warns), and no passivity check.
    """
    f = _frequencies(frequencies)
    layer = _Layer.make(flow_resistivity, thickness, air_gap, model)
    return _layer_impedance(f, layer.flow_resistivity, layer.thickness, layer.air_gap,
                            layer.model, _air(air))


# --------------------------------------------------------------------------
# sources of β(f): what an Impedance wraps
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class _Constant:
    beta: complex
    text: str = field(compare=False)

    frequency_dependent = False

    def admittance(self, f, air):
        return np.full(f.shape, self.beta, dtype=complex)

    def describe(self):
        return f"Impedance({self.text})"


@dataclass(frozen=True)
class _Function:
    fn: Callable
    kind: TableQuantity
    incidence: Incidence | None

    frequency_dependent = True

    def admittance(self, f, air):
        raw = self.fn(f)
        out = np.asarray(raw)
        if out.shape != f.shape:
            try:
                out = np.broadcast_to(out, f.shape)
            except ValueError as exc:
                raise InputError(
                    f"the {self.kind.value} function {self.fn!r} returned shape {np.shape(raw)} for "
                    f"{f.shape} frequencies; it must return one value per frequency."
                ) from exc
        if self.kind is TableQuantity.ALPHA:
            a = _check_alpha(out, self.incidence, where=f"alpha returned by {self.fn!r}")
            return _admittance_from_absorption(a, self.incidence).astype(complex)
        out = np.asarray(out, dtype=complex)
        if not np.isfinite(out).all():
            raise InputError(
                f"the {self.kind.value} function {self.fn!r} returned non-finite values; "
                "it must return finite complex values."
            )
        if self.kind is TableQuantity.IMPEDANCE:
            if (out == 0).any():
                raise InputError(
                    f"the impedance function {self.fn!r} returned 0 (a pressure-release surface) at "
                    f"{float(f[out == 0].flat[0])!r} Hz; use PressureRelease() for such a surface."
                )
            out = 1.0 / out
        return out

    def describe(self):
        extra = f", incidence={self.incidence.value!r}" if self.incidence is not None else ""
        return f"Impedance({self.kind.value}={self.fn!r}{extra})"


@dataclass(frozen=True)
class _Table:
    quantity: TableQuantity
    frequencies: tuple
    values: tuple
    incidence: Incidence | None
    outside: OutsideRange
    _warned: list = field(default_factory=list, compare=False, repr=False)

    frequency_dependent = True

    @functools.cached_property
    def _arrays(self):
        logf = np.log(np.asarray(self.frequencies, dtype=float))
        v = np.asarray(self.values, dtype=complex)
        return logf, v.real.copy(), v.imag.copy()

    def admittance(self, f, air):
        logf, vr, vi = self._arrays
        f0, f1 = self.frequencies[0], self.frequencies[-1]
        out_of_range = (f < f0) | (f > f1)
        if out_of_range.any():
            lo, hi = float(f[out_of_range].min()), float(f[out_of_range].max())
            if self.outside is OutsideRange.ERROR:
                raise InputError(
                    f"frequency {(lo if lo < f0 else hi)!r} Hz is outside the table's range "
                    f"[{f0:g}, {f1:g}] Hz; extend the table, or give outside='hold' to use the end values."
                )
            if not self._warned:
                self._warned.append(True)
                span = f"{lo:g} Hz" if lo == hi else f"{lo:g}–{hi:g} Hz"
                warnings.warn(
                    f"wall admittance table covers [{f0:g}, {f1:g}] Hz; at {span} the end "
                    "values are held (outside='hold'). Extend the table, or give outside='error' "
                    "to refuse frequencies outside it. (Warned once per wall.)",
                    stacklevel=4,
                )
        lf = np.log(f)
        # linear in log-frequency, real and imaginary parts separately; np.interp
        # holds the end values outside the nodes
        v = np.interp(lf, logf, vr) + 1j * np.interp(lf, logf, vi)
        if self.quantity is TableQuantity.ADMITTANCE:
            return v
        if self.quantity is TableQuantity.IMPEDANCE:
            return 1.0 / v   # nonzero: interpolation of nodes with Re z > 0 or on a segment avoiding 0
        return _admittance_from_absorption(v.real, self.incidence).astype(complex)

    def describe(self):
        n = len(self.frequencies)
        if n <= 8:
            fs = "[" + ", ".join(f"{x:g}" for x in self.frequencies) + "]"
            vs = "[" + ", ".join(_fmt(x) for x in self.values) + "]"
        else:
            fs = f"<{n} frequencies {self.frequencies[0]:g}–{self.frequencies[-1]:g} Hz>"
            vs = f"<{n} values>"
        extra = f", incidence={self.incidence.value!r}" if self.incidence is not None else ""
        return (f"Impedance.from_table({fs}, {vs}, quantity={self.quantity.value!r}{extra}, "
                f"outside={self.outside.value!r})")


def _reciprocal(beta):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(beta == 0, np.inf + 0j, 1.0 / np.where(beta == 0, 1.0, beta))


def _fmt(x):
    x = complex(x)
    return f"{x.real:g}" if x.imag == 0 else f"{x:g}"


@dataclass(frozen=True)
class _Layer:
    flow_resistivity: float
    thickness: float
    air_gap: float
    model: PorousModel
    _warned: list = field(default_factory=list, compare=False, repr=False)

    frequency_dependent = True

    @classmethod
    def make(cls, flow_resistivity, thickness, air_gap, model):
        sigma = _positive("flow_resistivity", flow_resistivity, "Pa·s/m²")
        d = _positive("thickness", thickness, "m")
        gap = _positive("air_gap", air_gap, "m", allow_zero=True)
        return cls(sigma, d, gap, _option(PorousModel, model, "model"))

    def admittance(self, f, air):
        x = _model_parameter(f, self.flow_resistivity, self.model, air)
        lo, hi = VALIDITY[self.model]
        outside = (x < lo) | (x > hi)
        if outside.any() and not self._warned:
            self._warned.append(True)
            flo, fhi = float(f[outside].min()), float(f[outside].max())
            span = f"{flo:g} Hz" if flo == fhi else f"{flo:g}–{fhi:g} Hz"
            name = "ρ0 f/σ" if self.model is PorousModel.ALLARD_CHAMPOUX else "f/σ"
            scale = self.flow_resistivity / (air.rho if self.model is PorousModel.ALLARD_CHAMPOUX else 1.0)
            warnings.warn(
                f"porous layer ({self.model.value}, σ = {self.flow_resistivity:g} Pa·s/m²) is used at "
                f"{span}, outside the model's range "
                f"{lo:g} < {name} < {hi:g} (here {lo * scale:g}–{hi * scale:g} Hz); the values there are "
                "extrapolated" + (f" (and below {MIKI_PASSIVE_FLOOR * scale:g} Hz the medium is held at its values "
                "there, to stay passive)" if self.model is PorousModel.MIKI else "") +
                ". (Warned once per wall.)",
                stacklevel=4,
            )
        floor = MIKI_PASSIVE_FLOOR if self.model is PorousModel.MIKI else None
        z = _layer_impedance(f, self.flow_resistivity, self.thickness, self.air_gap, self.model, air,
                             floor)
        return 1.0 / z

    def describe(self):
        return (f"Impedance.porous_layer(flow_resistivity={self.flow_resistivity:g}, "
                f"thickness={self.thickness:g}, air_gap={self.air_gap:g}, model={self.model.value!r})")


# --------------------------------------------------------------------------
# the wall
# --------------------------------------------------------------------------


class Impedance(Wall):
    """A locally reacting wall given by its normalised admittance or impedance.

    Give exactly one of:

    admittance : complex, callable or mapping
        β = ρc/Z (dimensionless), Re β >= 0.
    impedance : complex, callable or mapping
        z = Z/(ρc) (dimensionless), the reciprocal of β, Re z >= 0, z != 0.
    alpha : float, callable or mapping
        Absorption coefficient in [0, 1), converted to a real impedance on
        the stiff branch (z >= 1; see :func:`impedance_from_absorption`) for
        the chosen ``incidence`` ("normal", the default: ISO 10534-2; or
        "random": Paris' formula, α <= 0.9512).

    A callable is called with a (n,) float array of frequencies in Hz and
    must return (n,) values.  A mapping {frequency: value} is a table, see
    :meth:`from_table` (end values held outside its range).  Time convention
    e^{+iωt}: data in the e^{-iωt} convention must be conjugated first.
    Re(β) >= 0 (a passive wall) is checked for constants and table nodes on
    construction and for every value :meth:`admittance_at` returns.

    Further constructors: :meth:`from_table`, :meth:`porous_layer`.
    Walls compare equal when they give the same β(f) by the same rule;
    constants compare by β (``Impedance(impedance=2) == Impedance(admittance=0.5)``).
    """

    fixes_pressure = False

    def __init__(self, admittance=None, *, impedance=None, alpha=None, incidence=None):
        given = [(n, v) for n, v in (("admittance", admittance), ("impedance", impedance),
                                     ("alpha", alpha)) if v is not None]
        if len(given) != 1:
            raise InputError(
                "Impedance needs exactly one of admittance= (β = ρc/Z), impedance= (z = Z/ρc) or "
                f"alpha= (absorption coefficient); got {[n for n, _ in given] or 'none'}."
            )
        kind_name, value = given[0]
        kind = TableQuantity(kind_name)
        if incidence is not None and kind is not TableQuantity.ALPHA:
            raise InputError(
                f"incidence={incidence!r} applies only to alpha=; an {kind_name} needs no incidence."
            )
        inc = _option(Incidence, "normal" if incidence is None else incidence, "incidence") \
            if kind is TableQuantity.ALPHA else None

        if isinstance(value, Mapping):
            source = _make_table(value, None, kind, inc, OutsideRange.HOLD)
        elif callable(value):
            source = _Function(value, kind, inc)
        elif kind is TableQuantity.ALPHA:
            if isinstance(value, bool) or not isinstance(value, numbers.Real):
                raise InputError(f"alpha={value!r} must be a real number in [0, 1).")
            a = float(_check_alpha(float(value), inc))
            beta = complex(float(_admittance_from_absorption(np.array(a), inc)))
            source = _Constant(beta, f"alpha={float(value)!r}, incidence={inc.value!r}")
        else:
            v = _complex(kind_name, value)
            if kind is TableQuantity.IMPEDANCE:
                if v == 0:
                    raise InputError(
                        "impedance=0 is a pressure-release surface: use PressureRelease()."
                    )
                beta = 1.0 / v
            else:
                beta = v
            if beta.real < 0:
                raise InputError(
                    f"{kind_name}={value!r} has a negative real part of the admittance "
                    f"(β = {beta:.4g}): the wall would generate energy. With data in the "
                    "e^{-iωt} convention, conjugate them; otherwise check the sign."
                )
            shown = float(value) if isinstance(value, numbers.Real) else complex(value)
            source = _Constant(beta, f"{kind_name}={shown!r}")
        self._source = source

    @classmethod
    def _wrap(cls, source) -> "Impedance":
        obj = cls.__new__(cls)
        obj._source = source
        return obj

    # -- further constructors -------------------------------------------------

    @classmethod
    def from_table(cls, frequencies, values=None, *, quantity="impedance", incidence=None,
                   outside="hold") -> "Impedance":
        """A wall whose admittance is interpolated in a table over frequency.

        Parameters
        ----------
        frequencies : (n,) float array, Hz, strictly increasing, n >= 2;
            or a mapping {frequency: value} (then ``values`` is omitted;
            sorted by frequency), e.g. octave-band absorption coefficients
            ``{125: 0.10, 250: 0.15, 500: 0.3, 1000: 0.45}``.
        values : (n,) complex array
            The tabulated quantity at each frequency.
        quantity : TableQuantity or "impedance" (z), "admittance" (β), "alpha"
        incidence : Incidence or "normal" / "random" (alpha only; default normal)
        outside : OutsideRange or "hold" / "error"

        Rule: the given quantity is interpolated linearly in log-frequency
        (real and imaginary parts separately), so that the value at the
        geometric mean √(f1 f2) of two nodes is the mean of their values; an
        α is interpolated first and converted to β afterwards.  Outside
        [f_first, f_last] the end values are held and a warning is issued once
        per wall ("hold"), or an InputError is raised ("error").  Passivity
        at the nodes (Re z >= 0, Re β >= 0, 0 <= α < 1) carries over to every
        interpolated value.

        Returns
        -------
        Impedance (frequency_dependent is True)
        """
        q = _option(TableQuantity, quantity, "quantity")
        if incidence is not None and q is not TableQuantity.ALPHA:
            raise InputError(
                f"incidence={incidence!r} applies only to quantity='alpha', not {q.value!r}."
            )
        inc = _option(Incidence, "normal" if incidence is None else incidence, "incidence") \
            if q is TableQuantity.ALPHA else None
        return cls._wrap(_make_table(frequencies, values, q, inc,
                                     _option(OutsideRange, outside, "outside")))

    @classmethod
    def porous_layer(cls, flow_resistivity, thickness, *, air_gap=0.0, model="miki") -> "Impedance":
        """A porous layer on a rigid backing, optionally with an air gap behind it.

        Parameters
        ----------
        flow_resistivity : float, Pa·s/m² (> 0); e.g. 5e3–5e4 for mineral wool
        thickness : float, m (> 0)
        air_gap : float, m (>= 0); depth of the air layer between the porous
            layer and the rigid wall
        model : PorousModel or "miki" (default), "delany-bazley", "allard-champoux"

        The surface impedance is :func:`porous_layer_impedance` (normal
        incidence, locally reacting) with the air given to
        :meth:`admittance_at`.  A warning is issued (once per wall) at
        frequencies outside the model's range (:data:`VALIDITY`); where the
        model gives an active surface (Re z < 0: Delany–Bazley and
        Allard–Champoux at low f/σ, the defect Miki's refit removes within
        the range) :meth:`admittance_at` raises.  Miki's medium is held at
        f/σ = :data:`MIKI_PASSIVE_FLOOR` below it, so its wall is passive at
        every frequency (the 0 Hz mode of a closed room needs that).

        Returns
        -------
        Impedance (frequency_dependent is True)
        """
        return cls._wrap(_Layer.make(flow_resistivity, thickness, air_gap, model))

    # -- evaluation -------------------------------------------------------------

    @property
    def frequency_dependent(self) -> bool:
        """True when β depends on frequency (the eigenproblem is then nonlinear)."""
        return self._source.frequency_dependent

    @property
    def constant_admittance(self) -> complex | None:
        """β of a frequency-independent wall; None when β depends on frequency."""
        return self._source.beta if isinstance(self._source, _Constant) else None

    def admittance_at(self, frequencies, air: Air | None = None) -> np.ndarray:
        """Normalised admittance β = ρc/Z at the given frequencies.

        Parameters
        ----------
        frequencies : float or array of any shape, Hz (> 0, finite)
        air : Air, optional (default Air()); used by porous layers

        Returns
        -------
        complex array of the shape of ``frequencies`` (0-d for a scalar),
        Re β >= 0.

        Raises
        ------
        InputError
            A frequency <= 0 or not finite; a value outside a table with
            outside="error"; a callable or model giving a non-finite or active
            (Re β < 0) value.
        """
        return self._evaluate(frequencies, air)

    def _evaluate(self, frequencies, air):
        # every public evaluator calls this directly, so the sources' warnings
        # (stacklevel=4: source -> _evaluate -> public method -> caller) point
        # at the caller's line
        f = _frequencies(frequencies)
        air = _air(air)
        flat = f.reshape(-1)
        beta = np.asarray(self._source.admittance(flat, air), dtype=complex).reshape(f.shape)
        if not np.isfinite(beta).all():
            first = flat[~np.isfinite(beta.reshape(-1))][0]
            raise InputError(
                f"{self!r} gives a non-finite admittance at {first:g} Hz; check the data there."
            )
        # Re β < 0 beyond round-off (a lossless wall has Re β = 0 exactly in theory)
        active = beta.real < -1e-12 * np.maximum(1.0, np.abs(beta))
        if active.any():
            i = np.flatnonzero(active.reshape(-1))[0]
            fix = ("use model='miki', or keep to the model's range of f/σ"
                   if isinstance(self._source, _Layer) else
                   "with data in the e^{-iωt} convention, conjugate them; otherwise check the sign")
            raise InputError(
                f"{self!r} gives an active wall (Re β < 0: it would generate energy) at "
                f"{flat[i]:g} Hz, β = {beta.reshape(-1)[i]:.4g}; {fix}."
            )
        return beta

    def impedance_at(self, frequencies, air: Air | None = None) -> np.ndarray:
        """Normalised impedance z = 1/β.

        Returns a complex array of the shape of ``frequencies`` (0-d for a
        scalar); ``inf`` where β = 0 (a rigid wall).
        """
        return _reciprocal(self._evaluate(frequencies, air))

    def absorption_at(self, frequencies, air: Air | None = None, incidence="normal") -> np.ndarray:
        """Absorption coefficient at the given frequencies.

        Parameters
        ----------
        frequencies : float or array of any shape, Hz (> 0)
        air : Air, optional (default Air())
        incidence : "normal" (ISO 10534-2) or "random" (Paris' formula); see
            :func:`absorption_coefficient`.

        Returns
        -------
        float array of the shape of ``frequencies`` (0-d for a scalar).
        """
        inc = _option(Incidence, incidence, "incidence")
        beta = self._evaluate(frequencies, air)
        if inc is Incidence.NORMAL:
            return np.asarray(_alpha_normal_from_admittance(beta), dtype=float)
        return absorption_coefficient(_reciprocal(beta), inc)

    # -- comparison and display -----------------------------------------------

    def __eq__(self, other):
        if not isinstance(other, Impedance):
            return NotImplemented
        return self._source == other._source

    def __hash__(self):
        return hash((Impedance, self._source))

    def __repr__(self) -> str:
        return self._source.describe()


def _make_table(frequencies, values, quantity: TableQuantity, incidence, outside: OutsideRange):
    if isinstance(frequencies, Mapping):
        if values is not None:
            raise InputError(
                "give either a mapping {frequency: value} or frequencies and values, not both."
            )
        items = sorted(frequencies.items(), key=lambda kv: float(kv[0]))
        frequencies = [k for k, _ in items]
        values = [v for _, v in items]
    elif values is None:
        raise InputError("from_table needs values= (one per frequency) unless frequencies is a mapping.")
    try:
        f = np.asarray(frequencies, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"table frequencies {frequencies!r} must be real numbers (Hz).") from exc
    try:
        v = np.asarray(values, dtype=complex)
    except (TypeError, ValueError) as exc:
        raise InputError(f"table values {values!r} must be numbers.") from exc
    if f.ndim != 1 or v.ndim != 1:
        raise InputError(
            f"table frequencies and values must be 1-D; got shapes {f.shape} and {v.shape}."
        )
    if f.size != v.size:
        raise InputError(
            f"table has {f.size} frequencies but {v.size} values; give one value per frequency."
        )
    if f.size < 2:
        raise InputError(
            f"a table needs at least two frequencies, got {f.size}; for one value give a constant "
            "(Impedance(admittance=...), impedance=... or alpha=...)."
        )
    bad = ~(np.isfinite(f) & (f > 0))
    if bad.any():
        raise InputError(
            f"table frequency {float(f[bad][0])!r} Hz must be positive and finite (interpolation is in "
            "log-frequency)."
        )
    steps = np.flatnonzero(np.diff(f) <= 0)
    if steps.size:
        i = int(steps[0])
        raise InputError(
            f"table frequencies must be strictly increasing: frequencies[{i}] = {f[i]:g} Hz and "
            f"frequencies[{i + 1}] = {f[i + 1]:g} Hz are not; sort the table and remove duplicates."
        )
    if not np.isfinite(v).all():
        i = int(np.flatnonzero(~np.isfinite(v))[0])
        raise InputError(f"table value {complex(v[i])!r} at {f[i]:g} Hz must be finite.")
    if quantity is TableQuantity.ALPHA:
        v = _check_alpha(v, incidence, where="table alpha").astype(complex)
    else:
        re = v.real
        if (re < 0).any():
            i = int(np.flatnonzero(re < 0)[0])
            raise InputError(
                f"table {quantity.value} {complex(v[i])!r} at {f[i]:g} Hz has a negative real part: the wall "
                "would generate energy. With data in the e^{-iωt} convention, conjugate them."
            )
        if quantity is TableQuantity.IMPEDANCE:
            # z = 0 on the table or on a segment between two nodes (possible only
            # where Re z = 0 at both ends) would be a pressure-release point
            zero = np.flatnonzero(v == 0)
            seg = np.flatnonzero((re[:-1] == 0) & (re[1:] == 0)
                                 & (np.sign(v.imag[:-1]) * np.sign(v.imag[1:]) < 0))
            if zero.size or seg.size:
                i = int(zero[0]) if zero.size else int(seg[0])
                raise InputError(
                    f"table impedance reaches 0 (a pressure-release surface) at or after {f[i]:g} Hz; "
                    "a table of admittances (quantity='admittance') can represent that."
                )
    return _Table(quantity, tuple(float(x) for x in f),
                  tuple(complex(x) for x in v), incidence, outside)
