"""The built-in demos: invented rooms of our own.

* :data:`DEMO_SCENARIO` — the scenario ``acoustic-fem demo`` runs: Room 3 of
  the (fictional) Alder Lane house, a small mixing room with a sloped
  ceiling, a corner absorber, a door and a window, two subwoofers and a grid
  of seats.  It is also the fully commented example of the scenario format;
  ``meshes/mixing_room.toml`` is a copy (``python meshes/make_meshes.py``
  rewrites it, a test checks they agree).
* :func:`demo_room` — the mesh of Room 2 of the same house (below), shipped as
  ``meshes/alder_lane_room2.msh`` for the README tour and the first notebook.

"Room 2 of the Alder Lane rehearsal house" — a fictional, slightly irregular
rehearsal room: a five-sided floor (one corner cut at an angle), a ceiling
sloping from 3.05 m down to 2.55 m, and an open doorway in the left wall
modelled as a pressure-release patch.  Surfaces: ``floor``, ``ceiling``,
``front_wall``, ``angled_wall``, ``right_wall``, ``back_wall``, ``left_wall``
and ``doorway``.  The geometry is built with gmsh's OpenCASCADE kernel at a
mesh size chosen for P2 elements up to the demo's fmax.
"""

from __future__ import annotations

import numpy as np

from .mesh import Mesh

__all__ = ["DEMO_FMAX", "DEMO_FILENAME", "DEMO_SCENARIO", "demo_room"]

#: highest frequency of the Room 2 mesh (Hz)
DEMO_FMAX = 120.0

#: file name the demo scenario is written under
DEMO_FILENAME = "mixing_room.toml"

