"""Comparison of two sets of mode shapes of the same discrete problem (test helper).

Two solvers of the same pencil K x = λ M x agree on the eigenvalues; their
eigenvectors agree up to sign for simple eigenvalues, and only as subspaces
inside a degenerate cluster (any M-orthonormal basis of the eigenspace is a
valid answer).  The subspace check uses the principal angles between the two
bases in the M inner product (Golub & Van Loan, *Matrix Computations*, 4th
ed., §6.4.3): for M-orthonormal bases U, V of equal dimension the cosines of
the angles are the singular values of Uᵀ M V.
"""

from __future__ import annotations

import numpy as np


def clusters(freqs: np.ndarray, rtol: float) -> list[np.ndarray]:
    """Index groups of (numerically) equal frequencies, ascending input."""
    scale = max(float(np.max(np.abs(freqs))), 1e-300)
    cuts = np.flatnonzero(np.diff(freqs) > rtol * scale) + 1
    return np.split(np.arange(freqs.size), cuts)


def subspace_cosines(ref, other, M, freqs, rtol=1e-9):
    """Per cluster: smallest cosine of the principal angles, and Uᵀ M V for singletons.

    Parameters
    ----------
    ref, other : (n, m) M-orthonormal mode shapes (free DOFs)
    M : (n, n) sparse mass matrix
    freqs : (m,) frequencies of ``ref``, ascending

    Returns
    -------
    worst : float
        The smallest cosine over all clusters (1 = identical subspaces).
    signed : (k,) float
        u_jᵀ M v_j of the simple eigenvalues (+1 when the signs agree too).
    """
    G = ref.T @ (M @ other)
    worst, signed = 1.0, []
    for c in clusters(freqs, rtol):
        s = np.linalg.svd(G[np.ix_(c, c)], compute_uv=False)
        worst = min(worst, float(s.min()))
        if c.size == 1:
            signed.append(float(G[c[0], c[0]]))
    return worst, np.array(signed)
