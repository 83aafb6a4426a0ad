"""Tests of the room builders in ``acoustic_fem.geometry``.

Areas and volumes are checked against closed forms: rectangle areas and box
volumes, polygon areas by the shoelace formula (Gauss's area formula), prism
volume = base area x height.  Eigenfrequencies of the box are checked against
the rectangular-room modes of Morse & Ingard, Theoretical Acoustics (1968),
§9.4, via ``acoustic_fem.analytic.box_modes``.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

import acoustic_fem
from acoustic_fem import Air, InputError, ResolutionWarning, analytic, solve_modes
from acoustic_fem.geometry import box, floor_plan, mesh_size

REL = 1e-9

# our own L-shaped room: 6 m x 5 m with a 3.5 m x 2 m corner cut out
L_ROOM = [(0.0, 0.0), (6.0, 0.0), (6.0, 3.0), (2.5, 3.0), (2.5, 5.0), (0.0, 5.0)]
L_HEIGHT = 2.8


def _shoelace(P):
    # Gauss's area formula (shoelace): A = 1/2 |sum(x_i y_{i+1} - x_{i+1} y_i)|
    P = np.asarray(P, dtype=float)
    Q = np.roll(P, -1, axis=0)
    return 0.5 * abs(float(np.sum(P[:, 0] * Q[:, 1] - Q[:, 0] * P[:, 1])))


# ------------------------------------------------------------------- box
@pytest.mark.parametrize("order", [1, 2])
def test_box_names_areas_volume(order):
    Lx, Ly, Lz = 2.7, 1.9, 1.6
    m = box((Lx, Ly, Lz), fmax=120, order=order)
    assert m.geometry_order == order
    assert m.surface_names == ("x0", "x1", "y0", "y1", "z0", "z1")
    assert m.volume_names == ("air",)
    # rectangle areas and box volume (elementary closed forms)
    expect = {"x0": Ly * Lz, "x1": Ly * Lz, "y0": Lx * Lz, "y1": Lx * Lz,
              "z0": Lx * Ly, "z1": Lx * Ly}
    for name, a in expect.items():
        assert m.region_measure(name) == pytest.approx(a, rel=REL), name
    assert m.region_measure("air") == pytest.approx(Lx * Ly * Lz, rel=REL)
    # each face lies in its plane: x0 at x = 0, x1 at x = Lx, ...
    for ax, (c, L) in enumerate(zip("xyz", (Lx, Ly, Lz))):
        assert np.allclose(m.points[np.unique(m.boundaries[c + "0"])][:, ax], 0.0, atol=1e-12)
        assert np.allclose(m.points[np.unique(m.boundaries[c + "1"])][:, ax], L, atol=1e-12)


def test_box_modes_against_morse_ingard():
    size = (3.1, 2.3, 2.0)
    fmax = 200.0
    c = Air().c
    m = box(size, fmax=fmax)  # default sizing, P2 geometry
    # rigid box modes, Morse & Ingard (1968) §9.4
    exact = analytic.box_modes(size, c=c, fmax=fmax).frequencies
    # solve a little beyond fmax so that an FE mode just above 200 Hz whose
    # exact value is just below 200 Hz is not cut off; match by sorted order
    with warnings.catch_warnings():
        warnings.simplefilter("error", ResolutionWarning)  # default sizing is fine for P2
        fe_all = solve_modes(m, order=2, fmax=fmax * 1.01).frequencies
    assert len(fe_all) >= len(exact)  # none missing
    fe = fe_all[: len(exact)]
    assert fe[0] == 0.0 and exact[0] == 0.0
    rel = np.abs(fe[1:] / exact[1:] - 1.0)
    assert rel.max() < 5e-3, (rel.max(), exact[1:][np.argmax(rel)])
    # no spurious modes: conforming FE eigenvalues bound the exact ones from
    # above (min-max principle, Strang & Fix 1973 ch. 6; straight faces, exact
    # geometry), so the FE count up to any f cannot exceed the exact count
    wide = analytic.box_modes(size, c=c, fmax=fmax * 1.01).frequencies
    assert len(fe_all) <= len(wide)


# ------------------------------------------------------------ floor plan
@pytest.mark.parametrize("reverse", [False, True], ids=["ccw", "cw"])
@pytest.mark.parametrize("order", [1, 2])
def test_floor_plan_l_room(reverse, order):
    P = L_ROOM[::-1] if reverse else L_ROOM
    m = floor_plan(P, L_HEIGHT, fmax=90, order=order)
    n = len(P)
    assert m.surface_names == tuple(sorted(["floor", "ceiling", *(f"wall_{i}" for i in range(1, n + 1))]))
    assert m.volume_names == ("air",)
    area = _shoelace(P)  # Gauss's area formula
    assert area == pytest.approx(23.0, rel=1e-15)
    # prism: volume = base area x height; floor and ceiling = base area
    assert m.region_measure("air") == pytest.approx(area * L_HEIGHT, rel=REL)
    assert m.region_measure("floor") == pytest.approx(area, rel=REL)
    assert m.region_measure("ceiling") == pytest.approx(area, rel=REL)
    # wall i runs from vertex i to vertex i+1: rectangle of edge length x height
    Pa = np.asarray(P)
    edge = np.linalg.norm(np.roll(Pa, -1, axis=0) - Pa, axis=1)
    for i in range(n):
        name = f"wall_{i + 1}"
        assert m.region_measure(name) == pytest.approx(edge[i] * L_HEIGHT, rel=REL), name
        # its nodes lie on the vertical plane through vertices i and i+1
        a, b = Pa[i], Pa[(i + 1) % n]
        q = m.points[np.unique(m.boundaries[name])][:, :2]
        t = b - a
        dist = np.abs((q[:, 0] - a[0]) * t[1] - (q[:, 1] - a[1]) * t[0]) / np.hypot(*t)
        assert dist.max() < 1e-9, name
    zf = m.points[np.unique(m.boundaries["floor"])][:, 2]
    zc = m.points[np.unique(m.boundaries["ceiling"])][:, 2]
    assert np.allclose(zf, 0.0, atol=1e-12) and np.allclose(zc, L_HEIGHT, atol=1e-12)


def test_floor_plan_rectangle_matches_box_names():
    # a rectangle outline gives the same volume as box() (elementary closed form)
    m = floor_plan(np.array([(0, 0), (3, 0), (3, 2), (0, 2)]), 2.5, fmax=80)
    assert m.measure == pytest.approx(15.0, rel=REL)
    assert m.region_measure("wall_2") == pytest.approx(2 * 2.5, rel=REL)


def test_mesh_size_rule():
    c = Air().c
    assert mesh_size(200) == pytest.approx(c / 200 / 6)
    assert mesh_size(200, order=1) == pytest.approx(c / 200 / 16)
    assert mesh_size(100, air=Air(c=340.0)) == pytest.approx(340.0 / 100 / 6)


# ------------------------------------------------------------ bad input
_BAD = [
    # (callable, value expected in message)
    (lambda: box((3, 2, 2), fmax=0), "fmax=0"),
    (lambda: box((3, 2, 2), fmax=-5.0), "fmax=-5.0"),
    (lambda: box((3, 2, 2), fmax=float("nan")), "fmax=nan"),
    (lambda: box((3, 2, 2), fmax=float("inf")), "fmax=inf"),
    (lambda: box((3, 2, 2), fmax="200"), "fmax='200'"),
    (lambda: box((3, 0.0, 2), fmax=100), "size[1]=0.0"),
    (lambda: box((3, 2, -1), fmax=100), "size[2]=-1"),
    (lambda: box((3, 2), fmax=100), "(3, 2)"),
    (lambda: box((3, 2, 2), fmax=100, order=3), "order=3"),
    (lambda: box((3, 2, 2), fmax=100, order=True), "order=True"),
    (lambda: box((3, 2, 2), fmax=100, air=343), "air=343"),
    (lambda: floor_plan(L_ROOM, 0.0, fmax=100), "height=0.0"),
    (lambda: floor_plan(L_ROOM, -2.5, fmax=100), "height=-2.5"),
    (lambda: floor_plan(L_ROOM, 2.5, fmax=-1), "fmax=-1"),
    (lambda: floor_plan(L_ROOM, 2.5, fmax=100, order=0), "order=0"),
    (lambda: floor_plan([(0, 0), (1, 0)], 2.5, fmax=100), "[(0, 0), (1, 0)]"),
    (lambda: floor_plan([(0, 0, 0), (1, 0, 0), (0, 1, 0)], 2.5, fmax=100), "(3, 3)"),
    # consecutive duplicate
    (lambda: floor_plan([(0, 0), (4, 0), (4, 0), (4, 3), (0, 3)], 2.5, fmax=100), "(4, 0)"),
    # first vertex repeated at the end
    (lambda: floor_plan([(0, 0), (4, 0), (4, 3), (0, 3), (0, 0)], 2.5, fmax=100), "(0, 0)"),
    # non-consecutive duplicate (figure touching itself at a vertex)
    (lambda: floor_plan([(0, 0), (2, 0), (2, 2), (4, 2), (4, 4), (2, 2), (0, 2)], 2.5,
                        fmax=100), "(2, 2)"),
    # bow-tie: edge 2 (4,0)->(0,3) crosses edge 4 (4,3)->(0,0)
    (lambda: floor_plan([(0, 0), (4, 0), (0, 3), (4, 3)], 2.5, fmax=100), "edge 2 (4, 0)->(0, 3)"),
    # a vertex touching a non-adjacent edge
    (lambda: floor_plan([(0, 0), (4, 0), (4, 3), (2, 0), (0, 3)], 2.5, fmax=100), "(2, 0)"),
    # an edge turning back along its predecessor
    (lambda: floor_plan([(0, 0), (4, 0), (2, 0), (2, 3)], 2.5, fmax=100), "vertex 2 (4, 0)"),
    # all vertices on one line: the outline doubles back at an end vertex
    (lambda: floor_plan([(0, 0), (1, 1), (3, 3)], 2.5, fmax=100), "vertex 1 (0, 0)"),
    (lambda: floor_plan([(0, 0), (1, float("nan")), (0, 1)], 2.5, fmax=100), "nan"),
]


@pytest.mark.parametrize("call, text", _BAD, ids=[t for _, t in _BAD])
def test_bad_input(call, text, monkeypatch):
    # validation must happen before any meshing: make gmsh unusable
    import gmsh

    def _no_gmsh(*a, **k):
        raise AssertionError("gmsh was called before the input was validated")

    monkeypatch.setattr(gmsh, "initialize", _no_gmsh)
    monkeypatch.setattr(gmsh, "isInitialized", _no_gmsh)
    with pytest.raises(InputError) as info:
        call()
    assert text in str(info.value)
    assert isinstance(info.value, acoustic_fem.AcousticFemError)


def test_gmsh_left_as_found():
    import gmsh

    assert not gmsh.isInitialized()
    box((1.0, 1.0, 1.0), fmax=100, order=1)
    assert not gmsh.isInitialized()
    gmsh.initialize(interruptible=False)
    try:
        gmsh.model.add("caller_model")
        gmsh.option.setNumber("Mesh.MeshSizeMax", 7.0)
        box((1.0, 1.0, 1.0), fmax=100, order=1)
        assert gmsh.isInitialized()
        assert gmsh.model.getCurrent() == "caller_model"
        assert gmsh.option.getNumber("Mesh.MeshSizeMax") == 7.0
    finally:
        gmsh.finalize()


# ------------------------------------------- sloped ceiling, obstacles, patches
from acoustic_fem import PressureRelease  # noqa: E402
from acoustic_fem.geometry import Column, Cuboid, Patch, cylinder, plan, sphere, tube  # noqa: E402

# our own studio: 5 m x 4 m, ceiling 2.5 m at x = 0 rising 0.1 m per metre
# along x, a 1 m x 1 m x 1.2 m equipment cabinet in the far corner, a
# door in wall_1 (y = 0) and an absorber panel on the ceiling
STUDIO = [(0.0, 0.0), (5.0, 0.0), (5.0, 4.0), (0.0, 4.0)]
SLOPE = (0.1, 0.0)
CABINET = Cuboid("cabinet", (4.0, 3.0, 0.0), (5.0, 4.0, 1.2))
DOOR = Patch("door", "wall_1", (1.0, 0.0), (2.0, 2.0))
PANEL = Patch("panel", "ceiling", (1.0, 1.0), (3.0, 2.0))


def _studio(order=2, fmax=70, **kw):
    return floor_plan(STUDIO, 2.5, fmax=fmax, order=order, ceiling_slope=SLOPE,
                      obstacles=[CABINET], patches=[DOOR, PANEL], **kw)


@pytest.mark.parametrize("order", [1, 2])
def test_sloped_ceiling_obstacle_patches_exact_measures(order):
    m = _studio(order)
    assert set(m.surface_names) == {"floor", "ceiling", "wall_1", "wall_2", "wall_3", "wall_4",
                                    "cabinet", "door", "panel"}
    # exact values by elementary geometry (all faces planar, so the meshes are
    # exact and only rounding remains): ceiling z = 2.5 + 0.1 x
    stretch = math.sqrt(1.0 + 0.1**2)       # area factor of the inclined plane
    z = lambda x: 2.5 + 0.1 * x             # noqa: E731
    wall_1 = 5 * (z(0) + z(5)) / 2          # trapezoid under the slope
    expect = {
        "floor": 20.0 - 1.0,                # minus the cabinet's footprint
        "ceiling": (20.0 - 2.0) * stretch,  # minus the panel (2 m x 1 m in plan)
        "panel": 2.0 * stretch,
        "wall_1": wall_1 - 2.0,             # minus the 1 m x 2 m door
        "door": 2.0,
        "wall_2": 4 * z(5) - 1.0 * 1.2,     # x = 5, minus the cabinet's back
        "wall_3": wall_1 - 1.0 * 1.2,       # y = 4, minus the cabinet's side
        "wall_4": 4 * z(0),
        "cabinet": 1.0 + 2 * 1.0 * 1.2,     # top and the two faces open to the room
        "air": 20.0 * z(2.5) - 1.0 * 1.0 * 1.2,  # prism volume = area x mean height
    }
    for name, value in expect.items():
        assert m.region_measure(name) == pytest.approx(value, rel=REL), name
    # every ceiling node lies on the ceiling plane
    cn = m.points[np.unique(m.boundaries["ceiling"])]
    assert np.allclose(cn[:, 2], z(cn[:, 0]), atol=1e-12)


def test_column_is_curved_to_tolerance():
    m = floor_plan(STUDIO, 2.5, fmax=70, obstacles=[Column("pillar", (2.0, 2.0), 0.25)])
    # lateral area 2 pi r H and volume: the P2 (isoparametric) surface with
    # ELEMENTS_PER_TURN = 12 edges per turn approximates the circle; the
    # quadratic arc's error in the enclosed area is ~ (2 pi / 12)^4 / 720 per
    # unit ~ 1e-4 relative; allow 2e-3 (meshing tolerance)
    assert m.region_measure("pillar") == pytest.approx(2 * math.pi * 0.25 * 2.5, rel=2e-3)
    assert m.region_measure("air") == pytest.approx(50.0 - math.pi * 0.25**2 * 2.5, rel=1e-4)
    assert m.region_measure("floor") == pytest.approx(20.0 - math.pi * 0.25**2, rel=1e-4)


def test_pressure_release_door_lowers_first_mode():
    m = _studio(2, fmax=90)
    rigid = solve_modes(m, order=2, count=12).frequencies
    door = solve_modes(m, {"door": PressureRelease()}, order=2, count=12).frequencies
    # rigid room: a 0 Hz mode; an open door gives the air a way out, so the
    # lowest mode is a low "opening" mode, above 0 Hz but below the first
    # nonzero rigid mode; and every mode rises or stays (a Dirichlet condition
    # on part of the boundary only raises eigenvalues: min-max principle,
    # Courant & Hilbert, Methods of Mathematical Physics vol. 1, ch. VI §2)
    assert rigid[0] == 0.0
    assert 0.0 < door[0] < rigid[1]
    assert np.all(door >= rigid * (1 - 1e-9))


def test_l_room_default_sizing_against_refined_reference():
    # acceptance: every mode below fmax at the default sizing within 0.5 % of a
    # reference on the same geometry with half the mesh size (P2); the
    # refined mesh's own error is ~16x smaller (P2 eigenvalue error ~ h^4)
    fmax = 90.0
    coarse = floor_plan(L_ROOM, L_HEIGHT, fmax=fmax)
    fine = floor_plan(L_ROOM, L_HEIGHT, fmax=2 * fmax)  # h halves
    assert fine.h_max < 0.6 * coarse.h_max
    fc = solve_modes(coarse, order=2, fmax=fmax).frequencies
    ff = solve_modes(fine, order=2, fmax=fmax * 1.01).frequencies
    assert len(ff) >= len(fc) >= 10  # none missing
    rel = np.abs(fc[1:] / ff[1 : len(fc)] - 1.0)
    assert rel.max() < 5e-3, rel.max()


# --------------------------------------------------- other builders vs analytic
def test_cylinder_builder_modes():
    R, H, fmax = 0.6, 1.1, 380.0
    m = cylinder(R, H, fmax=fmax)
    assert m.surface_names == ("bottom", "side", "top")
    assert m.region_measure("air") == pytest.approx(math.pi * R**2 * H, rel=1e-4)
    # rigid closed cylinder, zeros of J_m' (Abramowitz & Stegun Table 9.5)
    exact = analytic.cylinder_modes(R, H, c=Air().c, fmax=fmax).frequencies
    fe = solve_modes(m, order=2, fmax=fmax * 1.02).frequencies
    assert len(fe) >= len(exact)
    assert np.abs(fe[1 : len(exact)] / exact[1:] - 1).max() < 5e-3


def test_sphere_builder_modes():
    R, fmax = 0.5, 500.0
    m = sphere(R, fmax=fmax)
    assert m.surface_names == ("shell",)
    # rigid sphere, zeros of j_l' (Abramowitz & Stegun §10.1)
    exact = analytic.sphere_modes(R, c=Air().c, fmax=fmax).frequencies
    fe = solve_modes(m, order=2, fmax=fmax * 1.02).frequencies
    assert len(fe) >= len(exact)
    assert np.abs(fe[1 : len(exact)] / exact[1:] - 1).max() < 5e-3


@pytest.mark.parametrize("order", [1, 2])
def test_plan_builder_2d_rectangle(order):
    size, fmax = (3.2, 2.1), 300.0
    m = plan([(0, 0), (size[0], 0), size, (0, size[1])], fmax=fmax, order=order)
    assert m.dim == 2 and m.surface_names == ("wall_1", "wall_2", "wall_3", "wall_4")
    assert m.region_measure("air") == pytest.approx(size[0] * size[1], rel=REL)
    assert m.region_measure("wall_2") == pytest.approx(size[1], rel=REL)
    # rigid rectangle (Morse & Ingard 1968 §9.4 in 2D); wall_4 (x = 0) released
    c = Air().c
    exact = analytic.box_modes(size, c=c, walls={"x0": "pressure_release"}, fmax=fmax).frequencies
    fe = solve_modes(m, {"wall_4": PressureRelease()}, order=order, fmax=fmax * 1.02).frequencies
    assert len(fe) >= len(exact)
    assert np.abs(fe[: len(exact)] / exact - 1).max() < 5e-3


@pytest.mark.parametrize("order", [1, 2])
def test_tube_builder(order):
    L, fmax = 1.7, 800.0
    m = tube(L, fmax=fmax, order=order)
    assert m.dim == 1 and m.surface_names == ("x0", "x1")
    # closed-open tube f = (2n+1) c / 4L (Kinsler et al., Fundamentals of Acoustics §10.2)
    exact = analytic.tube_modes(L, c=Air().c, ends=("rigid", "pressure_release"), count=4)
    fe = solve_modes(m, {"x1": PressureRelease()}, order=order, count=4).frequencies
    assert np.abs(fe / exact - 1).max() < 5e-3


_BAD_PARTS = [
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, ceiling_slope=(-0.6, 0)), "vertex 2"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, ceiling_slope=(0.1,)), "ceiling_slope"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60,
                        obstacles=[Cuboid("crate", (4.5, 1, 0), (5.5, 2, 1))]), "'crate'"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60,
                        obstacles=[Cuboid("crate", (1, 1, 0), (2, 2, 3.0))]), "outside the room"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60,
                        obstacles=[Cuboid("crate", (2, 1, 0), (1, 2, 1))]), "hi=(1.0, 2.0, 1.0)"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60,
                        obstacles=[Column("post", (4.9, 2.0), 0.3)]), "'post'"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, obstacles=[Column("post", (2, 2), -0.3)]),
     "radius=-0.3"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, obstacles=["column"]), "Cuboid or a Column"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, patches=[Patch("door", "wall_9", (0, 0), (1, 2))]),
     "'wall_9'"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, patches=[Patch("door", "wall_1", (4.5, 0), (5.5, 2))]),
     "(5.5, 0)"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, patches=[Patch("win", "wall_2", (1, 1), (2, 2.7))]),
     "'win'"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60,
                        patches=[Patch("a", "floor", (1, 1), (2, 2)), Patch("b", "floor", (1.5, 1.5), (3, 3))]),
     "overlap"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, patches=[Patch("floor", "wall_1", (1, 0), (2, 2))]),
     "'floor' is already used"),
    (lambda: floor_plan(STUDIO, 2.5, fmax=60, patches=[Patch("door", "wall_1", (1, 0), (2, 2))],
                        obstacles=[Cuboid("door", (1, 1, 0), (2, 2, 1))]), "'door' is already used"),
    (lambda: cylinder(0.0, 1.0, fmax=100), "radius=0.0"),
    (lambda: sphere(-1.0, fmax=100), "radius=-1.0"),
    (lambda: tube(1.0, fmax=0), "fmax=0"),
    (lambda: plan([(0, 0), (1, 1)], fmax=100), "at least 3"),
]


@pytest.mark.parametrize("call, text", _BAD_PARTS, ids=[t for _, t in _BAD_PARTS])
def test_bad_parts(call, text, monkeypatch):
    import gmsh

    def _no_gmsh(*a, **k):
        raise AssertionError("gmsh was called before the input was validated")

    monkeypatch.setattr(gmsh, "initialize", _no_gmsh)
    monkeypatch.setattr(gmsh, "isInitialized", _no_gmsh)
    with pytest.raises(InputError) as info:
        call()
    assert text in str(info.value)


def test_local_refinement_and_save_load_round_trip(tmp_path):
    from acoustic_fem import read_mesh, write_mesh
    from acoustic_fem.assembly import facet_measures

    coarse = _studio(2)
    fine = _studio(2, refine={"door": 0.08})
    # local refinement: the door's facets shrink to about the asked size (mean
    # facet area of a right-isoceles-ish triangle of side 0.08 m ~ 0.0028 m^2,
    # allow a factor 2), far from the door the mesh stays as it was
    assert facet_measures(fine, "door").mean() < 2 * 0.08**2
    assert facet_measures(coarse, "door").mean() > 4 * facet_measures(fine, "door").mean()
    assert facet_measures(fine, "wall_3").mean() == pytest.approx(
        facet_measures(coarse, "wall_3").mean(), rel=0.5)
    # save and load (.msh) keeps every name and every cell
    path = write_mesh(tmp_path / "studio.msh", fine)
    back = read_mesh(path)
    assert back.surface_names == fine.surface_names and back.volume_names == ("air",)
    assert np.array_equal(back.cells, fine.cells) and np.allclose(back.points, fine.points)
    for name in fine.surface_names:
        assert back.region_measure(name) == pytest.approx(fine.region_measure(name), rel=1e-12)


def test_refine_names_checked():
    from acoustic_fem import UnknownSurfaceError

    with pytest.raises(UnknownSurfaceError, match="'dor'.*'door'"):
        _studio(2, refine={"dor": 0.1})
    with pytest.raises(InputError, match=r"refine\['z0'\]=0"):
        box((2, 2, 2), fmax=100, refine={"z0": 0})


@pytest.mark.parametrize("call", [
    lambda b: box((12.0, 9.0, 5.0), fmax=300, memory_budget=b),
    lambda b: floor_plan(L_ROOM, L_HEIGHT, fmax=400, ceiling_slope=(0.05, 0.0), memory_budget=b),
    lambda b: cylinder(3.0, 4.0, fmax=500, memory_budget=b),
    lambda b: sphere(3.0, fmax=500, memory_budget=b),
], ids=["box", "floor_plan", "cylinder", "sphere"])
def test_memory_budget_refused_before_meshing(call, monkeypatch):
    import gmsh

    from acoustic_fem import ModelTooLargeError

    def _no_gmsh(*a, **k):
        raise AssertionError("gmsh was called before the budget check")

    monkeypatch.setattr(gmsh, "initialize", _no_gmsh)
    monkeypatch.setattr(gmsh, "isInitialized", _no_gmsh)
    with pytest.raises(ModelTooLargeError) as info:
        call(2e9)  # a 2 GB budget; each model needs far more (estimate_cost)
    msg = str(info.value)
    assert "DOFs" in msg and "memory_budget" in msg and "lower fmax" in msg
    assert info.value.estimate.peak_bytes > 2e9
