"""The built-in demo: an invented small room of our own.

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

__all__ = ["DEMO_FMAX", "demo_room"]

#: highest frequency of the demo (Hz)
DEMO_FMAX = 120.0

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
