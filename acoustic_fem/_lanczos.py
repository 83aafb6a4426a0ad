"""Block Lanczos for the shift-inverted pencil, with full re-orthogonalisation.

For A = K - σM factorised once, the operator T = A⁻¹M is self-adjoint in the
M inner product; its eigenvalues θ = 1/(λ - σ) are largest in magnitude for
the λ nearest σ.  A block Krylov basis V (M-orthonormal, blocks of b
vectors) is grown by multi-right-hand-side solves — much cheaper per vector
than one solve at a time with a supernodal factorisation — and orthogonalised
twice by classical block Gram–Schmidt (Daniel, Gragg, Kaufman & Stewart 1976).
When the basis is full it is restarted thickly: the best Ritz vectors are
kept and the Lanczos relation continued from the residual block (the
thick-restart Lanczos of Wu & Simon, SIAM J. Matrix Anal. Appl. 22, 2000,
the symmetric case of Stewart's Krylov–Schur method).  Ritz pairs of the
projected matrix are accepted when their Lanczos residual estimate ‖B y‖
falls below ``tol``·|θ| (Golub & Van Loan, Matrix Computations, 4th ed.,
§10.3); callers then check the true residuals of K x = λ M x.  A block of
size b finds eigenvalues of multiplicity up to b.
"""

from __future__ import annotations

import numpy as np
import scipy.linalg as sla


class LanczosStall(Exception):
    """The basis reached its size limit before the wanted Ritz pairs converged."""


def _m_orthonormalise(W, M, rng, V=None, MV=None):
    """M-orthonormalise the columns of W (Cholesky QR, twice).

    Returns (Q, MQ, R) with W = Q R.  One product with M per pass; MQ follows
    from MW by the same triangular transform.  Directions of W lost to
    rounding (a numerically rank-deficient block) are replaced by random
    vectors, made M-orthogonal to the basis ``V`` if given, with zero rows
    in R.
    """
    n, b = W.shape
    R_total = np.eye(b)
    MW = M @ W
    for _ in range(2):
        G = W.T @ MW
        G = 0.5 * (G + G.T)
        w, U = np.linalg.eigh(G)
        tiny = w <= 1e-26 * max(w.max(), 1e-300)
        if not tiny.any():
            R = sla.cholesky(G, lower=False)
            Rinv = sla.solve_triangular(R, np.eye(b), lower=False)
            W = W @ Rinv
            MW = MW @ Rinv
            R_total = R @ R_total
            continue
        keep = ~tiny
        k = int(keep.sum())
        Wn = np.empty_like(W)
        R = np.zeros((b, b))
        Wn[:, :k] = (W @ U[:, keep]) / np.sqrt(w[keep])
        R[:k] = (U[:, keep] * np.sqrt(w[keep])).T
        Z = rng.standard_normal((n, b - k))
        for _ in range(2):
            if V is not None and V.shape[1]:
                Z -= V @ (MV.T @ Z)
            Z -= Wn[:, :k] @ ((M @ Wn[:, :k]).T @ Z)
        Wn[:, k:] = Z
        W = Wn
        MW = M @ W
        R_total = R @ R_total
    return W, MW, R_total


def block_lanczos(solve, M, nev, *, block=8, max_basis=None, tol=1e-12, seed=0,
                  max_restarts=80):
    """Eigenpairs of largest |θ| of T = A⁻¹M (M-self-adjoint).

    Parameters
    ----------
    solve : callable, (n, b) -> (n, b), applies A⁻¹
    M : (n, n) sparse SPD
    nev : int, number of wanted eigenpairs
    block : int, block size b
    max_basis : int, basis size at which the basis is restarted
        (default 2·nev + 4b)
    tol : float, relative residual tolerance on θ
    max_restarts : int

    Returns
    -------
    theta : (nev,) eigenvalues of T, ordered by decreasing |θ|
    X : (n, nev) M-orthonormal Ritz vectors
    n_solves : int, number of right-hand sides solved
    """
    n = M.shape[0]
    rng = np.random.default_rng(seed)
    b = int(max(1, min(block, n)))
    if max_basis is None:
        max_basis = 2 * nev + 4 * b
    max_basis = int(min(max_basis, n - 2 * b))
    keep_n = int(min(nev + b, max_basis - 2 * b))
    if keep_n < nev:
        raise LanczosStall("problem too small for block Lanczos")
    V = np.empty((n, max_basis + b))
    MV = np.empty_like(V)
    T = np.zeros((max_basis + b, max_basis + b))

    Q, MQ, _ = _m_orthonormalise(rng.standard_normal((n, b)), M, rng)
    V[:, :b], MV[:, :b] = Q, MQ
    m = b  # vectors in V; the last block V[:, m-b:m] is the one to expand
    n_solves = 0
    restarts = 0
    since_check = 0
    while True:
        lo, hi = m - b, m
        W = solve(MV[:, lo:hi])
        n_solves += b
        norm0 = np.linalg.norm(W, axis=0)
        H = MV[:, :hi].T @ W
        W -= V[:, :hi] @ H
        if np.any(np.linalg.norm(W, axis=0) < 0.7 * norm0):
            # heavy cancellation: a second pass (Daniel, Gragg, Kaufman & Stewart 1976)
            H2 = MV[:, :hi].T @ W
            W -= V[:, :hi] @ H2
            H += H2
        Q, MQ, R = _m_orthonormalise(W, M, rng, V[:, :hi], MV[:, :hi])
        C = MV[:, :hi].T @ Q
        if np.abs(C).max() > 1e-12:
            Q -= V[:, :hi] @ C
            H += C @ R
            Q, MQ, R2 = _m_orthonormalise(Q, M, rng, V[:, :hi], MV[:, :hi])
            R = R2 @ R
        T[:hi, lo:hi] = H
        V[:, hi:hi + b], MV[:, hi:hi + b] = Q, MQ
        m = hi + b
        since_check += 1
        full = m > max_basis
        if hi < nev or (not full and since_check < 2):
            continue
        since_check = 0
        Ts = T[:hi, :hi]
        Ts = np.triu(Ts) + np.triu(Ts, 1).T  # the upper part holds the projections
        theta, Y = np.linalg.eigh(Ts)
        order = np.argsort(-np.abs(theta))
        theta, Y = theta[order], Y[:, order]
        res = np.linalg.norm(R @ Y[lo:hi, :nev], axis=0)
        if np.all(res <= tol * np.abs(theta[:nev])):
            return theta[:nev], V[:, :hi] @ Y[:, :nev], n_solves
        if not full:
            continue
        if restarts >= max_restarts:
            break
        restarts += 1
        # thick restart: keep the best keep_n Ritz vectors and the residual block
        Yk = Y[:, :keep_n]
        nxt, mnxt = V[:, hi:hi + b].copy(), MV[:, hi:hi + b].copy()
        V[:, :keep_n] = V[:, :hi] @ Yk
        MV[:, :keep_n] = MV[:, :hi] @ Yk
        V[:, keep_n:keep_n + b], MV[:, keep_n:keep_n + b] = nxt, mnxt
        T[:] = 0.0
        T[np.arange(keep_n), np.arange(keep_n)] = theta[:keep_n]
        m = keep_n + b
    raise LanczosStall(f"block Lanczos did not converge in {max_restarts} restarts")
