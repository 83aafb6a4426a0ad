"""A-posteriori error estimates of eigenfrequencies and corrected frequencies.

Method: hierarchical-basis enrichment (Bank & Smith, "A posteriori error
estimates based on hierarchical bases", SIAM J. Numer. Anal. 30(4), 1993;
from memory), applied to the eigenvalue problem through the
Rayleigh–Ritz principle.

For a mode (λ_h, u_h) of the order-p space V, let W be the hierarchical
complement of V in P(p+1) (:mod:`acoustic_fem._hierarchical`: edge bubbles
for P1, edge and face cubics for P2).  The W-part of the enriched-space
correction solves

    (K_WW − λ_h M_WW) e = −(K_WV − λ_h M_WV) u_h,

the residual of u_h tested with the W functions, with the shift λ_h (one
step of inverse iteration in V ⊕ W restricted to W; the W block is
spectrally equivalent to its diagonal, so a few Jacobi-preconditioned
conjugate-gradient steps solve it, all modes at once).  Rayleigh–Ritz on
span{u_1 … u_m, e_1 … e_m} then gives corrected eigenvalues λ_c,i ≤ λ_h,i
(Cauchy interlacing; degenerate clusters handled together) and, for straight
cells, λ_c,i ≥ λ_i of the enriched space ≥ the exact λ_i (min-max).  Under the
saturation assumption (P(p+1) is clearly more accurate than P(p); Bank &
Smith 1993) λ_h − λ_c estimates λ_h − λ, so the estimated relative error of
the frequency f_h is

    η = sqrt(λ_h / λ_c) − 1,

and f_c = c sqrt(λ_c) / 2π is offered as the *corrected* frequency (an
approximation of the P(p+1) result, more accurate than f_h).  The identity
behind it is λ_h − λ = ‖u − u_h‖²_a − λ ‖u − u_h‖²_0 (Babuška & Osborn,
"Eigenvalue problems", Handbook of Numerical Analysis II, 1991; from
memory): the eigenvalue error is the energy of the eigenfunction error, which
the W correction captures.

The element-wise indicator of a mode distributes η over the cells in
proportion to the energy ‖∇e‖² of the correction on each cell.

Measured effectivity (estimated / true relative frequency error, tests and
bench of this project): P2 0.83–0.94 on boxes with rigid and
pressure-release walls and on a cylinder, 0.57–0.91 on a sphere (curved
walls, two mesh sizes each); P1 0.54–0.97 on the same cases.  The corrected
frequencies are 5–15 times more accurate than the raw ones there.  Damped
modes (tests/test_estimate.py, against exact roots): tube with an
admittance end 0.97–1.00 (frequency and decay rate, P1 and P2); box with
an admittance wall, P2, 0.86–1.2 (frequency) and 0.76–1.11 (decay rate).

Damped modes (impedance walls, ``damping="exact"``).  The same enrichment
applied to the complex eigenpair (k_h, x_h) of the quadratic problem
Q(k) = K + ik Σ_s β_s B_s − k² M (complex symmetric; β of a
frequency-dependent wall frozen at the mode's frequency): the W correction
solves Q_WW(k_h) e = −Q_WV(k_h) x_h by Jacobi-preconditioned COCG (the CG of
complex symmetric matrices, van der Vorst & Melissen, IEEE Trans. Magn.
26(2), 1990; from memory), and a Galerkin projection of Q on span{x_j, e_j}
of the mode's cluster (modes within 2 % in |k|) gives the corrected root
k_c.  The estimated relative errors are |Re k_h / Re k_c − 1| for the
frequency and |Im k_h / Im k_c − 1| for the decay rate δ = c Im k (NaN for
the frequency of the near-0 Hz mode of a room without pressure-release
surfaces, whose relative frequency error is undefined).  There is no
min-max ordering for complex roots, so the corrected values are not bounds.
Modes from ``damping="perturbation"`` are first-order approximations, not
eigenpairs of the discrete problem: they are not estimated (NaN).

Not estimated: the error of the geometry (a curved wall approximated by P2
cells is the same in V and in V ⊕ W) and of the data (speed of sound); for
modes of a room with re-entrant corners, where P(p+1) converges no faster
than P(p), the estimate is a lower bound of the error rather than an
equal-size estimate.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from ._errors import InputError, SolverError
from ._hierarchical import enrich, local_w_block
from .assembly import Assembly

__all__ = ["ModeErrors", "AccurateModes", "estimate_errors", "solve_to_tolerance", "METHOD",
           "DEFAULT_MAX_DOFS", "OVERSHOOT", "EFFECTIVITY_FLOOR"]

#: Name and source of the method, for tables and reports.
METHOD = ("hierarchical P(p)→P(p+1) enrichment with Rayleigh–Ritz correction "
          "(Bank & Smith, SIAM J. Numer. Anal. 30(4), 1993)")


@dataclass(frozen=True, eq=False)
class ModeErrors:
    """Estimated errors of the eigenfrequencies of a :class:`~acoustic_fem.modes.Modes`.

    Attributes
    ----------
    frequency_errors : (n_modes,) float array
        Estimated relative error (f_h − f)/f of each frequency (>= 0; 0 for
        the 0 Hz mode, which the space contains exactly; inf for a mode the
        mesh does not resolve at all — fewer than about 2-3 elements per
        wavelength, where the W-block problem is indefinite — listed in
        ``info["unresolved_modes"]``).
    corrected_frequencies : (n_modes,) float array
        Corrected frequencies f_c in Hz (the enriched-space Rayleigh–Ritz
        values), beside the raw ``Modes.frequencies``.
    corrected_eigenvalues : (n_modes,) float array
        k_c² in 1/m².
    cell_indicators : (n_cells, n_modes) float array or None
        Share of each mode's estimated error attributed to each cell (each
        column sums to ``frequency_errors``); None when not asked for.
    method : str
        The method and its source.
    info : mapping
        What was done: W size, solver iterations, times.
    decay_rate_errors : (n_modes,) float array
        Estimated relative error |δ_h − δ|/δ of each decay rate (damped
        modes); 0 for undamped modes, whose decay rate 0 is exact.
    corrected_decay_rates : (n_modes,) float array
        Corrected decay rates c Im k_c in 1/s (0 for undamped modes).

    For damped modes ``corrected_eigenvalues`` is complex (k_c²).
    """

    frequency_errors: np.ndarray
    corrected_frequencies: np.ndarray
    corrected_eigenvalues: np.ndarray
    cell_indicators: np.ndarray | None = None
    method: str = METHOD
    info: Mapping = field(default_factory=dict)
    decay_rate_errors: np.ndarray = None  # type: ignore[assignment]
    corrected_decay_rates: np.ndarray = None  # type: ignore[assignment]

    def __post_init__(self) -> None:
        n = len(np.asarray(self.frequency_errors))
        for name in ("decay_rate_errors", "corrected_decay_rates"):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.zeros(n))
        for name in ("frequency_errors", "corrected_frequencies", "corrected_eigenvalues",
                     "cell_indicators", "decay_rate_errors", "corrected_decay_rates"):
            a = getattr(self, name)
            if a is None:
                continue
            a = np.array(a, dtype=complex if (name == "corrected_eigenvalues"
                                              and np.iscomplexobj(a)) else float)
            a.setflags(write=False)
            object.__setattr__(self, name, a)
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))

    def __len__(self) -> int:
        return len(self.frequency_errors)

    @property
    def max_error(self) -> float:
        """Largest estimated relative frequency error, NaN entries ignored (0 for no modes)."""
        e = self.frequency_errors[~np.isnan(self.frequency_errors)]
        return float(e.max()) if e.size else 0.0

    def columns(self) -> dict:
        """Table columns to put beside ``Modes.table()``: name -> (n_modes,) array.

        ``estimated_relative_error`` (the estimate of (f_h − f)/f),
        ``corrected_frequency_hz`` (the enriched-space value, labelled as
        corrected, not as the solution), ``estimated_decay_rate_error`` and
        ``corrected_decay_rate_per_s`` (damped modes; 0 for undamped ones).
        """
        return {"estimated_relative_error": self.frequency_errors,
                "corrected_frequency_hz": self.corrected_frequencies,
                "estimated_decay_rate_error": self.decay_rate_errors,
                "corrected_decay_rate_per_s": self.corrected_decay_rates}

    def cell_data(self, frequencies) -> dict:
        """Element-wise indicators as VTK cell data: name -> (n_cells,) array.

        Parameters
        ----------
        frequencies : (n_modes,) array
            The raw frequencies, for the array names (``error_mode_003_41.250Hz``).
        """
        if self.cell_indicators is None:
            raise InputError("these errors were estimated with indicators=False; estimate "
                             "again with indicators=True for element-wise values.")
        return {f"error_mode_{i:03d}_{f:.3f}Hz": self.cell_indicators[:, i]
                for i, f in enumerate(np.asarray(frequencies, dtype=float))}


#: Modes solved together in one block of the W-block CG.
_CG_BLOCK = 64


def _pcg_shifted(K, M, lam, B, *, rtol, maxiter):
    """Solve (K − λ_i M) x_i = b_i for every column i by Jacobi-preconditioned CG.

    K, M : (n, n) sparse SPD; lam : (m,); B : (n, m).  Columns whose
    curvature p·Ap turns non-positive (the shift above the W block's lowest
    eigenvalue: a badly unresolved mode) stop there and are flagged.
    Returns X (n, m), iterations (m,), relative residuals (m,), indefinite (m,) bool.
    """
    n, m = B.shape
    dK, dM = K.diagonal(), M.diagonal()
    Dinv = 1.0 / (dK[:, None] - dM[:, None] * lam[None, :])
    bad_diag = ~np.all(Dinv > 0, axis=0)
    Dinv = np.abs(Dinv)
    X = np.zeros((n, m))
    R = B.copy()
    bnorm = np.linalg.norm(B, axis=0)
    active = (bnorm > 0) & ~bad_diag
    indefinite = bad_diag.copy()
    its = np.zeros(m, dtype=int)
    Z = Dinv * R
    P = Z.copy()
    rz = np.einsum("ij,ij->j", R, Z)
    for it in range(maxiter):
        if not active.any():
            break
        a = np.flatnonzero(active)
        Pa = P[:, a]
        AP = K @ Pa - (M @ Pa) * lam[a]
        pAp = np.einsum("ij,ij->j", Pa, AP)
        neg = pAp <= 0
        if neg.any():
            indefinite[a[neg]] = True
            active[a[neg]] = False
            keep = ~neg
            a, Pa, AP, pAp = a[keep], Pa[:, keep], AP[:, keep], pAp[keep]
            if a.size == 0:
                break
        alpha = rz[a] / pAp
        X[:, a] += Pa * alpha
        R[:, a] -= AP * alpha
        its[a] += 1
        rn = np.linalg.norm(R[:, a], axis=0)
        done = rn <= rtol * bnorm[a]
        Za = Dinv[:, a] * R[:, a]
        rz_new = np.einsum("ij,ij->j", R[:, a], Za)
        beta = rz_new / rz[a]
        P[:, a] = Za + P[:, a] * beta
        rz[a] = rz_new
        active[a[done]] = False
    res = np.linalg.norm(R, axis=0) / np.where(bnorm > 0, bnorm, 1.0)
    return X, its, res, indefinite


def _ritz(Kc, Mc, m):
    """Lowest m eigenvalues of the small pencil (Kc, Mc), Mc possibly singular."""
    from threadpoolctl import threadpool_limits

    # one BLAS thread: for matrices this small, threads cost more than they save
    with threadpool_limits(1, user_api="blas"):
        s, Q = np.linalg.eigh(0.5 * (Mc + Mc.T))
        keep = s > 1e-12 * s.max()
        T = Q[:, keep] / np.sqrt(s[keep])
        A = T.T @ Kc @ T
        theta, Y = np.linalg.eigh(0.5 * (A + A.T))
    return theta[:m], T @ Y[:, :m]


def estimate_errors(modes, *, assembly: Assembly | None = None, indicators: bool = True,
                    rtol: float = 1e-3, maxiter: int = 60) -> ModeErrors:
    """Estimate the relative error of every eigenfrequency of ``modes``.

    Hierarchical P(p)→P(p+1) enrichment with a Rayleigh–Ritz correction
    (Bank & Smith 1993; see the module docstring for the method).

    Parameters
    ----------
    modes : Modes
        Modes from :func:`~acoustic_fem.modes.solve_modes`: real (rigid and
        pressure-release walls) or damped (impedance walls, exact damping;
        see "Damped modes" in the module notes).
    assembly : Assembly, optional
        Not needed (the enriched matrices are assembled here); accepted so that
        callers can pass the one they have, which is checked for consistency.
    indicators : bool
        Also compute the (n_cells, n_modes) element-wise indicators.
    rtol, maxiter : float, int
        Relative residual and iteration limit of the W-block solves.

    Returns
    -------
    ModeErrors
        ``frequency_errors`` (n_modes,), ``corrected_frequencies`` (n_modes,),
        ``cell_indicators`` (n_cells, n_modes) or None; ``decay_rate_errors``
        and ``corrected_decay_rates`` (n_modes,).
    """
    from .modes import Modes

    t0 = time.perf_counter()
    if not isinstance(modes, Modes):
        raise InputError(f"estimate_errors needs the Modes from solve_modes, got "
                         f"{type(modes).__name__}.")
    if assembly is not None and (assembly.dofs.mesh is not modes.mesh
                                 or assembly.order != modes.order):
        raise InputError("the assembly given was made for another mesh or element order.")
    if np.iscomplexobj(modes.shapes) or np.any(modes.decay_rates != 0):
        if dict(modes.info).get("damping") == "perturbation":
            raise InputError(
                "these damped modes come from damping='perturbation' (first-order "
                "approximations, not eigenpairs of the discrete problem) and cannot be "
                "estimated; solve with damping='exact' for an error estimate.")
        return _estimate_damped(modes, indicators=indicators, rtol=rtol, maxiter=maxiter)
    dofs = modes.dofs
    lam = np.asarray(modes.eigenvalues, dtype=float)
    m = lam.size
    mesh = dofs.mesh
    if m == 0:
        return ModeErrors(np.zeros(0), np.zeros(0), np.zeros(0),
                          np.zeros((mesh.n_cells, 0)) if indicators else None,
                          info=dict(n_w=0, seconds=0.0))
    en = enrich(dofs)
    K, M, Ke, _ = en.assemble()
    t_asm = time.perf_counter() - t0
    nv = dofs.n_dofs
    fixed_names = [n for n, w in modes.walls.items() if w.fixes_pressure]
    fixed_w = en.boundary_w(fixed_names)
    free_w = np.setdiff1d(np.arange(en.n_w), fixed_w, assume_unique=True)
    rows = nv + free_w
    Kw = K[rows]
    Mw = M[rows]
    K_WW, M_WW = Kw[:, rows], Mw[:, rows]
    K_WV, M_WV = Kw[:, :nv], Mw[:, :nv]
    K_VV, M_VV = K[:nv][:, :nv], M[:nv][:, :nv]
    del K, M, Kw, Mw  # only the blocks are needed from here on
    if not indicators:
        del Ke
    U = np.asarray(modes.shapes, dtype=float)
    KU, MU = K_WV @ U, M_WV @ U
    R = KU - MU * lam
    zero = lam == 0.0
    R[:, zero] = 0.0  # the constant mode is exact: its residual is rounding
    t1 = time.perf_counter()
    E = np.empty_like(R)
    its = np.zeros(m, dtype=int)
    res = np.zeros(m)
    indefinite = np.zeros(m, dtype=bool)
    for start in range(0, m, _CG_BLOCK):  # column blocks bound the CG's work arrays
        b = slice(start, start + _CG_BLOCK)
        E[:, b], its[b], res[b], indefinite[b] = _pcg_shifted(
            K_WW, M_WW, lam[b], -R[:, b], rtol=rtol, maxiter=maxiter)
    del R
    t_solve = time.perf_counter() - t1
    # Rayleigh–Ritz on span{U, E} in V ⊕ W
    KWWE, MWWE = K_WW @ E, M_WW @ E
    Kuu = U.T @ (K_VV @ U)
    Muu = U.T @ (M_VV @ U)
    Kue = KU.T @ E
    Mue = MU.T @ E
    Kee = E.T @ KWWE
    Mee = E.T @ MWWE
    Kc = np.block([[Kuu, Kue], [Kue.T, Kee]])
    Mc = np.block([[Muu, Mue], [Mue.T, Mee]])
    theta, _ = _ritz(Kc, Mc, m)
    if theta.size < m:  # pragma: no cover - U alone is M-orthonormal
        raise SolverError("the enriched Rayleigh–Ritz problem lost modes; report this mesh.")
    lam_c = np.minimum(np.maximum(theta, 0.0), lam)
    lam_c[zero] = 0.0
    with np.errstate(divide="ignore", invalid="ignore"):
        eta = np.where(lam_c > 0, np.sqrt(lam / lam_c) - 1.0, 0.0)
    eta[indefinite & ~zero] = np.inf
    f_c = modes.air.frequency(lam_c)
    ind = None
    if indicators:
        nvb = dofs.cell_dofs.shape[1]
        nb = en.cell_dofs.shape[1]
        Kloc = local_w_block(Ke, nvb, nb)  # (E, nw, nw), signed basis
        Efull = np.zeros((en.n_w, m))
        Efull[free_w] = E
        El = Efull[en.cell_w]  # (E, nw, m)
        energy = np.einsum("ekm,ekm->em", El, Kloc @ El)
        tot = energy.sum(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            ind = np.where(tot > 0, energy / tot, 0.0) * np.where(np.isfinite(eta), eta, 0.0)
    info = dict(
        method=METHOD,
        order=dofs.order,
        enriched_order=dofs.order + 1,
        n_v=int(nv),
        n_w=int(free_w.size),
        cg_iterations=its.tolist(),
        cg_max_iterations=int(its.max()) if its.size else 0,
        cg_relative_residual=float(res.max()) if res.size else 0.0,
        unresolved_modes=np.flatnonzero(indefinite & ~zero).tolist(),
        assembly_seconds=t_asm,
        solve_seconds=t_solve,
        seconds=time.perf_counter() - t0,
    )
    return ModeErrors(eta, f_c, lam_c, ind, info=info)


# --------------------------------------------------------------- damped modes
#: Modes whose |k| differ by less than this share are corrected together.
_CLUSTER = 0.02


def _cocg_shifted(K, M, Cs, ks, betas, B, *, rtol, maxiter):
    """Solve Q_i x_i = b_i, Q_i = K − k_i² M + i k_i Σ_s β_si C_s, for every column i.

    Jacobi-preconditioned COCG (conjugate orthogonal CG for complex symmetric
    matrices: CG with the unconjugated bilinear form; van der Vorst &
    Melissen 1990).  K, M, C_s : (n, n) sparse real symmetric; ks : (m,)
    complex; betas : (n_s, m) complex; B : (n, m) complex.
    Returns X (n, m), iterations (m,), relative residuals (m,).
    """
    n, m = B.shape
    coef = [1j * ks * b for b in betas]  # (m,) each
    D = K.diagonal()[:, None] - M.diagonal()[:, None] * ks[None, :] ** 2
    for C, c in zip(Cs, coef):
        D = D + C.diagonal()[:, None] * c[None, :]
    Dinv = np.where(np.abs(D) > 0, 1.0 / np.where(D == 0, 1.0, D), 0.0)

    def apply(P, a):
        out = K @ P - (M @ P) * ks[a] ** 2
        for C, c in zip(Cs, coef):
            out = out + (C @ P) * c[a]
        return out

    X = np.zeros((n, m), dtype=complex)
    R = np.array(B, dtype=complex)
    bnorm = np.linalg.norm(R, axis=0)
    active = bnorm > 0
    its = np.zeros(m, dtype=int)
    Z = Dinv * R
    P = Z.copy()
    rz = np.einsum("ij,ij->j", R, Z)
    for _ in range(maxiter):
        if not active.any():
            break
        a = np.flatnonzero(active)
        AP = apply(P[:, a], a)
        pAp = np.einsum("ij,ij->j", P[:, a], AP)
        ok = np.abs(pAp) > 1e-300
        active[a[~ok]] = False  # breakdown: keep what was reached
        a, AP, pAp = a[ok], AP[:, ok], pAp[ok]
        if a.size == 0:
            break
        alpha = rz[a] / pAp
        X[:, a] += P[:, a] * alpha
        R[:, a] -= AP * alpha
        its[a] += 1
        done = np.linalg.norm(R[:, a], axis=0) <= rtol * bnorm[a]
        Za = Dinv[:, a] * R[:, a]
        rz_new = np.einsum("ij,ij->j", R[:, a], Za)
        P[:, a] = Za + P[:, a] * (rz_new / np.where(rz[a] == 0, 1.0, rz[a]))
        rz[a] = rz_new
        active[a[done]] = False
    res = np.linalg.norm(R, axis=0) / np.where(bnorm > 0, bnorm, 1.0)
    return X, its, res


def _qep_roots(Kc, Cc, Mc):
    """All roots k of the small quadratic (Kc + ik Cc − k² Mc) y = 0 (companion form)."""
    from threadpoolctl import threadpool_limits
    import scipy.linalg as sla

    r = Kc.shape[0]
    eye, zero = np.eye(r), np.zeros((r, r))
    A = np.block([[zero, eye], [Kc, 1j * Cc]])
    Bm = np.block([[eye, zero], [zero, Mc]])
    with threadpool_limits(1, user_api="blas"):
        k = sla.eig(A, Bm, right=False)
    return k[np.isfinite(k)]


def _estimate_damped(modes, *, indicators, rtol, maxiter) -> ModeErrors:
    """The hierarchical estimate of damped modes (module notes, "Damped modes")."""
    from scipy.optimize import linear_sum_assignment

    from .impedance import Impedance

    t0 = time.perf_counter()
    dofs = modes.dofs
    mesh = dofs.mesh
    ks = np.asarray(modes.wavenumbers, dtype=complex)
    m = ks.size
    if m == 0:
        return ModeErrors(np.zeros(0), np.zeros(0), np.zeros(0, dtype=complex),
                          np.zeros((mesh.n_cells, 0)) if indicators else None,
                          info=dict(n_w=0, seconds=0.0))
    air = modes.air
    absorbing = [n for n, w in modes.walls.items() if isinstance(w, Impedance)
                 and not (not w.frequency_dependent and w.constant_admittance == 0)]
    # β per surface and mode, at the mode's frequency (never below the floor
    # solve_modes uses: 1 % of c / (2 x the mesh's largest extent))
    extent = float(np.ptp(mesh.points[:, : mesh.dim], axis=0).max())
    f_floor = 0.01 * air.c / (2.0 * extent)
    freq = air.c * np.abs(ks.real) / (2 * math.pi)
    betas = np.vstack([np.asarray(modes.walls[n].admittance_at(np.maximum(freq, f_floor), air),
                                  dtype=complex).reshape(m) for n in absorbing]) \
        if absorbing else np.zeros((0, m), dtype=complex)
    en = enrich(dofs)
    K, M, Ke, _ = en.assemble()
    Bs = [en.boundary_mass([n]) for n in absorbing]
    t_asm = time.perf_counter() - t0
    nv = dofs.n_dofs
    fixed_names = [n for n, w in modes.walls.items() if w.fixes_pressure]
    fixed_w = en.boundary_w(fixed_names)
    free_w = np.setdiff1d(np.arange(en.n_w), fixed_w, assume_unique=True)
    rows = nv + free_w

    def blocks(A):
        Aw = A[rows]
        return Aw[:, rows], Aw[:, :nv], A[:nv][:, :nv]

    K_WW, K_WV, K_VV = blocks(K)
    M_WW, M_WV, M_VV = blocks(M)
    Cb = [blocks(B) for B in Bs]
    del K, M, Bs
    if not indicators:
        del Ke
    U = np.asarray(modes.shapes, dtype=complex)
    coef = [1j * ks * b for b in betas]
    R = K_WV @ U - (M_WV @ U) * ks**2
    for (_, C_WV, _), c in zip(Cb, coef):
        R = R + (C_WV @ U) * c
    t1 = time.perf_counter()
    E = np.empty_like(R)
    its = np.zeros(m, dtype=int)
    res = np.zeros(m)
    for start in range(0, m, _CG_BLOCK):  # column blocks bound the work arrays
        b = slice(start, start + _CG_BLOCK)
        E[:, b], its[b], res[b] = _cocg_shifted(K_WW, M_WW, [c[0] for c in Cb], ks[b],
                                                betas[:, b], -R[:, b], rtol=rtol,
                                                maxiter=maxiter)
    del R
    t_solve = time.perf_counter() - t1
    unresolved = res > 0.1  # the W problem did not converge: the mesh misses the mode
    # Galerkin (unconjugated) projections on span{U, E}: (2m, 2m) per matrix
    def project(A_VV, A_WV, A_WW):
        uu = U.T @ (A_VV @ U)
        ue = (A_WV @ U).T @ E
        ee = E.T @ (A_WW @ E)
        return np.block([[uu, ue], [ue.T, ee]])

    Kp = project(K_VV, K_WV, K_WW)
    Mp = project(M_VV, M_WV, M_WW)
    Cp = [project(c[2], c[1], c[0]) for c in Cb]
    kc = np.full(m, np.nan + 0j)
    scale = np.abs(ks)
    for i in range(m):  # a loop over modes (small dense problems)
        cl = np.flatnonzero(np.abs(ks - ks[i]) <= _CLUSTER * max(scale[i], 1e-12))
        idx = np.concatenate([cl, m + cl])
        Cc = sum((b[i] * C[np.ix_(idx, idx)] for b, C in zip(betas, Cp)),
                 np.zeros((idx.size, idx.size), dtype=complex))
        roots = _qep_roots(Kp[np.ix_(idx, idx)], Cc, Mp[np.ix_(idx, idx)])
        if roots.size < cl.size:  # pragma: no cover - the projection lost roots
            continue
        cost = np.abs(ks[cl][:, None] - roots[None, :])
        r_i, c_i = linear_sum_assignment(cost)  # distinct roots for a cluster's modes
        pos = np.flatnonzero(cl[r_i] == i)
        kc[i] = roots[c_i[pos[0]]] if pos.size else np.nan
    kc[unresolved] = np.nan
    with np.errstate(divide="ignore", invalid="ignore"):
        near_zero = np.abs(ks.real) <= 1e-8 * max(float(scale.max()), 1e-300)
        eta_f = np.where(near_zero, np.nan, np.abs(ks.real / kc.real - 1.0))
        eta_d = np.where(kc.imag > 0, np.abs(ks.imag / kc.imag - 1.0), np.nan)
    eta_f[unresolved & ~near_zero] = np.inf
    eta_d[unresolved] = np.inf
    f_c = air.c * np.abs(kc.real) / (2 * math.pi)
    d_c = air.c * kc.imag
    ind = None
    if indicators:
        nvb = dofs.cell_dofs.shape[1]
        nb = en.cell_dofs.shape[1]
        Kloc = local_w_block(Ke, nvb, nb)
        Efull = np.zeros((en.n_w, m), dtype=complex)
        Efull[free_w] = E
        El = Efull[en.cell_w]
        energy = np.einsum("ekm,ekm->em", El.conj(), Kloc @ El).real
        tot = energy.sum(axis=0)
        share = np.where(np.isfinite(eta_f), eta_f, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            ind = np.where(tot > 0, energy / tot, 0.0) * share
    info = dict(
        method=METHOD + "; damped modes: complex symmetric W correction (COCG) and Galerkin "
                        "projection of the quadratic problem",
        order=dofs.order, enriched_order=dofs.order + 1, n_v=int(nv), n_w=int(free_w.size),
        cg_iterations=its.tolist(), cg_max_iterations=int(its.max()),
        cg_relative_residual=float(res.max()),
        unresolved_modes=np.flatnonzero(unresolved).tolist(),
        near_zero_modes=np.flatnonzero(near_zero).tolist(),
        assembly_seconds=t_asm, solve_seconds=t_solve, seconds=time.perf_counter() - t0,
    )
    return ModeErrors(eta_f, f_c, kc**2, ind, info=info, decay_rate_errors=eta_d,
                      corrected_decay_rates=d_c)


# --------------------------------------------------------------- accuracy target
#: Default DOF budget of :func:`solve_to_tolerance`: about 6 GB of peak memory
#: for a P2 solve, from the figures in DEVELOPERS.md (2.6 GB at 210 k DOFs,
#: roughly linear in the DOFs).
DEFAULT_MAX_DOFS = 500_000
#: A remesh aims each mode at OVERSHOOT^(-s) * tol (s its convergence rate in
#: DOFs), so that its DOFs exceed what an exact prediction would need by at
#: most this factor, and the noise of unstructured meshes and of the estimate
#: still leaves the result below tol.
OVERSHOOT = 1.4


@dataclass(frozen=True, eq=False)
class AccurateModes:
    """Modes solved to an accuracy target, with their estimated errors.

    Attributes
    ----------
    modes : Modes
        The modes of the last (accepted) step.
    errors : ModeErrors
        Their estimated errors and corrected frequencies.
    tol : float
        The target relative frequency error.
    met : bool
        Every mode below fmax has an estimated error <= tol.
    steps : tuple of dict
        One entry per solve: mesh size, order, DOFs, largest estimated
        error, seconds, and the action that followed.
    budget : mapping
        The budget stated before the first solve (max_dofs, max_seconds).
    judged_errors : (n_modes,) float array
        The errors the target was judged by: ``errors.frequency_errors``
        divided by the effectivity measured between the last two solves
        (:func:`_calibrate`), so at least the raw estimate.
    effectivities : (n_modes,) float array
        Measured effectivity (estimated / observed change) per mode, in
        [EFFECTIVITY_FLOOR, 1]; 1 where not measured.
    """

    modes: object
    errors: ModeErrors
    tol: float
    met: bool
    steps: tuple
    budget: Mapping
    judged_errors: np.ndarray = None  # type: ignore[assignment]
    effectivities: np.ndarray = None  # type: ignore[assignment]

    def __post_init__(self) -> None:
        n = len(self.errors)
        if self.judged_errors is None:
            object.__setattr__(self, "judged_errors", np.array(self.errors.frequency_errors))
        if self.effectivities is None:
            object.__setattr__(self, "effectivities", np.ones(n))

    @property
    def frequencies(self) -> np.ndarray:
        return self.modes.frequencies

    @property
    def frequency_errors(self) -> np.ndarray:
        return self.errors.frequency_errors

    @property
    def corrected_frequencies(self) -> np.ndarray:
        return self.errors.corrected_frequencies


def _predict_dofs_refined(mesh, order: int) -> int:
    """DOFs of the order-``order`` space after one red refinement of ``mesh`` (exact count).

    New vertices = old vertices + edges; new edges = 2 per old edge, 3 inside
    each old face (triangles: each cell; tetrahedra: each face) and 1 inside
    each tetrahedron.
    """
    from ._hierarchical import Enrichment
    from .dofs import DofMap
    from .elements import CellType as CT

    nvert = DofMap(mesh, 1).n_dofs
    E = len(mesh.edges)
    T = mesh.n_cells
    if mesh.cell_type is CT.LINE:
        e2 = 2 * E
    elif mesh.cell_type is CT.TRIANGLE:
        e2 = 2 * E + 3 * T
    else:
        e2 = 2 * E + 3 * Enrichment(DofMap(mesh, 2))._faces[2] + T
    return int(nvert + E + (e2 if order == 2 else 0))


def solve_to_tolerance(mesh, walls=None, *, tol: float, fmax: float, order: int = 2,
                       air=None, max_dofs: int | None = DEFAULT_MAX_DOFS,
                       max_seconds: float | None = None, backend: str = "auto",
                       max_steps: int = 6, indicators: bool = False) -> AccurateModes:
    """Solve the modes below ``fmax`` until every estimated frequency error is <= ``tol``.

    The budget (``max_dofs``, ``max_seconds``) is fixed before the first
    solve and recorded in the result.  Each step solves, estimates the error
    of every mode (:func:`estimate_errors`) and, while some estimate exceeds
    ``tol``, improves the discretisation:

    * order 1: raise the order to 2 on the same mesh;
    * a Mesh given: refine it uniformly (:func:`acoustic_fem.refine.refine_uniform`,
      mesh size halved: about 2^dim times the DOFs, the error of P2 / 16);
    * a mesh builder given (a callable ``h -> Mesh``, h the target element
      size in m, e.g. ``lambda h: geometry.floor_plan(..., fmax=c / (6 h))``):
      remesh at the size predicted from the estimates, aiming each mode a
      little below ``tol`` (:data:`OVERSHOOT`) with the rate N^(-4/d) of P2
      in the DOFs N, or the rate measured between the last two solves.

    From the second solve of one order on, each mode's estimate is divided by
    its effectivity measured between the last two solves (the change of the
    raw frequency is the change of the true error; :func:`_calibrate`), so
    that modes the estimate under-rates (singular at re-entrant corners) are
    judged by a corrected figure (``judged_errors``).

    Before a step it predicts the DOFs (and, from the last step's time, the
    seconds) and stops with :class:`~acoustic_fem.BudgetExceededError` (a
    :class:`~acoustic_fem.ConvergenceError`) when the
    prediction exceeds the budget; the error's ``partial`` holds the
    :class:`AccurateModes` of the last step (``met`` False).

    Parameters
    ----------
    mesh : Mesh or callable h -> Mesh
    walls : mapping of surface name -> Rigid() / PressureRelease() / Impedance(...), optional
        With impedance walls the damped modes (``damping="exact"``) are
        judged by their estimated *frequency* errors; their decay-rate errors
        are estimated and reported (``errors.decay_rate_errors``) but not
        part of the target.  The near-0 Hz damped mode of a room without
        pressure-release surfaces has no relative frequency error (NaN) and
        does not take part.
    tol : float
        Target relative frequency error, e.g. 1e-3.
    fmax : float
        Every mode with frequency <= fmax (Hz) is included.
    order : int
        Starting element order, 1 or 2.
    air : Air, optional
    max_dofs : int or None
        DOF budget (default :data:`DEFAULT_MAX_DOFS`); None: no limit.
    max_seconds : float or None
        Time budget in seconds for the whole call; None: no limit.  A step's
        time is predicted from the previous one (time ~ DOFs), so the first
        solve always runs.
    backend : str
        Factorisation backend for :func:`solve_modes`.
    max_steps : int
        Largest number of solves.
    indicators : bool
        Also compute the (n_cells, n_modes) element-wise indicators of each
        step's estimate (``errors.cell_indicators``; default False: not needed
        to judge the target).

    Returns
    -------
    AccurateModes
        ``modes``, ``errors`` ((n_modes,) arrays), ``steps``, ``budget``.
    """
    import warnings as _warnings

    from .air import Air
    from .mesh import Mesh
    from .modes import ResolutionWarning, solve_modes
    from .refine import refine_uniform

    t_start = time.perf_counter()
    try:
        tol = float(tol)
    except (TypeError, ValueError):
        raise InputError(f"tol={tol!r} must be a relative frequency error such as 1e-3.") from None
    if not math.isfinite(tol) or not 0 < tol < 1:
        raise InputError(f"tol={tol!r} must lie between 0 and 1 (a relative error, e.g. 1e-3).")
    if max_dofs is not None and (isinstance(max_dofs, bool) or int(max_dofs) <= 0):
        raise InputError(f"max_dofs={max_dofs!r} must be a positive number of DOFs or None.")
    if max_seconds is not None and not float(max_seconds) > 0:
        raise InputError(f"max_seconds={max_seconds!r} must be a positive time in s or None.")
    builder = None if isinstance(mesh, Mesh) else mesh
    if builder is not None and not callable(builder):
        raise InputError(
            f"mesh must be a Mesh or a callable h -> Mesh (a mesh builder), got "
            f"{type(mesh).__name__}.")
    if isinstance(order, bool) or order not in (1, 2):
        raise InputError(f"order={order!r} is not supported: use 1 or 2.")
    air = Air() if air is None else air
    budget = dict(max_dofs=None if max_dofs is None else int(max_dofs),
                  max_seconds=None if max_seconds is None else float(max_seconds),
                  max_steps=int(max_steps))
    if builder is not None:
        from .geometry import mesh_size

        h = mesh_size(fmax, order=2, air=air)
        current = builder(h)
        if not isinstance(current, Mesh):
            raise InputError(f"the mesh builder returned {type(current).__name__}, not a Mesh.")
    else:
        current, h = mesh, mesh.h_mean
    steps: list[dict] = []
    result = None
    history = []  # (DOFs, raw estimates) of previous order-2 steps
    n_pred = None  # DOFs predicted for the next step before its mesh is made
    prev = None  # (modes, errors) of the previous order-2 step
    from .dofs import DofMap

    while True:
        n_next = DofMap(current, order).n_dofs
        for n_check, what in ((n_pred, "is predicted to need"), (n_next, "needs")):
            if (n_check is not None and budget["max_dofs"] is not None
                    and n_check > budget["max_dofs"]):
                _stop(result, steps, budget, tol,
                      f"the next step {what} {n_check} DOFs (P{order}) but the budget is "
                      f"max_dofs={budget['max_dofs']}")
        _check_time(result, steps, budget, tol, t_start, n_next)
        t0 = time.perf_counter()
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore", ResolutionWarning)  # judged by the estimate
            modes = solve_modes(current, walls, order=order, fmax=fmax, air=air,
                                backend=backend)
        errs = estimate_errors(modes, indicators=bool(indicators))
        secs = time.perf_counter() - t0
        theta = _calibrate(prev, modes, errs) if prev is not None else np.ones(len(modes))
        # NaN: the relative frequency error of a near-0 Hz damped mode is undefined
        judged = np.nan_to_num(errs.frequency_errors, nan=0.0) / theta
        worst = float(judged.max()) if judged.size else 0.0
        prev = (modes, errs)
        step = dict(order=order, h_mean=float(current.h_mean), n_cells=int(current.n_cells),
                    n_dofs=int(modes.dofs.n_dofs), n_modes=len(modes),
                    max_estimated_error=errs.max_error, max_error=worst,
                    min_effectivity=float(theta.min()) if theta.size else 1.0,
                    seconds=secs, action="done")
        steps.append(step)
        met = bool(worst <= tol)
        result = AccurateModes(modes, errs, tol, met, tuple(steps), MappingProxyType(budget),
                               judged, theta)
        if met:
            return result
        if len(steps) >= max_steps:
            _stop(result, steps, budget, tol, f"max_steps={max_steps} solves were used")
        if order == 1:
            order = 2
            prev = None  # calibration compares solutions of one order only
            step["action"] = "raise the order 1 -> 2"
            n_pred = DofMap(current, 2).n_dofs
            continue
        if builder is None:
            n_pred = _predict_dofs_refined(current, order)
            _check_dofs(result, steps, budget, tol, n_pred)
            _check_time(result, steps, budget, tol, t_start, n_pred)
            step["action"] = "uniform refinement"
            current = refine_uniform(current)
            continue
        n_now = modes.dofs.n_dofs
        d = current.dim
        # error ~ N^(-s) with N the DOFs: s = 4/d for smooth P2 modes; measured
        # per mode from the raw estimates of the last two solves when their
        # DOFs differ enough (>= 1.5x) for the rate to stand out of the noise
        # of unstructured meshes; clipped to [0.4, 4/d] (0.44 is the 3D rate
        # of a mode singular at a 270° edge: eigenvalue error ~ h^(4/3)).
        s_rate = np.full(len(modes), 4.0 / d)
        if history:
            n_old, e_old = history[-1]
            k = min(len(e_old), len(modes))
            if n_now >= 1.5 * n_old:
                with np.errstate(divide="ignore", invalid="ignore"):
                    r = np.log(e_old[:k] / errs.frequency_errors[:k]) / math.log(n_now / n_old)
                s_rate[:k] = np.where(np.isfinite(r), np.clip(r, 0.4, 4.0 / d), 4.0 / d)
        history.append((n_now, errs.frequency_errors))
        # aim each mode at OVERSHOOT^(-s) * tol: at most OVERSHOOT times the DOFs
        # an exact prediction would need, whatever the mode's rate
        with np.errstate(divide="ignore", invalid="ignore"):
            need = np.where(judged > 0, (judged / (OVERSHOOT ** -s_rate * tol)) ** (1.0 / s_rate),
                            0.0)
        # an unresolved mode (infinite estimate) halves the mesh size
        need = np.where(np.isfinite(need), need, 2.0**d)
        growth = max(float(need.max()), 1.3)  # at least 30 % more DOFs
        shrink = growth ** (-1.0 / d)
        h = h * shrink
        n_pred = int(math.ceil(n_now * growth))
        _check_dofs(result, steps, budget, tol, n_pred)
        _check_time(result, steps, budget, tol, t_start, n_pred)
        step["action"] = f"remesh at h = {h:.4g} m (about {n_pred} DOFs)"
        current = builder(h)


#: Lowest effectivity the calibration between two solves may apply.
EFFECTIVITY_FLOOR = 0.3


def _calibrate(prev, modes, errs) -> np.ndarray:
    """Effectivity of the estimate per mode, measured between two solves of one order.

    The true errors of two solves differ by exactly the change of the raw
    frequencies, err_1 − err_2 = f_1/f_2 − 1 (relative, to first order), which
    needs no reference; if the estimate has effectivity θ (η = θ·err) on both,
    θ = (η_1 − η_2) / (f_1/f_2 − 1).  Measured only where the frequency changed
    by more than a fifth of the earlier estimate (a clear, asymptotic change),
    and clipped to [EFFECTIVITY_FLOOR, 1]: the calibration only ever makes the
    judged error larger.  This matters for modes that a re-entrant corner
    makes singular, where P(p+1) converges no faster than P(p) and the
    hierarchical estimate falls to about half the true error (measured
    0.47–0.54 for the lowest mode of an L-shaped room) while it stays within
    0.83–0.97 on smooth modes.
    """
    m_old, e_old = prev
    n = len(modes)
    theta = np.ones(n)
    k = min(n, len(m_old))
    if k == 0:
        return theta
    f0, f1 = m_old.frequencies[:k], modes.frequencies[:k]
    eta0, eta1 = e_old.frequency_errors[:k], errs.frequency_errors[:k]
    with np.errstate(divide="ignore", invalid="ignore"):
        change = np.where(f1 > 0, f0 / f1 - 1.0, 0.0)
        t = (eta0 - eta1) / change
    ok = (f1 > 0) & (change > 0.2 * eta0) & np.isfinite(t)
    theta[:k] = np.where(ok, np.clip(t, EFFECTIVITY_FLOOR, 1.0), 1.0)
    return theta


def _check_dofs(result, steps, budget, tol, n):
    if budget["max_dofs"] is not None and n > budget["max_dofs"]:
        _stop(result, steps, budget, tol,
              f"the next step is predicted to need {n} DOFs but the budget is "
              f"max_dofs={budget['max_dofs']}")


def _check_time(result, steps, budget, tol, t_start, n):
    if budget["max_seconds"] is None or not steps:
        return
    elapsed = time.perf_counter() - t_start
    last = steps[-1]
    predicted = last["seconds"] * n / max(last["n_dofs"], 1)  # time ~ DOFs (DEVELOPERS.md)
    if elapsed + predicted > budget["max_seconds"]:
        _stop(result, steps, budget, tol,
              f"the next step ({n} DOFs) is predicted to take {predicted:.3g} s (scaled from "
              f"{last['seconds']:.3g} s at {last['n_dofs']} DOFs); with {elapsed:.3g} s spent "
              f"that exceeds max_seconds={budget['max_seconds']:g}")


def _stop(result, steps, budget, tol, why):
    from ._errors import BudgetExceededError

    if result is None:
        raise BudgetExceededError(
            f"solve_to_tolerance: {why}; nothing was solved. Raise max_dofs / max_seconds, "
            "lower fmax or start from a coarser mesh.", partial=None, steps=(),
            budget=MappingProxyType(budget))
    last = steps[-1]
    raise BudgetExceededError(
        f"solve_to_tolerance stopped before reaching tol={tol:g}: {why}. The last solve "
        f"({last['n_dofs']} DOFs, P{last['order']}) has a largest estimated error of "
        f"{last['max_error']:.3g}; raise max_dofs / max_seconds, loosen tol or lower fmax. "
        "The modes solved so far are in this error's .partial.",
        partial=AccurateModes(result.modes, result.errors, tol, False, tuple(steps),
                              MappingProxyType(budget), result.judged_errors,
                              result.effectivities),
        steps=tuple(steps), budget=MappingProxyType(budget))
