"""Air properties against handbook values."""

import math

import pytest

from acoustic_fem import Air, InputError


def test_speed_of_sound_iso9613_form():
    # ISO 9613-1:1993 form c = 343.2 (T/293.15 K)^(1/2); at 20 °C exactly 343.2 m/s
    assert Air(20.0).c == pytest.approx(343.2, rel=1e-12)
    # at 0 °C: 331.3 m/s (handbook value, e.g. Kinsler et al. 4th ed. §5.6, from memory)
    assert Air(0.0).c == pytest.approx(331.3, abs=0.1)
    # the square-root law itself: c(T1)/c(T2) = sqrt(T1/T2)
    assert Air(35.0).c / Air(5.0).c == pytest.approx(math.sqrt(308.15 / 278.15), rel=1e-12)


def test_density_ideal_gas():
    # dry air at 20 °C and 101.325 kPa: 1.204 kg/m³ (handbook value, from memory)
    assert Air(20.0).rho == pytest.approx(1.204, abs=0.002)
    # rho c at 20 °C ≈ 413 rayl (Kinsler et al. 4th ed. Table A10, from memory)
    assert Air(20.0).impedance == pytest.approx(413.3, abs=1.0)


def test_overrides_and_errors():
    a = Air(c=340.0, rho=1.2)
    assert (a.c, a.rho) == (340.0, 1.2)
    with pytest.raises(InputError, match="-300"):
        Air(-300.0)
    with pytest.raises(InputError, match="c=-1"):
        Air(c=-1.0)
    assert Air().frequency(Air().wavenumber(100.0) ** 2) == pytest.approx(100.0)
