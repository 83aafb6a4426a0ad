"""Cross-check of acoustic_fem against an independent assembler: scikit-fem.

The same straight mesh (read by ``acoustic_fem.read_mesh`` from a gmsh file
written by ``meshgen``) is handed to scikit-fem (``skfem.MeshTri`` /
``skfem.MeshTet`` built from our vertices), which assembles the same
discrete problem with its own Lagrange elements (``ElementTriP1/P2``,
``ElementTetP1/P2``) and its own forms (``skfem.models.poisson.laplace`` =
∫∇u·∇v, ``mass`` = ∫uv).  Pressure-release DOFs are found on scikit-fem's
side from its own facets located by coordinates (x == Lx) and its own
``Basis.get_dofs``.  The two discretisations are then the same matrices up
to a renumbering of the DOFs, so:

* the generalized eigenvalues K x = λ M x (with the Dirichlet DOFs removed)
  agree to rounding; we ask 1e-8 relative, far above the ~1e-12 that
  double-precision solvers reach on these well-conditioned, small problems
  and far below any discretisation difference (changing P1 to P2 moves the
  eigenvalues by >1e-3 relative, a wrong mass or stiffness entry by more);
* numbering-invariant quantities of K and M agree: Frobenius norms, traces,
  sorted matrix eigenvalues (tiny meshes), and -- after matching DOFs by
  their coordinates -- every entry.

Besides scikit-fem, some checks use published facts of Lagrange finite
elements (cited beside each check):

* partition of unity, Σ_j φ_j ≡ 1, so Σ_ij M_ij = |Ω| and K·1 = 0
  (Ciarlet, *The Finite Element Method for Elliptic Problems*, 1978, §2.2);
* exactness of the interpolant on polynomials of degree <= the element
  order (Ciarlet 1978, §3.1), so u = x gives uᵀKu = ∫|∇x|² = |Ω| and
  uᵀMu = ∫x² dΩ; for P2, u = x² gives uᵀKu = ∫4x² dΩ.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse.linalg as spla
import skfem
from scipy.spatial import cKDTree
from skfem.models.poisson import laplace, mass

import acoustic_fem as af
import meshgen

RECT = (1.3, 0.7)  # Lx, Ly of the 2D domain (m)
BOX = (1.3, 0.9, 0.7)  # Lx, Ly, Lz of the 3D domain (m); distinct sides -> no exact degeneracy
N_EIG = 15  # number of lowest eigenvalues compared
EIG_RTOL = 1e-8  # see the module docstring
# Entrywise / norm agreement: both assemblers sum a few local contributions
# per entry, each exact to rounding; the differences are a few ulps of the
# largest entry.  1e-12 leaves a margin of ~1e3 over that.
MAT_RTOL = 1e-12

ORDERS = (1, 2)
CELLS = ("triangle", "tetra")

_SKFEM_ELEMENTS = {
    ("triangle", 1): skfem.ElementTriP1,
    ("triangle", 2): skfem.ElementTriP2,
    ("tetra", 1): skfem.ElementTetP1,
    ("tetra", 2): skfem.ElementTetP2,
}


# ---------------------------------------------------------------------------
# fixtures and helpers
# ---------------------------------------------------------------------------
@pytest.fixture(scope="module")
def meshes(tmp_path_factory):
    """Straight (first-order) meshes of the rectangle and the box, medium and tiny."""
    d = tmp_path_factory.mktemp("crosscheck")
    return {
        ("triangle", "medium"): af.read_mesh(meshgen.rect_msh(d / "rect.msh", size=RECT, h=0.15)),
        ("tetra", "medium"): af.read_mesh(meshgen.box_msh(d / "box.msh", size=BOX, h=0.35)),
        ("triangle", "tiny"): af.read_mesh(meshgen.rect_msh(d / "rect_t.msh", size=RECT, h=0.45)),
        ("tetra", "tiny"): af.read_mesh(meshgen.box_msh(d / "box_t.msh", size=BOX, h=0.7)),
    }


def _size(cell):
    return RECT if cell == "triangle" else BOX


def _skfem_basis(mesh: af.Mesh, cell: str, order: int) -> skfem.Basis:
    """scikit-fem basis on the vertices of our mesh (straight cells)."""
    assert mesh.geometry_order == 1
    t = np.ascontiguousarray(mesh.vertices.T)
    if cell == "triangle":
        sm = skfem.MeshTri(np.ascontiguousarray(mesh.points[:, :2].T), t)
    else:
        sm = skfem.MeshTet(np.ascontiguousarray(mesh.points.T), t)
    return skfem.Basis(sm, _SKFEM_ELEMENTS[(cell, order)]())


def _skfem_matrices(basis: skfem.Basis):
    return laplace.assemble(basis).tocsr(), mass.assemble(basis).tocsr()


def _dof_match(ours: af.Assembly, basis: skfem.Basis) -> np.ndarray:
    """perm with our DOF i located at scikit-fem DOF perm[i] (matched by coordinates).

    The match is by the DOF locations only (vertices, and edge midpoints for
    P2), so it does not rely on either library's numbering.
    """
    d = basis.mesh.p.shape[0]
    sk_pts = basis.doflocs.T  # (N, d) scikit-fem's own DOF coordinates
    our_pts = ours.dofs.points[:, :d]
    assert sk_pts.shape == our_pts.shape
    dist, perm = cKDTree(sk_pts).query(our_pts)
    # DOFs are >= h/2 apart; coordinates of the same point agree to rounding
    assert dist.max() < 1e-12
    assert np.unique(perm).size == perm.size  # a bijection
    return perm


def _release_dofs(basis: skfem.Basis, Lx: float) -> np.ndarray:
    """scikit-fem DOFs on the facets with x == Lx (the ``x1`` pressure-release wall)."""
    facets = basis.mesh.facets_satisfying(lambda x: np.abs(x[0] - Lx) < 1e-12)
    assert facets.size > 0
    return np.unique(basis.get_dofs(facets).all())


def _reference_eigenvalues(K, M, n):
    """Lowest n eigenvalues of K x = λ M x by scipy, independent of acoustic_fem."""
    if K.shape[0] <= 300:  # dense LAPACK, exact to rounding
        return sla.eigh(K.toarray(), M.toarray(), eigvals_only=True, subset_by_index=[0, n - 1])
    # shift-invert Lanczos about σ = -1 (below the spectrum: K is positive
    # definite with the Dirichlet DOFs removed), tol=0 -> machine precision
    lam = spla.eigsh(K.tocsc(), k=n, M=M.tocsc(), sigma=-1.0, which="LM", tol=0,
                     return_eigenvectors=False)
    return np.sort(lam)


# ---------------------------------------------------------------------------
# eigenvalues with a pressure-release wall
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_eigenvalues_match_skfem_with_pressure_release(meshes, cell, order):
    mesh = meshes[(cell, "medium")]
    Lx = _size(cell)[0]
    basis = _skfem_basis(mesh, cell, order)
    Ksk, Msk = _skfem_matrices(basis)
    D = _release_dofs(basis, Lx)
    interior = np.setdiff1d(np.arange(basis.N), D)
    ref = _reference_eigenvalues(Ksk[interior][:, interior], Msk[interior][:, interior], N_EIG)

    modes = af.solve_modes(mesh, {"x1": af.PressureRelease()}, order=order, count=N_EIG)
    assert modes.eigenvalues.shape == (N_EIG,)
    # source: scikit-fem assembly + scipy eigensolver on the same discrete problem
    np.testing.assert_allclose(modes.eigenvalues, ref, rtol=EIG_RTOL)

    # the same DOFs are fixed on both sides (found independently)
    perm = _dof_match(af.assemble(mesh, order), basis)
    ours_fixed = modes.dofs.boundary_dofs("x1")
    np.testing.assert_array_equal(np.sort(perm[ours_fixed]), D)

    # mode shapes, moved to scikit-fem's numbering, are eigenvectors of
    # scikit-fem's matrices, M-normalised and zero on the release wall.
    X = np.zeros((basis.N, N_EIG))
    X[perm] = modes.shapes
    assert np.all(X[D] == 0.0)
    # M-orthonormality to rounding of the eigensolver (1e-8, as the eigenvalues)
    np.testing.assert_allclose(X.T @ (Msk @ X), np.eye(N_EIG), atol=1e-8)
    R = (Ksk @ X - (Msk @ X) * modes.eigenvalues)[interior]
    scale = np.abs(Msk @ X).max(axis=0) * modes.eigenvalues
    assert np.all(np.abs(R).max(axis=0) <= 1e-7 * scale)


def test_eigenvalue_comparison_can_fail(meshes):
    """The 1e-8 comparison separates P1 from P2: a wrong element order would show."""
    mesh = meshes[("triangle", "medium")]
    p1 = af.solve_modes(mesh, {"x1": af.PressureRelease()}, order=1, count=N_EIG).eigenvalues
    p2 = af.solve_modes(mesh, {"x1": af.PressureRelease()}, order=2, count=N_EIG).eigenvalues
    assert np.max(np.abs(p1 - p2) / p2) > 1e3 * EIG_RTOL


# ---------------------------------------------------------------------------
# assembled matrices: numbering-invariant comparisons
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_matrices_match_skfem_invariants(meshes, cell, order):
    mesh = meshes[(cell, "medium")]
    ours = af.assemble(mesh, order)
    K, M = ours.K.tocsr(), ours.M.tocsr()
    basis = _skfem_basis(mesh, cell, order)
    Ksk, Msk = _skfem_matrices(basis)
    assert K.shape == Ksk.shape == (basis.N, basis.N)

    # symmetric, as both bilinear forms are
    assert abs(K - K.T).max() <= MAT_RTOL * abs(K).max()
    assert abs(M - M.T).max() <= MAT_RTOL * abs(M).max()

    # Frobenius norms and traces are invariant under a DOF permutation
    # (source: scikit-fem's matrices)
    for A, B in ((K, Ksk), (M, Msk)):
        np.testing.assert_allclose(sla.norm(A.toarray()), sla.norm(B.toarray()), rtol=MAT_RTOL)
        np.testing.assert_allclose(A.diagonal().sum(), B.diagonal().sum(), rtol=MAT_RTOL)

    # partition of unity (Ciarlet 1978, §2.2): Σ M_ij = |Ω| exactly, K·1 = 0;
    # the exact area / volume of the rectangle / box; checked for both
    # assemblers, so a failure says which side is wrong
    exact = float(np.prod(_size(cell)))
    for A, B in ((K, M), (Ksk, Msk)):
        np.testing.assert_allclose(B.sum(), exact, rtol=MAT_RTOL)
        ones = np.ones(A.shape[0])
        assert np.abs(A @ ones).max() <= MAT_RTOL * abs(A).max() * 10  # ~10 terms per row

    # entry by entry, after matching DOFs by coordinates (source: scikit-fem)
    perm = _dof_match(ours, basis)
    for A, B in ((K, Ksk), (M, Msk)):
        Bp = B[perm][:, perm]
        assert abs(A - Bp).max() <= MAT_RTOL * abs(B).max()


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_matrix_spectra_match_skfem_on_tiny_meshes(meshes, cell, order):
    """Sorted eigenvalues of K and of M alone: invariant under DOF renumbering."""
    mesh = meshes[(cell, "tiny")]
    ours = af.assemble(mesh, order)
    assert ours.n_dofs < 600  # dense eigenvalues stay cheap
    Ksk, Msk = _skfem_matrices(_skfem_basis(mesh, cell, order))
    for A, B in ((ours.K, Ksk), (ours.M, Msk)):
        ea = np.linalg.eigvalsh(A.toarray())
        eb = np.linalg.eigvalsh(B.toarray())
        # symmetric eigenvalues are perturbed by at most ||ΔA||_2 (Weyl's
        # inequality); ΔA is rounding, ~n·eps·||A||.  K has an exact 0
        # eigenvalue (constants), so the tolerance is absolute in ||A||.
        np.testing.assert_allclose(ea, eb, rtol=0, atol=MAT_RTOL * np.abs(eb).max())
    # K is singular with the constants as its only null vector (connected
    # domain, no Dirichlet DOFs): one eigenvalue ~0, the next well away
    eK = np.linalg.eigvalsh(ours.K.toarray())
    assert abs(eK[0]) < 1e-12 * eK[-1] < eK[1]


@pytest.mark.parametrize("order", ORDERS)
@pytest.mark.parametrize("cell", CELLS)
def test_polynomial_energies_are_exact(meshes, cell, order):
    """Interpolants of polynomials of degree <= order are exact (Ciarlet 1978, §3.1)."""
    mesh = meshes[(cell, "medium")]
    L = _size(cell)
    a = af.assemble(mesh, order)
    x = a.dofs.points[:, 0]
    cross = float(np.prod(L[1:]))  # area (3D) / length (2D) of a cross-section x = const
    # u = x: ∫|∇x|² dΩ = |Ω|; ∫ x² dΩ = cross · Lx³/3  (elementary integrals)
    np.testing.assert_allclose(x @ (a.K @ x), cross * L[0], rtol=MAT_RTOL)
    np.testing.assert_allclose(x @ (a.M @ x), cross * L[0] ** 3 / 3, rtol=MAT_RTOL)
    if order == 2:
        # u = x² is in P2: ∫|∇x²|² dΩ = ∫4x² dΩ = 4·cross·Lx³/3
        u = x**2
        np.testing.assert_allclose(u @ (a.K @ u), 4 * cross * L[0] ** 3 / 3, rtol=MAT_RTOL)
    else:
        # ...but not in P1: the P1 interpolant's energy differs (the check can fail)
        u = x**2
        assert abs(u @ (a.K @ u) - 4 * cross * L[0] ** 3 / 3) > 1e-4
