"""Following modes through a parameter sweep by the modal assurance criterion.

A mode's position in the ascending frequency list changes when two modes
cross, so a sweep that plotted "mode 3" of every variant would jump from one
shape to another.  Here each variant's mode shapes are sampled on one common
set of points — given as *fractions* of the variant's bounding box, so that
rooms of different sizes compare point for point — and consecutive variants
are matched by the modal assurance criterion

    MAC(φ, ψ) = |φᴴψ|² / ((φᴴφ)(ψᴴψ)),

which is 1 for proportional shapes and 0 for orthogonal ones, independent of
normalisation and sign (Allemang & Brown, "A correlation coefficient for
modal vector analysis", Proc. 1st IMAC, 1982).  The matching is the
assignment maximising the summed MAC (``scipy.optimize.linear_sum_assignment``),
so two modes that cross in frequency keep their identities.

Degenerate modes
----------------
Where several modes of a variant share one frequency (a cube, or a sweep
point exactly on a crossing) their eigenvectors are any orthonormal basis of
the eigenspace, and the solver's choice may mix the shapes the neighbouring
variants have.  Modes whose frequencies agree within ``degenerate_rtol`` form
a cluster; when as many tracks project mostly into the cluster's span (the
squared cosine of the principal angle, i.e. the subspace MAC, at least
``min_mac``) the cluster's basis is rotated by the orthogonal Procrustes
solution (Golub & Van Loan, *Matrix Computations*, 4th ed., §6.4.1) onto
those tracks' previous shapes.  The rotated vectors are as valid a basis of
the (near-)eigenspace as the solver's; their frequencies are the Rayleigh
quotients Σ_j R_jk² λ_j (λ = f²), which lie within the cluster's spread.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from ._errors import InputError
from .elements import reference_element

__all__ = [
    "Tracks", "grid_fractions", "locate_points", "sample_shapes", "mac_matrix", "track_modes",
]

#: Barycentric tolerance with which a point counts as inside a cell.
_INSIDE_TOL = 1e-9
#: Nearest cell centroids tried per point before the exhaustive search.
_CANDIDATES = 16


# ----------------------------------------------------------------- sampling
def grid_fractions(n: int = 8, dim: int = 3) -> np.ndarray:
    """Regular grid of cell-centred fractions of a bounding box.

    Parameters
    ----------
    n : int
        Points per axis (>= 2): fractions (i + 1/2)/n, i = 0..n-1.  A grid of
        n points per axis tells apart cosine modes of index below n along
        that axis (higher ones alias onto lower ones).
    dim : int
        1, 2 or 3.

    Returns
    -------
    (n**dim, dim) float array, each entry in (0, 1).
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 2:
        raise InputError(f"grid={n!r} must be a whole number of points per axis, >= 2 (e.g. 8).")
    if dim not in (1, 2, 3):
        raise InputError(f"dim={dim!r} must be 1, 2 or 3.")
    t = (np.arange(n) + 0.5) / n
    g = np.meshgrid(*([t] * dim), indexing="ij")
    return np.stack([a.ravel() for a in g], axis=1)


def _check_fractions(fractions, dim: int) -> np.ndarray:
    F = np.asarray(fractions, dtype=float)
    if F.ndim != 2 or F.shape[1] < dim or F.shape[0] == 0:
        raise InputError(
            f"tracking points must be an (n_points, {dim}) array of fractions of the bounding "
            f"box, got shape {F.shape}; e.g. grid_fractions(8, {dim})."
        )
    F = F[:, :dim]
    if not np.all(np.isfinite(F)) or F.min() < 0.0 or F.max() > 1.0:
        raise InputError(
            "tracking points are fractions of the bounding box and must lie in [0, 1]; got "
            f"values in [{np.nanmin(F):g}, {np.nanmax(F):g}]."
        )
    return F


