"""Sanity tests of the gmsh fixture generators in ``tests/meshgen.py``.

Measures (length, area, volume) are computed here directly from the cells
with their own isoparametric quadrature, independent of the library code.
"""

from __future__ import annotations

import math
import os
import sys

import meshio
import numpy as np
import pytest

sys.path.insert(0, os.path.dirname(__file__))
import meshgen  # noqa: E402

VERSIONS = (2.2, 4.1)

# ---------------------------------------------------------------------------
# measures of (possibly curved) Lagrange simplices, meshio/VTK node order
# ---------------------------------------------------------------------------

_EDGES = {
    "line3": [(0, 1)],
    "triangle6": [(0, 1), (1, 2), (2, 0)],
    "tetra10": [(0, 1), (1, 2), (2, 0), (0, 3), (1, 3), (2, 3)],
}
_LINEAR = {"line3": "line", "triangle6": "triangle", "tetra10": "tetra"}
_DIM = {"vertex": 0, "line": 1, "line3": 1, "triangle": 2, "triangle6": 2, "tetra": 3, "tetra10": 3}


def _rule(dim):
    """Quadrature points (reference coordinates) and weights on the unit simplex."""
    if dim == 1:  # 3-point Gauss-Legendre on [0, 1]
        g = math.sqrt(3.0 / 5.0)
        return np.array([[0.5 * (1 - g)], [0.5], [0.5 * (1 + g)]]), np.array([5, 8, 5]) / 18.0
    if dim == 2:  # 6-point rule of degree 4; weights sum to the area 1/2
        a, b = 0.445948490915965, 0.091576213509771
        wa, wb = 0.223381589678011 / 2, 0.109951743655322 / 2
        pts = [(a, a), (1 - 2 * a, a), (a, 1 - 2 * a), (b, b), (1 - 2 * b, b), (b, 1 - 2 * b)]
        return np.array(pts), np.array([wa] * 3 + [wb] * 3)
    if dim == 3:  # 5-point rule of degree 3 (centroid weight negative); sum 1/6
        p = [(0.25, 0.25, 0.25), (1 / 6, 1 / 6, 1 / 6), (0.5, 1 / 6, 1 / 6), (1 / 6, 0.5, 1 / 6), (1 / 6, 1 / 6, 0.5)]
        return np.array(p), np.array([-4 / 5, 9 / 20, 9 / 20, 9 / 20, 9 / 20]) / 6.0
    raise ValueError(dim)


def _grad_shape(cell_type, xi):
    """Reference gradients, shape (n_nodes, dim), of the shape functions at xi."""
    dim = _DIM[cell_type]
    lam = np.concatenate([[1.0 - xi.sum()], xi])
    dlam = np.vstack([-np.ones(dim), np.eye(dim)])
    if cell_type in _EDGES:
        rows = [(4 * lam[i] - 1) * dlam[i] for i in range(dim + 1)]
        rows += [4 * (lam[a] * dlam[b] + lam[b] * dlam[a]) for a, b in _EDGES[cell_type]]
        return np.array(rows)
    return dlam


def measure(points, cell_type, cells):
    """Per-cell length / area / volume (absolute) of a block of cells."""
    dim = _DIM[cell_type]
    X = points[cells]  # (n_cells, n_nodes, 3)
    total = np.zeros(len(cells))
    signed = np.zeros(len(cells))
    for xi, w in zip(*_rule(dim)):
        J = np.einsum("cnk,nd->ckd", X, _grad_shape(cell_type, xi))  # (c, 3, dim)
        if dim == 3:
            d = np.linalg.det(J)
            signed += w * d
        else:
            d = np.sqrt(np.linalg.det(np.einsum("ckd,cke->cde", J, J)))  # Gram determinant
            total += w * d
    return np.abs(signed) if dim == 3 else total


def cells_named(mesh, name):
    """{cell_type: connectivity} of the cells in the physical group ``name``."""
    tag, dim = (int(v) for v in mesh.field_data[name])
    out = {}
    for block, phys in zip(mesh.cells, mesh.cell_data["gmsh:physical"]):
        if _DIM[block.type] != dim:
            continue
        sel = block.data[np.asarray(phys) == tag]
        if len(sel):
            out[block.type] = np.concatenate([out[block.type], sel]) if block.type in out else sel
    return out


def measure_named(mesh, name):
    return sum(measure(mesh.points, t, c).sum() for t, c in cells_named(mesh, name).items())


def nodes_named(mesh, name):
    ids = np.unique(np.concatenate([c.ravel() for c in cells_named(mesh, name).values()]))
    return mesh.points[ids]


