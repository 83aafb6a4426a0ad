"""Integer keys for small sorted index tuples (edges, facets), vectorised."""

from __future__ import annotations

import numpy as np

__all__ = ["row_keys"]


def row_keys(rows: np.ndarray, n: int) -> np.ndarray:
    """Unique int64 key per row of non-negative indices below ``n``.

    Rows are sorted first, so a key identifies the set of indices (an edge or
    facet regardless of orientation).

    Parameters
    ----------
    rows : (m, k) integer array, 1 <= k <= 3
    n : int
        Exclusive upper bound of the indices.

    Returns
    -------
    (m,) int64 array, or (m,) structured array when the indices do not fit
    into 63 bits (k * bits(n) > 63); both compare and sort consistently.
    """
    r = np.sort(np.asarray(rows, dtype=np.int64), axis=1)
    k = r.shape[1]
    bits = max(int(n - 1).bit_length(), 1)
    if k * bits <= 63:
        key = np.zeros(r.shape[0], dtype=np.int64)
        for j in range(k):  # k <= 3: a loop over tuple positions, not elements
            key = (key << bits) | r[:, j]
        return key
    r = np.ascontiguousarray(r)
    return r.view([(f"f{j}", np.int64) for j in range(k)]).ravel()
