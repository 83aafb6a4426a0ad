"""Mesh input/output, mesh validation and bad-input errors of acoustic_fem.

Sources outside the project, named again beside each check:

* gmsh (the mesher, through ``tests/meshgen.py``) writes the files and
  defines the physical groups and their names;
* meshio (an independent reader/writer) reads back our VTK output and
  defines the expected cell-type names;
* Python's ``csv`` module reads back our CSV output;
* exact measures of the box / rectangle (products of side lengths) and of
  the ball, V = 4/3 π r³ and S = 4 π r² (Archimedes, *On the Sphere and
  Cylinder*);
* the VTK file-format documentation (kitware, "VTK File Formats") for the
  local node order of quadratic triangles / tetrahedra: edges (0,1), (1,2),
  (2,0) and (0,1), (1,2), (0,2), (0,3), (1,3), (2,3).

Tolerances: measures of straight regions are sums of a few hundred
positive terms, each exact to rounding, so they match the exact values to
~1e-15 relative; we ask 1e-12.
"""

from __future__ import annotations

import csv
import math
import os

import meshio
import numpy as np
import pytest

import acoustic_fem as af
import meshgen
from acoustic_fem import CellType

RECT = (1.3, 0.7)
BOX = (1.3, 0.9, 0.7)
MEAS_RTOL = 1e-12  # see the module docstring
VERSIONS = (2.2, 4.1)
ORDERS = (1, 2)
CELLS = ("triangle", "tetra")

# local edges of the quadratic cells in VTK node order (VTK File Formats)
_VTK_EDGES = {
    "triangle": [(0, 1), (1, 2), (2, 0)],
    "tetra": [(0, 1), (1, 2), (0, 2), (0, 3), (1, 3), (2, 3)],
}
# local facets of the simplices (vertex triples / pairs), any orientation
_LOCAL_FACETS = {
    "triangle": [(0, 1), (1, 2), (2, 0)],
    "tetra": [(0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)],
}


def _gen(cell, path, order=1, version=4.1, h=None):
    """gmsh mesh of the rectangle (triangle) or box (tetra) via meshgen."""
    if cell == "triangle":
        return meshgen.rect_msh(path, size=RECT, h=h or 0.2, order=order, version=version)
    return meshgen.box_msh(path, size=BOX, h=h or 0.4, order=order, version=version)


def _size(cell):
    return RECT if cell == "triangle" else BOX


def _signed_measures(points, cells, dim):
    """Signed areas / volumes of the straight simplices (own determinant)."""
    X = points[cells[:, : dim + 1], :dim]
    J = np.transpose(X[:, 1:, :] - X[:, :1, :], (0, 2, 1))
    return np.linalg.det(J) / math.factorial(dim)


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """gmsh files: cell x geometry order x msh version."""
    d = tmp_path_factory.mktemp("meshio_files")
    out = {}
    for cell in CELLS:
        for order in ORDERS:
            for v in VERSIONS:
                out[(cell, order, v)] = _gen(cell, d / f"{cell}_{order}_{v}.msh", order, v)
    return out


@pytest.fixture(scope="module")
def small_meshes(tmp_path_factory):
    """Coarse first-order meshes for the solver-based tests."""
    d = tmp_path_factory.mktemp("small")
    return {
        "triangle": af.read_mesh(_gen("triangle", d / "r.msh", h=0.3)),
        "tetra": af.read_mesh(_gen("tetra", d / "b.msh", h=0.5)),
    }


