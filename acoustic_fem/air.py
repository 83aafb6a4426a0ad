"""Properties of the air filling the enclosure."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from ._errors import InputError

__all__ = ["Air"]

#: Reference temperature of ISO 9613-1 (K).
T_REF = 293.15
#: Speed of sound at T_REF used by the ISO 9613-1 form (m/s).
C_REF = 343.2
#: Specific gas constant of dry air (J/(kg K)); value from memory (R / M with
#: M = 28.9647 g/mol, R = 8.314462618 J/(mol K)).
R_DRY_AIR = 287.058
#: Standard atmospheric pressure (Pa).
P_REF = 101325.0


@dataclass(frozen=True)
class Air:
    """Air inside the enclosure.

    Parameters
    ----------
    temperature : float
        Air temperature in degrees Celsius (default 20 °C).
    pressure : float
        Static pressure in Pa (default 101325 Pa).
    c : float, optional
        Speed of sound in m/s.  When omitted it follows the form used by
        ISO 9613-1:1993, ``c = 343.2 * sqrt(T / 293.15)`` with T in kelvin.
    rho : float, optional
        Density in kg/m³.  When omitted, the ideal-gas law for dry air,
        ``rho = p / (R T)`` with R = 287.058 J/(kg K).

    Attributes
    ----------
    c, rho : float
        Speed of sound (m/s) and density (kg/m³) in use.
    impedance : float
        Characteristic impedance rho*c (Pa s/m, i.e. rayl).
    """

    temperature: float = 20.0
    pressure: float = P_REF
    c: float = field(default=None)  # type: ignore[assignment]
    rho: float = field(default=None)  # type: ignore[assignment]

    def __post_init__(self) -> None:
        t = float(self.temperature)
        if not math.isfinite(t) or t <= -273.15:
            raise InputError(
                f"Air temperature {self.temperature!r} °C is not physical: "
                "give a finite temperature above -273.15 °C (absolute zero)."
            )
        p = float(self.pressure)
        if not math.isfinite(p) or p <= 0:
            raise InputError(
                f"Air pressure {self.pressure!r} Pa must be a positive finite number "
                f"(standard atmosphere: {P_REF} Pa)."
            )
        kelvin = t + 273.15
        c = C_REF * math.sqrt(kelvin / T_REF) if self.c is None else float(self.c)
        rho = p / (R_DRY_AIR * kelvin) if self.rho is None else float(self.rho)
        for name, value, unit in (("c", c, "m/s"), ("rho", rho, "kg/m³")):
            if not math.isfinite(value) or value <= 0:
                raise InputError(
                    f"Air {name}={value!r} {unit} must be a positive finite number."
                )
        object.__setattr__(self, "temperature", t)
        object.__setattr__(self, "pressure", p)
        object.__setattr__(self, "c", c)
        object.__setattr__(self, "rho", rho)

    @property
    def impedance(self) -> float:
        """Characteristic impedance rho*c in Pa s/m."""
        return self.rho * self.c

    def wavenumber(self, frequency):
        """Wavenumber k = 2 pi f / c (rad/m) for frequencies in Hz (any shape)."""
        return 2.0 * math.pi * frequency / self.c

    def frequency(self, eigenvalue):
        """Frequency in Hz from an eigenvalue k² of the Helmholtz problem (any shape)."""
        import numpy as np

        lam = np.asarray(eigenvalue, dtype=float)
        return self.c * np.sqrt(np.clip(lam, 0.0, None)) / (2.0 * math.pi)
