"""Tests of CAD (STEP, BREP) and STL import in ``acoustic_fem.cad``.

Sources of the expected values:

* areas and volumes of planar rooms: rectangle areas, polygon areas by
  Gauss's shoelace formula, prism volume = base area x height, box minus box
  (elementary closed forms);
* modes: the same room built by ``acoustic_fem.geometry`` (box /
  floor_plan) and, for the box, the rectangular-room modes of Morse &
  Ingard, Theoretical Acoustics (1968) §9.4 via ``analytic.box_modes``;
* STEP units: ISO 10303-21 files declare their length unit
  (``SI_UNIT(.MILLI.,.METRE.)``); OpenCASCADE writes millimetres by default.

The CAD files are written in the tests by gmsh's OpenCASCADE kernel (an
independent writer); the STL files by meshio from triangles given here.
"""

from __future__ import annotations

import warnings

import meshio
import numpy as np
import pytest

import acoustic_fem as af
from acoustic_fem import InputError, MeshError, MeshReadError, ModelTooLargeError
from acoustic_fem.cad import (
    FacesInBox,
    FacesOnPlane,
    cad_faces,
    import_cad,
    import_stl,
    stl_patches,
)
from acoustic_fem.geometry import BOX_FACES, box, floor_plan

REL = 1e-9  # exact geometry: only rounding in sums of a few thousand facets

# our own rooms: a box and an L-shaped floor plan
BOX = (3.1, 2.3, 2.0)
L_ROOM = [(0.0, 0.0), (6.0, 0.0), (6.0, 3.0), (2.5, 3.0), (2.5, 5.0), (0.0, 5.0)]
L_HEIGHT = 2.8


def _shoelace(P):
    # Gauss's area formula: A = 1/2 |sum(x_i y_{i+1} - x_{i+1} y_i)|
    P = np.asarray(P, dtype=float)
    Q = np.roll(P, -1, axis=0)
    return 0.5 * abs(float(np.sum(P[:, 0] * Q[:, 1] - Q[:, 0] * P[:, 1])))