def locate_points(mesh, points) -> tuple[np.ndarray, np.ndarray]:
    """Cell containing each point and the point's reference coordinates there.

    Uses the straight (vertex) map of each cell, which is exact for
    first-order geometry and for second-order cells with straight edges; on
    curved cells a point within the curved part of a boundary cell may be
    reported outside.

    Parameters
    ----------
    mesh : Mesh
    points : (n_points, 3) or (n_points, dim) float array

    Returns
    -------
    cells : (n_points,) int array
        Containing cell, -1 for points outside the mesh.
    xi : (n_points, dim) float array
        Reference coordinates in that cell (NaN outside).
    """
    from scipy.spatial import cKDTree

    d = mesh.dim
    P = np.asarray(points, dtype=float)
    if P.ndim != 2 or P.shape[1] < d:
        raise InputError(f"points must be rows (n_points, 3); got shape {P.shape}.")
    P = P[:, :d]
    V = mesh.points[mesh.vertices][:, :, :d]  # (n_cells, d+1, d)
    v0 = V[:, 0, :]
    J = np.transpose(V[:, 1:, :] - v0[:, None, :], (0, 2, 1))  # columns v_i - v_0
    Jinv = np.linalg.inv(J)  # (n_cells, d, d)
    n_c = len(V)

    def score(pts, cand):  # pts (m, d), cand (m, k) -> (xi (m,k,d), min barycentric (m,k))
        xi = np.einsum("mkij,mkj->mki", Jinv[cand], pts[:, None, :] - v0[cand])
        lam_min = np.minimum(1.0 - xi.sum(axis=2), xi.min(axis=2))
        return xi, lam_min

    k = min(_CANDIDATES, n_c)
    _, cand = cKDTree(V.mean(axis=1)).query(P, k=k)
    cand = np.asarray(cand).reshape(len(P), k)
    xi, lam = score(P, cand)
    best = np.argmax(lam, axis=1)
    rows = np.arange(len(P))
    cells = cand[rows, best]
    out_xi = xi[rows, best]
    found = lam[rows, best] >= -_INSIDE_TOL
    todo = np.flatnonzero(~found)
    chunk = max(1, 2_000_000 // max(n_c * d, 1))
    all_cells = np.arange(n_c)
    for s in range(0, todo.size, chunk):  # exhaustive search for the few misses
        idx = todo[s:s + chunk]
        c = np.broadcast_to(all_cells, (idx.size, n_c))
        x, l = score(P[idx], c)
        b = np.argmax(l, axis=1)
        ok = l[np.arange(idx.size), b] >= -_INSIDE_TOL
        cells[idx[ok]] = b[ok]
        out_xi[idx[ok]] = x[np.arange(idx.size), b][ok]
        found[idx[ok]] = True
    cells = np.where(found, cells, -1)
    out_xi = np.where(found[:, None], out_xi, np.nan)
    return cells, out_xi


def sample_shapes(modes, fractions) -> np.ndarray:
    """Mode shapes of ``modes`` at points given as fractions of its bounding box.

    The point of fraction t is ``lo + t * (hi - lo)`` with ``lo, hi`` the
    corners of ``modes.mesh.bounding_box``; values come from the finite
    element interpolation (the Lagrange basis of the containing cell).  The
    cells are found by ``acoustic_fem._locate.locate`` where that module
    exists, else by :func:`locate_points`.

    Parameters
    ----------
    modes : Modes
    fractions : (n_points, dim) float array in [0, 1]

    Returns
    -------
    (n_points, n_modes) float array; rows of points outside the mesh are NaN.
    """
    mesh = modes.mesh
    d = mesh.dim
    F = _check_fractions(fractions, d)
    lo, hi = mesh.bounding_box
    pts = np.tile(lo, (len(F), 1))
    pts[:, :d] = lo[:d] + F * (hi - lo)[:d]
    try:  # the project's shared locator (exact on curved cells), where present
        from ._locate import locate
    except ImportError:
        cells, xi = locate_points(mesh, pts)
    else:
        loc = locate(mesh, pts[:, :d])
        cells, xi = loc.cells, loc.xi
    inside = cells >= 0
    out = np.full((len(F), modes.shapes.shape[1]), np.nan,
                  dtype=np.result_type(modes.shapes.dtype, float))
    if np.any(inside):
        N = reference_element(mesh.cell_type, modes.order).values(xi[inside])  # (m, nb)
        dofs = modes.dofs.cell_dofs[cells[inside]]  # (m, nb)
        out[inside] = np.einsum("mb,mbk->mk", N, modes.shapes[dofs])
    return out


# ----------------------------------------------------------------------- MAC
def mac_matrix(a, b) -> np.ndarray:
    """Modal assurance criterion between two sets of sampled shapes.

    MAC_ij = |a_iᴴ b_j|² / ((a_iᴴ a_i)(b_jᴴ b_j)), summed over the points
    where both a_i and b_j are finite (NaN marks a point outside a domain).

    Parameters
    ----------
    a : (n_points, n_a) real or complex array
    b : (n_points, n_b) real or complex array

    Returns
    -------
    (n_a, n_b) float array in [0, 1] (0 for a shape that is zero everywhere).
    """
    a = np.asarray(a)
    b = np.asarray(b)
    if a.ndim == 1:
        a = a[:, None]
    if b.ndim == 1:
        b = b[:, None]
    if a.ndim != 2 or b.ndim != 2 or a.shape[0] != b.shape[0]:
        raise InputError(
            f"shapes must be (n_points, n_modes) arrays on the same points; got {a.shape} "
            f"and {b.shape}."
        )
    ma = np.isfinite(a)
    mb = np.isfinite(b)
    a0 = np.where(ma, a, 0.0)
    b0 = np.where(mb, b, 0.0)
    cross = np.abs(a0.conj().T @ b0) ** 2
    den = (np.abs(a0) ** 2).T @ mb.astype(float)
    den = den * (ma.astype(float).T @ (np.abs(b0) ** 2))
    with np.errstate(divide="ignore", invalid="ignore"):
        mac = np.where(den > 0, cross / np.where(den > 0, den, 1.0), 0.0)
    return np.clip(mac.real, 0.0, 1.0)


# ------------------------------------------------------------------ tracking
@dataclass(frozen=True, eq=False)
class Tracks:
    """Modes followed through an ordered sequence of variants.

    Attributes
    ----------
    mode_index : (n_variants, n_tracks) int array
        Position of the track's mode in that variant's own ascending list;
        -1 where the track has no mode in the variant.
    frequencies : (n_variants, n_tracks) float array
        Frequency in Hz of the track in each variant (NaN where absent).
    decay_rates : (n_variants, n_tracks) float array
        Decay rate in 1/s (NaN where absent).
    mac : (n_variants, n_tracks) float array
        MAC between the track's shape here and its previous shape (NaN where
        the track starts or is absent).
    shapes : (n_variants, n_points, n_tracks) float (or complex) array
        The track's sampled shape in each variant (after any rotation within
        a degenerate cluster); NaN where absent.
    rotated : (n_variants, n_tracks) bool array
        True where the shape was rotated within a degenerate cluster.
    """

    mode_index: np.ndarray
    frequencies: np.ndarray
    decay_rates: np.ndarray
    mac: np.ndarray
    shapes: np.ndarray
    rotated: np.ndarray

    @property
    def n_tracks(self) -> int:
        return int(self.mode_index.shape[1])

    @property
    def n_variants(self) -> int:
        return int(self.mode_index.shape[0])


def _clusters(f: np.ndarray, rtol: float) -> list[np.ndarray]:
    """Groups (index arrays, size >= 2) of frequencies equal within rtol (none if rtol = 0)."""
    if rtol <= 0 or f.size < 2:
        return []
    order = np.argsort(f, kind="stable")
    fs = f[order]
    scale = np.maximum(np.abs(fs), 1e-12 * max(float(np.abs(fs).max(initial=0.0)), 1e-300))
    split = np.flatnonzero(np.diff(fs) > rtol * scale[1:]) + 1
    return [g for g in np.split(order, split) if g.size >= 2]


def _rotate_degenerate(refs, f, d, S, rtol, min_mac):
    """Rotate each degenerate cluster of (f, d, S) onto the tracks' previous shapes.

    refs : (n_p, n_t) previous shapes of the tracks; f, d : (n,); S : (n_p, n).
    Returns new (f, d, S, index, rotated) with index (n,) the member of the
    cluster each (possibly rotated) column stands for.
    """
    from scipy.optimize import linear_sum_assignment

    f = f.copy()
    d = d.copy()
    S = S.copy()
    index = np.arange(f.size)
    rotated = np.zeros(f.size, dtype=bool)
    if refs.shape[1] == 0:
        return f, d, S, index, rotated
    for members in _clusters(f, rtol):
        m = members.size
        Bc = S[:, members]
        rows = np.all(np.isfinite(Bc), axis=1)
        A = np.where(np.isfinite(refs[rows]), refs[rows], 0.0)
        B = Bc[rows]
        if B.shape[0] < m:
            continue
        Q, _ = np.linalg.qr(B)
        na = np.sum(np.abs(A) ** 2, axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            # subspace MAC: squared norm of each track's projection on span(Bc)
            s = np.where(na > 0, np.sum(np.abs(Q.conj().T @ A) ** 2, axis=0)
                         / np.where(na > 0, na, 1), 0.0)
        top = np.argsort(-s, kind="stable")[:m]
        top = top[s[top] >= min_mac]  # the tracks living in this eigenspace
        if top.size == 0:
            continue
        Ahat = A[:, top] / np.sqrt(na[top])
        U, _, Vt = np.linalg.svd(B.conj().T @ Ahat)  # U (m, m), Vt (m', m')
        t = top.size
        # orthogonal (unitary) R: its first t columns carry Bc onto the tracks'
        # shapes (Procrustes), the others complete the basis of the eigenspace
        R = np.hstack([U[:, :t] @ Vt, U[:, t:]])
        W = np.abs(R) ** 2  # weights of the members in each rotated vector (columns sum to 1)
        S[:, members] = Bc @ R
        f[members] = np.sqrt(np.maximum(W.T @ (f[members] ** 2), 0.0))
        d[members] = W.T @ d[members]
        r, c = linear_sum_assignment(-W)  # a distinct member for each rotated column
        idx = np.empty(m, dtype=np.int64)
        idx[c] = members[r]
        index[members] = idx
        rotated[members] = True
    return f, d, S, index, rotated


def track_modes(frequencies: Sequence, samples: Sequence, decay_rates: Sequence | None = None,
                *, degenerate_rtol: float = 1e-3, min_mac: float = 0.5) -> Tracks:
    """Follow modes through an ordered sequence of variants by MAC.

    Each variant's modes are matched to the tracks' latest shapes (any
    earlier variant where the track last appeared) by the assignment that
    maximises the summed MAC; a pair with MAC below ``min_mac`` is no match.
    Unmatched modes start new tracks, numbered in ascending frequency; a
    track with no partner in a variant pauses and may resume later.
    Degenerate clusters are rotated first (see the module notes).

    Parameters
    ----------
    frequencies : sequence of n_variants (n_k,) float arrays
        Each variant's frequencies in Hz.
    samples : sequence of n_variants (n_points, n_k) float or complex arrays
        Each variant's mode shapes on the common points (NaN outside).
    decay_rates : sequence of (n_k,) float arrays, optional
        Decay rates in 1/s (default zeros).
    degenerate_rtol : float
        Relative frequency difference below which modes are treated as
        degenerate (default 1e-3); 0 turns the degenerate handling off.
    min_mac : float
        Least MAC (or subspace MAC) for a match, in (0, 1] (default 0.5).

    Returns
    -------
    Tracks
        Arrays (n_variants, n_tracks); shapes (n_variants, n_points, n_tracks).
    """
    from scipy.optimize import linear_sum_assignment

    n_var = len(frequencies)
    if len(samples) != n_var:
        raise InputError(
            f"got {n_var} frequency lists but {len(samples)} sample arrays; give one of each "
            "per variant."
        )
    if decay_rates is None:
        decay_rates = [np.zeros(len(np.atleast_1d(f))) for f in frequencies]
    if not 0.0 < float(min_mac) <= 1.0:
        raise InputError(f"min_mac={min_mac!r} must lie in (0, 1]; e.g. 0.5.")
    if not 0.0 <= float(degenerate_rtol) < 1.0:
        raise InputError(f"degenerate_rtol={degenerate_rtol!r} must lie in [0, 1); e.g. 1e-3.")
    n_p = None
    per_variant = []  # (track ids, mode index, f, d, mac, shapes (n_p, n), rotated)
    refs: list[np.ndarray] = []
    for k in range(n_var):
        f = np.asarray(frequencies[k], dtype=float).ravel()
        S = np.asarray(samples[k])
        S = S.astype(np.result_type(S.dtype, float), copy=False)
        dr = np.asarray(decay_rates[k], dtype=float).ravel()
        if S.ndim != 2 or S.shape[1] != f.size or dr.size != f.size:
            raise InputError(
                f"variant {k}: samples of shape {S.shape}, {f.size} frequencies and {dr.size} "
                "decay rates do not agree; samples must be (n_points, n_modes)."
            )
        if n_p is None:
            n_p = S.shape[0]
        elif S.shape[0] != n_p:
            raise InputError(
                f"variant {k} is sampled at {S.shape[0]} points, earlier ones at {n_p}; use one "
                "set of tracking points for every variant."
            )
        R = np.column_stack(refs) if refs else np.zeros((n_p, 0))
        f, dr, S, index, rot = _rotate_degenerate(R, f, dr, S, degenerate_rtol, min_mac)
        tid = np.full(f.size, -1, dtype=np.int64)
        mac = np.full(f.size, np.nan)
        if R.shape[1] and f.size:
            M = mac_matrix(R, S)
            ri, ci = linear_sum_assignment(-M)
            ok = M[ri, ci] >= min_mac
            tid[ci[ok]] = ri[ok]
            mac[ci[ok]] = M[ri[ok], ci[ok]]
        new = np.flatnonzero(tid < 0)
        new = new[np.argsort(f[new], kind="stable")]
        for j in new:
            tid[j] = len(refs)
            refs.append(S[:, j].copy())
        for j in np.flatnonzero(~np.isin(np.arange(f.size), new)):
            refs[tid[j]] = S[:, j].copy()
        per_variant.append((tid, index, f, dr, mac, S, rot))
    n_t = len(refs)
    n_p = 0 if n_p is None else n_p
    mode_index = np.full((n_var, n_t), -1, dtype=np.int64)
    freq = np.full((n_var, n_t), np.nan)
    dec = np.full((n_var, n_t), np.nan)
    macs = np.full((n_var, n_t), np.nan)
    dtype = np.result_type(float, *[pv[5].dtype for pv in per_variant])
    shapes = np.full((n_var, n_p, n_t), np.nan, dtype=dtype)
    rotated = np.zeros((n_var, n_t), dtype=bool)
    for k, (tid, index, f, dr, mac, S, rot) in enumerate(per_variant):
        mode_index[k, tid] = index
        freq[k, tid] = f
        dec[k, tid] = dr
        macs[k, tid] = mac
        shapes[k][:, tid] = S
        rotated[k, tid] = rot
    for a in (mode_index, freq, dec, macs, shapes, rotated):
        a.setflags(write=False)
    return Tracks(mode_index, freq, dec, macs, shapes, rotated)
