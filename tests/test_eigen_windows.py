"""The shift-window eigensolver against dense LAPACK on the same matrices.

Reference: scipy.linalg.eigh (LAPACK dsygvd), an independent dense solver of
the same generalized problem K x = λ M x; the window logic must find every
eigenvalue below the limit exactly once, including inside the triple
degeneracies of a cube (Morse & Ingard §9.4: permutations of (l, m, n)).
"""

import numpy as np
import pytest
import scipy.linalg as sla

import acoustic_fem as af
from acoustic_fem import _eigen


def _structured_cube(n):
    """Kuhn triangulation of the unit cube: n³ sub-cubes, 6 tets each (symmetric mesh)."""
    g = np.linspace(0.0, 1.0, n + 1)
    X, Y, Z = np.meshgrid(g, g, g, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    idx = np.arange((n + 1) ** 3).reshape(n + 1, n + 1, n + 1)
    i, j, k = np.meshgrid(np.arange(n), np.arange(n), np.arange(n), indexing="ij")
    i, j, k = i.ravel(), j.ravel(), k.ravel()
    c = lambda a, b, d: idx[i + a, j + b, k + d]  # noqa: E731
    v = [c(0, 0, 0), c(1, 0, 0), c(0, 1, 0), c(1, 1, 0), c(0, 0, 1), c(1, 0, 1), c(0, 1, 1),
         c(1, 1, 1)]
    paths = [(1, 3), (1, 5), (2, 3), (2, 6), (4, 5), (4, 6)]
    tets = [np.column_stack([v[0], v[a], v[b], v[7]]) for a, b in paths]
    cells = np.vstack(tets)
    faces = {}
    return af.Mesh(pts, cells, af.CellType.TETRAHEDRON, 1, faces, {"air": np.arange(len(cells))})


@pytest.fixture(scope="module")
def cube_problem():
    mesh = _structured_cube(5)
    asm = af.assemble(mesh, 2)
    K, M = asm.stiffness, asm.mass
    lam_ref = sla.eigh(K.toarray(), M.toarray(), eigvals_only=True)
    return K, M, lam_ref


@pytest.mark.parametrize("engine", ["block", "arpack"])
@pytest.mark.parametrize("backend", ["auto", "superlu"])
def test_windows_find_every_eigenvalue_once(cube_problem, engine, backend, monkeypatch):
    K, M, lam_ref = cube_problem
    monkeypatch.setattr(_eigen, "DENSE_LIMIT", 0)  # force the sparse windows
    lam_max = float(lam_ref[120])  # ~120 modes; pick a limit in a gap
    lam_max = 0.5 * (lam_ref[lam_ref <= lam_max].max() + lam_ref[lam_ref > lam_max].min())
    lam, X, rep = _eigen.solve_generalized(
        K, M, count=None, lam_max=lam_max, lam_guess=(np.pi / 2) ** 2, n_estimate=60,
        backend=backend, max_per_window=40, max_first_window=40, engine=engine)
    expected = lam_ref[lam_ref <= lam_max]
    assert len(rep.windows) >= 3  # several windows really were used
    assert lam.shape == expected.shape  # none lost, none doubled
    # same discrete problem: agreement to solver accuracy (1e-9 of the largest)
    assert np.max(np.abs(lam - expected)) <= 1e-9 * expected.max()
    # eigenvectors M-orthonormal across windows (inner products of different windows)
    G = X.T @ (M @ X)
    assert np.max(np.abs(G - np.eye(len(lam)))) < 1e-7


def test_count_mode_returns_lowest(cube_problem, monkeypatch):
    K, M, lam_ref = cube_problem
    monkeypatch.setattr(_eigen, "DENSE_LIMIT", 0)
    lam, X, rep = _eigen.solve_generalized(
        K, M, count=30, lam_max=None, lam_guess=(np.pi / 2) ** 2, n_estimate=30)
    assert np.allclose(lam, lam_ref[:30], rtol=1e-10, atol=1e-10)
    assert abs(lam[0]) < 1e-9  # the 0 Hz mode of the all-rigid cube is mode 0


def test_inertia_from_superlu_counts_eigenvalues_below_shift(cube_problem):
    # Sylvester's law of inertia (e.g. Golub & Van Loan, Matrix Computations §8.1)
    from acoustic_fem._linalg import factorize

    K, M, lam_ref = cube_problem
    sigma = 0.5 * (lam_ref[40] + lam_ref[41]) if lam_ref[41] > lam_ref[40] * (1 + 1e-6) else \
        0.5 * (lam_ref[37] + lam_ref[38])
    f = factorize((K - sigma * M).tocsc(), definite=False, backend="superlu")
    assert f.n_negative == int(np.count_nonzero(lam_ref < sigma))