# ---------------------------------------------------------------- writers
def _write_cad(path, build):
    """Write the OCC geometry made by ``build(occ)`` to path (.step in mm with its unit)."""
    import gmsh

    gmsh.initialize(readConfigFiles=False, interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        # work in metres, write STEP in OpenCASCADE's default millimetres
        gmsh.option.setString("Geometry.OCCTargetUnit", "M")
        gmsh.model.add("writer")
        build(gmsh.model.occ)
        gmsh.model.occ.synchronize()
        gmsh.write(str(path))
        gmsh.option.setString("Geometry.OCCTargetUnit", "MM")
    finally:
        gmsh.finalize()
    return path


def _box_build(L=BOX, origin=(0.0, 0.0, 0.0)):
    return lambda occ: occ.addBox(*origin, *L)


def _l_room_build(occ):
    n = len(L_ROOM)
    pts = [occ.addPoint(x, y, 0.0) for x, y in L_ROOM]
    lines = [occ.addLine(pts[i], pts[(i + 1) % n]) for i in range(n)]
    floor = occ.addPlaneSurface([occ.addCurveLoop(lines)])
    occ.extrude([(2, floor)], 0.0, 0.0, L_HEIGHT)


def _box_rules(L=BOX):
    """FacesOnPlane rules giving the box faces the builder's names x0 ... z1."""
    rules = {}
    for ax, c in enumerate("xyz"):
        n = np.eye(3)[ax]
        rules[c + "0"] = FacesOnPlane(np.zeros(3), n)
        rules[c + "1"] = FacesOnPlane(L[ax] * n, n)
    return rules


def _cube_stl(lo, hi):
    """8 vertices and 12 outward triangles of the box [lo, hi]."""
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    P = np.array([[lo[0], lo[1], lo[2]], [hi[0], lo[1], lo[2]], [hi[0], hi[1], lo[2]],
                  [lo[0], hi[1], lo[2]], [lo[0], lo[1], hi[2]], [hi[0], lo[1], hi[2]],
                  [hi[0], hi[1], hi[2]], [lo[0], hi[1], hi[2]]])
    T = np.array([[0, 2, 1], [0, 3, 2], [4, 5, 6], [4, 6, 7], [0, 1, 5], [0, 5, 4],
                  [1, 2, 6], [1, 6, 5], [2, 3, 7], [2, 7, 6], [3, 0, 4], [3, 4, 7]])
    return P, T


def _write_stl(path, P, T, binary=True):
    meshio.write(str(path), meshio.Mesh(P, [("triangle", np.asarray(T))]), binary=binary)
    return path


@pytest.fixture(scope="module")
def box_step(tmp_path_factory):
    return _write_cad(tmp_path_factory.mktemp("cad") / "room.step", _box_build())


@pytest.fixture(scope="module")
def box_brep(tmp_path_factory):
    return _write_cad(tmp_path_factory.mktemp("cad") / "room.brep", _box_build())


@pytest.fixture(scope="module")
def l_step(tmp_path_factory):
    return _write_cad(tmp_path_factory.mktemp("cad") / "l_room.stp", _l_room_build)


def _no_meshing(monkeypatch):
    """Make gmsh's meshing fail loudly: errors must come before it."""
    import gmsh

    def _fail(*a, **k):
        raise AssertionError("gmsh meshed before the error was found")

    monkeypatch.setattr(gmsh.model.mesh, "generate", _fail)


def _no_gmsh(monkeypatch):
    import gmsh

    def _fail(*a, **k):
        raise AssertionError("gmsh was started before the error was found")

    monkeypatch.setattr(gmsh, "initialize", _fail)
    monkeypatch.setattr(gmsh, "isInitialized", _fail)


# ------------------------------------------------------------ CAD faces
def test_cad_faces_of_a_box(box_step):
    faces = cad_faces(box_step)
    assert len(faces) == 6
    Lx, Ly, Lz = BOX
    # the six rectangles: centre at the face middle, area = product of its sides
    want = {}
    for ax in range(3):
        others = [i for i in range(3) if i != ax]
        area = BOX[others[0]] * BOX[others[1]]
        for side in (0.0, BOX[ax]):
            c = np.array(BOX) / 2
            c[ax] = side
            want[tuple(np.round(c, 9))] = (area, ax)
    for f in faces:
        key = tuple(np.round(f.centre, 9))
        assert key in want, f
        area, ax = want.pop(key)
        assert f.area == pytest.approx(area, rel=REL)
        assert f.normal is not None and abs(f.normal[ax]) == pytest.approx(1.0, abs=1e-12)
        assert f.kind == "Plane"
    assert not want


def test_step_unit_is_converted_to_metres(box_step):
    text = box_step.read_text()
    # the file holds millimetres, as declared (ISO 10303-21 unit entity)
    assert "SI_UNIT(.MILLI.,.METRE.)" in text
    assert "3.1E+03" in text
    # ... and the faces come back in metres
    xs = [f.centre[0] for f in cad_faces(box_step)]
    assert max(xs) == pytest.approx(BOX[0], rel=REL)


# -------------------------------------------------------- round trips
# Modes are compared on P2 meshes at the builders' default sizing for fmax,
# for the lowest modes (all below 0.9 fmax).  Measured against the exact box
# modes (Morse & Ingard §9.4) these meshes are within 5e-4 (checked below);
# conforming FE eigenvalues lie above the exact ones (min-max principle,
# Strang & Fix 1973 ch. 6; flat faces, so exact geometry), so two such
# meshes of one room differ by less than the larger error: 1e-3 holds with
# a factor 2 margin.
BOX_FMAX, BOX_COUNT = 150.0, 5
L_FMAX, L_COUNT = 100.0, 8


def _lowest(mesh, walls, count):
    with warnings.catch_warnings():
        warnings.simplefilter("error", af.ResolutionWarning)
        return af.solve_modes(mesh, walls, count=count).frequencies


@pytest.fixture(scope="module")
def box_reference():
    ref = box(BOX, fmax=BOX_FMAX)
    return ref, _lowest(ref, {"z1": af.PressureRelease()}, BOX_COUNT)


@pytest.fixture(scope="module")
def l_reference():
    ref = floor_plan(L_ROOM, L_HEIGHT, fmax=L_FMAX)
    return ref, _lowest(ref, {"ceiling": af.PressureRelease()}, L_COUNT)


@pytest.mark.parametrize("fmt", ["step", "brep"])
def test_box_round_trip_modes(fmt, box_step, box_brep, box_reference):
    path = box_step if fmt == "step" else box_brep
    m = import_cad(path, fmax=BOX_FMAX, surfaces=_box_rules())
    ref, g = box_reference
    assert m.surface_names == tuple(sorted(BOX_FACES)) == ref.surface_names
    # exact rectangle areas and box volume
    for ax, c in enumerate("xyz"):
        others = [i for i in range(3) if i != ax]
        for s in "01":
            assert m.region_measure(c + s) == pytest.approx(BOX[others[0]] * BOX[others[1]], rel=REL)
    assert m.region_measure("air") == pytest.approx(np.prod(BOX), rel=REL)
    # rigid room with a pressure-release ceiling
    f = _lowest(m, {"z1": af.PressureRelease()}, BOX_COUNT)
    exact = af.analytic.box_modes(BOX, c=af.Air().c, count=BOX_COUNT,
                                  walls={"z1": "pressure_release"}).frequencies
    assert exact[-1] < 0.9 * BOX_FMAX
    assert np.all(np.abs(g / exact - 1.0) < 5e-4)  # the premise of the tolerance
    assert np.all(np.abs(f / exact - 1.0) < 1e-3)
    assert np.abs(f / g - 1.0).max() < 1e-3  # the acceptance criterion


def test_l_room_step_round_trip_areas_and_modes(l_step, l_reference):
    floor = FacesOnPlane((0, 0, 0), (0, 0, 1))
    ceiling = FacesOnPlane((0, 0, L_HEIGHT), (0, 0, 1))
    m = import_cad(l_step, fmax=L_FMAX, surfaces={"floor": floor, "ceiling": ceiling})
    area = _shoelace(L_ROOM)
    assert area == pytest.approx(23.0, rel=1e-15)
    # prism: volume = base area x height, floor = ceiling = base area
    assert m.region_measure("air") == pytest.approx(area * L_HEIGHT, rel=REL)
    assert m.region_measure("floor") == pytest.approx(area, rel=REL)
    assert m.region_measure("ceiling") == pytest.approx(area, rel=REL)
    # the 6 walls got default names; each is an edge length x height rectangle
    walls = [n for n in m.surface_names if n.startswith("surface_")]
    assert len(walls) == 6
    P = np.asarray(L_ROOM)
    edges = sorted(np.linalg.norm(np.roll(P, -1, axis=0) - P, axis=1) * L_HEIGHT)
    assert sorted(m.region_measure(n) for n in walls) == pytest.approx(edges, rel=REL)
    # modes: the same as the floor_plan builder's mesh of the same room
    ref, g = l_reference
    f = _lowest(m, {"ceiling": af.PressureRelease()}, L_COUNT)
    assert g[-1] < 0.9 * L_FMAX
    assert np.abs(f / g - 1.0).max() < 1e-3  # see the note above


@pytest.mark.parametrize("order", [1, 2])
def test_two_solids_fused(tmp_path, order):
    # two rooms side by side sharing the plane x = 3 (a 2 m x 2 m part of it)
    def build(occ):
        occ.addBox(0, 0, 0, 3, 2, 2)
        occ.addBox(3, 0, 0, 2, 3, 2)

    path = _write_cad(tmp_path / "two.brep", build)
    faces = cad_faces(path)
    # the shared 2 x 2 square is interior: boundary = both boxes' surfaces
    # minus twice the shared square
    total = 2 * (6 + 6 + 4) + 2 * (6 + 4 + 6) - 2 * 4
    assert sum(f.area for f in faces) == pytest.approx(total, rel=REL)
    m = import_cad(path, fmax=120, order=order, others="walls")
    assert m.surface_names == ("walls",)
    assert m.region_measure("air") == pytest.approx(12 + 12, rel=REL)
    assert m.region_measure("walls") == pytest.approx(total, rel=REL)


# ------------------------------------------------------------ naming rules
def test_faces_in_box_names_and_tags(box_step):
    faces = cad_faces(box_step)
    Lx, Ly, Lz = BOX
    floor_tag = [f.tag for f in faces if abs(f.centre[2]) < 1e-9][0]
    m = import_cad(box_step, fmax=100, order=1, surfaces={
        "ceiling": FacesInBox((0, 0, Lz - 0.01), (Lx, Ly, Lz + 0.01)),
        "floor": floor_tag,
        "ends": [FacesOnPlane((0, 0, 0), (1, 0, 0)), FacesOnPlane((Lx, 0, 0), (-1, 0, 0))],
    }, others="sides")
    assert m.surface_names == ("ceiling", "ends", "floor", "sides")
    assert m.region_measure("ceiling") == pytest.approx(Lx * Ly, rel=REL)
    assert m.region_measure("floor") == pytest.approx(Lx * Ly, rel=REL)
    assert m.region_measure("ends") == pytest.approx(2 * Ly * Lz, rel=REL)
    assert m.region_measure("sides") == pytest.approx(2 * Lx * Lz, rel=REL)
    # the ceiling's nodes are on z = Lz
    assert np.allclose(m.points[np.unique(m.boundaries["ceiling"])][:, 2], Lz, atol=1e-12)


def test_overlapping_selectors(box_step, monkeypatch):
    _no_meshing(monkeypatch)
    with pytest.raises(InputError) as info:
        import_cad(box_step, fmax=100, surfaces={
            "lower": FacesInBox((-1, -1, -1), (9, 9, 0.5)),  # the floor only
            "floor": FacesOnPlane((0, 0, 0), (0, 0, 1)),
        })
    msg = str(info.value)
    assert "'lower'" in msg and "'floor'" in msg and "centre (1.55, 1.15, 0)" in msg


def test_empty_selector_lists_faces(box_step, monkeypatch):
    _no_meshing(monkeypatch)
    with pytest.raises(InputError) as info:
        import_cad(box_step, fmax=100, surfaces={"ceiling": FacesOnPlane((0, 0, 2.5), (0, 0, 1))})
    msg = str(info.value)
    assert "'ceiling'" in msg and "matches no face" in msg
    # every face centre is listed so that the user can correct the rule
    for f in cad_faces(box_step):
        assert f"face {f.tag}: centre" in msg


@pytest.mark.parametrize("surfaces, text", [
    ({"x": 99}, "face tag 99"),
    ({"x": "floor"}, "'floor' is not a selector"),
    ({"air": 1}, "'air' is the name of the volume"),
    ({"": 1}, "non-empty"),
    ({"x": [1, [2]]}, "nested"),
    ({"surface_2": 1}, "default name"),
    (["floor"], "mapping"),
])
def test_bad_selectors(box_step, surfaces, text, monkeypatch):
    _no_meshing(monkeypatch)
    with pytest.raises(InputError) as info:
        import_cad(box_step, fmax=100, surfaces=surfaces)
    assert text in str(info.value)


def test_rule_validation():
    with pytest.raises(InputError, match="lo="):
        FacesInBox((1, 0, 0), (0, 1, 1))
    with pytest.raises(InputError, match="normal"):
        FacesOnPlane((0, 0, 0), (0, 0, 0))
    with pytest.raises(InputError, match="point"):
        FacesOnPlane((0, 0), (0, 0, 1))
    with pytest.raises(InputError, match="tol"):
        FacesOnPlane((0, 0, 0), (0, 0, 1), tol=-1)


# -------------------------------------------------------------- bad input
def test_bad_arguments_before_reading(box_step, monkeypatch):
    _no_gmsh(monkeypatch)
    for fmax, text in [(0, "fmax=0"), (-5.0, "fmax=-5.0"), (float("nan"), "fmax=nan")]:
        with pytest.raises(InputError, match=text.replace(".", r"\.")):
            import_cad(box_step, fmax=fmax)
        with pytest.raises(InputError, match=text.replace(".", r"\.")):
            import_stl("any.stl", fmax=fmax)
    with pytest.raises(InputError, match="order=3"):
        import_cad(box_step, fmax=100, order=3)
    with pytest.raises(InputError, match="memory_budget=-1"):
        import_cad(box_step, fmax=100, memory_budget=-1)
    with pytest.raises(InputError, match=r"'\.iges'"):
        import_cad(_touch(box_step.parent / "x.iges"), fmax=100)
    with pytest.raises(MeshReadError, match="does not exist"):
        import_cad(box_step.parent / "missing.step", fmax=100)
    with pytest.raises(InputError, match="feature_angle=190"):
        import_stl("any.stl", fmax=100, feature_angle=190)


def _touch(p):
    p.write_text("")
    return p


def test_unreadable_step(tmp_path):
    p = tmp_path / "broken.step"
    p.write_text("ISO-10303-21;\nthis is not a STEP file\n")
    with pytest.raises((MeshReadError, MeshError)):
        import_cad(p, fmax=100)


def test_open_shell_is_no_solid(tmp_path):
    # five faces of a box: a shell with a hole, no volume
    def build(occ):
        b = occ.addBox(0, 0, 0, 1, 1, 1)
        occ.synchronize()
        import gmsh

        faces = gmsh.model.getBoundary([(3, b)], oriented=False)
        occ.remove([(3, b)])
        top = [t for d, t in faces if abs(occ.getCenterOfMass(2, t)[2] - 1) < 1e-9]
        occ.remove([(2, top[0])], recursive=True)

    path = _write_cad(tmp_path / "open.brep", build)
    with pytest.raises(MeshError, match="no solid"):
        import_cad(path, fmax=100)


def test_budget_refused_before_meshing(box_step, monkeypatch):
    _no_meshing(monkeypatch)
    with pytest.raises(ModelTooLargeError) as info:
        import_cad(box_step, fmax=2000, memory_budget=2e8)
    err = info.value
    est = err.estimate
    assert est.volume == pytest.approx(np.prod(BOX), rel=REL)  # read from the CAD solid
    msg = str(err)
    assert f"{est.n_dofs:,}" in msg and "0.20 GB" in msg and "lower fmax" in msg
    assert isinstance(err, InputError)


# --------------------------------------------------------------------- STL
def test_stl_cube_volume_and_faces(tmp_path):
    L = (3.0, 2.0, 2.5)
    P, T = _cube_stl((0, 0, 0), L)
    T = T.copy()
    T[::3] = T[::3][:, [0, 2, 1]]  # every third triangle flipped: orientation repaired
    path = _write_stl(tmp_path / "cube.stl", P, T, binary=False)
    patches = stl_patches(path)
    assert sum(p.area for p in patches) == pytest.approx(2 * (6 + 7.5 + 5), rel=REL)
    # every patch of the box is flat with an axis normal pointing out of the air
    for p in patches:
        ax = int(np.argmax(np.abs(p.normal)))
        side = 1.0 if p.centre[ax] > L[ax] / 2 else -1.0
        assert p.normal[ax] == pytest.approx(side, abs=1e-12)
    for order in (1, 2):
        m = import_stl(path, fmax=150, order=order, surfaces={
            "floor": FacesOnPlane((0, 0, 0), (0, 0, 1)),
            "ceiling": FacesOnPlane((0, 0, L[2]), (0, 0, 1)),
        })
        assert m.surface_names == ("ceiling", "floor", "walls")
        # flat faces: the re-meshed surface lies on the STL planes, so the box
        # volume and the rectangle areas are exact
        assert m.region_measure("air") == pytest.approx(np.prod(L), rel=REL)
        assert m.region_measure("floor") == pytest.approx(L[0] * L[1], rel=REL)
        assert m.region_measure("walls") == pytest.approx(2 * (L[0] + L[1]) * L[2], rel=REL)


def test_stl_with_obstacle(tmp_path):
    P, T = _cube_stl((0, 0, 0), (3, 2, 2.5))
    lo, hi = (1.0, 0.8, 0.5), (1.5, 1.2, 1.5)
    Q, U = _cube_stl(lo, hi)
    path = _write_stl(tmp_path / "room_column.stl", np.vstack([P, Q]), np.vstack([T, U + 8]))
    m = import_stl(path, fmax=150, surfaces={"column": FacesInBox((0.9, 0.7, 0.4), (1.6, 1.3, 1.6))})
    # binary STL stores IEEE single-precision coordinates (the format's
    # definition): 0.8 and 1.2 are rounded, so the exact values are those of
    # the rounded column
    a, b, c = (np.float32(hi) - np.float32(lo)).astype(float)
    # box minus box
    assert m.region_measure("air") == pytest.approx(15.0 - a * b * c, rel=REL)
    assert m.region_measure("column") == pytest.approx(2 * (a * b + b * c + a * c), rel=REL)
    # the column's patches: normals point out of the air, i.e. into the column
    mid = 0.5 * (np.array(lo) + np.array(hi))
    col = [p for p in stl_patches(path)
           if np.all(p.centre >= np.array(lo) - 1e-6) and np.all(p.centre <= np.array(hi) + 1e-6)]
    assert len(col) >= 6 and sum(p.area for p in col) == pytest.approx(2 * (a * b + b * c + a * c), rel=REL)
    for p in col:
        assert float(p.normal @ (mid - p.centre)) > 0


def test_stl_l_room_modes_match_builder(tmp_path, l_reference):
    import gmsh

    # the L room's surface triangulated by gmsh and written as STL
    path = tmp_path / "l_room.stl"
    gmsh.initialize(readConfigFiles=False, interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("stl")
        _l_room_build(gmsh.model.occ)
        gmsh.model.occ.synchronize()
        gmsh.option.setNumber("Mesh.MeshSizeMax", 0.7)
        gmsh.model.mesh.generate(2)
        gmsh.write(str(path))
    finally:
        gmsh.finalize()
    ceiling = FacesOnPlane((0, 0, L_HEIGHT), (0, 0, 1))
    m = import_stl(path, fmax=L_FMAX, surfaces={"ceiling": ceiling})
    assert m.region_measure("air") == pytest.approx(_shoelace(L_ROOM) * L_HEIGHT, rel=REL)
    assert m.region_measure("ceiling") == pytest.approx(_shoelace(L_ROOM), rel=REL)
    _, g = l_reference
    f = _lowest(m, {"ceiling": af.PressureRelease()}, L_COUNT)
    assert np.abs(f / g - 1.0).max() < 1e-3  # see the note on the round trips


def test_unclosed_stl_refused_before_gmsh(tmp_path, monkeypatch):
    P, T = _cube_stl((0, 0, 0), (1, 1, 1))
    path = _write_stl(tmp_path / "open.stl", P, T[1:])  # one triangle missing
    _no_gmsh(monkeypatch)
    with pytest.raises(MeshError) as info:
        import_stl(path, fmax=100)
    msg = str(info.value)
    # the missing triangle (0, 2, 1) leaves its 3 edges used once
    assert "not closed" in msg and "3 open edge(s)" in msg and "near (" in msg
    with pytest.raises(MeshError):
        stl_patches(path)


def test_non_manifold_stl(tmp_path, monkeypatch):
    # two cubes touching along one edge: that edge is shared by 4 triangles
    P, T = _cube_stl((0, 0, 0), (1, 1, 1))
    Q, U = _cube_stl((1, 1, 0), (2, 2, 1))
    PP, inv = np.unique(np.vstack([P, Q]), axis=0, return_inverse=True)
    TT = inv.ravel()[np.vstack([T, U + 8])]
    path = _write_stl(tmp_path / "edge.stl", PP, TT)
    _no_gmsh(monkeypatch)
    with pytest.raises(MeshError, match=r"1 non-manifold edge"):
        import_stl(path, fmax=100)


def test_separate_bodies_stl(tmp_path, monkeypatch):
    P, T = _cube_stl((0, 0, 0), (1, 1, 1))
    Q, U = _cube_stl((3, 0, 0), (4, 1, 1))
    path = _write_stl(tmp_path / "two.stl", np.vstack([P, Q]), np.vstack([T, U + 8]))
    _no_gmsh(monkeypatch)
    with pytest.raises(MeshError, match="2 separate closed surfaces"):
        import_stl(path, fmax=100)


@pytest.mark.parametrize("flip", ["none", "every third", "all"])
def test_stl_budget_refused_before_gmsh(tmp_path, monkeypatch, flip):
    P, T = _cube_stl((0, 0, 0), (10, 8, 4))
    T = T.copy()
    if flip == "every third":
        T[::3] = T[::3][:, [0, 2, 1]]
    elif flip == "all":  # inside out
        T = T[:, [0, 2, 1]]
    path = _write_stl(tmp_path / "hall.stl", P, T)
    _no_gmsh(monkeypatch)
    with pytest.raises(ModelTooLargeError) as info:
        import_stl(path, fmax=1000, memory_budget=1e9)
    # volume by the divergence theorem on the STL triangles once orientated
    # consistently: 10 x 8 x 4 whatever the file's orientation
    assert info.value.estimate.volume == pytest.approx(320.0, rel=REL)
    assert info.value.estimate.area == pytest.approx(2 * (80 + 40 + 32), rel=REL)


def test_not_an_stl(tmp_path):
    p = tmp_path / "room.stl"
    p.write_text("solid nothing\nendsolid nothing\n")
    with pytest.raises((MeshError, MeshReadError)):
        import_stl(p, fmax=100)
    with pytest.raises(InputError, match="suffix"):
        import_stl(_touch(tmp_path / "room.obj"), fmax=100)


# ------------------------------------------------------------ housekeeping
def test_gmsh_left_as_found_and_silent(box_step, tmp_path, capfd):
    import gmsh

    P, T = _cube_stl((0, 0, 0), (1, 1, 1))
    stl = _write_stl(tmp_path / "c.stl", P, T)
    capfd.readouterr()
    assert not gmsh.isInitialized()
    import_cad(box_step, fmax=100, order=1)
    import_stl(stl, fmax=100, order=1)
    assert not gmsh.isInitialized()
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("caller_model")
        gmsh.option.setNumber("Mesh.MeshSizeMax", 7.0)
        import_cad(box_step, fmax=100, order=1)
        import_stl(stl, fmax=100, order=1)
        assert gmsh.model.getCurrent() == "caller_model"
        assert gmsh.option.getNumber("Mesh.MeshSizeMax") == 7.0
        assert gmsh.option.getString("Geometry.OCCTargetUnit") == ""
    finally:
        gmsh.finalize()
    out, err = capfd.readouterr()
    assert out == "" and err == ""  # the library never prints