# ---------------------------------------------------------------------------
# reading gmsh files
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("version", VERSIONS)
@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_read_named_groups_and_exact_measures(files, cell, order, version):
    mesh = af.read_mesh(files[(cell, order, version)])
    L = _size(cell)
    dim = len(L)
    assert mesh.cell_type is (CellType.TRIANGLE if dim == 2 else CellType.TETRAHEDRON)
    assert mesh.geometry_order == order
    # group names as meshgen gave them to gmsh (meshgen.rect_msh / box_msh docstrings)
    sides = [a + s for a in "xyz"[:dim] for s in "01"]
    assert set(mesh.boundaries) == set(sides)
    assert set(mesh.volumes) == {"air"}
    np.testing.assert_array_equal(np.sort(mesh.volumes["air"]), np.arange(mesh.n_cells))

    # exact measures: each side x_i = const has measure prod(L_j, j != i)
    for name in sides:
        axis = "xyz".index(name[0])
        exact = float(np.prod([L[j] for j in range(dim) if j != axis]))
        np.testing.assert_allclose(mesh.region_measure(name), exact, rtol=MEAS_RTOL)
        # ... and it is the right side: every node of its facets (vertices and
        # mid-edge nodes) lies on the plane x_axis = 0 or L_axis
        f = mesh.boundaries[name]
        coord = mesh.points[f.ravel(), axis]
        plane = 0.0 if name[1] == "0" else L[axis]
        np.testing.assert_allclose(coord, plane, rtol=0, atol=1e-12)
    np.testing.assert_allclose(mesh.region_measure("air"), np.prod(L), rtol=MEAS_RTOL)
    np.testing.assert_allclose(mesh.measure, np.prod(L), rtol=MEAS_RTOL)


@pytest.mark.parametrize("version", VERSIONS)
def test_unnamed_group_gets_generated_name(tmp_path, version):
    # meshgen.unnamed_groups_msh: unnamed physical surface of tag 7 on x = 0
    # of the unit box; mesh_io documents the name ``boundary_<tag>``
    mesh = af.read_mesh(meshgen.unnamed_groups_msh(tmp_path / "u.msh", version=version))
    assert set(mesh.boundaries) == {"boundary_7"}
    assert set(mesh.volumes) == {"air"}
    np.testing.assert_allclose(mesh.region_measure("boundary_7"), 1.0, rtol=MEAS_RTOL)
    np.testing.assert_allclose(mesh.points[mesh.boundaries["boundary_7"].ravel(), 0], 0.0,
                               atol=1e-12)


def test_curved_sphere_volume_closer_than_linear(tmp_path):
    r = 1.0
    V = 4.0 / 3.0 * math.pi * r**3  # Archimedes
    S = 4.0 * math.pi * r**2
    lin = af.read_mesh(meshgen.sphere_msh(tmp_path / "s1.msh", radius=r, h=0.4, order=1))
    cur = af.read_mesh(meshgen.sphere_msh(tmp_path / "s2.msh", radius=r, h=0.4, order=2))
    assert lin.geometry_order == 1 and cur.geometry_order == 2
    assert lin.n_cells == cur.n_cells  # same vertices, gmsh only adds mid-edge nodes
    # the straight mesh is inscribed (vertices on the sphere, ball convex), so
    # it has less volume and area than the ball
    assert lin.measure < V and lin.region_measure("shell") < S
    err_lin, err_cur = abs(lin.measure - V), abs(cur.measure - V)
    # straight cells: O(h²) volume error; quadratic cells: O(h³) or better.
    # Require a factor 10 (observed ~200) so that curved cells silently
    # integrated as straight ones would fail.
    assert err_cur < 0.1 * err_lin
    assert abs(cur.region_measure("shell") - S) < 0.1 * abs(lin.region_measure("shell") - S)


# ---------------------------------------------------------------------------
# validation by the Mesh constructor
# ---------------------------------------------------------------------------
_UNIT_TET = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)


@pytest.mark.parametrize("cell", CELLS)
def test_degenerate_cell_names_the_cell(cell):
    if cell == "tetra":
        # cell 1 has its 4th vertex in the plane z = 0 of the other three
        pts = np.vstack([_UNIT_TET, [0.3, 0.3, 0.0]])
        cells = np.array([[0, 1, 2, 3], [0, 1, 2, 4]])
        ct = CellType.TETRAHEDRON
    else:
        # cell 1 has three collinear vertices (on y = 0)
        pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.5, 0, 0]], float)
        cells = np.array([[0, 1, 2], [0, 3, 1]])
        ct = CellType.TRIANGLE
    with pytest.raises(af.MeshError) as ei:
        af.Mesh(pts, cells, ct)
    msg = str(ei.value)
    assert "degenerate" in msg and "cell 1" in msg
    assert str(cells[1].tolist()) in msg  # its nodes are named too


