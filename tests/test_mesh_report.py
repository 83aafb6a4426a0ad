"""Tests of the mesh report (``acoustic_fem.mesh_report``) and the cost model (``_cost``).

Sources of the expected values:

* regular tetrahedron: radius ratio 3 r_in / r_circ = 1 and dihedral angle
  arccos(1/3) = 70.528779...° (elementary solid geometry, e.g. Coxeter,
  Regular Polytopes, Table I, from memory);
* corner tetrahedron (0,0,0), (1,0,0), (0,1,0), (0,0,1), worked out by hand
  here: V = 1/6, faces 1/2, 1/2, 1/2 and √3/2, r_in = 3V / ΣA = 1/(3 + √3),
  circumcentre (1/2, 1/2, 1/2) so r_circ = √3/2, hence
  3 r_in / r_circ = √3 - 1; dihedral angles 90° at the three axis edges and
  arccos(1/√3) = 54.7356...° between the slanted face and each axis plane;
* triangles: equilateral 2 r_in / r_circ = 1, angles 60°; right isosceles
  triangle legs 1: r_in = (2 - √2)/2, r_circ = √2/2, ratio 2√2 - 2;
* gmsh's own element quality "gamma" (inscribed / circumscribed radius,
  normalised), an independent implementation, element by element;
* Euler's formula V - E + F - T = 1 for a tetrahedrised ball (Euler-Poincaré);
* region measures: rectangle areas, box volume, Gauss's shoelace formula;
* Weyl's law with the surface term for a rigid box against the exact count
  of box modes (Morse & Ingard §9.4 via analytic.box_modes).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

import acoustic_fem as af
from acoustic_fem import CellType, InputError, Mesh, ModelTooLargeError
from acoustic_fem import _cost
from acoustic_fem.geometry import box, floor_plan, mesh_size
from acoustic_fem.mesh_report import cell_angles, cell_quality, mesh_report

REL = 1e-9

L_ROOM = [(0.0, 0.0), (6.0, 0.0), (6.0, 3.0), (2.5, 3.0), (2.5, 5.0), (0.0, 5.0)]
L_HEIGHT = 2.8


def _tet(P):
    return Mesh(np.asarray(P, float), np.array([[0, 1, 2, 3]]), CellType.TETRAHEDRON)


def _tri(P):
    P = np.column_stack([np.asarray(P, float), np.zeros(3)])
    return Mesh(P, np.array([[0, 1, 2]]), CellType.TRIANGLE)


REGULAR = [(1, 1, 1), (1, -1, -1), (-1, 1, -1), (-1, -1, 1)]  # alternate cube corners
CORNER = [(0, 0, 0), (1, 0, 0), (0, 1, 0), (0, 0, 1)]


# ------------------------------------------------------------ cell measures
def test_regular_tetrahedron():
    m = _tet(REGULAR)
    assert cell_quality(m)[0] == pytest.approx(1.0, abs=1e-14)
    # dihedral angle of the regular tetrahedron: arccos(1/3)
    assert np.allclose(cell_angles(m), math.degrees(math.acos(1 / 3)), atol=1e-12)
    assert math.degrees(math.acos(1 / 3)) == pytest.approx(70.528779, abs=1e-6)


def test_corner_tetrahedron_by_hand():
    m = _tet(CORNER)
    assert cell_quality(m)[0] == pytest.approx(math.sqrt(3) - 1, abs=1e-14)
    ang = cell_angles(m)[0]
    # EDGES order (0,1), (1,2), (0,2), (0,3), (1,3), (2,3): axis edges are
    # (0,1), (0,2), (0,3); the others bound the slanted face x + y + z = 1
    slanted = math.degrees(math.acos(1 / math.sqrt(3)))
    assert ang == pytest.approx([90, slanted, 90, 90, slanted, slanted], abs=1e-12)


def test_flattening_tetrahedron_quality_falls():
    # apex height t above the centroid of an equilateral base: quality -> 0 as t -> 0
    base = np.array([[1, 0, 0], [-0.5, math.sqrt(3) / 2, 0], [-0.5, -math.sqrt(3) / 2, 0]])
    q = [cell_quality(_tet(np.vstack([base, [0, 0, t]])))[0] for t in (math.sqrt(2), 0.3, 0.03)]
    # t = sqrt(2) (edge sqrt(3)): the regular tetrahedron
    assert q[0] == pytest.approx(1.0, abs=1e-14)
    assert q[0] > q[1] > q[2] > 0 and q[2] < 0.1


def test_triangles():
    eq = _tri([(0, 0), (1, 0), (0.5, math.sqrt(3) / 2)])
    assert cell_quality(eq)[0] == pytest.approx(1.0, abs=1e-14)
    assert np.allclose(cell_angles(eq), 60.0, atol=1e-12)
    right = _tri([(0, 0), (1, 0), (0, 1)])
    assert cell_quality(right)[0] == pytest.approx(2 * math.sqrt(2) - 2, abs=1e-14)
    assert sorted(cell_angles(right)[0]) == pytest.approx([45, 45, 90], abs=1e-12)


def test_quality_matches_gmsh_gamma():
    import gmsh

    gmsh.initialize(readConfigFiles=False, interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("q")
        gmsh.model.occ.addSphere(0, 0, 0, 1.0)  # curved: a spread of qualities
        gmsh.model.occ.synchronize()
        gmsh.option.setNumber("Mesh.MeshSizeMax", 0.3)
        gmsh.model.mesh.generate(3)
        _, etags, enodes = gmsh.model.mesh.getElements(3)
        gamma = np.array(gmsh.model.mesh.getElementQualities(etags[0], "gamma"))
        ntags, coord, _ = gmsh.model.mesh.getNodes()
    finally:
        gmsh.finalize()
    X = np.zeros((int(ntags.max()) + 1, 3))
    X[ntags.astype(int)] = np.asarray(coord).reshape(-1, 3)
    cells = np.asarray(enodes[0], dtype=np.int64).reshape(-1, 4)
    used = np.unique(cells)
    renum = np.full(len(X), -1)
    renum[used] = np.arange(len(used))
    m = Mesh(X[used], renum[cells], CellType.TETRAHEDRON)
    q = cell_quality(m)
    assert gamma.min() < 0.6  # a real spread, not only near-regular cells
    # the same measure computed independently (floating-point agreement)
    assert np.abs(q - gamma).max() < 1e-12


# ------------------------------------------------------------------ report
@pytest.mark.parametrize("order", [1, 2])
def test_report_of_l_room(order):
    m = floor_plan(L_ROOM, L_HEIGHT, fmax=100, order=order)
    fmax = 100.0
    rep = mesh_report(m, fmax=fmax)
    # counts: Euler's formula for a tetrahedrised ball, V - E + F - T = 1 with
    # F = (4T + F_b)/2 (each interior face in two cells, boundary face in one)
    F = (4 * rep.n_cells + rep.n_boundary_facets) // 2
    assert rep.n_vertices - rep.n_edges + F - rep.n_cells == 1
    assert rep.n_dofs[1] == rep.n_vertices
    assert rep.n_dofs[2] == rep.n_vertices + rep.n_edges
    assert rep.n_dofs[2] == af.DofMap(m, 2).n_dofs
    # measures: shoelace area x height, wall rectangles
    A = 23.0
    assert rep.volumes["air"] == pytest.approx(A * L_HEIGHT, rel=REL)
    assert rep.surfaces["floor"] == pytest.approx(A, rel=REL)
    assert rep.measure == pytest.approx(A * L_HEIGHT, rel=REL)
    P = np.asarray(L_ROOM)
    perimeter = float(np.linalg.norm(np.roll(P, -1, axis=0) - P, axis=1).sum())
    assert rep.boundary_measure == pytest.approx(2 * A + perimeter * L_HEIGHT, rel=REL)
    assert sum(rep.surfaces.values()) == pytest.approx(rep.boundary_measure, rel=REL)
    # quality: within (0, 1], dihedral angles within (0, 180)
    assert 0 < rep.quality_min <= rep.quality_mean <= 1
    assert 0 < rep.angle_min_deg < 70.53 < rep.angle_max_deg < 180
    # resolution: the definition solve_modes uses
    c = af.Air().c
    assert rep.elements_per_wavelength == pytest.approx(c / fmax / m.h_mean, rel=1e-12)
    assert rep.elements_per_wavelength_max_edge == pytest.approx(c / fmax / m.h_max, rel=1e-12)
    assert rep.resolved[order]  # the builder's default sizing resolves its own fmax
    assert rep.dofs_per_mode[2] == pytest.approx(rep.n_dofs[2] / rep.modes_below_fmax)
    assert set(rep.solve_memory_bytes) == {1, 2}
    text = str(rep)
    for name in ("floor", "ceiling", "wall_1", "air", "DOFs/mode", "dihedral"):
        assert name in text
    assert f"{rep.n_cells} tetrahedron cells" in text
    json.dumps(rep.as_dict())  # plain data


def test_report_flags_unresolved():
    m = box((2.0, 1.5, 1.2), fmax=100, order=1)
    rep = mesh_report(m, fmax=400.0)
    # 4x the design frequency: a quarter of the elements per wavelength
    assert not rep.resolved[1]
    assert "NO" in str(rep)
    rep0 = mesh_report(m)
    assert rep0.fmax is None and rep0.elements_per_wavelength is None
    with pytest.raises(InputError, match="fmax=0"):
        mesh_report(m, fmax=0)
    with pytest.raises(InputError):
        mesh_report("mesh.msh")


def test_report_of_triangles():
    # a 2D mesh: two right triangles forming the unit square
    P = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], float)
    m = Mesh(P, np.array([[0, 1, 2], [0, 2, 3]]), CellType.TRIANGLE,
             boundaries={"bottom": np.array([[0, 1]])}, volumes={"air": np.array([0, 1])})
    rep = mesh_report(m, fmax=100)
    assert rep.volumes["air"] == pytest.approx(1.0, rel=REL)
    assert rep.surfaces["bottom"] == pytest.approx(1.0, rel=REL)
    assert rep.quality_min == pytest.approx(2 * math.sqrt(2) - 2, abs=1e-14)
    assert rep.angle_min_deg == pytest.approx(45.0, abs=1e-12)
    assert rep.angle_max_deg == pytest.approx(90.0, abs=1e-12)
    assert rep.n_dofs == {1: 4, 2: 4 + 5}


# ---------------------------------------------------------------- weyl
def test_weyl_count_against_exact_box_count():
    size = (5.2, 4.1, 2.8)
    c = af.Air().c
    fmax = 300.0
    exact = len(af.analytic.box_modes(size, c=c, fmax=fmax).frequencies)
    V = float(np.prod(size))
    S = 2 * (size[0] * size[1] + size[1] * size[2] + size[0] * size[2])
    k = 2 * math.pi * fmax / c
    w = _cost.weyl_count(3, V, S, k)
    # the omitted edge term L k/(16π) (L = total edge length; Kuttruff, Room
    # Acoustics §3.4, from memory) plus fluctuations of order sqrt(N): allow
    # twice the edge term
    edge = 4 * sum(size) * k / (16 * math.pi)
    assert abs(exact - w) <= 2 * edge + math.sqrt(exact), (exact, w, edge)


# ---------------------------------------------------------------- estimate
@pytest.mark.parametrize("case", ["box P2", "L room P2", "L room P1"])
def test_estimate_within_factor_two_of_builder_meshes(case):
    if case == "box P2":
        size = (5.2, 4.1, 2.8)
        fmax, order = 200.0, 2
        m = box(size, fmax=fmax, order=order)
        V = float(np.prod(size))
        S = 2 * (size[0] * size[1] + size[1] * size[2] + size[0] * size[2])
    else:
        order = 2 if case.endswith("P2") else 1
        fmax = 150.0 if order == 2 else 70.0
        m = floor_plan(L_ROOM, L_HEIGHT, fmax=fmax, order=order)
        V, S = m.measure, m.boundary_measure
    est = af.estimate_cost(V, S, fmax=fmax, order=order)
    dofs = af.DofMap(m, order).n_dofs
    # the issue asks for a factor 2; the model was fitted to within ~15 %
    assert 0.5 < est.n_dofs / dofs < 2.0, (est.n_dofs, dofs)
    assert 0.5 < est.n_cells / m.n_cells < 2.0, (est.n_cells, m.n_cells)
    assert est.h == pytest.approx(mesh_size(fmax, order=order))
    # the report's memory for this mesh and the estimate's agree within 2x
    rep = mesh_report(m, fmax=fmax)
    assert 0.5 < est.peak_bytes / rep.solve_memory_bytes[order] < 2.0


def test_solve_memory_against_recorded_runs():
    # process peak RSS of assembly + 50 lowest modes measured on the
    # development machine (DEVELOPERS.md table, bench/results/modes_scaling.json,
    # 2026-12-01): the issue asks for the estimate within a factor 2
    for n, gb in [(17348, 0.267), (37826, 0.487), (101631, 1.212), (210073, 2.634)]:
        est = _cost.estimate_solve_memory(n, 2, 50)["peak"] / 2**30
        assert 0.5 < est / gb < 2.0, (n, est, gb)


def test_estimate_scaling_and_parts():
    a = af.estimate_cost(60.0, 95.0, fmax=400)
    b = af.estimate_cost(60.0, 95.0, fmax=800)
    # at fixed elements per wavelength the volume term grows as fmax³ and
    # dominates fine meshes: doubling fmax gives nearly 8x the cells
    assert 7.5 < b.n_cells / a.n_cells <= 8.0
    assert b.peak_bytes > a.peak_bytes
    assert set(b.memory) >= {"meshing", "matrices", "factor", "eigen", "base"}
    assert a.n_modes == pytest.approx(_cost.weyl_count(3, 60.0, 95.0, 2 * math.pi * 400 / af.Air().c))
    # default area: a cube of the volume
    assert af.estimate_cost(27.0, fmax=100).area == pytest.approx(54.0)
    json.dumps(b.as_dict())
    assert "DOFs" in str(b)


@pytest.mark.parametrize("kw, text", [
    (dict(volume=60.0, fmax=0), "fmax=0"),
    (dict(volume=60.0, fmax=-100), "fmax=-100"),
    (dict(volume=0.0, fmax=100), "volume=0.0"),
    (dict(volume=60.0, area=-1.0, fmax=100), "area=-1.0"),
    (dict(volume=60.0, fmax=100, order=3), "order=3"),
])
def test_estimate_bad_input(kw, text):
    with pytest.raises(InputError, match=text.replace("(", r"\(")):
        af.estimate_cost(**kw)


def test_budget_refusal_carries_numbers():
    est = af.estimate_cost(500.0, 400.0, fmax=400, order=2)
    budget = 2e9
    assert est.peak_bytes > budget
    with pytest.raises(ModelTooLargeError) as info:
        af.check_memory(est, budget=budget)
    err = info.value
    msg = str(err)
    assert f"{est.n_cells:,} tetrahedra" in msg and f"{est.n_dofs:,} DOFs" in msg
    assert f"{est.peak_bytes / 1e9:.2f} GB" in msg and "2.00 GB" in msg
    assert "fmax 400 Hz" in msg and "memory_budget" in msg
    assert err.estimate is est and err.budget == int(budget)
    assert isinstance(err, InputError) and isinstance(err, af.AcousticFemError)
    # the fmax it suggests does fit, and 3 % more would not (bisection to 1 %)
    import re

    f_ok = float(re.search(r"lower fmax to at most about (\d+) Hz", msg).group(1))
    assert af.estimate_cost(500.0, 400.0, fmax=f_ok, order=2).peak_bytes <= budget
    assert af.estimate_cost(500.0, 400.0, fmax=f_ok * 1.03, order=2).peak_bytes > budget
    # a fitting model passes through; no limit with math.inf
    assert af.check_memory(est, budget=math.inf) is est
    small = af.estimate_cost(10.0, fmax=50)
    assert af.check_memory(small) is small  # default: the machine's memory
    with pytest.raises(InputError, match="memory_budget=-5"):
        af.check_memory(small, budget=-5)


def test_available_memory():
    avail = af.available_memory()
    total = None
    with open("/proc/meminfo") as f:
        for line in f:
            if line.startswith("MemTotal:"):
                total = int(line.split()[1]) * 1024
    assert avail is not None and 0 < avail <= total