def summary(mesh):
    """Cell counts per (type, physical name) -- format independent."""
    names = {(int(t), int(d)): n for n, (t, d) in mesh.field_data.items()}
    counts = {}
    for block, phys in zip(mesh.cells, mesh.cell_data["gmsh:physical"]):
        for tag in np.unique(phys):
            key = (block.type, names.get((int(tag), _DIM[block.type]), int(tag)))
            counts[key] = counts.get(key, 0) + int(np.sum(phys == tag))
    return counts


# ---------------------------------------------------------------------------
# fixtures: every generator, both file versions
# ---------------------------------------------------------------------------

BOX = (1.0, 0.7, 0.5)
RECT = (1.2, 0.8)
LINE = 2.0
CYL = (0.5, 1.0)  # radius, height
SPHERE_R = 1.0
DISC_R = 0.6

GENERATORS = {
    "box": (meshgen.box_msh, dict(size=BOX, h=0.2)),
    "box2": (meshgen.box_msh, dict(size=BOX, h=0.25, order=2)),
    "rect": (meshgen.rect_msh, dict(size=RECT, h=0.15)),
    "rect2": (meshgen.rect_msh, dict(size=RECT, h=0.2, order=2)),
    "line": (meshgen.line_msh, dict(length=LINE, h=0.1)),
    "line2": (meshgen.line_msh, dict(length=LINE, h=0.2, order=2)),
    "cylinder": (meshgen.cylinder_msh, dict(radius=CYL[0], height=CYL[1], h=0.2)),
    "cylinder1": (meshgen.cylinder_msh, dict(radius=CYL[0], height=CYL[1], h=0.2, order=1)),
    "sphere": (meshgen.sphere_msh, dict(radius=SPHERE_R, h=0.3)),
    "sphere1": (meshgen.sphere_msh, dict(radius=SPHERE_R, h=0.3, order=1)),
    "disc": (meshgen.disc_msh, dict(radius=DISC_R, h=0.15)),
    "disc1": (meshgen.disc_msh, dict(radius=DISC_R, h=0.15, order=1)),
    "lshape": (meshgen.lshape_msh, dict(h=0.6)),
    "unnamed": (meshgen.unnamed_groups_msh, dict(h=0.3)),
    "untagged": (meshgen.untagged_mixed_msh, dict(h=0.3)),
}


@pytest.fixture(scope="module")
def meshes(tmp_path_factory):
    root = tmp_path_factory.mktemp("meshgen")
    files, out = {}, {}
    for key, (fn, kw) in GENERATORS.items():
        for v in VERSIONS:
            path = root / f"v{v}" / f"{key}.msh"  # sub-directory is created by the generator
            ret = fn(path, version=v, **kw)
            assert ret == str(path) and os.path.isfile(ret)
            files[key, v] = ret
            out[key, v] = meshio.read(ret)
    return out, files


@pytest.fixture(scope="module", params=VERSIONS)
def m(request, meshes):
    version = request.param
    return lambda key: meshes[0][key, version]


def _field(mesh):
    return {n: (int(t), int(d)) for n, (t, d) in mesh.field_data.items()}


def _types(mesh):
    return {b.type for b in mesh.cells}


# ---------------------------------------------------------------------------
# tests
# ---------------------------------------------------------------------------


def test_box(m):
    Lx, Ly, Lz = BOX
    mesh = m("box")
    dims = {n: d for n, (_, d) in _field(mesh).items()}
    assert dims == {"x0": 2, "x1": 2, "y0": 2, "y1": 2, "z0": 2, "z1": 2, "air": 3}
    assert _types(mesh) == {"triangle", "tetra"}
    assert mesh.points.shape[1] == 3
    assert measure_named(mesh, "air") == pytest.approx(Lx * Ly * Lz, rel=1e-12)
    for axis, letter in enumerate("xyz"):
        for side, value in (("0", 0.0), ("1", BOX[axis])):
            name = letter + side
            assert np.allclose(nodes_named(mesh, name)[:, axis], value, atol=1e-12), name
            other = [BOX[i] for i in range(3) if i != axis]
            assert measure_named(mesh, name) == pytest.approx(other[0] * other[1], rel=1e-12), name


def test_box_order2(m):
    mesh = m("box2")
    assert _types(mesh) == {"triangle6", "tetra10"}
    assert measure_named(mesh, "air") == pytest.approx(np.prod(BOX), rel=1e-12)
    assert np.allclose(nodes_named(mesh, "x1")[:, 0], BOX[0], atol=1e-12)


