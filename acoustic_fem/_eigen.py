"""Shift-invert Lanczos over several shift windows for K x = λ M x.

K is symmetric positive semi-definite (an all-rigid room has λ = 0), M
symmetric positive definite.  Each window factorises A = K - σ M once and
runs ARPACK's implicitly restarted Lanczos on A⁻¹M (scipy ``eigsh``).  The
``nev`` eigenvalues nearest σ returned by a window contain *every*
eigenvalue in the open interval (σ - r, σ + r), r = max |λ_i - σ|.  Windows
are chained so that these complete intervals overlap; each eigenvalue is
taken from exactly one window, the cut between windows placed in a gap of
the spectrum so that a degenerate cluster is never split.  When the
factorisation gives the inertia of A (the number of eigenvalues below σ,
Sylvester's law of inertia), the count of modes found below σ is checked
against it.
"""

from __future__ import annotations

import enum
import math
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from threadpoolctl import threadpool_limits

from ._errors import ConvergenceError, InputError, SolverError
from ._linalg import factorize
from ._lanczos import LanczosStall, block_lanczos

#: relative width within which eigenvalues count as one degenerate cluster
CLUSTER_RTOL = 1e-8
#: below this many unknowns the dense symmetric solver is used
DENSE_LIMIT = 1200


@dataclass
class EigenReport:
    """What the eigensolver did (kept in Modes.info)."""

    method: str = ""
    windows: list = field(default_factory=list)
    seconds: float = 0.0


def _dense(K, M, stop_count, lam_max):
    # one BLAS thread: for matrices this small, threads cost more than they save
    with threadpool_limits(1, user_api="blas"):
        lam, X = sla.eigh(K.toarray(), M.toarray())
    if lam_max is not None:
        keep = lam <= lam_max * (1 + 1e-12) + 1e-300
        lam, X = lam[keep], X[:, keep]
    if stop_count is not None:
        lam, X = lam[:stop_count], X[:, :stop_count]
    return lam, X


def _residuals(K, M, lam, X):
    """(m,) backward errors ‖Kx - λMx‖∞ / ((‖K‖∞ + |λ|‖M‖∞) ‖x‖∞) of eigenpairs.

    Scaled by the matrix norms, not by ‖Kx‖, so that the 0 Hz mode of a
    rigid room (Kx = 0) is judged correctly.
    """
    nK = abs(K).sum(axis=1).max()
    nM = abs(M).sum(axis=1).max()
    r = np.abs(K @ X - (M @ X) * lam).max(axis=0)
    return r / ((nK + np.abs(lam) * nM) * np.abs(X).max(axis=0))


#: eigenpairs whose relative residual exceeds this are rejected
RESIDUAL_TOL = 1e-8


def _window(K, M, sigma, nev, backend, tol, engine="block"):
    """Eigenpairs nearest ``sigma``; returns (lam, X, factor, engine_used)."""
    n = K.shape[0]
    A = (K - sigma * M).tocsc()
    f = factorize(A, definite=sigma < 0, backend=backend)
    nev = int(min(nev, n - 2))
    if engine == "block" and n > 4 * nev + 64:
        b = 8 if nev <= 24 else 16
        try:
            theta, X, _ = block_lanczos(f.solve, M, nev, block=b, tol=max(tol, 1e-13))
            lam = sigma + 1.0 / theta
            if np.all(_residuals(K, M, lam, X) < RESIDUAL_TOL):
                o = np.argsort(lam)
                return lam[o], X[:, o], f, "block Lanczos"
        except LanczosStall:
            pass
    ncv = int(min(n - 1, max(2 * nev + 1, nev + 20)))
    try:
        lam, X = spla.eigsh(
            K, k=nev, M=M, sigma=sigma, which="LM", OPinv=f.operator(), tol=tol, ncv=ncv
        )
    except spla.ArpackNoConvergence as exc:
        raise ConvergenceError(
            f"the eigensolver did not converge in the window around σ = {sigma:.6g} "
            f"({len(exc.eigenvalues)} of {nev} modes converged); increase the mesh quality "
            "or ask for fewer modes."
        ) from None
    o = np.argsort(lam)
    return lam[o], X[:, o], f, "ARPACK"


