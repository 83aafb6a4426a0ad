"""The optional MUMPS layer (acoustic_fem._zsym): complex symmetric LDLᵀ solves.

Reference: SciPy's SuperLU (``scipy.sparse.linalg.spsolve``, an independent
LU with partial pivoting) on the same matrix Q(σ) = K + iσC - σ²M of a small
P2 room with complex wall admittance -- the matrix the damped eigensolver
factorises.  Q(σ) is well conditioned at this shift (between modes, off the
real axis), so the two solutions agree to ~1e3 eps; the bound 1e-10 leaves a
factor 100 for the conditioning.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

import acoustic_fem as af
from acoustic_fem import _zsym, geometry
from acoustic_fem._errors import SolverError

pytestmark = pytest.mark.skipif(not _zsym.available(),
                                reason=f"MUMPS layer: {_zsym.unavailable_reason()}")


@pytest.fixture(scope="module")
def q_sigma():
    mesh = geometry.box((1.3, 1.0, 0.8), fmax=250.0, order=2)
    asm = af.assemble(mesh, 2)
    B = sum(af.boundary_mass(asm.dofs, n) for n in mesh.surface_names)
    beta = 0.2 + 0.1j
    sigma = 2.0 + 0.3j  # 1/m: between modes, above the real axis
    Q = (asm.K + (1j * sigma * beta) * B - sigma**2 * asm.M).tocsr()
    return Q


def test_solve_matches_superlu(q_sigma):
    Q = q_sigma
    assert abs(Q - Q.T).max() == 0.0 and abs(Q - Q.conj().T).max() > 0  # symmetric, not Hermitian
    n = Q.shape[0]
    rng = np.random.default_rng(3)
    b = rng.standard_normal((n, 5)) + 1j * rng.standard_normal((n, 5))
    F = _zsym.ComplexSymmetricFactor(Q)
    x = F.solve(b)
    ref = spla.spsolve(Q.tocsc(), b)
    assert np.linalg.norm(x - ref) / np.linalg.norm(ref) < 1e-10
    assert np.linalg.norm(Q @ x - b) / np.linalg.norm(b) < 1e-12
    # one column at a time gives the same as the block, shapes kept
    x0 = F.solve(b[:, 0])
    assert x0.shape == (n,)
    np.testing.assert_allclose(x0, x[:, 0], rtol=1e-13, atol=1e-13 * np.abs(x).max())
    assert F.factor_entries > Q.nnz // 2 and F.factor_megabytes >= 0
    # a real right-hand side is promoted, the input is not overwritten
    br = rng.standard_normal(n)
    keep = br.copy()
    xr = F.solve(br)
    np.testing.assert_array_equal(br, keep)
    assert np.linalg.norm(Q @ xr - br) / np.linalg.norm(br) < 1e-12


def test_bad_use_is_a_clear_error(q_sigma):
    F = _zsym.ComplexSymmetricFactor(q_sigma)
    with pytest.raises(SolverError, match="rows"):
        F.solve(np.ones(3))
    F.free()
    with pytest.raises(SolverError, match="freed"):
        F.solve(np.ones(q_sigma.shape[0]))
    singular = sp.kron(sp.eye(3), sp.csr_matrix(np.ones((2, 2)))).astype(complex)
    with pytest.raises(SolverError, match="singular"):
        _zsym.ComplexSymmetricFactor(singular)


def test_disabled_by_environment():
    env = dict(os.environ, ACOUSTIC_FEM_NO_MUMPS="1")
    out = subprocess.run(
        [sys.executable, "-c",
         "from acoustic_fem import _zsym, _damped; "
         "print(_zsym.available(), _damped.use_mumps('auto')); "
         "print(_zsym.unavailable_reason())"],
        env=env, capture_output=True, text=True, check=True)
    first, second = out.stdout.splitlines()
    assert first == "False False" and "ACOUSTIC_FEM_NO_MUMPS" in second
