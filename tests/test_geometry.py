"""Tests of the room builders in ``acoustic_fem.geometry``.

Areas and volumes are checked against closed forms: rectangle areas and box
volumes, polygon areas by the shoelace formula (Gauss's area formula), prism
volume = base area x height.  Eigenfrequencies of the box are checked against
the rectangular-room modes of Morse & Ingard, Theoretical Acoustics (1968),
§9.4, via ``acoustic_fem.analytic.box_modes``.
"""

from __future__ import annotations

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
