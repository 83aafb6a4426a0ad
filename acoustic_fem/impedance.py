"""Locally reacting absorbing walls: :class:`Impedance`.

Time convention: e^{+iωt} (p(t) = Re(p̂ e^{iωt})).  A wall of specific
acoustic impedance Z (Pa·s/m, pressure over the normal particle velocity
*into* the wall) gives the Robin condition ∂p/∂n = -ik β p on the surface,
with the outward normal n, k = ω/c and β = ρc/Z the normalised specific
admittance.  A passive wall has Re(β) >= 0.  Data given in the e^{-iωt}
convention (common in physics texts) must be complex-conjugated before use.
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from ._errors import InputError
from .air import Air
from .walls import Wall

__all__ = ["Impedance"]


def _complex(name, value):
    if isinstance(value, bool) or not isinstance(value, numbers.Number):
        raise InputError(f"{name}={value!r} must be a (complex) number.")
    v = complex(value)
    if not (math.isfinite(v.real) and math.isfinite(v.imag)):
        raise InputError(f"{name}={value!r} must be finite.")
    return v


class Impedance(Wall):
    """A locally reacting wall given by its normalised admittance or impedance.

    Give exactly one of:

    admittance : complex or callable
        β = ρc/Z (dimensionless).  A callable is called with a (n,) float
        array of frequencies in Hz and must return (n,) complex values.
    impedance : complex or callable
        z = Z/(ρc) (dimensionless), the reciprocal of β.

    Re(β) >= 0 (a passive wall) is required for constant values.
    """

    fixes_pressure = False

    def __init__(self, admittance=None, *, impedance=None):
        given = [n for n, v in (("admittance", admittance), ("impedance", impedance))
                 if v is not None]
        if len(given) != 1:
            raise InputError(
                "Impedance needs exactly one of admittance= (β = ρc/Z) or impedance= "
                f"(z = Z/ρc); got {given or 'none'}."
            )
        if admittance is not None:
            value, kind = admittance, "admittance"
        else:
            value, kind = impedance, "impedance"
        if callable(value):
            self._fn = value
            self._beta = None
        else:
            v = _complex(kind, value)
            if kind == "impedance":
                if v == 0:
                    raise InputError(
                        "impedance=0 is a pressure-release surface: use PressureRelease()."
                    )
                v = 1.0 / v
            if v.real < 0:
                raise InputError(
                    f"{kind}={value!r} has a negative real part of the admittance "
                    f"(β = {v:.4g}): the wall would generate energy. With data in the "
                    "e^{-iωt} convention, conjugate them; otherwise check the sign."
                )
            self._fn = None
            self._beta = v
        self._kind = kind

    @property
    def frequency_dependent(self) -> bool:
        """True when β depends on frequency (the eigenproblem is then nonlinear)."""
        return self._fn is not None

    def admittance_at(self, frequencies, air: Air | None = None) -> np.ndarray:
        """Normalised admittance β at the given frequencies.

        Parameters
        ----------
        frequencies : float or (n,) array, Hz
        air : Air, optional (default Air())

        Returns
        -------
        (n,) complex array (0-d for a scalar frequency).
        """
        f = np.asarray(frequencies, dtype=float)
        if self._fn is None:
            return np.full(f.shape, self._beta, dtype=complex)
        out = np.asarray(self._fn(f), dtype=complex)
        if out.shape != f.shape:
            out = np.broadcast_to(out, f.shape).astype(complex)
        if self._kind == "impedance":
            out = 1.0 / out
        return out

    def __repr__(self) -> str:
        if self._fn is None:
            return f"Impedance(admittance={self._beta!r})"
        return f"Impedance({self._kind}={self._fn!r})"