#: the demo scenario (TOML), a fully commented example of the format
DEMO_SCENARIO = r'''# acoustic-fem scenario — a fully commented example.
#
# Room 3 of the (fictional) Alder Lane house: a small mixing room with a
# sloped ceiling, a deep absorber in one corner, a door and a window, two
# subwoofers and a grid of seats.  Everything here is invented.
#
# Run it:      acoustic-fem run mixing_room.toml --out results
# Check it:    acoustic-fem check mixing_room.toml      (validates, estimates cost)
# Mesh only:   acoustic-fem mesh mixing_room.toml --out room.msh
#
# Units are in the key names (_m metres, _hz hertz, _c degrees Celsius, ...).
# Relative file paths are relative to the folder of this file.  Unknown keys
# are errors (with the closest valid key suggested), so a typo never passes
# silently.

[scenario]
title = "Alder Lane house, room 3: mixing room (invented)"
description = """A 4.6 m x 3.8 m control room with one corner cut at 45 degrees, \
a ceiling falling from 2.7 m to 2.24 m, a 300 mm corner absorber, a timber \
door and a window; two subwoofers at the front wall."""
format_version = 1                 # the scenario format this file is written for

# ---------------------------------------------------------------- geometry
# Exactly one of:
#   builder = "box" | "floor_plan" | "cylinder" | "sphere"  plus the builder's
#             parameters (the keyword arguments of acoustic_fem.geometry.<builder>,
#             in metres; the mesh size comes from [frequencies] and [mesh]);
#   mesh_file = "room.msh"          a gmsh .msh (or any meshio format) with
#             named physical groups for the surfaces;
#   cad_file  = "room.step"         a CAD model (where acoustic_fem.cad is installed).
[geometry]
builder = "floor_plan"
# floor outline (x, y) in metres, in order around the room; wall_i runs from
# vertex i to vertex i+1 (wall_5 closes the outline back to vertex 1)
polygon = [[0.0, 0.0], [4.6, 0.0], [4.6, 3.8], [0.6, 3.8], [0.0, 3.2]]
height = 2.7                       # ceiling height at vertex 1, m
ceiling_slope = [-0.1, 0.0]        # dz/dx, dz/dy of the ceiling plane: 2.24 m at x = 4.6

# solids cut out of the air; each becomes a surface of its own name
[[geometry.obstacles]]
kind = "cuboid"                    # "cuboid" (lo/hi corners, optional angle) or "column"
name = "corner_absorber"
lo = [4.0, 3.2, 0.0]
hi = [4.6, 3.8, 2.0]

# rectangles on a surface that become surfaces of their own; on a wall,
# (u, v) = (distance along the wall from its first vertex, height above the floor)
[[geometry.patches]]
name = "door"
surface = "wall_3"                 # the back wall, from (4.6, 3.8) to (0.6, 3.8)
lo = [1.2, 0.0]
hi = [2.1, 2.0]

[[geometry.patches]]
name = "window"
surface = "wall_2"                 # the right wall, x = 4.6
lo = [0.8, 0.9]
hi = [2.0, 1.9]

# optional: give the builder's surfaces names of your own
[geometry.rename]
wall_1 = "front_wall"
wall_2 = "right_wall"
wall_3 = "back_wall"
wall_4 = "angled_wall"
wall_5 = "left_wall"

# ---------------------------------------------------------------- mesh
[mesh]
element_order = 2                  # 1 (linear) or 2 (quadratic, recommended)
# size_m = 0.4                     # explicit mesh size; default: from accuracy_percent

# ---------------------------------------------------------------- solver
[solver]
# how absorbing surfaces enter the modes: "exact" (the full quadratic
# eigenproblem with each wall evaluated at the mode's own frequency: the
# default) or "perturbation" (rigid-wall modes with first-order decay rates and
# frequency shifts: faster, accurate only while the walls absorb little)
damping = "exact"
# how the frequency sweep is solved: "modal" (a reduced model checked against
# the full system's residual: fast) or "direct" (one sparse solve per frequency)
response_method = "modal"

# ---------------------------------------------------------------- frequencies
[frequencies]
min_hz = 20.0                      # sweep start
max_hz = 120.0                     # sweep end, and modes are computed up to here
step_hz = 1.0                      # sweep step
accuracy_percent = 0.5             # target eigenfrequency error at max_hz (sets the mesh size)

# ---------------------------------------------------------------- air
[air]
temperature_c = 21.0
# pressure_pa = 101325.0
# speed_of_sound_m_s = 343.8       # overrides the value from the temperature
# density_kg_m3 = 1.2

# ---------------------------------------------------------------- surfaces
# surface = "material".  A material is "rigid", "pressure_release" (an idealised
# opening, p = 0), an entry of the material library (acoustic-fem materials
# lists them, with their sources), or a [materials.NAME] table below.
# Surfaces not listed are rigid.
[surfaces]
floor = "carpet_on_concrete"
ceiling = "plasterboard_on_studs"
front_wall = "plasterboard_on_studs"
right_wall = "plasterboard_on_studs"
back_wall = "plaster_on_masonry"
angled_wall = "plasterboard_on_studs"
left_wall = "plasterboard_on_studs"
door = "timber_door"
window = "window_glass"
corner_absorber = "corner_trap"

# ---------------------------------------------------------------- materials
# Each [materials.NAME] is exactly one of:
#   library = "entry"                        a library entry (optionally incidence = ...)
#   bands_hz = [...] and alpha = [...]       your own absorption coefficients
#   absorption_csv = "file.csv"              columns frequency_hz, alpha
#   impedance_csv = "file.csv"               columns frequency_hz, real, imag: z = Z/(rho c),
#                                            e^{+i omega t} convention
#   porous_layer = "preset"  or  flow_resistivity_pa_s_m2 = ... with thickness_m = ...
#                                            (optional air_gap_m, model = "miki" |
#                                            "delany-bazley" | "allard-champoux")
#   admittance = [re, im]  or  impedance = [re, im]    constant, normalised
# incidence = "random" (default) or "normal" says what sound field absorption
# coefficients refer to.  Library values are typical, recalled from handbook
# tables: replace them with measured data.
[materials.corner_trap]
# random-incidence coefficients of 300 mm mineral wool with a flow resistivity
# of 5000 Pa s/m^2 on a rigid backing (the library preset "bass_trap_300mm"),
# computed from the Miki (1990) model at the octave-band centres; below 63 Hz
# the 63 Hz value is held.  porous_layer = "bass_trap_300mm" would use the
# layer model itself at every frequency.
bands_hz = [63, 125, 250, 500, 1000, 2000, 4000]
alpha = [0.59, 0.84, 0.92, 0.91, 0.92, 0.92, 0.92]
incidence = "random"
description = "300 mm mineral wool corner absorber (typical flow resistivity)"

# ---------------------------------------------------------------- sources
# point sources: position in m, volume velocity amplitude in m^3/s, phase in degrees
[[sources]]
name = "sub_left"
position_m = [1.3, 0.35, 0.3]
volume_velocity_m3_s = 0.001
phase_deg = 0.0

[[sources]]
name = "sub_right"
position_m = [3.3, 0.35, 0.3]
volume_velocity_m3_s = 0.001

# ---------------------------------------------------------------- receivers
[[receivers]]
name = "mix_position"
position_m = [2.3, 1.6, 1.2]

# a rectangular grid of seats: columns along x, rows along y (the height may
# rise from the first to the last row for tiered seating)
[[seat_grids]]
name = "couch"
first_seat_m = [1.5, 2.3, 1.1]
last_seat_m = [3.1, 3.0, 1.1]
rows = 2
columns = 3

# ---------------------------------------------------------------- outputs
[outputs]
vtk = true                         # .vtu per mode and a .pvd collection; with sources, also
                                   # the response field at the map frequencies (response.pvd)
plots = true                       # PNG plots
report = true                      # self-contained report.html
ear_height_m = 1.15                # height of the SPL map and the mode-shape slices
mode_slices = 6                    # lowest modes drawn as slices at ear height
# map_frequencies_hz = [38.0, 45.0] # SPL maps at these frequencies (default: lowest modes)
# map_spacing_m = 0.1              # grid spacing of the maps (default: room size / 60)
'''


