"""A-posteriori error estimates, corrected frequencies, refinement and the accuracy target.

Sources (named again beside each check):

* Bank & Smith, "A posteriori error estimates based on hierarchical bases",
  SIAM J. Numer. Anal. 30(4), 1993 -- the method (from memory).
* Morse & Ingard, *Theoretical Acoustics* (1968) §9.4 -- box modes with any
  rigid / pressure-release mix; Kinsler, Frey, Coppens & Sanders,
  *Fundamentals of Acoustics*, 4th ed. (2000) §10.2 -- tubes.
* Abramowitz & Stegun (1964) §9.5 Table 9.5 and §10.1 -- cylinder and
  sphere roots (through acoustic_fem.analytic, itself checked in
  test_analytic.py).
* Strang & Fix, *An Analysis of the Finite Element Method* (1973) ch. 6 --
  eigenvalue error O(h^(2p)) for degree p, eigenvalues from above (min-max;
  from memory).
* scikit-fem's ElementTriP3 -- an independent cubic Lagrange space.

The acceptance criterion of the estimate (project issue): estimated/true
relative frequency error in [1/3, 3] for >= 95 % of the modes whose true
error exceeds 1e-6.  Measured effectivities are quoted beside the checks.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse.linalg as spla

import meshgen

import acoustic_fem as af
from acoustic_fem import PressureRelease, analytic
from acoustic_fem._errors import ConvergenceError, InputError
from acoustic_fem._hierarchical import enrich
from acoustic_fem.estimate import estimate_errors, solve_to_tolerance
from acoustic_fem.refine import refine_uniform
from acoustic_fem.verification import structured_box, structured_line, structured_rect

C = 343.0  # m/s, common practice for air near 20 °C; every frequency scales with it
AIR = af.Air(c=C)
BOX = (1.2, 0.9, 0.6)


def effectivity(modes, errors, exact):
    """(estimated / |true|) relative frequency errors of the nonzero modes with |true| > 1e-6."""
    n = min(len(modes), len(exact))
    nz = exact[:n] > 0
    true = modes.frequencies[:n][nz] / exact[:n][nz] - 1.0
    est = errors.frequency_errors[:n][nz]
    big = np.abs(true) > 1e-6
    return est[big] / np.abs(true[big])


def in_band_share(ratio):
    return float(np.mean((ratio >= 1 / 3) & (ratio <= 3)))


# ---------------------------------------------------------------------------
# the enriched space
# ---------------------------------------------------------------------------
def _eigs(K, M, n=10):
    if K.shape[0] > 600:  # shift-invert about -1 (K is only semi-definite)
        lam = spla.eigsh(K.tocsc(), k=n, M=M.tocsc(), sigma=-1.0, return_eigenvectors=False)
        return np.sort(lam)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, user_api="blas"):  # small matrices: threads only cost
        return sla.eigh(K.toarray(), M.toarray(), eigvals_only=True)[:n]


@pytest.mark.parametrize("cell", ["line", "triangle", "tetrahedron"])
def test_p1_plus_edge_bubbles_is_the_p2_space(cell):
    # P1 ⊕ {λ_a λ_b} spans P2 on every cell (Zienkiewicz et al. hierarchical
    # elements, from memory), so its eigenvalues equal those of the Lagrange P2
    # assembly to rounding: 1e-10 relative is far below any basis error.
    mesh = {"line": lambda: structured_line(1.0, 7),
            "triangle": lambda: structured_rect((1.0, 0.75), 4),
            "tetrahedron": lambda: structured_box((1.0, 0.75, 0.5), 4)}[cell]()
    K, M, _, _ = enrich(af.DofMap(mesh, 1)).assemble()
    a2 = af.assemble(mesh, 2)
    np.testing.assert_allclose(_eigs(K, M), _eigs(a2.K, a2.M), rtol=1e-10, atol=1e-9)


def test_p1_plus_edge_bubbles_on_curved_cells(tmp_path):
    # same identity on isoparametric (curved P2-geometry) cells: checks the
    # quadrature path of the enrichment against assembly.py's curved path
    mesh = af.read_mesh(meshgen.disc_msh(tmp_path / "disc.msh", radius=0.5, h=0.2, order=2))
    K, M, _, _ = enrich(af.DofMap(mesh, 1)).assemble()
    a2 = af.assemble(mesh, 2)
    np.testing.assert_allclose(_eigs(K, M), _eigs(a2.K, a2.M), rtol=1e-10, atol=1e-9)


def test_p2_enrichment_equals_scikit_fem_p3_triangles():
    # P2 ⊕ {edge cubics, cell bubble} = P3: eigenvalues equal scikit-fem's
    # ElementTriP3 (independent library) to rounding
    skfem = pytest.importorskip("skfem")
    from skfem.models.poisson import laplace, mass

    mesh = structured_rect((1.0, 0.75), 4)
    K, M, _, _ = enrich(af.DofMap(mesh, 2)).assemble()
    basis = skfem.Basis(skfem.MeshTri(mesh.points[:, :2].T.copy(), mesh.cells.T.copy()),
                        skfem.ElementTriP3())
    ref = _eigs(laplace.assemble(basis), mass.assemble(basis))
    np.testing.assert_allclose(_eigs(K, M), ref, rtol=1e-10, atol=1e-9)


def test_p2_enrichment_of_tetrahedra_converges_like_p3():
    # scikit-fem has no P3 tetrahedron, so the tetrahedral W (edge cubics +
    # face bubbles) is checked by its rate: the P3 eigenvalue error is
    # O(h^6) (Strang & Fix 1973 ch. 6).  Mode (1,1,1) of the rigid
    # 1 x 0.75 x 0.5 box, lam = sum (n_i pi / L_i)^2 (Morse & Ingard §9.4).
    # Tolerance ±10 % of the slope (pre-asymptotic terms); with W missing a
    # function or mis-signed the slope would drop to 4 (P2) or below.
    size = (1.0, 0.75, 0.5)
    lam_exact = sum((math.pi / L) ** 2 for L in size)
    hs, errs = [], []
    for n in (4, 8):
        mesh = structured_box(size, n)
        K, M, _, _ = enrich(af.DofMap(mesh, 2)).assemble()
        lam = _eigs(K, M, 12)
        errs.append(np.min(np.abs(lam / lam_exact - 1.0)))  # P3 error << gaps of 5 %
        hs.append(1.0 / n)
    slope = math.log(errs[0] / errs[1]) / math.log(hs[0] / hs[1])
    assert abs(slope - 6.0) <= 0.6, (slope, errs)


# ---------------------------------------------------------------------------
# the estimate on structured boxes (fast)
# ---------------------------------------------------------------------------
BOX_CASES = {
    # name: (walls, analytic walls)
    "rigid": ({}, {}),
    "x1-released": ({"x1": PressureRelease()}, {"x1": "pressure_release"}),
    # one end of every axis released (quarter-wave axes)
    "mixed": ({"x1": PressureRelease(), "y0": PressureRelease(), "z1": PressureRelease()},
              {"x1": "pressure_release", "y0": "pressure_release", "z1": "pressure_release"}),
}


@pytest.fixture(scope="module")
def box_mesh():
    return structured_box(BOX, 6)


@pytest.mark.parametrize("order", [1, 2], ids=["P1", "P2"])
@pytest.mark.parametrize("case", list(BOX_CASES))
def test_effectivity_structured_box(box_mesh, case, order):
    walls, ref_walls = BOX_CASES[case]
    # P1 needs a finer mesh for errors of a few per cent; fmax 400 Hz keeps
    # the analytic modes (Morse & Ingard §9.4) >= 1.5 % apart where P1 errs
    # by up to ~3 %, so FE and analytic lists pair up in order
    mesh, fmax = (box_mesh, 500.0) if order == 2 else (structured_box(BOX, 12), 400.0)
    exact = analytic.box_modes(BOX, c=C, walls=ref_walls, fmax=fmax).frequencies
    modes = af.solve_modes(mesh, walls, order=order, count=len(exact), air=AIR)
    err = estimate_errors(modes)
    ratio = effectivity(modes, err, exact)
    assert ratio.size >= (8 if order == 2 else 5)
    # acceptance: >= 95 % within [1/3, 3]; measured 0.85-0.96 (P2), 0.96-1.00 (P1)
    assert in_band_share(ratio) >= 0.95, ratio
    # tighter, from the measurements: the estimate sits a little below the
    # true error (the W-only correction misses part of the V ⊕ W coupling)
    assert np.all((ratio > 0.6) & (ratio < 1.1)), ratio
    # corrected frequencies: Rayleigh–Ritz in V ⊕ W gives lam_exact <= lam_c <=
    # lam_h (min-max, Strang & Fix ch. 6: straight cells, exact geometry;
    # pressure-release W functions removed, so the enriched space stays
    # conforming), and they are closer to the exact value than the raw ones
    n = len(exact)
    fc, fh = err.corrected_frequencies[:n], modes.frequencies[:n]
    assert np.all(fc <= fh * (1 + 1e-12))
    assert np.all(fc >= exact * (1 - 1e-9)), fc / exact - 1
    nz = exact > 0
    assert np.all(np.abs(fc[nz] / exact[nz] - 1) < 0.5 * np.abs(fh[nz] / exact[nz] - 1))


def test_zero_mode_has_zero_error_and_indicators_sum(box_mesh):
    modes = af.solve_modes(box_mesh, order=2, count=12, air=AIR)
    err = estimate_errors(modes)
    # the uniform 0 Hz mode (Morse & Ingard §9.4) is in the space exactly
    assert modes.frequencies[0] == 0.0
    assert err.frequency_errors[0] == 0.0 and err.corrected_frequencies[0] == 0.0
    ind = err.cell_indicators
    assert ind.shape == (box_mesh.n_cells, len(modes))
    assert np.all(ind >= 0)
    # each column distributes the mode's estimate over the cells
    np.testing.assert_allclose(ind.sum(axis=0), err.frequency_errors, rtol=1e-12, atol=1e-15)
    assert err.info["cg_relative_residual"] <= 1e-3
    assert "Bank & Smith" in err.method


def test_indicator_locates_the_error():
    # A long box 1.0 x 0.3 x 0.2 m whose first three modes are the axial x
    # modes (n,0,0), n = 1..3 (Morse & Ingard §9.4; the first cross mode is at
    # c/0.6 = 572 Hz), meshed fine on the quarter x < 0.25 and 3x coarser in x
    # on the rest: the P2 error density grows like h_x^4 (81x), so the coarse
    # part must carry nearly all of each axial mode's estimated error
    # (measured >= 0.99), far more than its 75 % share of the volume.
    base = structured_box((1.0, 0.3, 0.2), 20)
    pts = base.points.copy()
    x = pts[:, 0]
    pts[:, 0] = np.where(x <= 0.5, 0.5 * x, 0.25 + 1.5 * (x - 0.5))
    mesh = af.Mesh(pts, base.cells, base.cell_type, boundaries=base.boundaries,
                   volumes=base.volumes)
    modes = af.solve_modes(mesh, order=2, count=4, air=AIR)
    err = estimate_errors(modes)
    centre = mesh.points[mesh.vertices].mean(axis=1)[:, 0]
    coarse = centre > 0.25
    share = err.cell_indicators[coarse].sum(axis=0)[1:] / err.frequency_errors[1:]
    assert np.all(share > 0.9), share


def test_estimate_rejects_other_input(box_mesh):
    with pytest.raises(InputError, match="Modes"):
        estimate_errors("not modes")
    modes = af.solve_modes(box_mesh, order=2, count=3, air=AIR)
    with pytest.raises(InputError, match="another mesh"):
        estimate_errors(modes, assembly=af.assemble(box_mesh, 1))


# ---------------------------------------------------------------------------
# the acceptance cases on gmsh meshes, two sizes each (1-5 s each)
# ---------------------------------------------------------------------------
ACCEPT_BOX = (1.6, 1.1, 0.9)
#: mesh sizes (two per case) and fmax of the acceptance cases
ACCEPT_SIZES = {"box": ((0.2, 0.14), 600.0), "box-released": ((0.2, 0.14), 600.0),
                "cylinder": ((0.12, 0.08), 700.0), "sphere": ((0.12, 0.08), 700.0)}


def _acceptance_case(name, h, fmax, tmp):
    if name.startswith("box"):
        mesh = af.read_mesh(meshgen.box_msh(tmp / f"b{h}.msh", size=ACCEPT_BOX, h=h))
        rel = {"x1": "pressure_release"} if name == "box-released" else {}
        walls = {k: PressureRelease() for k in rel}
        return mesh, walls, analytic.box_modes(ACCEPT_BOX, c=C, walls=rel, fmax=fmax).frequencies
    if name == "cylinder":
        mesh = af.read_mesh(meshgen.cylinder_msh(tmp / f"c{h}.msh", radius=0.4, height=0.8, h=h))
        return mesh, None, analytic.cylinder_modes(0.4, 0.8, c=C, fmax=fmax).frequencies
    mesh = af.read_mesh(meshgen.sphere_msh(tmp / f"s{h}.msh", radius=0.5, h=h))
    return mesh, None, analytic.sphere_modes(0.5, c=C, fmax=fmax).frequencies


@pytest.mark.filterwarnings("ignore::acoustic_fem.ResolutionWarning")  # coarse on purpose
@pytest.mark.parametrize("name", list(ACCEPT_SIZES))
def test_effectivity_acceptance(name, tmp_path):
    ratios = []
    sizes, fmax = ACCEPT_SIZES[name]
    for h in sizes:
        mesh, walls, exact = _acceptance_case(name, h, fmax, tmp_path)
        modes = af.solve_modes(mesh, walls, order=2, fmax=fmax, air=AIR)
        # the curved boundary can move an FE frequency across fmax: compare
        # the modes both lists have
        ratios.append(effectivity(modes, estimate_errors(modes, indicators=False), exact))
    ratio = np.concatenate(ratios)
    assert ratio.size >= 40
    # acceptance criterion; measured 0.83-0.93 (boxes, cylinder) and 0.57-0.91
    # (sphere: its lowest modes carry a geometry error the enrichment does not
    # see), i.e. every mode within the band
    assert in_band_share(ratio) >= 0.95, ratio


# ---------------------------------------------------------------------------
# uniform refinement
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("cell", ["line", "triangle", "tetrahedron"])
def test_refine_uniform_counts_and_regions(cell):
    mesh = {"line": lambda: structured_line(1.0, 5),
            "triangle": lambda: structured_rect((1.0, 0.5), 4),
            "tetrahedron": lambda: structured_box((1.0, 0.75, 0.5), 4)}[cell]()
    r = refine_uniform(mesh)
    d = mesh.dim
    assert r.n_cells == 2**d * mesh.n_cells
    assert r.measure == pytest.approx(mesh.measure, rel=1e-12)
    assert r.surface_names == mesh.surface_names and r.volume_names == mesh.volume_names
    for name in mesh.surface_names:
        assert len(r.boundaries[name]) == 2 ** (d - 1) * len(mesh.boundaries[name])
        if d > 1:
            assert r.region_measure(name) == pytest.approx(mesh.region_measure(name), rel=1e-12)
    # the longest edge at most halves ... and the mean edge about halves
    assert r.h_max <= 0.5 * mesh.h_max * (1 + 1e-12) + 1e-15 or d == 3
    assert 0.45 < r.h_mean / mesh.h_mean < 0.56


@pytest.mark.parametrize("order", [1, 2])
def test_budget_prediction_of_a_refinement_is_exact(order):
    # the DOF count solve_to_tolerance states before refining (Euler-type
    # counting of vertices, edges, faces) equals the count after refining
    from acoustic_fem.estimate import _predict_dofs_refined

    for mesh in (structured_line(1.0, 5), structured_rect((1.0, 0.5), 4),
                 structured_box((1.2, 0.9, 0.6), 3)):
        assert _predict_dofs_refined(mesh, order) == af.DofMap(refine_uniform(mesh),
                                                               order).n_dofs


def test_refined_triangles_are_the_finer_structured_mesh():
    # red refinement of the right triangles of an n-grid gives exactly the
    # 2n-grid (same diagonal direction): identical eigenvalues
    a = af.solve_modes(refine_uniform(structured_rect((1.0, 0.75), 4)), order=1, count=8,
                       air=AIR)
    b = af.solve_modes(structured_rect((1.0, 0.75), 8), order=1, count=8, air=AIR)
    np.testing.assert_allclose(a.eigenvalues, b.eigenvalues, rtol=1e-10, atol=1e-9)


def test_refine_curved_keeps_the_parent_geometry(tmp_path):
    mesh = af.read_mesh(meshgen.sphere_msh(tmp_path / "s.msh", radius=0.5, h=0.25, order=2))
    r = refine_uniform(mesh)
    assert r.geometry_order == 2
    # the children's mid-edge nodes come from the parent's P2 map: the
    # refined mesh describes the same curved volume (to rounding)
    assert r.measure == pytest.approx(mesh.measure, rel=1e-11)
    # ... which is the ball's volume to the isoparametric error (measured
    # -1.5e-4); the same cells with straight sides lose 8.8e-3 (measured)
    exact = 4.0 / 3.0 * math.pi * 0.5**3
    assert abs(r.measure / exact - 1) < 1e-3
    assert abs(r.linear().measure / exact - 1) > 10 * abs(r.measure / exact - 1)
    # every new mid-edge node of a shell facet lies on the sphere to the
    # map's accuracy (measured 1.1e-4 m): no straight-midpoint chords (those
    # would sit ~ (h/2)^2 / (8R) = 4e-3 m inside)
    f = r.boundaries["shell"]
    rad = np.linalg.norm(r.points[f[:, 3:]], axis=2)
    assert np.abs(rad - 0.5).max() < 1e-3


def test_refined_p2_tube_converges_at_rate_four():
    # P2 on uniform 1D meshes: frequency error (kh)^4/1440 (derived in
    # test_verification.py's docstring); halving h divides it by 16 -> ratio
    # within 5 % of 16 (next term O((kh)^6))
    L = 0.85
    exact = np.array([(2 * n + 1) * C / (4 * L) for n in range(4)])  # Kinsler §10.2
    m0 = structured_line(L, 10)
    e = []
    for mesh in (m0, refine_uniform(m0)):
        modes = af.solve_modes(mesh, {"x1": PressureRelease()}, order=2, count=4, air=AIR)
        e.append(modes.frequencies / exact - 1)
    np.testing.assert_allclose(e[0] / e[1], 16.0, rtol=0.05)


# ---------------------------------------------------------------------------
# accuracy target
# ---------------------------------------------------------------------------
def test_solve_to_tolerance_tube_by_refinement_and_order():
    L = 0.85
    exact = analytic.tube_modes(L, c=C, ends=("rigid", "pressure_release"), count=12)
    res = solve_to_tolerance(structured_line(L, 6), {"x1": PressureRelease()}, tol=1e-5,
                             fmax=2000.0, order=1, air=AIR)
    assert res.met
    actions = [s["action"] for s in res.steps]
    assert actions[0] == "raise the order 1 -> 2" and "uniform refinement" in actions
    assert actions[-1] == "done"
    assert res.budget["max_dofs"] > 0
    f = res.frequencies
    n = len(f)
    assert n == int(np.sum(exact <= 2000.0))  # every mode below fmax (Kinsler §10.2)
    true = np.abs(f / exact[:n] - 1)
    # every mode within the target of the published value
    assert np.all(true <= 1e-5), true
    assert np.all(res.judged_errors <= 1e-5)


def test_solve_to_tolerance_with_a_mesh_builder():
    size = (1.0, 0.5)

    def build(h):  # structured triangles with cells no longer than about h
        return structured_rect(size, 2 * max(1, math.ceil(0.5 / h)))

    exact = analytic.duct_2d_modes(*size, c=C, count=30)
    fmax = 700.0
    res = solve_to_tolerance(build, {"x1": PressureRelease()}, tol=1e-4, fmax=fmax, air=AIR)
    assert res.met and len(res.steps) >= 2
    assert all("remesh" in s["action"] for s in res.steps[:-1])
    n = len(res.frequencies)
    assert n == int(np.sum(exact <= fmax))
    true = np.abs(res.frequencies / exact[:n] - 1)
    assert np.all(true <= 1e-4), true  # Morse & Ingard §9.4 duct, each mode within tol


def test_solve_to_tolerance_refuses_over_budget():
    mesh = structured_box(BOX, 3)
    with pytest.raises(ConvergenceError, match="max_dofs=2000") as exc:
        solve_to_tolerance(mesh, tol=1e-6, fmax=300.0, air=AIR, max_dofs=2000)
    part = exc.value.partial
    assert part is not None and not part.met
    assert part.steps[-1]["n_dofs"] <= 2000
    assert len(part.frequencies) == len(part.frequency_errors) > 0
    # refused before anything is solved: nothing in partial
    with pytest.raises(ConvergenceError, match="nothing was solved"):
        solve_to_tolerance(mesh, tol=1e-3, fmax=500.0, air=AIR, max_dofs=10)
    for bad in (0, -1e-3, 2.0, float("nan"), "x"):
        with pytest.raises(InputError, match="tol"):
            solve_to_tolerance(mesh, tol=bad, fmax=500.0)


def test_l_shaped_room_to_tolerance():
    # Acceptance: tol = 1e-3 on an L-shaped room; every mode below fmax
    # within 1e-3 of a refined reference, with no more than 2x the DOFs of
    # the smallest uniform mesh that achieves it.
    #
    # Reference: a mesh graded towards the re-entrant edge (walls 3 and 4
    # meet there; the low modes are singular, error ~ h^(4/3)), ~31 k P2
    # DOFs, its corrected (P3-enriched) frequencies: measured within 7.9e-5
    # of the corrected values of a 93 k-DOF graded solve, which are within
    # 2.3e-5 of those of a 240 k-DOF graded solve -- about a tenth of tol.
    # Measured for the record (fmax 80 Hz, 8 modes): the uniform meshes of the
    # builder err by 3.1e-3 (1.9 k DOFs), 2.0e-3 (3.0 k), 1.5e-3 (5.6 k),
    # 1.19e-3 (8.6 k), 1.15e-3 (10.9 k), 1.09e-3 (13.1 k), 8.9e-4 (15.4 k);
    # the solve ends at 15-20 k DOFs with a true largest error of 8.5e-4.
    from acoustic_fem import geometry

    P, H, fmax = meshgen.LSHAPE_FLOOR, meshgen.LSHAPE_HEIGHT, 80.0
    h0 = geometry.mesh_size(fmax, order=2, air=AIR)

    def build(h):
        return geometry.floor_plan(P, H, fmax=C / (6 * h), air=AIR)

    graded = geometry.floor_plan(P, H, fmax=C / (6 * 0.6 * h0), air=AIR,
                                 refine={"wall_3": 0.1, "wall_4": 0.1})
    ref_modes = af.solve_modes(graded, order=2, fmax=1.15 * fmax, air=AIR)
    ref_err = estimate_errors(ref_modes, indicators=False)
    reference = ref_err.corrected_frequencies

    res = solve_to_tolerance(build, tol=1e-3, fmax=fmax, air=AIR)
    assert res.met
    n = len(res.frequencies)
    assert reference[n - 1] <= fmax < reference[n]  # the same modes below fmax
    true = np.abs(res.frequencies[1:] / reference[1:n] - 1)
    assert np.all(true <= 1e-3), true
    # "no more than 2x the DOFs of the smallest uniform mesh that achieves it":
    # the solve's own last mesh is a uniform builder mesh that achieves it
    # (checked just above), so the smallest one exists and has at most
    # res DOFs; it has at least half of them if every builder mesh of the
    # scan (coarse to fine) with fewer than half the DOFs misses the target
    # (those are cheap to solve; the scan stops at half the DOFs)
    half = res.modes.dofs.n_dofs / 2
    checked = 0
    for s in (1.0, 0.8, 0.6, 0.5, 0.45, 0.42, 0.4, 0.37, 0.34, 0.3):
        mesh = build(h0 * s)
        if af.DofMap(mesh, 2).n_dofs >= half:
            break
        m = af.solve_modes(mesh, order=2, count=n, air=AIR)
        worst = float(np.max(np.abs(m.frequencies[1:] / reference[1:n] - 1)))
        assert worst > 1e-3, (s, m.dofs.n_dofs, worst, res.modes.dofs.n_dofs)
        checked += 1
    assert checked >= 3  # the comparison is not empty


# ---------------------------------------------------------------------------
# solve_modes(estimate=True / tol=...)
# ---------------------------------------------------------------------------
def test_solve_modes_estimate_attaches_the_estimate(box_mesh):
    walls = {"x1": PressureRelease()}
    exact = analytic.box_modes(BOX, c=C, walls={"x1": "pressure_release"},
                               fmax=500.0).frequencies  # Morse & Ingard §9.4
    plain = af.solve_modes(box_mesh, walls, order=2, count=len(exact), air=AIR)
    # backwards compatible: no estimate unless asked for (None, not a number)
    assert plain.errors is None and not plain.estimated
    assert plain.frequency_errors is None and plain.corrected_frequencies is None
    assert plain.cell_indicators is None
    assert "estimated_relative_error" not in plain.table()[0]
    modes = af.solve_modes(box_mesh, walls, order=2, count=len(exact), air=AIR, estimate=True)
    np.testing.assert_array_equal(modes.frequencies, plain.frequencies)
    direct = estimate_errors(plain)
    np.testing.assert_allclose(modes.frequency_errors, direct.frequency_errors, rtol=1e-9)
    np.testing.assert_allclose(modes.corrected_frequencies, direct.corrected_frequencies,
                               rtol=1e-12)
    # acceptance band of the issue against the analytic modes (Morse & Ingard
    # §9.4): estimated / true in [1/3, 3]; measured 0.85-0.96 at P2 (above)
    ratio = effectivity(modes, modes.errors, exact)
    assert ratio.size >= 8 and in_band_share(ratio) >= 0.95, ratio
    # the indicators are there for export and sum to each mode's estimate
    assert modes.cell_indicators.shape == (box_mesh.n_cells, len(modes))
    np.testing.assert_allclose(modes.cell_indicators.sum(axis=0), modes.frequency_errors,
                               rtol=1e-12, atol=1e-15)
    row = modes.table()[3]
    assert row["estimated_relative_error"] == modes.frequency_errors[3]
    assert row["corrected_frequency_hz"] == modes.corrected_frequencies[3]
    assert modes.info["estimate_seconds"] > 0
    with pytest.raises(InputError, match="estimate"):
        af.solve_modes(box_mesh, count=3, estimate="yes")


def _tube_roots(beta, n, length):
    """Exact roots of a tube rigid at x = 0 with admittance β at x = L: k_n L = nπ + i artanh β.

    Kinsler, Frey, Coppens & Sanders (2000) §10.2, the impedance-terminated
    tube, written for e^{+iωt} (derived in tests/test_damped.py::tube_roots).
    """
    return (np.arange(n) * np.pi + 1j * np.arctanh(complex(beta))) / length


def _box_roots(beta, kmax, size, nmax=8):
    """Exact roots k of a box rigid except x = L_x with admittance β, Re k <= kmax.

    Separation of variables (Morse & Ingard §9.4): p = cos(k_x x) cos(k_y y)
    cos(k_z z), k_y, k_z = nπ/L of the rigid walls, and the wall condition
    ∂p/∂x = −ikβp at x = L_x gives k_x sin(k_x L_x) = i k β cos(k_x L_x) with
    k² = k_x² + k_y² + k_z² (our derivation, e^{+iωt}); the scalar roots by
    Newton's method continued from β = 0, as the verification report's damped
    group computes them (acoustic_fem.verification._impedance_box_roots).
    """
    from acoustic_fem.verification import _impedance_box_roots

    return _impedance_box_roots(beta, kmax, size, nmax)


def _damped_effectivities(modes, exact):
    """(frequency, decay-rate) estimated/|true| for the errors > 1e-6, FE roots paired
    with the nearest exact root."""
    kh = modes.wavenumbers
    ex = np.array([exact[np.argmin(np.abs(exact - k))] for k in kh])
    with np.errstate(divide="ignore", invalid="ignore"):
        tf = np.abs(kh.real / ex.real - 1)
        td = np.abs(kh.imag / ex.imag - 1)
    bf, bd = np.isfinite(tf) & (tf > 1e-6), td > 1e-6
    return (modes.frequency_errors[bf] / tf[bf], modes.decay_rate_errors[bd] / td[bd])


@pytest.mark.parametrize("order, n", [(1, 60), (2, 12)], ids=["P1", "P2"])
@pytest.mark.parametrize("beta", [0.05, 0.2 + 0.1j], ids=["beta=0.05", "beta=0.2+0.1i"])
def test_damped_tube_estimate_against_exact_roots(order, n, beta):
    L = 0.85
    modes = af.solve_modes(structured_line(L, n), {"x1": af.Impedance(admittance=beta)},
                           order=order, count=8, air=AIR, estimate=True)
    assert np.any(modes.decay_rates > 0)
    rf, rd = _damped_effectivities(modes, _tube_roots(beta, 12, L))
    assert rf.size >= 6 and rd.size >= 6
    # the band [1/3, 3], for the frequency and the decay rate; measured
    # 0.97-1.00 (P2) and 1.00 (P1): in 1D the enriched space is far more accurate
    for r in (rf, rd):
        assert in_band_share(r) >= 0.95, r
        assert np.all((r > 0.8) & (r < 1.25)), r
    # the uniform-pressure mode: with a real β its frequency is 0 (k = i artanh β
    # / L), so its relative frequency error is not defined -- NaN, not a number
    # made up; a complex β gives it a small real frequency, which is estimated
    assert np.isfinite(modes.decay_rate_errors[0])
    assert np.isnan(modes.frequency_errors[0]) == (complex(beta).imag == 0)
    assert np.all(np.isfinite(modes.frequency_errors[1:]))


@pytest.mark.parametrize("beta, sizes", [(0.1, (6, 8)), (0.3 + 0.2j, (6,))],
                         ids=["beta=0.1", "beta=0.3+0.2i"])
def test_damped_box_estimate_against_exact_roots(beta, sizes):
    fmax = 400.0
    exact = _box_roots(beta, 2 * np.pi * 1.2 * fmax / C, BOX)
    rf, rd = [], []
    for n in sizes:  # two mesh sizes for the real admittance
        modes = af.solve_modes(structured_box(BOX, n), {"x1": af.Impedance(admittance=beta)},
                               order=2, fmax=fmax, air=AIR, estimate=True)
        a, b = _damped_effectivities(modes, exact)
        rf.append(a)
        rd.append(b)
        assert modes.cell_indicators.shape == (modes.mesh.n_cells, len(modes))
        np.testing.assert_allclose(np.nansum(modes.cell_indicators, axis=0),
                                   np.nan_to_num(modes.frequency_errors), rtol=1e-10,
                                   atol=1e-15)
    rf, rd = np.concatenate(rf), np.concatenate(rd)
    assert rf.size >= 10 and rd.size >= 10
    # the band [1/3, 3] for >= 95 % of the modes; measured 0.86-1.2
    # (frequency) and 0.76-1.11 (decay rate)
    assert in_band_share(rf) >= 0.95, rf
    assert in_band_share(rd) >= 0.95, rd


def test_perturbation_modes_are_not_estimated_and_say_so():
    # first-order (perturbation) modes are not eigenpairs of the discrete
    # problem: NaN (never a made-up number) and an EstimateWarning
    mesh = structured_box(BOX, 4)
    walls = {"x1": af.Impedance(admittance=0.2)}
    with pytest.warns(af.EstimateWarning, match="perturbation"):
        modes = af.solve_modes(mesh, walls, order=2, count=4, air=AIR,
                               damping="perturbation", estimate=True)
    assert np.any(modes.decay_rates > 0)
    assert modes.estimated and np.all(np.isnan(modes.frequency_errors))
    assert np.all(np.isnan(modes.decay_rate_errors)) and modes.cell_indicators is None
    with pytest.raises(InputError, match="perturbation"):
        estimate_errors(modes)
    with pytest.raises(InputError, match="damping='exact'"):
        af.solve_modes(mesh, walls, tol=1e-3, fmax=200.0, air=AIR, damping="perturbation")


@pytest.mark.parametrize("beta", [0.1, 0.2 + 0.1j], ids=["beta=0.1", "beta=0.2+0.1i"])
def test_solve_modes_tol_with_an_impedance_end(beta):
    # the accuracy target with damped modes: judged by the frequency errors;
    # every mode up to fmax within tol of the exact roots of the
    # impedance-terminated tube (Kinsler et al. 2000 §10.2, _tube_roots)
    L, fmax, tol = 0.85, 1500.0, 1e-5
    modes = af.solve_modes(structured_line(L, 6), {"x1": af.Impedance(admittance=beta)},
                           order=1, fmax=fmax, air=AIR, tol=tol)
    target = modes.info["accuracy_target"]
    assert target["met"] and len(target["steps"]) >= 2
    exact = _tube_roots(beta, 20, L)
    exact = exact[C * exact.real / (2 * np.pi) <= fmax]
    assert len(modes) == len(exact)
    k = modes.wavenumbers
    nz = exact.real > 0
    assert np.all(np.abs(k.real[nz] / exact.real[nz] - 1) <= tol)
    # decay rates are estimated and reported (not targeted): each estimate
    # within a factor 3 of the true decay-rate error where that exceeds 1e-6
    td = np.abs(k.imag / exact.imag - 1)
    big = td > 1e-6
    r = modes.decay_rate_errors[big] / td[big]
    assert np.all((r >= 1 / 3) & (r <= 3)), r


def test_enriched_boundary_mass_is_the_p2_boundary_mass():
    # P1 ⊕ edge bubbles = P2 (as above): K + 3B over two faces has the same
    # eigenvalues as the Lagrange P2 assembly's (rounding-level agreement)
    for mesh in (structured_rect((1.0, 0.75), 4), structured_box((1.0, 0.75, 0.5), 3)):
        names = ["x1", "y0"]
        en = enrich(af.DofMap(mesh, 1))
        K, M, _, _ = en.assemble()
        a2 = af.assemble(mesh, 2)
        np.testing.assert_allclose(
            _eigs(K + 3 * en.boundary_mass(names), M),
            _eigs(a2.K + 3 * af.boundary_mass(a2.dofs, names), a2.M), rtol=1e-10, atol=1e-9)


def test_enriched_boundary_mass_equals_scikit_fem_p3():
    # P2 ⊕ W = P3 on triangles: boundary mass against scikit-fem's ElementTriP3
    # on a FacetBasis (independent library)
    skfem = pytest.importorskip("skfem")
    from skfem.models.poisson import laplace, mass

    mesh = structured_rect((1.0, 0.75), 4)
    en = enrich(af.DofMap(mesh, 2))
    K, M, _, _ = en.assemble()
    B = en.boundary_mass(list(mesh.surface_names))
    m = skfem.MeshTri(mesh.points[:, :2].T.copy(), mesh.cells.T.copy())
    basis = skfem.Basis(m, skfem.ElementTriP3())

    @skfem.BilinearForm
    def facet_mass(u, v, w):
        return u * v

    Bs = facet_mass.assemble(skfem.FacetBasis(m, skfem.ElementTriP3()))
    np.testing.assert_allclose(_eigs(K + 3 * B, M),
                               _eigs(laplace.assemble(basis) + 3 * Bs, mass.assemble(basis)),
                               rtol=1e-10, atol=1e-9)


def test_solve_modes_tol_meets_the_target_against_the_analytic_box():
    # tol=1e-3 from a coarse structured box (uniform refinement): every mode
    # below fmax within 1e-3 of the analytic value (Morse & Ingard §9.4)
    fmax = 400.0
    exact = analytic.box_modes(BOX, c=C, walls={"z1": "pressure_release"},
                               fmax=fmax).frequencies
    mesh = structured_box(BOX, 3)
    modes = af.solve_modes(mesh, {"z1": PressureRelease()}, order=2, fmax=fmax, air=AIR,
                           tol=1e-3)
    target = modes.info["accuracy_target"]
    assert target["met"] and target["tol"] == 1e-3
    # the budget was stated up front (defaults) and every step is reported
    assert target["budget"]["max_dofs"] == af.modes.TOL_MAX_DOFS > 0
    assert target["budget"]["max_seconds"] == af.modes.TOL_MAX_SECONDS
    assert [s["action"] for s in target["steps"]][-1] == "done"
    assert len(target["steps"]) >= 2 and target["steps"][0]["action"] == "uniform refinement"
    assert modes.mesh.n_cells == 8 ** (len(target["steps"]) - 1) * mesh.n_cells
    assert len(modes) == len(exact)
    true = np.abs(modes.frequencies / exact - 1)
    assert np.all(true <= 1e-3), true
    assert np.all(modes.frequency_errors <= 1e-3)
    assert modes.cell_indicators is None  # tol alone: estimate without indicators
    # the solve_modes default budget is the estimator's
    from acoustic_fem.estimate import DEFAULT_MAX_DOFS

    assert af.modes.TOL_MAX_DOFS == DEFAULT_MAX_DOFS


def test_solve_modes_tol_stops_at_the_budget_with_partial_modes():
    mesh = structured_box(BOX, 3)
    with pytest.raises(af.BudgetExceededError, match="max_dofs=3000") as exc:
        af.solve_modes(mesh, order=2, fmax=300.0, air=AIR, tol=1e-6, max_dofs=3000,
                       estimate=True)
    err = exc.value
    assert isinstance(err, ConvergenceError)  # catchable as before
    part = err.partial
    assert isinstance(part, af.Modes) and part.dofs.n_dofs <= 3000
    assert part.frequency_errors.max() > 1e-6 and part.cell_indicators is not None
    assert not part.info["accuracy_target"]["met"]
    assert err.budget["max_dofs"] == 3000 and len(err.steps) >= 1
    with pytest.raises(af.BudgetExceededError, match="nothing was solved") as exc:
        af.solve_modes(mesh, fmax=300.0, air=AIR, tol=1e-3, max_dofs=10)
    assert exc.value.partial is None


@pytest.mark.parametrize("kwargs, fragment", [
    (dict(tol=1e-3), "needs fmax"),
    (dict(tol=1e-3, fmax=300.0, count=4), "count"),
    (dict(tol=0.0, fmax=300.0), "tol"),
    (dict(tol=1e-3, fmax=300.0, max_dofs=0), "max_dofs"),
    (dict(tol=1e-3, fmax=300.0, max_seconds=-1.0), "max_seconds"),
])
def test_solve_modes_tol_bad_input(kwargs, fragment):
    with pytest.raises(InputError, match=fragment):
        af.solve_modes(structured_box(BOX, 3), **kwargs)


def test_solve_modes_tol_refuses_an_assembly():
    mesh = structured_box(BOX, 3)
    with pytest.raises(InputError, match="assembly"):
        af.solve_modes(mesh, fmax=300.0, tol=1e-3, assembly=af.assemble(mesh, 2))


def test_vtu_carries_the_indicator_as_cell_data(box_mesh, tmp_path):
    import meshio

    modes = af.solve_modes(box_mesh, order=2, count=5, air=AIR, estimate=True)
    p = af.write_vtk(tmp_path / "m.vtu", modes)
    got = meshio.read(p)
    names = [f"error_mode_{i:03d}_{f:.3f}Hz" for i, f in enumerate(modes.frequencies)]
    assert set(names) <= set(got.cell_data)
    for i, name in enumerate(names):
        np.testing.assert_array_equal(np.ravel(got.cell_data[name][0]),
                                      modes.cell_indicators[:, i])
    # without an estimate: no cell data, as before
    plain = af.solve_modes(box_mesh, order=2, count=5, air=AIR)
    assert not meshio.read(af.write_vtk(tmp_path / "p.vtu", plain)).cell_data
