"""The memory-lean eigensolver path: LOBPCG preconditioned by algebraic multigrid.

For models whose sparse factorisation does not fit in memory.  No matrix is
factorised: the lowest eigenpairs of K x = λ M x are found by LOBPCG (Knyazev
2001, locally optimal block preconditioned conjugate gradient; SciPy's
``lobpcg``) on the shifted, diagonally scaled pencil

    A y = μ B y,   A = D (K - σM) D,  B = D M D,  D = diag(M)^(-1/2),

μ = λ - σ, σ < 0 below the lowest eigenvalue as on the default path (A is
then positive definite, even for an all-rigid room whose K is singular).
The preconditioner is one V-cycle of smoothed-aggregation algebraic multigrid
(pyamg) on A, whose memory is a small multiple of A's (no fill-in).

Two LOBPCG runs: a short one (a few iterations) estimates the wanted μ, then
the tolerance is set relative to the largest wanted one and LOBPCG continues
from those vectors.  The block carries ``guard`` vectors beyond the wanted
ones: LOBPCG's convergence of the k-th pair depends on the gap to the first
eigenvalue outside the block.  Without a factorisation there is no inertia
count, so unlike the default path, completeness rests on LOBPCG's block
(a random start block in general position finds the lowest eigenpairs).
"""

from __future__ import annotations

import math
import numbers
import time
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import lobpcg

from ._errors import ConvergenceError, InputError, MissingDependencyError

__all__ = ["AmgSolver", "solve_amg", "PYAMG_INSTALL"]

#: LOBPCG iterations per round between checks of the wanted pairs
CHUNK = 25

PYAMG_INSTALL = "pip install 'acoustic-fem[lean]'   (or: pip install pyamg)"


@dataclass(frozen=True)
class AmgSolver:
    """Options of the memory-lean (AMG-preconditioned LOBPCG) eigensolver.

    Pass an instance, or the string ``"amg"`` for the defaults, as
    ``solve_modes(..., backend=...)``.

    Attributes
    ----------
    tol : float
        Relative residual ‖A y - μ B y‖₂ / (μ_top ‖B y‖₂) every wanted pair
        must reach, μ_top the largest wanted shifted eigenvalue (default
        1e-7).  The eigenvalue error is about tol² μ_top²/gap (Rayleigh
        quotient of a symmetric pencil), so eigenfrequencies are far more
        accurate than tol; mode shapes are accurate to about tol μ_top/gap.
    max_iter : int
        LOBPCG iterations at most (default 600).
    guard : int or None
        Block vectors beyond the wanted ones (None: max(6, 15 % of them)).
    seed : int
        Seed of the random start block (results are reproducible).
    """

    tol: float = 1e-7
    max_iter: int = 600
    guard: int | None = None
    seed: int = 0

    def __post_init__(self) -> None:
        if not (isinstance(self.tol, numbers.Real) and 0 < self.tol < 1e-2):
            raise InputError(f"AmgSolver(tol={self.tol!r}): give a relative residual in "
                             "(0, 0.01), e.g. 1e-7.")
        for name, low in (("max_iter", 1), ("guard", 1)):
            v = getattr(self, name)
            if v is None and name == "guard":
                continue
            if isinstance(v, bool) or not isinstance(v, numbers.Integral) or v < low:
                raise InputError(f"AmgSolver({name}={v!r}): give a whole number >= {low}.")


def _pyamg():
    try:
        import pyamg
    except ImportError:
        raise MissingDependencyError(
            "the memory-lean eigensolver (backend='amg') needs pyamg, which is not installed; "
            f"install it with: {PYAMG_INSTALL}.", install=PYAMG_INSTALL) from None
    return pyamg


def _residual_norms(A, B, mu, Y):
    """(m,) ‖A y - μ B y‖₂ of each column scaled to yᵀBy = 1 (LOBPCG's own measure)."""
    BY = B @ Y
    R = A @ Y - BY * mu
    return np.linalg.norm(R, axis=0) / np.sqrt(np.einsum("ij,ij->j", Y, BY))