def test_rect(m):
    Lx, Ly = RECT
    for key, line_t, tri_t in (("rect", "line", "triangle"), ("rect2", "line3", "triangle6")):
        mesh = m(key)
        dims = {n: d for n, (_, d) in _field(mesh).items()}
        assert dims == {"x0": 1, "x1": 1, "y0": 1, "y1": 1, "air": 2}
        assert _types(mesh) == {line_t, tri_t}
        assert np.allclose(mesh.points[:, 2], 0.0)
        assert measure_named(mesh, "air") == pytest.approx(Lx * Ly, rel=1e-12)
        for axis, letter in enumerate("xy"):
            for side, value in (("0", 0.0), ("1", RECT[axis])):
                name = letter + side
                assert np.allclose(nodes_named(mesh, name)[:, axis], value, atol=1e-12)
                assert measure_named(mesh, name) == pytest.approx(RECT[1 - axis], rel=1e-12)


def test_line(m):
    for key, line_t in (("line", "line"), ("line2", "line3")):
        mesh = m(key)
        assert _field(mesh) == {"x0": (1, 0), "x1": (2, 0), "air": (3, 1)}
        assert _types(mesh) == {"vertex", line_t}
        assert np.allclose(mesh.points[:, 1:], 0.0)
        assert measure_named(mesh, "air") == pytest.approx(LINE, rel=1e-12)
        assert nodes_named(mesh, "x0").tolist() == [[0.0, 0.0, 0.0]]
        assert nodes_named(mesh, "x1").tolist() == [[LINE, 0.0, 0.0]]


def test_cylinder(m):
    R, H = CYL
    exact = math.pi * R**2 * H  # elementary cylinder volume
    mesh, mesh1 = m("cylinder"), m("cylinder1")
    dims = {n: d for n, (_, d) in _field(mesh).items()}
    assert dims == {"side": 2, "bottom": 2, "top": 2, "air": 3}
    assert _types(mesh) == {"triangle6", "tetra10"}
    assert _types(mesh1) == {"triangle", "tetra"}
    side = nodes_named(mesh, "side")  # includes the curved mid-edge nodes
    assert np.allclose(np.hypot(side[:, 0], side[:, 1]), R, atol=1e-9)
    assert np.allclose(nodes_named(mesh, "bottom")[:, 2], 0.0, atol=1e-12)
    assert np.allclose(nodes_named(mesh, "top")[:, 2], H, atol=1e-12)
    err2 = abs(measure_named(mesh, "air") - exact) / exact
    err1 = abs(measure_named(mesh1, "air") - exact) / exact
    assert err2 < 1e-3 and err2 < err1 / 5
    assert measure_named(mesh, "side") == pytest.approx(2 * math.pi * R * H, rel=1e-3)
    assert measure_named(mesh, "top") == pytest.approx(math.pi * R**2, rel=1e-3)


def test_sphere_curved_order2_beats_order1(m):
    R = SPHERE_R
    exact = 4.0 / 3.0 * math.pi * R**3  # elementary sphere volume formula
    mesh, mesh1 = m("sphere"), m("sphere1")
    assert _field(mesh) == {"shell": (1, 2), "air": (2, 3)}
    assert _types(mesh) == {"triangle6", "tetra10"}
    assert _types(mesh1) == {"triangle", "tetra"}
    shell = nodes_named(mesh, "shell")
    assert np.allclose(np.linalg.norm(shell, axis=1), R, atol=1e-9)
    err2 = abs(measure_named(mesh, "air") - exact) / exact
    err1 = abs(measure_named(mesh1, "air") - exact) / exact
    assert err1 > 1e-3  # the inscribed polyhedron is visibly too small ...
    assert err2 < err1 / 10  # ... the curved quadratic mesh is much closer
    assert measure_named(mesh, "shell") == pytest.approx(4 * math.pi * R**2, rel=1e-3)


def test_tetra10_node_order(m):
    """Mid-edge nodes sit (close to) the midpoints of the edges assumed above."""
    mesh = m("sphere")
    tets = cells_named(mesh, "air")["tetra10"]
    X = mesh.points[tets]
    for k, (a, b) in enumerate(_EDGES["tetra10"]):
        mid = 0.5 * (X[:, a] + X[:, b])
        length = np.linalg.norm(X[:, a] - X[:, b], axis=1)
        assert np.all(np.linalg.norm(X[:, 4 + k] - mid, axis=1) < 0.2 * length)


def test_disc(m):
    R = DISC_R
    exact = math.pi * R**2
    mesh, mesh1 = m("disc"), m("disc1")
    assert _field(mesh) == {"rim": (1, 1), "air": (2, 2)}
    assert _types(mesh) == {"line3", "triangle6"}
    assert _types(mesh1) == {"line", "triangle"}
    assert np.allclose(mesh.points[:, 2], 0.0)
    rim = nodes_named(mesh, "rim")
    assert np.allclose(np.hypot(rim[:, 0], rim[:, 1]), R, atol=1e-9)
    err2 = abs(measure_named(mesh, "air") - exact) / exact
    err1 = abs(measure_named(mesh1, "air") - exact) / exact
    assert err2 < err1 / 10
    assert measure_named(mesh, "rim") == pytest.approx(2 * math.pi * R, rel=1e-4)