def test_orphan_nodes_are_removed_with_warning():
    # two tets sharing a face, plus two nodes (5 and 6) that no cell uses
    pts = np.vstack([_UNIT_TET, [[5, 5, 5]], [1, 1, 1], [7, 7, 7]])
    cells = np.array([[0, 1, 2, 3], [1, 2, 3, 5]])
    faces = {"wall": np.array([[0, 1, 2]]), "top": np.array([[1, 5, 3]])}
    with pytest.warns(af.MeshWarning, match="removed 2"):
        mesh = af.Mesh(pts, cells, CellType.TETRAHEDRON, boundaries=faces)
    assert mesh.n_points == 5
    used = [0, 1, 2, 3, 5]
    np.testing.assert_array_equal(mesh.points, pts[used])
    # cells and boundary facets still name the same coordinates
    np.testing.assert_array_equal(mesh.points[mesh.cells], pts[cells])
    for name, f in faces.items():
        np.testing.assert_array_equal(mesh.points[mesh.boundaries[name]], pts[f])


def _interior_facet(mesh, cell):
    """Vertex numbers of one facet shared by two cells."""
    seen = {}
    for c in mesh.vertices:
        for loc in _LOCAL_FACETS[cell]:
            key = tuple(sorted(c[list(loc)]))
            if key in seen:
                return np.array(key)
            seen[key] = True
    raise AssertionError("no interior facet")


@pytest.mark.parametrize("cell", CELLS)
def test_tagged_interior_facet_names_the_group(small_meshes, cell):
    m = small_meshes[cell]
    inner = _interior_facet(m, cell)[None, :]
    b = dict(m.boundaries)
    b["inner_partition"] = inner
    with pytest.raises(af.MeshError) as ei:
        af.Mesh(m.points, m.cells, m.cell_type, 1, b, m.volumes)
    msg = str(ei.value)
    assert "'inner_partition'" in msg and "not on the boundary" in msg
    assert "x0" not in msg  # the valid groups are not blamed


def _reverse(cells, cell, order):
    """Swap local vertices 0 and 1 (and the mid-edge nodes that go with them).

    The edge-node permutation is derived here from the VTK edge order, not
    taken from the library.
    """
    nv = 3 if cell == "triangle" else 4
    vperm = list(range(nv))
    vperm[0], vperm[1] = 1, 0
    cols = list(vperm)
    if order == 2:
        edges = [frozenset(e) for e in _VTK_EDGES[cell]]
        for a, b in _VTK_EDGES[cell]:
            cols.append(nv + edges.index(frozenset((vperm[a], vperm[b]))))
    return cells[:, cols]


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_reversed_cells_are_fixed(tmp_path, cell, order):
    # curved meshes for geometry order 2 (the disc / the ball), straight for 1
    if order == 1:
        mesh = af.read_mesh(_gen(cell, tmp_path / "m.msh", h=0.35 if cell == "tetra" else 0.2))
    elif cell == "triangle":
        mesh = af.read_mesh(meshgen.disc_msh(tmp_path / "d.msh", h=0.35, order=2))
    else:
        mesh = af.read_mesh(meshgen.sphere_msh(tmp_path / "s.msh", h=0.6, order=2))
    dim = mesh.dim
    assert np.all(_signed_measures(mesh.points, mesh.cells, dim) > 0)

    cells = np.array(mesh.cells)
    flip = np.zeros(len(cells), bool)
    flip[::2] = True  # every other cell reversed
    cells[flip] = _reverse(cells[flip], cell, order)
    assert np.all(_signed_measures(mesh.points, cells, dim)[flip] < 0)

    fixed = af.Mesh(mesh.points, cells, mesh.cell_type, order, mesh.boundaries, mesh.volumes)
    # all orientations positive again, same vertex sets cell by cell
    assert np.all(_signed_measures(fixed.points, fixed.cells, dim) > 0)
    np.testing.assert_array_equal(np.sort(fixed.vertices, axis=1), np.sort(mesh.vertices, axis=1))
    # each mid-edge node still belongs to its edge: same edge-node coordinates
    np.testing.assert_array_equal(fixed.edges, mesh.edges)
    np.testing.assert_array_equal(fixed.edge_nodes, mesh.edge_nodes)
    # the same cell measures (curved ones by quadrature): rounding only
    np.testing.assert_allclose(fixed.cell_measures, mesh.cell_measures, rtol=1e-12)

    # identical problem -> identical eigenvalues up to summation-order
    # rounding (1e-10 relative: the solver is accurate to ~1e-12)
    e0 = af.solve_modes(mesh, order=2, count=8).eigenvalues
    e1 = af.solve_modes(fixed, order=2, count=8).eigenvalues
    assert e0[0] == 0.0 and e1[0] == 0.0  # rigid walls: the uniform-pressure mode
    np.testing.assert_allclose(e1, e0, rtol=1e-10)