def _cut(lam: np.ndarray, upper: float, scale: float) -> tuple[float, np.ndarray]:
    """Position of a cut below ``upper`` in a gap of the spectrum.

    Every eigenvalue below ``upper`` (exclusive) is known to be in ``lam``.
    Returns the cut c and the mask of eigenvalues below it; eigenvalues
    within CLUSTER_RTOL of ``upper`` are left above the cut (their cluster
    may be incomplete).
    """
    tol = CLUSTER_RTOL * scale
    inside = lam < upper - tol
    if not inside.any():
        return -math.inf, inside
    last = lam[inside].max()
    above = lam[~inside]
    nxt = min(above.min(), upper) if above.size else upper
    return 0.5 * (last + nxt), inside


def solve_generalized(
    K: sp.spmatrix,
    M: sp.spmatrix,
    *,
    count: int | None,
    lam_max: float | None,
    lam_guess: float,
    n_estimate: int,
    backend: str = "auto",
    max_per_window: int = 160,
    max_first_window: int = 400,
    tol: float = 1e-10,
    engine: str = "block",
):
    """Lowest eigenpairs of K x = λ M x: the first ``count`` or all λ <= lam_max.

    Parameters
    ----------
    K, M : (n, n) sparse symmetric; K positive semi-definite, M positive definite
    count : int or None
    lam_max : float or None
        (At least one of count, lam_max is given; with both, the smaller set.)
    lam_guess : float
        A positive guess of the lowest nonzero eigenvalue (sets the first shift).
    n_estimate : int
        Estimated number of wanted eigenvalues (Weyl's law), sizes the windows.
    backend : str, MpiSolver or AmgSolver
        A factorisation name ("auto", "cholmod", "superlu") for the shift
        windows, or a large-model path ("petsc" / MpiSolver: SLEPc under MPI,
        "amg" / AmgSolver: AMG-preconditioned LOBPCG), which replaces them;
        the normalisation below is the same for every path.

    Returns
    -------
    lam : (m,) ascending eigenvalues
    X : (n, m) eigenvectors, M-orthonormal
    report : EigenReport
    """
    t0 = time.perf_counter()
    n = K.shape[0]
    report = EigenReport()
    large = large_model_solver(backend)
    if large is not None:
        lam, X, report.method, report.windows = _solve_large(
            K, M, large, count=count, lam_max=lam_max, lam_guess=lam_guess,
            n_estimate=n_estimate)
    elif n <= DENSE_LIMIT:
        lam, X = _dense(K, M, count, lam_max)
        report.method = "dense (LAPACK eigh)"
    else:
        report.method = "shift-invert windows"
        lam, X = _windows(K, M, count, lam_max, lam_guess, n_estimate, backend,
                          max_per_window, max_first_window, tol, report, engine)
    # M-normalise (ARPACK returns M-orthogonal vectors; this fixes the scale)
    MX = M @ X
    norms = np.sqrt(np.einsum("ij,ij->j", X, MX))
    X = X / norms
    # deterministic sign: the entry of largest magnitude is positive
    idx = np.argmax(np.abs(X), axis=0)
    X = X * np.sign(X[idx, np.arange(X.shape[1])])
    report.seconds = time.perf_counter() - t0
    return lam, X, report


class LargeModelBackend(str, enum.Enum):
    """Eigensolver paths for large models, named as ``backend`` strings.

    PETSC
        SLEPc Krylov–Schur, shift-and-invert, MUMPS, under MPI
        (:class:`~acoustic_fem.MpiSolver` with its defaults).
    AMG
        LOBPCG preconditioned by algebraic multigrid, no factorisation
        (:class:`~acoustic_fem.AmgSolver` with its defaults).
    """

    PETSC = "petsc"
    AMG = "amg"


def large_model_solver(backend):
    """The MpiSolver / AmgSolver that ``backend`` asks for, or None (a factorisation name)."""
    from ._distributed_eigen import MpiSolver
    from ._lean_eigen import AmgSolver

    if isinstance(backend, (MpiSolver, AmgSolver)):
        return backend
    if isinstance(backend, enum.Enum):
        backend = backend.value
    if not isinstance(backend, str):
        raise InputError(
            f"backend={backend!r} is not understood: give a name ('auto', 'cholmod', "
            "'superlu', 'petsc', 'amg') or an MpiSolver(...) / AmgSolver(...).")
    if backend == LargeModelBackend.PETSC.value:
        return MpiSolver()
    if backend == LargeModelBackend.AMG.value:
        return AmgSolver()
    return None