def test_lshape(m):
    mesh = m("lshape")
    H = meshgen.LSHAPE_HEIGHT
    dims = {n: d for n, (_, d) in _field(mesh).items()}
    assert dims == {"floor": 2, "ceiling": 2, "walls": 2, "air": 3}
    poly = np.array(meshgen.LSHAPE_FLOOR)
    x, y = poly[:, 0], poly[:, 1]
    area = 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))  # shoelace
    perimeter = np.linalg.norm(poly - np.roll(poly, -1, axis=0), axis=1).sum()
    assert area == pytest.approx(16.02)
    assert measure_named(mesh, "air") == pytest.approx(area * H, rel=1e-12)
    assert measure_named(mesh, "floor") == pytest.approx(area, rel=1e-12)
    assert measure_named(mesh, "ceiling") == pytest.approx(area, rel=1e-12)
    assert measure_named(mesh, "walls") == pytest.approx(perimeter * H, rel=1e-12)
    assert np.allclose(nodes_named(mesh, "floor")[:, 2], 0.0, atol=1e-12)
    assert np.allclose(nodes_named(mesh, "ceiling")[:, 2], H, atol=1e-12)
    # every wall node lies on one of the six vertical wall planes
    w = nodes_named(mesh, "walls")
    on_wall = (
        np.isclose(w[:, 0], 0.0) | np.isclose(w[:, 0], 5.0) | np.isclose(w[:, 0], 2.2)
        | np.isclose(w[:, 1], 0.0) | np.isclose(w[:, 1], 2.5) | np.isclose(w[:, 1], 4.1)
    )
    assert on_wall.all()
    assert not np.any((w[:, 0] > 2.2 + 1e-9) & (w[:, 1] > 2.5 + 1e-9))  # the cut-out corner


def test_unnamed_group(m):
    mesh = m("unnamed")
    assert _field(mesh) == {"air": (1, 3)}
    tri = [(b, p) for b, p in zip(mesh.cells, mesh.cell_data["gmsh:physical"]) if b.type == "triangle"]
    assert tri and all(set(np.unique(p)) == {7} for _, p in tri)
    ids = np.unique(np.concatenate([b.data.ravel() for b, _ in tri]))
    assert np.allclose(mesh.points[ids, 0], 0.0)
    assert measure_named(mesh, "air") == pytest.approx(1.0, rel=1e-12)


def test_untagged_mixed(m):
    mesh = m("untagged")
    assert not mesh.field_data
    assert _types(mesh) == {"vertex", "line", "triangle", "tetra"}
    phys = mesh.cell_data.get("gmsh:physical")
    assert phys is None or all(np.all(np.asarray(p) == 0) for p in phys)
    vol = sum(measure(mesh.points, b.type, b.data).sum() for b in mesh.cells if b.type == "tetra")
    assert vol == pytest.approx(1.0, rel=1e-12)
    n_vertex = sum(len(b.data) for b in mesh.cells if b.type == "vertex")
    assert n_vertex == 8  # the box corners


@pytest.mark.parametrize("key", [k for k in GENERATORS if k != "untagged"])
def test_versions_agree(meshes, key):
    a, b = meshes[0][key, 2.2], meshes[0][key, 4.1]
    assert _field(a) == _field(b)
    assert summary(a) == summary(b)
    assert np.allclose(np.sort(a.points, axis=0), np.sort(b.points, axis=0))


def test_version_header(meshes):
    files = meshes[1]
    for (key, v), path in files.items():
        with open(path) as f:
            assert f.readline().strip() == "$MeshFormat"
            assert f.readline().split()[0] == str(v)


def test_deterministic(tmp_path):
    a = meshgen.sphere_msh(tmp_path / "a.msh", radius=1.0, h=0.4)
    b = meshgen.sphere_msh(tmp_path / "b.msh", radius=1.0, h=0.4)
    with open(a, "rb") as fa, open(b, "rb") as fb:
        assert fa.read() == fb.read()


@pytest.mark.parametrize(
    "call",
    [
        lambda p: meshgen.box_msh(p, h=0.0),
        lambda p: meshgen.box_msh(p, h=0.5, order=3),
        lambda p: meshgen.box_msh(p, h=0.5, version=3.0),
        lambda p: meshgen.box_msh(p, size=(1.0, 1.0), h=0.5),
        lambda p: meshgen.rect_msh(p, size=(1.0, -1.0), h=0.5),
        lambda p: meshgen.sphere_msh(p, radius=0.0, h=0.5),
    ],
)
def test_bad_arguments(tmp_path, call):
    with pytest.raises(ValueError):
        call(tmp_path / "bad.msh")
    assert not (tmp_path / "bad.msh").exists()