# ---------------------------------------------------------------------------
# bad input: our own exceptions, naming the offending value
# ---------------------------------------------------------------------------
def _read_quietly(capsys, path):
    """read_mesh expected to fail; no SystemExit and nothing printed."""
    try:
        with pytest.raises(af.MeshReadError) as ei:
            af.read_mesh(path)
    except SystemExit:  # meshio calls sys.exit(1) when all its readers give up
        pytest.fail("SystemExit escaped from read_mesh")
    out, err = capsys.readouterr()
    assert out == "" and err == ""  # meshio's prints are swallowed
    assert isinstance(ei.value, af.AcousticFemError)
    assert str(path) in str(ei.value)
    return ei.value


def test_missing_file(tmp_path, capsys):
    p = tmp_path / "no_such_room.msh"
    e = _read_quietly(capsys, p)
    assert isinstance(e, FileNotFoundError) or "does not exist" in str(e)


def test_garbage_bytes_file(tmp_path, capsys):
    p = tmp_path / "garbage.msh"
    p.write_bytes(np.random.default_rng(1).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    _read_quietly(capsys, p)


def test_garbage_text_file(tmp_path, capsys):
    # plain text: every meshio reader for .msh gives up, and meshio then
    # prints and calls sys.exit (meshio/_helpers.py, _read_file)
    p = tmp_path / "notes.msh"
    p.write_text("this is not a mesh\n1 2 3\n")
    _read_quietly(capsys, p)


@pytest.mark.parametrize("version", VERSIONS)
def test_truncated_msh(files, tmp_path, capsys, version):
    text = open(files[("tetra", 1, version)]).read()
    p = tmp_path / "truncated.msh"
    p.write_text(text[: len(text) // 2])
    _read_quietly(capsys, p)


def test_directory_is_not_a_mesh(tmp_path, capsys):
    d = tmp_path / "room.msh"
    d.mkdir()
    _read_quietly(capsys, d)


def test_unknown_surface_lists_existing_names(small_meshes):
    mesh = small_meshes["tetra"]
    with pytest.raises(af.UnknownSurfaceError) as ei:
        af.solve_modes(mesh, {"ceiling": af.PressureRelease()}, order=1, count=3)
    msg = str(ei.value)
    assert isinstance(ei.value, af.AcousticFemError)
    assert "'ceiling'" in msg
    for name in ("x0", "x1", "y0", "y1", "z0", "z1"):
        assert f"'{name}'" in msg


@pytest.mark.parametrize("count", [0, -3])
def test_count_not_positive(small_meshes, count):
    with pytest.raises(af.InputError, match=f"count={count}") as ei:
        af.solve_modes(small_meshes["triangle"], order=1, count=count)
    assert isinstance(ei.value, af.AcousticFemError)


@pytest.mark.parametrize("fmax", [0, 0.0, -100.0])
def test_fmax_not_positive(small_meshes, fmax):
    with pytest.raises(af.InputError) as ei:
        af.solve_modes(small_meshes["triangle"], order=1, fmax=fmax)
    assert f"fmax={fmax!r}" in str(ei.value)


@pytest.mark.parametrize("order", [0, 3, 1.5, True])
def test_solve_modes_order_not_1_or_2(small_meshes, order):
    with pytest.raises(af.InputError) as ei:
        af.solve_modes(small_meshes["triangle"], order=order, count=3)
    assert f"order={order!r}" in str(ei.value)


@pytest.mark.parametrize(
    "order",
    [0, 3, 1.5, True],
)
def test_assemble_order_not_1_or_2(small_meshes, order):
    with pytest.raises(af.InputError) as ei:
        af.assemble(small_meshes["triangle"], order)
    assert repr(order) in str(ei.value)


def test_empty_mesh():
    with pytest.raises(af.MeshError) as ei:
        af.Mesh(_UNIT_TET, np.zeros((0, 4), dtype=int), CellType.TETRAHEDRON)
    assert "no tetrahedron cells" in str(ei.value) and "(0, 4)" in str(ei.value)
    # the same through the meshio conversion
    with pytest.raises(af.MeshError) as ei:
        af.from_meshio(meshio.Mesh(_UNIT_TET, []), source="empty.vtu")
    assert "empty.vtu" in str(ei.value) and "no cells" in str(ei.value)


@pytest.mark.parametrize(
    "version",
    [2.2, 4.1],
)
def test_mixed_dimensions_without_volume_group(tmp_path, version):
    p = meshgen.untagged_mixed_msh(tmp_path / "mixed.msh", version=version)
    with pytest.raises(af.MeshError) as ei:
        af.read_mesh(p)
    msg = str(ei.value)
    assert str(p) in msg and "dimensions" in msg and "volume group" in msg


# ---------------------------------------------------------------------------
# VTK output read back by meshio
# ---------------------------------------------------------------------------
_MESHIO_CELL = {("triangle", 1): "triangle", ("triangle", 2): "triangle6",
                ("tetra", 1): "tetra", ("tetra", 2): "tetra10"}


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_vtk_round_trip_with_meshio(small_meshes, tmp_path, cell, order):
    modes = af.solve_modes(small_meshes[cell], {"x1": af.PressureRelease()}, order=order,
                           count=5)
    path = tmp_path / "modes.vtu"
    assert af.write_vtk(path, modes) == path
    back = meshio.read(path)  # source: meshio's independent VTU reader

    # points: the DOF coordinates, bit for bit (binary float64)
    np.testing.assert_array_equal(back.points, modes.dofs.points)
    # cells: the DOF connectivity as linear / quadratic VTK cells
    assert [b.type for b in back.cells] == [_MESHIO_CELL[(cell, order)]]
    np.testing.assert_array_equal(back.cells[0].data, modes.dofs.cell_dofs)
    # every mode, exactly, under the documented name mode_<iii>_<f.3f>Hz
    assert len(back.point_data) == len(modes)
    for i, f in enumerate(modes.frequencies):
        name = f"mode_{i:03d}_{f:.3f}Hz"
        assert name in back.point_data
        arr = back.point_data[name]
        assert arr.shape in ((modes.dofs.n_dofs,), (modes.dofs.n_dofs, 1))  # 1 component
        np.testing.assert_array_equal(arr.reshape(-1), modes.shapes[:, i])
    np.testing.assert_array_equal(np.ravel(back.field_data["frequencies_hz"]), modes.frequencies)
    np.testing.assert_array_equal(np.ravel(back.field_data["decay_rates_per_s"]),
                                  modes.decay_rates)


def test_vtk_not_overwritten_without_flag(small_meshes, tmp_path):
    mesh = small_meshes["triangle"]
    m3 = af.solve_modes(mesh, order=1, count=3)
    m4 = af.solve_modes(mesh, order=1, count=4)
    path = tmp_path / "out.vtu"
    af.write_vtk(path, m3)
    before = path.read_bytes()
    with pytest.raises(af.OutputExistsError) as ei:
        af.write_vtk(path, m4)
    assert isinstance(ei.value, af.AcousticFemError) and str(path) in str(ei.value)
    assert path.read_bytes() == before  # untouched
    assert sorted(os.listdir(tmp_path)) == ["out.vtu"]  # no temporary left behind
    af.write_vtk(path, m4, overwrite=True)
    back = meshio.read(path)
    assert len(back.point_data) == 4  # replaced by the 4-mode file
    np.testing.assert_array_equal(np.ravel(back.field_data["frequencies_hz"]), m4.frequencies)


# ---------------------------------------------------------------------------
# CSV table read back by the csv module
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_modes_csv_round_trip(small_meshes, tmp_path, cell, order):
    modes = af.solve_modes(small_meshes[cell], order=order, count=6)  # rigid: 0 Hz mode
    path = tmp_path / "modes.csv"
    af.write_modes_csv(path, modes)
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))  # source: Python's csv module
    assert len(rows) == len(modes)
    assert [int(r["index"]) for r in rows] == list(range(len(modes)))
    freq = np.array([float(r["frequency_hz"]) for r in rows])
    # 9 significant digits: rounding to 9 digits moves a value by at most half
    # a unit in the 9th digit, i.e. <= 5e-9 relative
    assert freq[0] == 0.0 == modes.frequencies[0]
    np.testing.assert_allclose(freq, modes.frequencies, rtol=5e-9, atol=0)
    for r, f in zip(rows, modes.frequencies):
        assert float(r["frequency_hz"]) == float(f"{f:.9g}")
    with pytest.raises(af.OutputExistsError):
        af.write_modes_csv(path, modes)


# ---------------------------------------------------------------------------
# write_mesh -> read_mesh
# ---------------------------------------------------------------------------
def _rows(a):
    """Rows as a sorted list of tuples (order-independent comparison)."""
    return sorted(map(tuple, np.asarray(a).tolist()))




@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_write_mesh_round_trip(files, tmp_path, cell, order):
    src = af.read_mesh(files[(cell, order, 4.1)])
    # two volume regions, to see that cell groups survive too
    centroid_x = src.points[src.vertices, 0].mean(axis=1)
    left = np.flatnonzero(centroid_x < 0.5 * _size(cell)[0])
    right = np.flatnonzero(centroid_x >= 0.5 * _size(cell)[0])
    mesh = af.Mesh(src.points, src.cells, src.cell_type, order, src.boundaries,
                   {"left": left, "right": right})
    path = tmp_path / "copy.msh"
    af.write_mesh(path, mesh)
    back = af.read_mesh(path)
    assert back.cell_type is mesh.cell_type and back.geometry_order == order
    np.testing.assert_array_equal(back.points, mesh.points)
    assert _rows(back.cells) == _rows(mesh.cells)
    assert set(back.boundaries) == set(mesh.boundaries)
    assert set(back.volumes) == set(mesh.volumes)
    for name, f in mesh.boundaries.items():
        assert _rows(back.boundaries[name]) == _rows(f)
    for name, idx in mesh.volumes.items():
        assert _rows(back.cells[back.volumes[name]]) == _rows(mesh.cells[idx])
    with pytest.raises(af.OutputExistsError):
        af.write_mesh(path, mesh)


def test_write_mesh_round_trip_volume_only(small_meshes, tmp_path):
    src = small_meshes["triangle"]
    mesh = af.Mesh(src.points, src.cells, src.cell_type, 1, {}, {"air": np.arange(src.n_cells)})
    path = tmp_path / "vol.msh"
    af.write_mesh(path, mesh)
    back = af.read_mesh(path)
    np.testing.assert_array_equal(back.points, mesh.points)
    np.testing.assert_array_equal(back.cells, mesh.cells)
    assert set(back.volumes) == {"air"}
