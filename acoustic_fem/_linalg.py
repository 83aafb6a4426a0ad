"""Sparse factorisations of shifted Helmholtz matrices A = K - σ M.

A :class:`Factor` is computed once per shift and reused for every solve.
Backends:

* ``"cholmod"`` — supernodal Cholesky of CHOLMOD (scikit-sparse), for the
  symmetric positive definite case σ < 0; fill-reducing ordering chosen by
  CHOLMOD (AMD/METIS).  Fastest on this project's benchmarks; optional.
* ``"superlu"`` — SciPy's SuperLU in symmetric mode (symmetric minimum-degree
  ordering of A + Aᵀ, diagonal pivots preferred).  Always available; for an
  indefinite A it also yields the inertia (the number of negative pivots,
  which by Sylvester's law of inertia is the number of eigenvalues below σ).
"""

from __future__ import annotations

import enum
import os

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ._errors import InputError, SolverError

__all__ = ["Backend", "Factor", "factorize", "available_backends"]


class Backend(str, enum.Enum):
    """Sparse direct solvers the eigensolver can use."""

    AUTO = "auto"
    CHOLMOD = "cholmod"
    SUPERLU = "superlu"


def _have_cholmod() -> bool:
    if os.environ.get("ACOUSTIC_FEM_NO_CHOLMOD"):
        return False
    try:
        import sksparse.cholmod  # noqa: F401
    except Exception:
        return False
    return True


def available_backends() -> list[str]:
    """Names of the factorisation backends usable on this machine."""
    return [b.value for b in (Backend.CHOLMOD,) if _have_cholmod()] + [Backend.SUPERLU.value]


class Factor:
    """A factorisation of a sparse symmetric matrix A, reused for many solves.

    Attributes
    ----------
    backend : str
    n : int
    n_negative : int or None
        Number of negative eigenvalues of A (inertia), when known.
    """

    def __init__(self, solve, n: int, backend: str, n_negative: int | None):
        self._solve = solve
        self.n = n
        self.backend = backend
        self.n_negative = n_negative

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Solve A x = b for b of shape (n,) or (n, m)."""
        return self._solve(b)

    def operator(self) -> spla.LinearOperator:
        """A⁻¹ as a LinearOperator (n x n)."""
        return spla.LinearOperator(
            (self.n, self.n), matvec=self._solve, matmat=self._solve, dtype=float
        )


def _cholmod(A: sp.csc_matrix) -> Factor:
    from sksparse.cholmod import CholmodNotPositiveDefiniteError, cholesky

    # Nested dissection (METIS) roughly halves the fill and the factorisation
    # time against CHOLMOD's default AMD choice on 3D P2 meshes (bench/).
    f = None
    for ordering in ("metis", "default"):
        try:
            f = cholesky(A, mode="supernodal", ordering_method=ordering)
            break
        except CholmodNotPositiveDefiniteError as exc:
            raise _NotDefinite(str(exc)) from None
        except Exception:  # METIS not compiled in: CHOLMOD's own choice
            if ordering == "default":
                raise
    return Factor(f.solve_A, A.shape[0], Backend.CHOLMOD.value, 0)


class _NotDefinite(Exception):
    pass


def _superlu(A: sp.csc_matrix) -> Factor:
    try:
        lu = spla.splu(
            A,
            permc_spec="MMD_AT_PLUS_A",
            diag_pivot_thresh=0.0,
            options={"SymmetricMode": True},
        )
    except RuntimeError as exc:  # exactly singular
        raise SolverError(
            f"the shifted matrix is singular ({exc}); the shift sits on an eigenvalue — "
            "this is rare: retry with a slightly different frequency range."
        ) from None
    n_neg = None
    if np.array_equal(lu.perm_r, lu.perm_c):
        # A = Pᵀ L U P with no row pivoting: U = D Lᵀ, so diag(U) = D
        n_neg = int(np.count_nonzero(lu.U.diagonal() < 0))

    def solve(b):
        return lu.solve(np.asarray(b, dtype=float))

    return Factor(solve, A.shape[0], Backend.SUPERLU.value, n_neg)


def factorize(A: sp.spmatrix, *, definite: bool, backend: str = "auto") -> Factor:
    """Factorise the symmetric sparse matrix ``A`` (n x n).

    Parameters
    ----------
    A : (n, n) sparse symmetric matrix
    definite : bool
        True when A is known to be positive definite (a negative shift).
    backend : {"auto", "cholmod", "superlu"}
        "auto" takes CHOLMOD for definite matrices when installed, else SuperLU.

    Returns
    -------
    Factor
    """
    try:
        b = Backend(backend)
    except ValueError:
        raise InputError(
            f"unknown factorisation backend {backend!r}; available: {available_backends()}."
        ) from None
    if b is Backend.CHOLMOD and not _have_cholmod():
        raise InputError(
            "backend 'cholmod' asked for but scikit-sparse is not installed; install it with "
            "`apt-get install libsuitesparse-dev && pip install 'scikit-sparse==0.4.16'` "
            "or use backend='superlu'."
        )
    A = sp.csc_matrix(A)
    if definite and b in (Backend.AUTO, Backend.CHOLMOD) and _have_cholmod():
        try:
            return _cholmod(A)
        except _NotDefinite:
            pass  # fall through to LU: a (numerically) singular shifted matrix
    return _superlu(A)