def solve_amg(K, M, solver: AmgSolver, *, count, lam_max, lam_guess, n_estimate):
    """Lowest eigenpairs of K x = λ M x without a factorisation.

    Parameters
    ----------
    K, M : (n, n) sparse symmetric (K positive semi-definite, M positive definite)
    solver : AmgSolver
    count, lam_max, lam_guess, n_estimate : as for ``_eigen.solve_generalized``

    Returns
    -------
    lam : (m,) ascending eigenvalues
    X : (n, m) eigenvectors (not yet normalised)
    runs : list of dict
        One entry per block size tried (iterations, residuals, timings).
    """
    pyamg = _pyamg()
    n = K.shape[0]
    sigma = -0.1 * lam_guess
    d = 1.0 / np.sqrt(M.diagonal())
    D = sp.diags(d)
    B = (D @ M @ D).tocsr()
    A = (D @ K @ D).tocsr() - sigma * B
    A = sp.csr_matrix(A)
    t0 = time.perf_counter()
    hierarchy = pyamg.smoothed_aggregation_solver(A, symmetry="symmetric", max_coarse=500)
    precondition = hierarchy.aspreconditioner(cycle="V")
    t_setup = time.perf_counter() - t0
    want = count if count is not None else n_estimate
    rng = np.random.default_rng(solver.seed)
    runs = []
    Y = None
    for _attempt in range(8):
        guard = solver.guard if solver.guard is not None else max(6, math.ceil(0.15 * want))
        block = int(min(want + guard, max(n // 5 - 1, 1)))
        if block <= want:
            raise InputError(f"the model has only {n} unknowns: too few for {want} modes on the "
                             "lean path; use the default backend for small models.")
        start = rng.standard_normal((n, block))
        if Y is not None:  # warm start from the previous, smaller block
            start[:, : Y.shape[1]] = Y
        t1 = time.perf_counter()
        used = 0
        mu = None  # Ritz values of the last round (none before the first)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # non-convergence is checked below
            # LOBPCG stops only when the whole block has converged, and the
            # guard vectors converge last: run it in rounds and stop as soon
            # as the wanted pairs are there (a round restarts from the block)
            while True:
                step = min(8 if used == 0 else CHUNK, solver.max_iter - used)
                tol_abs = (solver.tol * float(np.sort(mu)[:want].max()) if used
                           else 1e-300)  # first round: a fixed 8 steps to estimate μ
                out = lobpcg(A, start if used == 0 else Y, B=B, M=precondition, tol=tol_abs,
                             maxiter=step, largest=False, retResidualNormsHistory=True)
                mu, Y, hist = out[0], out[1], out[-1]
                used += max(len(hist) - 1, 1)
                o = np.argsort(mu)
                mu, Y = mu[o], Y[:, o]
                res = _residual_norms(A, B, mu, Y) / float(mu[:want].max())
                if np.all(res[:want] <= solver.tol) or used >= solver.max_iter:
                    break
        runs.append(dict(sigma=float(sigma), nev=int(block), accepted=int(want),
                         backend="pyamg smoothed aggregation (V-cycle)",
                         engine="LOBPCG", iterations=int(used),
                         amg_levels=len(hierarchy.levels),
                         amg_operator_complexity=float(hierarchy.operator_complexity()),
                         amg_setup_seconds=t_setup, lobpcg_seconds=time.perf_counter() - t1,
                         max_relative_residual=float(res[:want].max())))
        if np.any(res[:want] > solver.tol):
            bad = int(np.count_nonzero(res[:want] > solver.tol))
            raise ConvergenceError(
                f"LOBPCG left {bad} of {want} wanted modes above the residual tolerance "
                f"{solver.tol:g} after {used} iterations (largest "
                f"{res[:want].max():.3g}); raise AmgSolver(max_iter=...), loosen tol, or use "
                "the default backend.")
        lam = mu + sigma
        if lam_max is None or lam[want - 1] > lam_max or block >= n // 5 - 1:
            break
        want = int(math.ceil(1.5 * want)) + 8
        Y = Y[:, :want]
    lam, Y = lam[:want], Y[:, :want]
    X = Y * d[:, None]
    if lam_max is not None:
        keep = lam <= lam_max
        lam, X = lam[keep], X[:, keep]
    if count is not None:
        lam, X = lam[:count], X[:, :count]
    return lam, X, runs
