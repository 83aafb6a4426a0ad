"""A small library of typical surface materials, and turning a material into a wall.

**These are typical values, to be replaced by measured data.**  Published
absorption coefficients of "the same" material differ by a factor of two
and more between sources, mountings and samples, and the octave-band
coefficients below were *recalled from memory* of the handbook tables named
beside each entry, not checked against those tables.  For any decision,
measure the actual construction (ISO 354 reverberation room for random
incidence, ISO 10534-2 impedance tube for normal incidence) and give the
measured table instead (``absorption_csv`` / ``impedance_csv`` in a
scenario file).

Two kinds of entries:

* :class:`Material` — octave-band random-incidence absorption coefficients
  α at 125–4000 Hz (and 63 Hz where a source gives it; none of the entries
  below does).  Below the lowest band the coefficient of that band is held
  (:meth:`~acoustic_fem.impedance.Impedance.from_table` with
  ``outside="hold"``, which warns once), a real limitation at the low
  frequencies this program is for.
* :class:`PorousLayer` — a porous absorber given by its airflow resistivity
  σ (Pa·s/m²) and thickness (m), optionally with an air gap in front of the
  rigid backing; its surface impedance comes from an empirical model
  (:meth:`~acoustic_fem.impedance.Impedance.porous_layer`, Miki 1990 by
  default), which reaches to low frequencies through the physics of the
  layer rather than by holding a band value.

Material → wall (:meth:`Material.wall`): the α table becomes an
:class:`~acoustic_fem.impedance.Impedance` by
``Impedance.from_table(bands, alpha, quantity="alpha", incidence=...)``.
The incidence assumption is stated explicitly: **random incidence** is the
default (tabulated Sabine-type coefficients are diffuse-field values; the
conversion uses Paris' formula for a locally reacting surface with a real
impedance), "normal" treats the values as impedance-tube data.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping

from ._errors import InputError

__all__ = [
    "OCTAVE_BANDS_HZ",
    "TYPICAL_VALUES_NOTE",
    "Material",
    "PorousLayer",
    "LIBRARY",
    "POROUS_PRESETS",
    "material",
    "porous_preset",
]

#: Octave-band centre frequencies (Hz) the library uses (IEC 61260 nominal values).
OCTAVE_BANDS_HZ = (63.0, 125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0)

#: The caution printed beside every use of the library.
TYPICAL_VALUES_NOTE = (
    "Library materials are typical values recalled from handbook tables (from memory, not "
    "checked against the tables); replace them by measured data for any decision."
)

_SIX = (125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0)

# Where the recalled values come from.  The values were recalled, not looked
# up: each entry says so.
_EVEREST = ("Everest & Pohlmann, Master Handbook of Acoustics, appendix table of absorption "
            "coefficients of common building materials")
_LONG = "M. Long, Architectural Acoustics (2006), tables of absorption coefficients"
_COX = ("Cox & D'Antonio, Acoustic Absorbers and Diffusers, chapter on porous absorbers "
        "(typical flow resistivities of fibrous materials)")


@dataclass(frozen=True)
class Material:
    """A surface material given by octave-band absorption coefficients.

    Attributes
    ----------
    name : str
        Identifier used in scenario files.
    description : str
    bands_hz : tuple of float
        Octave-band centre frequencies in Hz, ascending (at least two).
    alpha : tuple of float
        Absorption coefficient in each band, 0 <= α < 1.
    source : str
        Where the values come from ("from memory" where recalled).
    incidence : str
        The sound field the values refer to: "random" (diffuse field, the
        kind of coefficient handbook tables give) or "normal".
    """

    name: str
    description: str
    bands_hz: tuple
    alpha: tuple
    source: str
    incidence: str = "random"

    def __post_init__(self) -> None:
        if len(self.bands_hz) != len(self.alpha) or len(self.bands_hz) < 2:
            raise InputError(
                f"material {self.name!r}: give one absorption coefficient per band and at least "
                f"two bands; got {len(self.bands_hz)} bands and {len(self.alpha)} values."
            )
        for f, a in zip(self.bands_hz, self.alpha):
            if not (math.isfinite(f) and f > 0):
                raise InputError(f"material {self.name!r}: band {f!r} Hz must be positive.")
            if not (math.isfinite(a) and 0.0 <= a < 1.0):
                raise InputError(
                    f"material {self.name!r}: alpha={a!r} at {f:g} Hz must be in [0, 1)."
                )
        if any(b <= a for a, b in zip(self.bands_hz, self.bands_hz[1:])):
            raise InputError(f"material {self.name!r}: bands {self.bands_hz} must increase.")
        if self.incidence not in ("random", "normal"):
            raise InputError(
                f"material {self.name!r}: incidence={self.incidence!r} must be 'random' or "
                "'normal'."
            )

    def table(self) -> dict:
        """{band frequency (Hz): α}."""
        return dict(zip(self.bands_hz, self.alpha))

    def wall(self, incidence: str | None = None):
        """The wall condition of this material: an Impedance from its α table.

        Parameters
        ----------
        incidence : "random" or "normal", optional
            Overrides the material's own incidence assumption.

        Returns
        -------
        Impedance
            ``Impedance.from_table(bands_hz, alpha, quantity="alpha",
            incidence=...)``: α interpolated in log-frequency, held outside
            the bands (with a warning once), converted to a real impedance.
        """
        from .impedance import Impedance

        return Impedance.from_table(list(self.bands_hz), list(self.alpha), quantity="alpha",
                                    incidence=incidence or self.incidence)


@dataclass(frozen=True)
class PorousLayer:
    """A porous absorber layer on a rigid backing.

    Attributes
    ----------
    name : str
    description : str
    flow_resistivity : float
        Static airflow resistivity σ in Pa·s/m².
    thickness : float
        Layer thickness in m.
    air_gap : float
        Depth of the air layer between the porous layer and the rigid wall, m.
    source : str
    """

    name: str
    description: str
    flow_resistivity: float
    thickness: float
    source: str
    air_gap: float = 0.0

    def __post_init__(self) -> None:
        for key, unit in (("flow_resistivity", "Pa·s/m²"), ("thickness", "m")):
            v = getattr(self, key)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not (
                    math.isfinite(v) and v > 0):
                raise InputError(f"porous layer {self.name!r}: {key}={v!r} {unit} must be positive.")
        g = self.air_gap
        if isinstance(g, bool) or not isinstance(g, (int, float)) or not (
                math.isfinite(g) and g >= 0):
            raise InputError(f"porous layer {self.name!r}: air_gap={g!r} m must be >= 0.")

    def wall(self, model: str = "miki"):
        """``Impedance.porous_layer(flow_resistivity, thickness, air_gap=..., model=...)``."""
        from .impedance import Impedance

        return Impedance.porous_layer(self.flow_resistivity, self.thickness,
                                      air_gap=self.air_gap, model=model)


def _m(name, description, alpha, source, bands=_SIX):
    return Material(name, description, tuple(float(b) for b in bands),
                    tuple(float(a) for a in alpha), source)


_MATERIALS = [
    _m("concrete_painted", "Concrete block wall, painted",
       (0.10, 0.05, 0.06, 0.07, 0.09, 0.08), f"from memory: {_EVEREST}"),
    _m("concrete_smooth", "Poured concrete, smooth or sealed (floor or wall)",
       (0.01, 0.01, 0.02, 0.02, 0.02, 0.02), f"from memory: {_EVEREST}"),
    _m("brick_unglazed", "Brick wall, unglazed, unpainted",
       (0.03, 0.03, 0.03, 0.04, 0.05, 0.07), f"from memory: {_EVEREST}"),
    _m("plaster_on_masonry", "Plaster on brick or concrete",
       (0.01, 0.02, 0.02, 0.03, 0.04, 0.05), f"from memory: {_LONG}"),
    _m("plasterboard_on_studs", "12.5 mm gypsum plasterboard on studs with a cavity",
       (0.29, 0.10, 0.05, 0.04, 0.07, 0.09), f"from memory: {_EVEREST}"),
    _m("plywood_panel", "Plywood panelling, about 10 mm, on battens over an air space",
       (0.28, 0.22, 0.17, 0.09, 0.10, 0.11), f"from memory: {_EVEREST}"),
    _m("timber_door", "Solid timber door or 25 mm boarding with an air space behind",
       (0.19, 0.14, 0.09, 0.06, 0.06, 0.05), f"from memory: {_EVEREST}"),
    _m("window_glass", "Ordinary window glass",
       (0.35, 0.25, 0.18, 0.12, 0.07, 0.04), f"from memory: {_EVEREST}"),
    _m("plate_glass", "Heavy plate glass, large panes",
       (0.18, 0.06, 0.04, 0.03, 0.02, 0.02), f"from memory: {_EVEREST}"),
    _m("wood_floor_on_joists", "Wooden floor on joists",
       (0.15, 0.11, 0.10, 0.07, 0.06, 0.07), f"from memory: {_EVEREST}"),
    _m("vinyl_on_concrete", "Vinyl or linoleum tiles on concrete",
       (0.02, 0.03, 0.03, 0.03, 0.03, 0.02), f"from memory: {_EVEREST}"),
    _m("carpet_on_concrete", "Heavy carpet laid directly on concrete",
       (0.02, 0.06, 0.14, 0.37, 0.60, 0.65), f"from memory: {_EVEREST}"),
    _m("carpet_on_underlay", "Heavy carpet on a foam or felt underlay",
       (0.08, 0.24, 0.57, 0.69, 0.71, 0.73), f"from memory: {_EVEREST}"),
    _m("heavy_curtain", "Heavy velour curtain, draped to half its area",
       (0.14, 0.35, 0.55, 0.72, 0.70, 0.65), f"from memory: {_EVEREST}"),
]

_POROUS = [
    PorousLayer("mineral_wool_50mm", "50 mm mineral (rock) wool slab, about 40-60 kg/m³",
                15000.0, 0.05, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("mineral_wool_100mm", "100 mm mineral (rock) wool slab, about 40-60 kg/m³",
                15000.0, 0.10, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("glass_wool_100mm", "100 mm light glass wool, about 15-20 kg/m³",
                8000.0, 0.10, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("polyester_50mm", "50 mm polyester fibre panel",
                6000.0, 0.05, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("melamine_foam_50mm", "50 mm open-cell melamine foam",
                10000.0, 0.05, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("bass_trap_300mm", "300 mm of light mineral wool (a deep low-frequency absorber)",
                5000.0, 0.30, f"from memory: flow resistivity typical of {_COX}"),
    PorousLayer("panel_50mm_gap_100mm", "50 mm mineral wool spaced 100 mm off the wall",
                15000.0, 0.05, f"from memory: flow resistivity typical of {_COX}",
                air_gap=0.10),
]

#: name -> Material (typical values; see the module notes).
LIBRARY: Mapping[str, Material] = MappingProxyType({m.name: m for m in _MATERIALS})
#: name -> PorousLayer (typical values; see the module notes).
POROUS_PRESETS: Mapping[str, PorousLayer] = MappingProxyType({p.name: p for p in _POROUS})


def _lookup(table: Mapping, name, what: str):
    if not isinstance(name, str):
        raise InputError(f"{what} name {name!r} must be a string.")
    if name in table:
        return table[name]
    close = difflib.get_close_matches(name, list(table), n=1, cutoff=0.6)
    hint = f"did you mean {close[0]!r}? " if close else ""
    raise InputError(f"no {what} named {name!r}; {hint}known: {', '.join(sorted(table))}.")


def material(name: str) -> Material:
    """The library material ``name`` (InputError naming the closest one if unknown)."""
    return _lookup(LIBRARY, name, "library material")


def porous_preset(name: str) -> PorousLayer:
    """The porous-layer preset ``name`` (InputError naming the closest one if unknown)."""
    return _lookup(POROUS_PRESETS, name, "porous-layer preset")