def _solve_large(K, M, solver, *, count, lam_max, lam_guess, n_estimate):
    from ._distributed_eigen import MpiSolver, solve_mpi
    from ._lean_eigen import solve_amg

    if isinstance(solver, MpiSolver):
        lam, X, runs = solve_mpi(K, M, solver, count=count, lam_max=lam_max,
                                 lam_guess=lam_guess, n_estimate=n_estimate)
        method = (f"SLEPc Krylov-Schur shift-invert, MUMPS {solver.factor.value}, "
                  f"{solver.ranks} MPI rank{'s' if solver.ranks > 1 else ''}")
    else:
        lam, X, runs = solve_amg(K, M, solver, count=count, lam_max=lam_max,
                                 lam_guess=lam_guess, n_estimate=n_estimate)
        method = "LOBPCG, smoothed-aggregation AMG preconditioner"
    return lam, X, method, runs


def _windows(K, M, count, lam_max, lam_guess, n_estimate, backend, max_per_window,
             max_first_window, tol, report,
             engine):
    n = K.shape[0]
    want = count if count is not None else n_estimate
    sigma = -0.1 * lam_guess
    # the first window has σ < 0: a Cholesky factorisation (fast), so it may
    # be large; later windows (σ > 0) need an indefinite factorisation
    nev = int(min(max(want + 2, 8), max_first_window, n - 2))
    lower = -math.inf
    acc_lam: list[np.ndarray] = []
    acc_X: list[np.ndarray] = []
    total = 0
    scale = max(abs(lam_guess), 1e-300)
    for _attempt in range(200):  # windows; each advances or shrinks
        lam, X, f, used = _window(K, M, sigma, nev, backend, tol, engine)
        scale = max(scale, float(np.abs(lam).max()))
        r = float(np.abs(lam - sigma).max())
        if sigma - r > lower + CLUSTER_RTOL * scale and math.isfinite(lower):
            # a gap between the last window and this one: move the shift down
            report.windows.append(dict(sigma=sigma, nev=nev, accepted=0, note="gap, retried"))
            sigma = lower + 0.5 * (sigma - lower)
            continue
        if f.n_negative is not None and sigma > 0:
            below_prev = total + int(np.count_nonzero((lam >= lower) & (lam < sigma)))
            if below_prev != f.n_negative:
                raise SolverError(
                    f"mode count check failed at σ = {sigma:.6g}: {below_prev} modes found below "
                    f"the shift but the factorisation's inertia says {f.n_negative}."
                )
        cut, inside = _cut(lam, sigma + r, scale)
        take = inside & (lam >= lower)
        acc_lam.append(lam[take])
        acc_X.append(X[:, take])
        total += int(take.sum())
        report.windows.append(
            dict(sigma=float(sigma), nev=int(nev), accepted=int(take.sum()), backend=f.backend,
                 engine=used,
                 inertia=f.n_negative)
        )
        done_count = count is not None and total >= count
        done_lam = lam_max is not None and cut > lam_max
        if done_count or done_lam:
            break
        if nev >= n - 2:
            break  # the whole spectrum has been computed
        if not math.isfinite(cut):
            nev = min(2 * nev, n - 2)
            continue
        # next window: centred above the cut so that its lower edge overlaps
        taken = lam[(lam >= max(lower, sigma - r)) & (lam < cut)]
        span = max(cut - (taken.min() if taken.size else sigma - r), 1e-12 * scale)
        half = 0.5 * span * nev / max(taken.size, 1)
        lower = cut
        if count is not None:
            nev = int(min(max(count - total + 2, 8), max_per_window, n - 2))
        else:  # size the next window from the Weyl estimate of what is left
            left = max(n_estimate - total, 0)
            nev = int(min(max(int(1.25 * left) + 8, 16), max_per_window, n - 2))
        sigma = cut + 0.6 * half
    else:
        raise SolverError("the eigensolver's windows did not cover the requested range.")
    lam = np.concatenate(acc_lam)
    X = np.hstack(acc_X)
    o = np.argsort(lam, kind="stable")
    lam, X = lam[o], X[:, o]
    if lam_max is not None:
        keep = lam <= lam_max
        lam, X = lam[keep], X[:, keep]
    if count is not None:
        lam, X = lam[:count], X[:, :count]
    return lam, X