# floor polygon (x, y) in metres, counter-clockwise; edges name the walls
_FLOOR = [(0.0, 0.0), (5.4, 0.0), (5.4, 3.1), (4.5, 4.2), (0.0, 4.2)]
_WALLS = ["front_wall", "right_wall", "angled_wall", "back_wall", "left_wall"]
_H_LOW, _H_HIGH = 2.55, 3.05  # ceiling height at x = 5.4 and x = 0
_DOOR = (0.0, 1.2, 2.1, 0.95)  # left wall x = 0: y from 1.2 to 2.15, z up to 2.1


def _ceiling_z(x):
    return _H_HIGH + (_H_LOW - _H_HIGH) * x / 5.4


def demo_room(h: float | None = None, order: int = 2) -> Mesh:
    """Mesh of the demo room.

    Parameters
    ----------
    h : float, optional
        Mesh size in m (default: a sixth of the wavelength at DEMO_FMAX for
        P2, common practice for quadratic elements).
    order : int
        Geometry order of the mesh (1 straight; 2 gives mid-edge nodes).

    Returns
    -------
    Mesh with the surfaces listed in the module docstring and volume ``air``.
    """
    from .geometry import _mesh_with_gmsh

    if h is None:
        h = 343.0 / DEMO_FMAX / 6.0

    def build(occ):
        pts = [occ.addPoint(x, y, 0.0) for x, y in _FLOOR]
        lines = [occ.addLine(pts[i], pts[(i + 1) % len(pts)]) for i in range(len(pts))]
        floor = occ.addPlaneSurface([occ.addCurveLoop(lines)])
        prism = occ.extrude([(2, floor)], 0, 0, _H_HIGH + 0.5)
        vol = [t for d, t in prism if d == 3][0]
        # side profile in the x-z plane with the sloped top, extruded along y
        prof = [occ.addPoint(x, 0.0, z) for x, z in
                [(-0.1, 0.0), (5.5, 0.0), (5.5, _ceiling_z(5.5)), (-0.1, _ceiling_z(-0.1))]]
        pl = [occ.addLine(prof[i], prof[(i + 1) % 4]) for i in range(4)]
        side = occ.addPlaneSurface([occ.addCurveLoop(pl)])
        occ.translate([(2, side)], 0, -0.1, 0)
        wedge = [t for d, t in occ.extrude([(2, side)], 0, 4.4, 0) if d == 3][0]
        room, _ = occ.intersect([(3, vol)], [(3, wedge)])
        # the doorway rectangle, fragmented into the left wall as its own face
        y0, y1, z1 = _DOOR[1], _DOOR[1] + _DOOR[3], _DOOR[2]
        dp = [occ.addPoint(0.0, y, z) for y, z in [(y0, 0.0), (y1, 0.0), (y1, z1), (y0, z1)]]
        dl = [occ.addLine(dp[i], dp[(i + 1) % 4]) for i in range(4)]
        door = occ.addPlaneSurface([occ.addCurveLoop(dl)])
        occ.fragment(room, [(2, door)])

    names = ["floor", "ceiling", "doorway", *_WALLS]
    return _mesh_with_gmsh("demo_room", build, _classify, names, h, order)


def _classify(cx: float, cy: float, cz: float) -> str:
    """Name of the demo-room face with centre of mass (cx, cy, cz)."""
    if abs(cz) < 1e-6:
        return "floor"
    if abs(cz - _ceiling_z(cx)) < 1e-3 and cz > 2.0:
        return "ceiling"
    if abs(cx) < 1e-6:
        return "doorway" if (_DOOR[1] < cy < _DOOR[1] + _DOOR[3] and cz < _DOOR[2]) else "left_wall"
    p = np.asarray(_FLOOR)
    for i, name in enumerate(_WALLS):
        a, b = p[i], p[(i + 1) % len(p)]
        t = b - a
        nrm = np.array([t[1], -t[0]]) / np.hypot(*t)
        if abs(np.dot(np.array([cx, cy]) - a, nrm)) < 1e-6:
            return name
    raise RuntimeError(f"demo room: unclassified face at ({cx:.3f}, {cy:.3f}, {cz:.3f})")
