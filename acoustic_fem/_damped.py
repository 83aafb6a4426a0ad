"""Damped modes of a room with impedance walls: the quadratic eigenproblem.

Physics (time convention e^{+iωt}, :mod:`acoustic_fem.impedance`).  A wall of
normalised admittance β = ρc/Z imposes ∂p/∂n = -ikβ p; the weak form of the
Helmholtz equation becomes

    ∫∇p·∇q dV - k² ∫pq dV + ik Σ_s β_s ∫_s pq dS = 0,

i.e. the quadratic eigenproblem Q(k) x = (K + ik C - k² M) x = 0 with
C = Σ_s β_s B_s (B_s the boundary mass of surface s).  K, M and B_s are
real symmetric, so Q(k) is complex *symmetric* (not Hermitian) and the
natural pairing of eigenvectors is the bilinear form xᵀMy.  An eigenvalue
k = a + ib gives p ∝ e^{iωt} with ω = ck: frequency f = ca/(2π), decay rate
δ = cb (> 0 for passive walls, Re β >= 0).

Linearisation.  With y = kx the problem is the 2n-dimensional pencil

    A z = k B z,   A = [[0, I], [K, iC]],   B = [[I, 0], [0, M]],   z = [x; y].

Shift-invert of that pencil at σ never needs the 2n matrix factorised: the
solution of (A - σB)[u; v] = [a; b] is u = Q(σ)⁻¹(b - (iC - σM)a),
v = a + σu, so (A - σB)⁻¹B [x; y] = [u; x + σu] with
u = Q(σ)⁻¹(M(y + σx) - iCx): one solve with the n x n matrix Q(σ) per
application.  A Krylov method then finds the θ of largest modulus of that
operator, θ = 1/(k - σ), i.e. the k nearest σ; like the Hermitian case in
:mod:`acoustic_fem._eigen`, the ``nev`` eigenvalues nearest σ contain every
eigenvalue closer to σ than the farthest of them.  The engine
(``KRYLOV_ENGINE``) is the block two-level orthogonal Krylov-Schur method of
:mod:`acoustic_fem._toar`: the bottom half of every Krylov vector is a
combination of top halves, so the basis is kept as n-vectors (half the
orthogonalisation traffic and memory of Arnoldi on 2n-vectors), and with a
factor that solves two right-hand sides for the price of one (MUMPS) it
applies the operator to blocks of two.  ARPACK (scipy ``eigs`` on the 2n
operator) stays selectable for comparison: on the benchmark room (101 k P2
DOFs, 30 modes, complex β) its Arnoldi took 39 s of which 14 s were its own
work, the block engine 24 s; whole damped solves 50.0 s against 35.6 s
(measured, bench/bench_damped.py).  For real β the first window works in
κ = -ik, where Q = K - κC + κ²M is real: real arithmetic, half the work
(:func:`real_companion_operator`); there blocks lost (the roots come in
mirror pairs ±conj: 314 vectors for blocks of two against 226 single ones,
measured), so single vectors are applied (``KRYLOV_BLOCK``).

Shifts.  The first shift is σ = iτ on the positive imaginary axis.  There
Q(iτ) = (K + τ²M - τ Re C) - iτ Im C: its real part is symmetric and, for
τ above the wall's scale Re(∫_S β)/V, positive definite -- the matrix the
undamped solver factorises at a negative shift, so CHOLMOD's supernodal
Cholesky serves (Im C = 0 for real β: the factor *is* Q(iτ)⁻¹; otherwise
GMRES preconditioned by it solves Q(iτ) to 1e-12).  Since the distance of
k = a + ib from iτ is √(a² + (b - τ)²) <= √(a² + τ²) for 0 <= b <= 2τ, the
roots nearest iτ are the lowest modes, in the order of the undamped ones;
every root with 0 <= Im k <= 2τ and Re k < √(r² - τ²) (r the distance of
the farthest root found) is among them.  τ is chosen as
max(√0.1 π/(2 L_max), 2.5 |∫_S β dS|/V) (the first term is the undamped
solver's first shift): the strip then holds every mode whose first-order
decay (below) is up to 5x that of a box's oblique modes, and Re Q(iτ) is
positive definite for the uniform vector (τ > Re ∫β/V); solve_modes warns
when a root found lies above the strip.  Further windows (a
band too wide for one) sit at σ = s + iτ, s > 0, cut in a gap of Re k
between windows as in ``_eigen``, and factorise Q(σ) (complex, indefinite,
symmetric) by MUMPS's LDLᵀ when its optional layer is built (:mod:`._zsym`),
else by SciPy's SuperLU -- correct but some 50x slower on 3D meshes.

Complex β (Im C != 0).  Q(iτ) = R - iS with R = Re Q(iτ) (the real
factor) and S = τ Im C, nonzero on the absorbing-wall DOFs only: an exact
solve needs complex arithmetic.  With the MUMPS layer (the default when
built, :func:`use_mumps`) the first window is instead *centred in the band*
(:func:`_centred_start`): σ = s + iτ with s = k_guess / 2 (k_guess, the
expected top of the wanted band, from Weyl's law or kmax), Q(σ) factorised
by MUMPS's complex symmetric LDLᵀ (every application one exact solve), and
nev from Weyl's count below s + |σ|.  The window is accepted only when its
disk reaches the origin (r > |σ|, so it holds the static root and the 0 Hz
mode; otherwise it is continued with ~10 % more roots on the same factor,
or with ARPACK solved again with 1.4x the roots);
it then holds every root with Re k in [0, s + ρ], without the mirror roots
(Re k < 0) an imaginary-axis shift finds as well -- 145-154 ARPACK
applications instead of 243 for 30 modes at 101 k P2 DOFs.  Measured there:
factor 7.7 s (analysis 1.8 s + factorisation 5.8 s; 4.5x CHOLMOD's real
Cholesky of the pattern, which has 44.6 M entries against MUMPS's 45.3 M), a
solve of one or two columns 0.16 s (3x CHOLMOD's one column); with the block
engine 95 blocks of two, the damped solve 2.3-2.4x the undamped one (ARPACK:
3.2-3.4x).  Nev comes from Weyl's count with a small margin: a window that
misses the origin or holds too few roots below its cut is continued on the
same factor with a few more roots (the engine keeps its Krylov basis).
Without MUMPS, GMRES preconditioned by R needs ~6 iterations per
application (the spectrum of R⁻¹Q is 1 - iμ, μ >= 0 up to ~Im(∫β)/(V τ)
for smooth vectors: not clustered enough for 1-2), each a CHOLMOD solve:
18x the undamped solve at 101 k DOFs.  (Tried and set aside: MUMPS at
σ = iτ with 243 applications, 5.8x; blocks of 4-16 columns, which need
1.4-2x the vectors of blocks of two for no faster solves per block, and
on 2n-vectors an orthogonalisation that cost more than the blocks saved.)
The opt-in path (``COMPLEX_PATH = "proxy"``; the default stays "gmres", see
the note at COMPLEX_PATH) instead solves the
*real-part problem* (β replaced by Re β: real Arnoldi on the same factor R,
as fast as a real β) for the wanted count plus a margin (max(4, 15 %) more
modes, or up to 1.1 kmax), then refines the wanted roots to β by
:func:`refine_frozen`: Rayleigh-Ritz on a growing real basis expanded by R⁻¹
applied to all residuals at once -- one multi-column CHOLMOD solve per outer
step, which costs barely more than a single column.  Checks guard the
substitution, else the GMRES path is run: every wanted refined root
converged to ``PROXY_TOL`` and is distinct from the others; the wanted roots
lie below the last real-part root minus the largest displacement of |Re k|
(sorted lists of the wanted ones against the real-part ones), so that no
root of the true problem can come from a real-part root beyond the margin
(a heuristic: it assumes the unseen roots move no more than the seen ones);
and the 0 Hz continuation is within half its modulus of its first-order
value (not the static root).

Roots kept (each a mode with f >= 0):

* Re k < 0 roots are the negative-frequency branch (for real β exactly the
  mirror images -conj(k) of the kept ones): dropped.
* A room without pressure-release surfaces has K1 = 0, so k = 0 is always a
  root (x = uniform): the static state, which the Robin term (∝ k) cannot
  damp.  It is the spurious partner of the double root k = 0 of the rigid
  room, and is dropped (exactly one root: the one of smallest |k|).
* The other partner is the continuation of the rigid room's 0 Hz uniform
  mode: with β != 0 it becomes an (almost) aperiodic decay, first order
  k0 = i Σβ_s S_s / V (below).  It is kept as mode 0 whatever the sign of
  its tiny real part (a constant complex β, not physical at 0 Hz, gives
  Re k0 = -Im(Σβ_s S_s)/V), identified as the remaining root of smallest |k|
  when it is below half the next |k|; its frequency is reported as
  c |Re k0| / (2π).

Frequency-dependent walls: β_s(f) evaluated at each mode's own frequency
f = c |Re k| / (2π) (never below a floor, ``Pencil.f_floor``, so that the
uniform mode's β is defined).  The linear problem is solved with β frozen at a
reference frequency; each mode is then refined on the nonlinear problem
T(k) = K + ik Σ β_s(f(k)) B_s - k² M by the nonlinear Arnoldi method (H.
Voss, BIT Numer. Math. 44 (2004) 387-401): Rayleigh-Ritz on a real basis V
holding the frozen modes, the projected nonlinear problem solved per mode by
Rayleigh-functional iteration (blocks of close modes first separated by a
Rayleigh-Ritz step), and V expanded by the residuals preconditioned with the
first shift's real factor -- residual inverse iteration (A. Neumaier, SIAM J.
Numer. Anal. 22 (1985) 914-923) accelerated by the subspace.

First-order perturbation (the ``perturbation`` option and a check).  For a
simple rigid-room mode K φ = k_n² M φ, φᵀMφ = 1, k_n > 0, write k = k_n + κ
and project Q(k)φ ≈ 0 on φ: k_n² - k² + ik φᵀCφ = 0, so
-2 k_n κ + i k_n φᵀCφ = 0 and κ = (i/2) φᵀCφ:

    δ_n = c Im k = (c/2) Σ_s Re(β_s) ∫_s φ² dS,
    f_n - f_rigid = -(c/4π) Σ_s Im(β_s) ∫_s φ² dS.

Degenerate (or close) rigid modes Φ_G: the same projection on span Φ_G gives
k = eig(diag(k_i) + (i/2) Φ_Gᵀ C Φ_G).  The uniform mode (k_n = 0, φ = 1/√V)
is a double root of the rigid room: -k² + ik φᵀCφ = 0 gives, besides the
static k = 0, k0 = i φᵀCφ = i Σ_s β_s S_s / V -- twice the damping the
k_n > 0 formula would give.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from threadpoolctl import threadpool_limits

from ._eigen import CLUSTER_RTOL, _cut
from ._errors import ConvergenceError, SolverError
from ._linalg import factorize

#: eigenpairs of the quadratic problem whose backward error exceeds this are rejected
RESIDUAL_TOL = 1e-8
#: target backward error of the refinement on frequency-dependent walls
REFINE_TOL = 1e-10
#: Ritz tolerance of the frozen-β solve that starts the refinement on frequency-
#: dependent walls (instead of 1e-12): its roots move by O(Δβ) afterwards; 1e-8
#: still places every root to ~1e-8 relative for the windows' bookkeeping
FROZEN_TOL = 1e-8
#: ... of the candidates refined past the wanted band (only ordered against it: a
#: backward error of 1e-8 places a root to ~1e-8 relative, the acceptance level of
#: RESIDUAL_TOL); they converge last, so this saves outer steps
MARGIN_TOL = 1e-8
#: up to this many unknowns the 2n companion pencil is solved densely (LAPACK)
DENSE_LIMIT = 300
#: largest number of roots asked of one window (memory: n x (2 nev + ~6) complex)
MAX_WINDOW_NEV = 240
#: relative accuracy of the GMRES solves with Q(iτ) when Im β != 0 (the eigenpairs are
#: then checked against RESIDUAL_TOL on the true quadratic problem)
GMRES_TOL = 1e-10
#: how the sparse path treats a complex C (read at call time): "proxy" solves the
#: problem with Re β in real arithmetic and refines the roots to β (module notes),
#: falling back to "gmres" (complex Arnoldi, GMRES inside every application) when
#: a check fails.  Default "gmres": on a strongly reactive, frequency-dependent wall
#: (a porous layer, Im β >> Re β) the proxy returned genuine roots but skipped
#: lower ones without its checks noticing (tests/test_impedance.py, closed room
#: with a porous layer); until its completeness check is sound it is opt-in.
COMPLEX_PATH = "gmres"
#: target backward error of the refinement from Re β to β
PROXY_TOL = 1e-12
#: the Krylov engine of the sparse windows (read at call time): "toar", the block
#: two-level orthogonal Krylov-Schur method of :mod:`acoustic_fem._toar` (default),
#: or "arpack" (scipy ``eigs`` on the 2n companion operator, kept for comparison)
KRYLOV_ENGINE = "toar"
#: vectors per application of the "toar" engine, by the factor that solves
#: Q(σ): a block costs about one solve where the factor is read once per block
#: (measured at 101 k P2 DOFs: MUMPS 2 columns 1.0x one column, 4 columns 1.27x,
#: blocks of 2-4 equally fast overall).  CHOLMOD serves the real κ form, whose
#: mirror-paired roots made blocks need 40-110 % more vectors (26 s for single
#: vectors, 29-31 s for blocks of 2-4); GMRES and SuperLU solve column by
#: column: single vectors for all three
KRYLOV_BLOCK = {"mumps": 2}
#: ARPACK's basis size ncv = NCV_FACTOR nev + 1 (at least nev + 20)
NCV_FACTOR = 2.0
#: BLAS threads of the NumPy/SciPy wheels' OpenBLAS while a Krylov engine runs on a
#: large problem (read at call time; None leaves them alone; 2 threads made the
#: factor's solves 40 % slower, measured)
ARPACK_BLAS_THREADS = 1
#: the centred first window (complex β with MUMPS) is centred at CENTRE_REACH k_guess / 2
CENTRE_REACH = 1.0
#: factor complex Q(σ) with MUMPS when its layer is built (read at call time; False
#: restores the GMRES / SuperLU paths, e.g. to compare them)
USE_MUMPS = True


@dataclass
class WallTerm:
    """One impedance surface: its wall and boundary mass on the free DOFs."""

    name: str
    wall: object  # Impedance
    B: sp.csr_matrix


class Pencil:
    """The matrices of Q(k) = K + ik Σ β_s B_s - k² M on the free DOFs.

    Parameters
    ----------
    K, M : (n, n) sparse real symmetric
    terms : list of WallTerm (the impedance surfaces)
    air : Air
    f_floor : float
        Lowest frequency (Hz) at which a frequency-dependent β is evaluated.
    """

    def __init__(self, K, M, terms, air, f_floor):
        self.K = sp.csr_matrix(K)
        self.M = sp.csr_matrix(M)
        self.terms = list(terms)
        self.air = air
        self.f_floor = float(f_floor)
        self.n = self.K.shape[0]
        self.norm_K = float(abs(self.K).sum(axis=1).max())
        self.norm_M = float(abs(self.M).sum(axis=1).max())
        self.norm_B = np.array([float(abs(t.B).sum(axis=1).max()) if t.B.nnz else 0.0
                                for t in self.terms])
        # each wall's boundary mass lives on its own DOFs: (rows, B restricted to them)
        self.wall_blocks = []
        for t in self.terms:
            B = sp.csr_matrix(t.B)
            rows = np.flatnonzero(np.diff(B.indptr))
            self.wall_blocks.append((rows, B[rows][:, rows].tocsr()))

    @property
    def frequency_dependent(self) -> bool:
        return any(t.wall.frequency_dependent for t in self.terms)

    def frequency(self, k) -> np.ndarray:
        """Frequency in Hz of roots k (any shape): c |Re k| / (2π)."""
        return self.air.c * np.abs(np.real(k)) / (2.0 * math.pi)

    def betas(self, f) -> np.ndarray:
        """(n_terms, m) admittances of the impedance surfaces at frequencies f (m,) Hz."""
        f = np.maximum(np.atleast_1d(np.asarray(f, dtype=float)), self.f_floor)
        if not self.terms:
            return np.zeros((0, f.size), dtype=complex)
        return np.vstack([np.asarray(t.wall.admittance_at(f, self.air), dtype=complex)
                          .reshape(f.size) for t in self.terms])

    def C(self, beta) -> sp.csr_matrix:
        """Σ β_s B_s for one admittance per surface, beta (n_terms,)."""
        out = sp.csr_matrix((self.n, self.n), dtype=complex)
        for b, t in zip(beta, self.terms):
            if b != 0:
                out = out + complex(b) * t.B
        return out.tocsr()

    def residuals(self, ks, X, betas) -> np.ndarray:
        """(m,) backward errors of eigenpairs (k_j, x_j) with per-mode admittances.

        ‖Q(k)x‖∞ / ((‖K‖∞ + |k| ‖C‖∞ + |k|² ‖M‖∞) ‖x‖∞), scaled by the
        matrix norms (not by ‖Kx‖) so that the uniform mode is judged right.

        ks : (m,) complex, X : (n, m), betas : (n_terms, m)
        """
        ks = np.asarray(ks)
        if ks.size == 0:
            return np.zeros(0)
        return self.backward_errors(ks, X, betas, self.apply(ks, X, betas))

    def apply(self, ks, X, betas) -> np.ndarray:
        """(n, m) residual vectors Q(k_j) x_j = Kx - k²Mx + ik Σ β_s B_s x (complex).

        The real matrices act on the real views of X (:func:`_real_times_complex`).
        """
        ks = np.asarray(ks)
        X = np.asarray(X, dtype=complex)
        R = _real_times_complex(self.K, X) - _real_times_complex(self.M, X) * ks**2
        for (rows, Bw), b in zip(self.wall_blocks, betas):
            R[rows] += _real_times_complex(Bw, X[rows]) * (1j * ks * b)
        return R

    def backward_errors(self, ks, X, betas, R) -> np.ndarray:
        """(m,) backward errors (see :meth:`residuals`) from the residual vectors R (n, m)."""
        ks = np.asarray(ks)
        normC = np.zeros(ks.size)
        for b, nb in zip(betas, self.norm_B):
            normC += np.abs(b) * nb
        ak = np.abs(ks)
        scale = (self.norm_K + ak * normC + ak**2 * self.norm_M) * np.abs(X).max(axis=0)
        return np.abs(R).max(axis=0) / np.maximum(scale, 1e-300)


# ---------------------------------------------------------------------------
# solves with Q(σ)
# ---------------------------------------------------------------------------
def _real_solve_complex(fsolve, b):
    """Apply a real factor's solve to a complex (n,) or (n, m) right-hand side."""
    b = np.asarray(b)
    if b.ndim == 1:
        x = fsolve(np.column_stack([b.real, b.imag]))
        return x[:, 0] + 1j * x[:, 1]
    m = b.shape[1]
    x = fsolve(np.hstack([b.real, b.imag]))
    return x[:, :m] + 1j * x[:, m:]


def _gmres(matvec, psolve, b, tol, maxiter=80):
    """Right-preconditioned GMRES (no restart) for one complex right-hand side.

    Minimises the true residual ‖b - A x‖ over x = P⁻¹ (Krylov space)
    (Saad & Schultz, SIAM J. Sci. Stat. Comput. 7 (1986) 856), with classical
    Gram-Schmidt done twice.  Returns (x, relative residual, iterations).
    """
    beta = np.linalg.norm(b)
    if beta == 0.0:
        return np.zeros_like(b), 0.0
    n = b.shape[0]
    V = np.empty((maxiter + 1, n), dtype=complex)
    Z = np.empty((maxiter, n), dtype=complex)
    H = np.zeros((maxiter + 1, maxiter), dtype=complex)
    V[0] = b / beta
    e1 = np.zeros(maxiter + 1, dtype=complex)
    e1[0] = beta
    rel = 1.0
    j = 0
    for j in range(maxiter):
        Z[j] = psolve(V[j])
        w = matvec(Z[j])
        for _ in range(2):
            h = V[: j + 1].conj() @ w
            w = w - h @ V[: j + 1]
            H[: j + 1, j] += h
        H[j + 1, j] = np.linalg.norm(w)
        y, *_ = np.linalg.lstsq(H[: j + 2, : j + 1], e1[: j + 2], rcond=None)
        rel = np.linalg.norm(e1[: j + 2] - H[: j + 2, : j + 1] @ y) / beta
        if rel <= tol or H[j + 1, j].real <= 1e-300:
            break
        V[j + 1] = w / H[j + 1, j]
    return y @ Z[: j + 1], rel, j + 1


class ShiftSolver:
    """Solves Q(σ) u = b, b complex (n,) or (n, m).

    ``precondition(b)`` applies a real preconditioner (the factor of the
    real part at an imaginary shift) to a complex right-hand side.
    """

    def __init__(self, solve, precondition, method, backend, real_solve=None):
        self.solve = solve
        self.precondition = precondition
        self.real_solve = real_solve
        self.method = method
        self.backend = backend
        self.gmres_worst = 0.0
        self.gmres_iterations = 0


def imaginary_shift_solver(pencil: Pencil, C, tau: float, backend: str) -> ShiftSolver:
    """Solver of Q(iτ) = (K + τ²M - τ Re C) - iτ Im C (see the module notes)."""
    R = (pencil.K + tau**2 * pencil.M - tau * sp.csr_matrix(C.real)).tocsc()
    f = factorize(R, definite=True, backend=backend)
    S = sp.csr_matrix(tau * C.imag)
    S.eliminate_zeros()

    def precondition(b):
        return _real_solve_complex(f.solve, b)

    if S.nnz == 0:
        return ShiftSolver(precondition, precondition, "factor of Q(iτ)", f.backend, f.solve)

    Q = (R - 1j * S).tocsr()
    solver = None

    def solve(b):
        b = np.asarray(b, dtype=complex)
        cols = b.reshape(b.shape[0], -1)
        out = np.empty_like(cols)
        for j in range(cols.shape[1]):
            x, rel, its = _gmres(Q.__matmul__, precondition, cols[:, j], GMRES_TOL)
            solver.gmres_worst = max(solver.gmres_worst, rel)
            solver.gmres_iterations += its
            out[:, j] = x
        return out.reshape(b.shape)

    solver = ShiftSolver(solve, precondition, "GMRES preconditioned by the factor of Re Q(iτ)",
                         f.backend, f.solve)
    return solver


def general_shift_solver(pencil: Pencil, C, sigma: complex) -> ShiftSolver:
    """Solver of Q(σ) for any complex σ by SciPy's SuperLU (complex LU, COLAMD order)."""
    Q = (pencil.K + (1j * sigma) * C - (sigma**2) * pencil.M).tocsc().astype(complex)
    try:
        lu = spla.splu(Q, permc_spec="COLAMD")
    except RuntimeError as exc:
        raise SolverError(
            f"Q(σ) is singular at the shift σ = {sigma:.6g} ({exc}); this is rare: retry with "
            "a slightly different frequency range."
        ) from None

    def solve(b):
        return lu.solve(np.asarray(b, dtype=complex))

    return ShiftSolver(solve, None, "SuperLU (complex)", "superlu")


def use_mumps(backend) -> bool:
    """Whether shift-invert solves with a complex Q(σ) take the MUMPS factor (:mod:`._zsym`).

    Only with ``backend="auto"`` (an explicit "cholmod" or "superlu" keeps the
    other paths) and when the optional MUMPS layer is built.
    """
    if backend != "auto" or not USE_MUMPS:
        return False
    from ._zsym import available

    return available()


def mumps_shift_solver(pencil: Pencil, C, sigma: complex) -> ShiftSolver:
    """Solver of Q(σ) = K + iσC - σ²M, any complex σ, by MUMPS's complex symmetric LDLᵀ.

    Q(σ) is complex symmetric (Qᵀ = Q); the factor is an exact solver (no
    inner iteration), about 2.5x the time of a real Cholesky of the same
    pattern to compute and 3x per single solve (101 k P2 DOFs, measured).
    """
    from ._zsym import ComplexSymmetricFactor

    Q = (pencil.K + (1j * sigma) * C - (sigma**2) * pencil.M).tocsr()
    f = ComplexSymmetricFactor(Q)
    solver = ShiftSolver(f.solve, f.solve, "MUMPS LDLᵀ of Q(σ) (complex symmetric)", "mumps")
    solver.factor = f
    return solver


def companion_operator(pencil: Pencil, C, sigma: complex, solver: ShiftSolver):
    """(A - σB)⁻¹B of the companion pencil (module notes) on blocks.

    Returns (apply, count): apply maps a (2n,) or (2n, b) complex array to
    the same shape; count[0] is the number of vectors applied so far.
    """
    n = pencil.n
    apply_u = companion_block_solve(pencil, C, sigma, solver)
    count = [0]

    def apply(z):
        z = np.asarray(z, dtype=complex)
        one = z.ndim == 1
        Z = z.reshape(2 * n, -1)
        x, y = Z[:n], Z[n:]
        u = apply_u(x, y)
        count[0] += Z.shape[1]
        out = np.vstack([u, x + sigma * u])
        return out[:, 0] if one else out

    return apply, count


def real_companion_operator(pencil: Pencil, C, tau: float, fsolve):
    """The companion operator in κ = -ik for a real C, in real arithmetic.

    With k = iκ, Q(k) = K - κC + κ²M =: P(κ) is real when β is.  Its
    pencil [[0, I], [-K, C]] z = κ diag(I, M) z, shift-inverted at κ = τ
    (i.e. k = iτ), maps [x; y] to [u; x + τu] with
    u = P(τ)⁻¹((C - τM)x - My), P(τ) = K - τC + τ²M = Re Q(iτ), the real
    factor.  θ = 1/(κ - τ) gives k = i(τ + 1/θ).  Real Arnoldi then finds
    the pairs k, -conj(k) together as complex-conjugate θ, at half the cost
    of complex arithmetic.

    Returns (apply, count) as :func:`companion_operator`.
    """
    n = pencil.n
    apply_u = real_companion_block_solve(pencil, C, tau, fsolve)
    count = [0]

    def apply(z):
        z = np.asarray(z, dtype=float).reshape(2 * n, 1)
        x, y = z[:n], z[n:]
        u = apply_u(x, y)
        count[0] += 1
        return np.concatenate([u, x + tau * u]).reshape(-1)

    return apply, count


def companion_block_solve(pencil: Pencil, C, sigma: complex, solver: ShiftSolver):
    """The top half L(x, y) = Q(σ)⁻¹(M(y + σx) - iCx) of :func:`companion_operator`.

    For the TOAR engine (:mod:`._toar`), whose operator is
    [x; y] -> [L(x, y); x + σ L(x, y)].  Blocks: X, Y (n, b) -> (n, b) complex.
    """
    M = pencil.M
    iC = (1j * C).tocsr()

    def apply_u(X, Y):
        return np.asarray(solver.solve(_real_times_complex(M, Y + sigma * X) - iC @ X)
                          ).reshape(X.shape)

    return apply_u


def _real_times_complex(A, Z):
    """A @ Z for a real A (sparse or dense, (a, n)) and a complex Z (n, b), on Z's real view.

    Reads A once for the real and imaginary parts together (2b real columns):
    half the memory traffic of a complex copy of A (measured 2x faster for the
    sparse mass matrix), and for a dense basis no complex copy of it at all.
    """
    Z = np.ascontiguousarray(Z, dtype=complex)
    return np.ascontiguousarray(A @ Z.view(np.float64)).view(complex)


def real_companion_block_solve(pencil: Pencil, C, tau: float, fsolve):
    """The top half L(x, y) = P(τ)⁻¹((C - τM)x - My) of :func:`real_companion_operator`.

    Real blocks X, Y (n, b) -> (n, b); the operator is [x; y] -> [u; x + τu].
    """
    M = pencil.M
    CtM = (sp.csr_matrix(C.real) - tau * M).tocsr()

    def apply_u(X, Y):
        return np.asarray(fsolve(CtM @ X - M @ Y)).reshape(X.shape)

    return apply_u


# ---------------------------------------------------------------------------
# root classification and normalisation
# ---------------------------------------------------------------------------
def classify(ks, has_static: bool, scale: float):
    """Masks (keep, zero_mode) over roots ks of one window containing k = 0.

    keep: Re k >= -1e-9 scale, or the continuation of the 0 Hz mode; the
    static root (smallest |k|) is never kept (module notes).
    """
    ks = np.asarray(ks)
    keep = ks.real >= -1e-9 * scale
    zero = np.zeros(ks.size, dtype=bool)
    if has_static and ks.size:
        order = np.argsort(np.abs(ks), kind="stable")
        keep[order[0]] = False
        if ks.size >= 2:
            i0 = order[1]
            nxt = np.abs(ks[order[2]]) if ks.size >= 3 else math.inf
            if np.abs(ks[i0]) < 0.5 * nxt:
                zero[i0] = True
                keep[i0] = True
    return keep, zero


def normalise(X, M):
    """Scale eigenvectors so that xᵀMx = 1 (bilinear, unconjugated).

    The sign makes the real part of the entry of largest modulus positive, so
    that for β -> 0 the shapes tend to the real mass-normalised rigid ones.  A
    vector with |xᵀMx| < 1e-6 xᴴMx (possible only for very strong damping) is
    scaled to xᴴMx = 1 with that entry real and positive instead.

    Returns (X, n_hermitian).
    """
    X = np.asarray(X, dtype=complex)
    if X.shape[1] == 0:
        return X, 0
    MX = M @ X
    q = np.einsum("ij,ij->j", X, MX)
    h = np.einsum("ij,ij->j", X.conj(), MX).real
    weak = np.abs(q) < 1e-6 * h
    s = np.where(weak, np.sqrt(np.maximum(h, 1e-300)), np.sqrt(q))
    X = X / s
    idx = np.argmax(np.abs(X), axis=0)
    top = X[idx, np.arange(X.shape[1])]
    sign = np.where(top.real < 0, -1.0, 1.0)
    phase = np.where(weak, np.conj(top) / np.maximum(np.abs(top), 1e-300), sign)
    return X * phase, int(weak.sum())


# ---------------------------------------------------------------------------
# the linear (frozen-β) problem
# ---------------------------------------------------------------------------
@dataclass
class LinearResult:
    """Roots kept, sorted by frequency, with what the solver did."""

    ks: np.ndarray
    X: np.ndarray
    zero_mode: np.ndarray
    method: str = ""
    windows: list = field(default_factory=list)
    first_solver: ShiftSolver | None = None
    tau: float = 0.0


def _dense(pencil: Pencil, C):
    """All 2n roots of the companion pencil, as the standard problem B⁻¹A (LAPACK).

    B⁻¹A = [[0, I], [M⁻¹K, iM⁻¹C]]; the standard QR algorithm is several
    times faster than QZ on the pencil.
    """
    n = pencil.n
    M = pencil.M.toarray()
    Cd = C.toarray() if sp.issparse(C) else np.asarray(C)
    cho = sla.cho_factor(M)
    A = np.zeros((2 * n, 2 * n), dtype=complex)
    A[:n, n:] = np.eye(n)
    A[n:, :n] = sla.cho_solve(cho, pencil.K.toarray())
    A[n:, n:] = 1j * sla.cho_solve(cho, Cd)
    with threadpool_limits(1, user_api="blas"):
        w, Z = np.linalg.eig(A)
    ok = np.isfinite(w)
    return w[ok], Z[:n, ok]


def _arnoldi(apply, n2, nev, tol, to_k, dtype):
    """Roots nearest the shift by ARPACK (scipy eigs on the shift-inverted operator).

    to_k maps the operator's eigenvalues θ to roots k.  Returns (ks, Z).
    """
    rng = np.random.default_rng(12345)
    v0 = rng.standard_normal(n2)
    if dtype is complex:
        v0 = v0 + 1j * rng.standard_normal(n2)
    ncv = int(min(n2 - 1, max(int(NCV_FACTOR * nev) + 1, nev + 20)))
    op = spla.LinearOperator((n2, n2), matvec=apply, dtype=dtype)
    # ARPACK's own work is BLAS-2 on (2n, ncv) blocks: on small problems, BLAS
    # threads cost far more than they save (20x measured at 2n = 700).  On large
    # ones NumPy's/SciPy's OpenBLAS threads, spinning after each ARPACK step,
    # took the cores from the sparse factor's solves (CHOLMOD, MUMPS: the
    # system OpenBLAS), which then ran at half speed: those wheels' BLAS is
    # held to one thread throughout (ARPACK_BLAS_THREADS), the factor's keeps its own.
    try:
        with threadpool_limits(limits=_blas_limits(n2, ncv)):
            theta, Z = spla.eigs(op, k=nev, which="LM", v0=v0, ncv=ncv, tol=tol)
    except spla.ArpackNoConvergence as exc:
        th = np.asarray(exc.eigenvalues)
        raise _WindowFailed(to_k(th), np.asarray(exc.eigenvectors), nev) from None
    return to_k(theta), Z


class _WindowFailed(Exception):
    def __init__(self, ks, Z, nev):
        super().__init__("ARPACK did not converge")
        self.ks, self.Z, self.nev = ks, Z, nev


def _blas_limits(n2, ncv):
    """BLAS thread limits while a Krylov engine runs (see :func:`_arnoldi`)."""
    return ({"blas": 1} if n2 * ncv < 4_000_000
            else {"libscipy_openblas": ARPACK_BLAS_THREADS})


def _toar(engine, nev, tol, to_k):
    """Roots nearest the shift by the block TOAR Krylov-Schur engine (:mod:`._toar`).

    engine : CompanionKrylovSchur (continued if it ran before).  Returns (ks, X (n, nev)).
    """
    from ._toar import KrylovNotConverged

    ncv = max(2 * nev + engine.b, nev + 20)
    try:
        with threadpool_limits(limits=_blas_limits(2 * engine.n, ncv)):
            theta, X = engine.run(nev, ncv=ncv, tol=tol)
    except KrylovNotConverged as exc:
        raise _WindowFailed(to_k(exc.theta), exc.X, nev) from None
    return to_k(theta), X


def _m_orthonormal(W, M, drop=1e-12):
    """An M-orthonormal basis (n, p) of the span of the real columns W (n, q), p <= q.

    Columns scaled to unit M-norm, then the Gram matrix's eigenvectors (directions
    below ``drop`` of its largest eigenvalue are dropped as dependent), then one
    Cholesky pass (CholQR2-like) for orthogonality to round-off.
    """
    MW = M @ W
    nrm = np.sqrt(np.maximum(np.einsum("ij,ij->j", W, MW), 0.0))
    ok = nrm > 1e-300
    if not ok.any():
        return W[:, :0]
    W, MW = W[:, ok] / nrm[ok], MW[:, ok] / nrm[ok]
    G = W.T @ MW
    w, U = np.linalg.eigh(0.5 * (G + G.T))
    keep = w > drop * w.max()
    if not keep.any():
        return W[:, :0]
    T = U[:, keep] / np.sqrt(w[keep])
    V = W @ T
    G = V.T @ (M @ V)
    L = np.linalg.cholesky(0.5 * (G + G.T))
    return sla.solve_triangular(L, V.T, lower=True).T


def refine_frozen(pencil: Pencil, beta, ks, X, precondition, *, tol, zero=None,
                  has_static=False, count=None, kmax=None, max_outer=30):
    """Refine approximate roots of (K + ik C - k² M) x = 0 with constant C = Σ β_s B_s.

    Subspace-accelerated residual inverse iteration (the linear case of the
    nonlinear Arnoldi method of :func:`refine_nonlinear`), done for all modes
    at once: a real M-orthonormal basis V (n, p) starts as the span of the
    real and imaginary parts of X; each outer step solves the projected
    problem (p x p; all its 2p roots from the companion matrix by LAPACK),
    takes for each mode the projected root whose vector overlaps most with
    its previous vector (greedy, largest overlaps first), and expands V by the preconditioned residuals
    P⁻¹ Q(k) x of the modes not yet converged (one multi-column solve).  With
    ``has_static`` the projected root of smallest modulus is the static one
    (k = 0) and is never matched.

    Parameters
    ----------
    pencil : Pencil;  beta : (n_terms,) complex admittances
    ks : (m,) complex;  X : (n, m) complex -- starting pairs
    precondition : callable, complex (n, j) -> (n, j) (a real factor's solve)
    tol : backward-error target;  zero : (m,) bool, the 0 Hz continuation
    count, kmax : only the modes among the lowest ``count`` by |Re k| (or with
        |Re k| <= kmax) are driven to ``tol``; the others (a margin) are
        carried along in the Rayleigh-Ritz step only

    Returns
    -------
    ks (m,), X (n, m) complex, backward errors (m,; inf where never
    checked), info dict (outer iterations, basis size, preconditioned
    columns), wanted (m,) bool.  Converged modes are locked (no longer
    updated nor expanded).
    """
    K, M = pencil.K, pencil.M
    beta = np.asarray(beta, dtype=complex).reshape(len(pencil.terms))
    C = pencil.C(beta)
    # the wall matrix lives on the wall DOFs: project on those rows only
    walls = np.unique(C.tocoo().row)
    Cw = C[walls][:, walls]
    Cr, Ci = sp.csr_matrix(Cw.real), sp.csr_matrix(Cw.imag)
    ks = np.array(ks, dtype=complex)
    m = ks.size
    zero = np.zeros(m, dtype=bool) if zero is None else np.asarray(zero, dtype=bool)
    normC = float(sum(abs(b) * nb for b, nb in zip(beta, pencil.norm_B)))
    V = _m_orthonormal(np.hstack([np.real(X), np.imag(X)]), M)
    Y0 = V.T @ (M @ np.asarray(X, dtype=complex))  # (p, m) coordinates of the start
    Vw = V[walls]
    KV = V.T @ (K @ V)
    CrV, CiV = Vw.T @ (Cr @ Vw), Vw.T @ (Ci @ Vw)
    columns = 0
    outer = 0
    rel = np.full(m, np.inf)
    done = np.zeros(m, dtype=bool)
    wanted = np.ones(m, dtype=bool)
    Y = None
    p_new = 0  # columns the last expansion added to the basis
    for outer in range(max_outer + 1):
        CV = 0.5 * (CrV + CrV.T) + 0.5j * (CiV + CiV.T)
        with threadpool_limits(1, user_api="blas"):  # small dense problem
            w, Z = _small_qep(0.5 * (KV + KV.T), CV)
        free = np.isfinite(w)
        if has_static and zero.any() and free.any():
            free[np.argmin(np.where(free, np.abs(w), np.inf))] = False
        # match by eigenvector overlap with the previous vectors (nearest eigenvalue
        # alone swaps modes when the shift is comparable to the spacing)
        Zn = Z / np.maximum(np.linalg.norm(Z, axis=0), 1e-300)
        Yp = Y0 if Y is None else Y
        Yp = np.vstack([Yp, np.zeros((Z.shape[0] - Yp.shape[0], m), complex)])
        Yp = Yp / np.maximum(np.linalg.norm(Yp, axis=0), 1e-300)
        dist = np.where(free[None, :], -np.abs(Yp.conj().T @ Zn), np.inf)
        pick = np.full(m, -1)
        for flat in np.argsort(dist, axis=None):
            i, j = divmod(int(flat), w.size)
            if pick[i] < 0 and free[j]:
                pick[i] = j
                free[j] = False
                if (pick >= 0).all():
                    break
        if (pick < 0).any():
            break
        # converged modes keep their pair (locked); the others take the new Ritz pair
        upd = ~done
        ks[upd] = w[pick[upd]]
        Ynew = Z[:, pick]
        Y = Ynew if Y is None else np.vstack([Y, np.zeros((p_new, m), complex)])
        Y[:, upd] = Ynew[:, upd]
        key = np.where(zero, -1.0, np.abs(ks.real))
        wanted = np.ones(m, dtype=bool)
        if count is not None:
            wanted &= np.argsort(np.argsort(key, kind="stable"), kind="stable") < count
        if kmax is not None:
            wanted &= key <= kmax
        chk = np.flatnonzero(wanted & ~done)
        if chk.size == 0:
            break
        Xt = V @ Y[:, chk]
        kc = ks[chk]
        R = K @ Xt - (M @ Xt) * kc**2
        R = R + (C @ Xt) * (1j * kc)
        ak = np.abs(kc)
        rel[chk] = np.abs(R).max(axis=0) / np.maximum(
            (pencil.norm_K + ak * normC + ak**2 * pencil.norm_M) * np.abs(Xt).max(axis=0),
            1e-300)
        ok = rel[chk] < tol
        done[chk[ok]] = True
        todo = chk[~ok]
        if todo.size == 0 or outer == max_outer:
            break
        T = precondition(R[:, ~ok])
        del R, Xt
        columns += int(todo.size)
        Wn = np.hstack([T.real, T.imag])
        for _ in range(2):
            Wn = Wn - V @ (V.T @ (M @ Wn))
        Wn = _m_orthonormal(Wn, M)
        p_new = Wn.shape[1]
        if p_new == 0:
            break
        KW = K @ Wn
        KV = np.block([[KV, V.T @ KW], [KW.T @ V, Wn.T @ KW]])
        Ww = Wn[walls]
        CrV = np.block([[CrV, Vw.T @ (Cr @ Ww)], [Ww.T @ (Cr @ Vw), Ww.T @ (Cr @ Ww)]])
        CiV = np.block([[CiV, Vw.T @ (Ci @ Ww)], [Ww.T @ (Ci @ Vw), Ww.T @ (Ci @ Ww)]])
        V = np.hstack([V, Wn])
        Vw = np.hstack([Vw, Ww])
        del KW, Wn, T, Ww
    X = V @ Y if Y is not None else np.array(X, dtype=complex)
    info = dict(outer_iterations=int(outer), basis_size=int(V.shape[1]),
                preconditioned_columns=int(columns))
    return ks, X, rel, info, wanted


def _near_first_order(pencil, beta, k0) -> bool:
    """Whether k0 is within half of its modulus of the first-order k0 = i Σ β_s S_s / V."""
    ones = np.ones(pencil.n)
    ref = 1j * sum(b * float(ones @ (t.B @ ones)) for b, t in zip(beta, pencil.terms))
    ref = ref / float(ones @ (pencil.M @ ones))
    return abs(k0 - ref) <= 0.5 * abs(ref)


def _proxy_windows(pencil, beta, count, kmax, n_estimate, tau, has_static, backend, max_nev,
                   tol, res):
    """Complex β by the real-part problem and a refinement (module notes).

    beta : (n_terms,) complex.  Returns (ks (m,), X (n, m), zero (m,)) as
    :func:`_windows`, or None when a check fails (res.windows then holds
    the attempt, its ``proxy_rejected`` entry saying why).
    """
    beta = np.asarray(beta, dtype=complex)
    Cr = pencil.C(beta.real)
    margin = 0 if count is None else max(4, math.ceil(0.15 * count))
    p_count = None if count is None else count + margin
    p_kmax = None if kmax is None else 1.1 * kmax
    p_est = int(math.ceil(1.1**3 * n_estimate)) if kmax is not None else n_estimate + margin
    ks0, X0, zero0 = _windows(pencil, Cr, p_count, p_kmax, p_est, tau, has_static, backend,
                              max_nev, tol, res)
    first = res.windows[0]
    first["solver"] = first["solver"] + " at Re β (the factor of Re Q(iτ) at β)"
    ks, X, rel, rinfo, ok = refine_frozen(pencil, beta, ks0, X0, res.first_solver.precondition,
                                      tol=PROXY_TOL, zero=zero0, has_static=has_static,
                                      count=count, kmax=kmax)
    # ok: the wanted modes (the margin is dropped below)
    scale = max(float(np.abs(ks0).max()) if ks0.size else 1.0, tau, 1e-300)
    # how far the refinement moved the ordering key |Re k| (the 0 Hz continuation,
    # first in the order whatever it does, aside)
    # (over the wanted ones: the last candidates, at the edge of the set, may be
    # matched to farther roots, taken by their neighbours)
    key = np.sort(np.abs(ks.real))
    last0 = float(np.abs(ks0.real).max()) if ks0.size else 0.0
    if count is not None:
        need = float(key[min(count, key.size) - 1]) if key.size else 0.0
    else:
        need = float(kmax)
    # sorted: the lowest w refined keys against the lowest w real-part keys (the
    # bottleneck matching of two sorted lists; the Ritz matching may permute modes)
    k_new = np.sort(np.abs(ks.real[~zero0]))
    k_old = np.sort(np.abs(ks0.real[~zero0]))
    w_ = int(np.count_nonzero(k_new <= need))
    moved = np.abs(k_new[:w_] - k_old[:w_])
    shift = float(moved.max()) if moved.size else 0.0
    d = np.abs(ks[:, None] - ks[None, :]) + np.diag(np.full(ks.size, np.inf))
    why = None
    if ks.size and not np.all(rel[ok] < PROXY_TOL):
        why = f"refinement did not converge (worst backward error {float(rel[ok].max()):.2e})"
    elif ks.size and float(d.min()) <= 1e-8 * scale:
        why = "two refined roots coincide"
    elif has_static and zero0.any() and not _near_first_order(pencil, beta, ks[zero0][0]):
        why = "the 0 Hz continuation is not near its first-order value"
    elif count is not None and key.size < count:
        why = f"only {key.size} real-part roots for {count} wanted"
    elif need + shift >= last0 and not (count is not None and key.size >= pencil.n):
        why = (f"margin too small: wanted roots up to |Re k| = {need:.4g}, shifts up to "
               f"{shift:.3g}, last real-part root {last0:.4g}")
    first["complex_refinement"] = dict(
        start="roots at Re β", tolerance=PROXY_TOL, candidates=int(ks0.size),
        **rinfo,
        max_backward_error=float(rel[ok].max()) if ok.any() else 0.0, max_shift=shift,
        kept=int(ok.sum()),
        accepted=why is None)
    if why is not None:
        first["proxy_rejected"] = why
        return None
    return ks[ok], X[:, ok], zero0[ok]


def solve_linear(pencil: Pencil, beta, *, count, kmax, n_estimate, tau, has_static,
                 backend="auto", dense_limit=None, max_nev=None,
                 tol=1e-12, spectrum=None) -> LinearResult:
    """Roots of (K + ikC - k²M) x = 0 with constant C = Σ β_s B_s.

    Parameters
    ----------
    pencil : Pencil
    beta : (n_terms,) complex admittances
    count : int or None -- the lowest count kept roots (modes)
    kmax : float or None -- every kept root with |Re k| <= kmax
    n_estimate : int -- estimated number of wanted modes (sizes the windows)
    tau : float -- height of the shifts above the real axis (1/m)
    has_static : bool -- no pressure-release DOFs (k = 0 is a root)
    dense_limit, max_nev : default DENSE_LIMIT, MAX_WINDOW_NEV (read at call time)
    spectrum : (k_guess, n_below) or None -- the expected |Re k| of the highest wanted
        root and a callable estimating the number of roots below a wavenumber
        (Weyl's law); with them, a complex C and MUMPS, the first window is
        centred in the band (:func:`_centred_start`)

    Returns
    -------
    LinearResult with ks (m,) complex and X (n, m) (columns not normalised),
    ordered by |Re k|; raises ConvergenceError(partial=(ks, X)) when a window
    fails.
    """
    dense_limit = DENSE_LIMIT if dense_limit is None else dense_limit
    max_nev = MAX_WINDOW_NEV if max_nev is None else max_nev
    C = pencil.C(beta)
    n = pencil.n
    res = LinearResult(np.zeros(0, complex), np.zeros((n, 0), complex), np.zeros(0, bool),
                       tau=tau)
    if n <= dense_limit:
        ks, X = _dense(pencil, C)
        scale = max(float(np.abs(ks).max()) if ks.size else 1.0, 1e-300)
        keep, zero = classify(ks, has_static, scale)
        ks, X, zero = ks[keep], X[:, keep], zero[keep]
        res.method = "dense companion (LAPACK eig)"
        res.windows.append(dict(sigma_re=0.0, sigma_im=0.0, nev=int(2 * n), accepted=int(ks.size),
                                solver="dense"))
        res.first_solver = _dense_solver(pencil, C, tau)
    else:
        res.method = f"companion shift-invert ({_engine_name()})"
        out = None
        if np.any(C.data.imag) and COMPLEX_PATH == "proxy":
            out = _proxy_windows(pencil, beta, count, kmax, n_estimate, tau, has_static,
                                 backend, max_nev, tol, res)
            if out is not None:
                res.method = (f"companion shift-invert ({_engine_name()}) at Re β + "
                              "nonlinear-Arnoldi refinement to β")
        if out is None:
            tried = res.windows
            res.windows = []
            out = _windows(pencil, C, count, kmax, n_estimate, tau, has_static, backend,
                           max_nev, tol, res, spectrum=spectrum)
            if tried:
                res.windows[0]["proxy_attempt"] = tried
        ks, X, zero = out
    key = np.abs(ks.real)
    o = np.argsort(key, kind="stable")
    ks, X, zero = ks[o], X[:, o], zero[o]
    if kmax is not None:
        sel = np.abs(ks.real) <= kmax
        ks, X, zero = ks[sel], X[:, sel], zero[sel]
    if count is not None:
        ks, X, zero = ks[:count], X[:, :count], zero[:count]
    res.ks, res.X, res.zero_mode = ks, X, zero
    return res


def _dense_solver(pencil, C, tau):
    """Dense LU solver of Q(iτ) and of its real part (small problems)."""
    Qd = (pencil.K + tau**2 * pencil.M + (-tau) * C).toarray()
    lu = sla.lu_factor(Qd)
    lur = sla.lu_factor(Qd.real)

    def solve(b):
        return sla.lu_solve(lu, np.asarray(b, dtype=complex))

    def precondition(b):
        b = np.asarray(b, dtype=complex)
        return sla.lu_solve(lur, b.real) + 1j * sla.lu_solve(lur, b.imag)

    return ShiftSolver(solve, precondition, "dense LU", "lapack")


def _centred_start(pencil, C, want, has_static, tau, spectrum, backend, cap):
    """(s, nev) of a first window centred in the band, or None to start at σ = iτ.

    With a complex factor (MUMPS) at hand and a complex C, the first shift
    can sit at σ = s + iτ with s = CENTRE_REACH k_guess / 2: the disk around σ
    that reaches the origin (and so holds the static root and the 0 Hz mode)
    spans Re k in [0, ~2s] without the mirror roots (Re k < 0) an
    imaginary-axis shift also finds -- 166 instead of 243 applications for
    30 modes at 101 k DOFs (measured).  nev is Weyl's count below 2s
    (``spectrum = (k_guess, n_below)``) with a margin; a window whose disk
    misses the origin is solved again with more roots.
    """
    if spectrum is None or not np.any(C.data.imag) or not use_mumps(backend):
        return None
    k_guess, n_below = spectrum
    if not (k_guess and k_guess > 0):
        return None
    s = 0.5 * CENTRE_REACH * k_guess
    r0 = math.hypot(s, tau)
    if KRYLOV_ENGINE == "arpack":  # a retry starts again: a wide margin
        nev = int(math.ceil(1.1 * n_below(s + r0))) + 4 + (2 if has_static else 0)
        nev = max(nev, want + 6)
    else:  # the engine continues when more roots are needed: a small margin
        nev = int(math.ceil(n_below(s + r0))) + 2 + (2 if has_static else 0)
        nev = max(nev, want + 2 + (2 if has_static else 0))
    if nev > cap:
        return None
    return s, nev


def _engine_name() -> str:
    return "ARPACK" if KRYLOV_ENGINE == "arpack" else "block TOAR Krylov-Schur"


def _more_roots(nev: int, engine) -> int:
    """nev for a retry of the first window: a continued engine needs only a few more."""
    if engine is not None:
        return nev + max(4, math.ceil(0.1 * nev))
    return math.ceil(1.4 * nev)  # ARPACK starts again: a wide step


def _block_size(solver: ShiftSolver, n2: int, nev: int) -> int:
    """Vectors per application of the TOAR engine for this solver (KRYLOV_BLOCK)."""
    if "GMRES" in solver.method:
        return 1  # GMRES solves column by column
    b = int(KRYLOV_BLOCK.get(solver.backend, 1))
    while b > 1 and nev > n2 - 2 * b - 2:  # tiny problems: room for the blocks
        b //= 2
    return max(b, 1)


def _windows(pencil, C, count, kmax, n_estimate, tau, has_static, backend, max_nev, tol, res,
             spectrum=None):
    n = pencil.n
    n2 = 2 * n
    want = count if count is not None else n_estimate
    cap = int(min(max_nev, n2 - 2))
    nev = int(min(2 * want + 6 + (2 if has_static else 0), cap))
    s = 0.0
    start = _centred_start(pencil, C, want, has_static, tau, spectrum, backend, cap)
    if start is not None:
        s, nev = start
    nev_first = nev
    first = True
    lower = -math.inf
    acc_k, acc_X, acc_z = [], [], []
    total = 0
    scale = max(tau, 1e-300)
    real_c = not np.any(C.data.imag)
    solver = None
    engine = None  # the Krylov engine on the current factor (continued when it is reused)
    for _attempt in range(200):
        sigma = complex(s, tau)
        if first and solver is not None:
            pass  # the first window again, with more roots: same factor, same engine
        else:
            engine = None
            if first and s > 0.0:
                solver = mumps_shift_solver(pencil, C, sigma)
                res.first_solver = solver
            elif first:
                if not real_c and use_mumps(backend):
                    solver = mumps_shift_solver(pencil, C, sigma)
                else:
                    solver = imaginary_shift_solver(pencil, C, tau, backend)
                res.first_solver = solver
            elif use_mumps(backend):
                solver = mumps_shift_solver(pencil, C, sigma)
            else:
                solver = general_shift_solver(pencil, C, sigma)
        real_form = first and s == 0.0 and real_c  # real β: κ = -ik, real arithmetic
        if real_form:
            to_k = (lambda th: 1j * (tau + 1.0 / th))
        else:
            to_k = (lambda th, sg=sigma: sg + 1.0 / th)
        try:
            if KRYLOV_ENGINE == "arpack":
                if real_form:
                    apply, napp = real_companion_operator(pencil, C, tau, solver.real_solve)
                    dtype, used = float, "ARPACK (real, κ = -ik)"
                else:
                    apply, napp = companion_operator(pencil, C, sigma, solver)
                    dtype, used = complex, "ARPACK"
                ks, Z = _arnoldi(apply, n2, nev, tol, to_k, dtype)
                X = Z[:n]
                applied = dict(applications=int(napp[0]))
            else:
                if engine is None:
                    from ._toar import CompanionKrylovSchur

                    if real_form:
                        apply_u = real_companion_block_solve(pencil, C, tau, solver.real_solve)
                        shift, dtype = tau, float
                    else:
                        apply_u = companion_block_solve(pencil, C, sigma, solver)
                        shift, dtype = sigma, complex
                    engine = CompanionKrylovSchur(apply_u, n, shift, dtype=dtype,
                                                  block=_block_size(solver, n2, nev))
                used = (f"block TOAR Krylov-Schur (b = {engine.b}"
                        + (", real, κ = -ik)" if real_form else ")"))
                ks, X = _toar(engine, nev, tol, to_k)
                applied = dict(applications=int(engine.applications), blocks=int(engine.blocks),
                               restarts=int(engine.restarts), basis_rank=int(engine.max_rank))
        except _WindowFailed as exc:
            part_k = np.concatenate(acc_k) if acc_k else np.zeros(0, complex)
            part_X = np.hstack(acc_X) if acc_X else np.zeros((n, 0), complex)
            raise ConvergenceError(
                f"the damped eigensolver did not converge in the window around σ = "
                f"{sigma:.6g} 1/m ({exc.ks.size} of {nev} roots converged); ask for fewer "
                "modes or refine the mesh.",
                partial=(part_k, part_X),
            ) from None
        scale = max(scale, float(np.abs(ks).max()))
        r = float(np.abs(ks - sigma).max())
        rho = math.sqrt(max(r * r - tau * tau, 0.0))
        win = dict(sigma_re=float(s), sigma_im=float(tau), nev=int(nev), radius=r,
                   solver=solver.method, backend=solver.backend, engine=used, **applied)
        if solver.gmres_iterations:
            win["gmres_worst_residual"] = float(solver.gmres_worst)
            win["gmres_iterations"] = int(solver.gmres_iterations)
        if first and s > 0.0 and r <= abs(sigma) * (1.0 + 1e-9):
            # the centred disk misses the origin: more roots, same factor
            win.update(accepted=0, note="disk misses the origin, retried with more roots")
            res.windows.append(win)
            if nev >= cap:
                raise SolverError(
                    f"the damped eigensolver's first window around σ = {sigma:.6g} 1/m did "
                    f"not reach the origin with {nev} roots; ask for fewer modes.")
            nev = int(min(_more_roots(nev, engine), cap))
            continue
        if not first and s - rho > lower + CLUSTER_RTOL * scale:
            win.update(accepted=0, note="gap, retried")
            res.windows.append(win)
            s = lower + 0.5 * (s - lower) if math.isfinite(lower) else 0.5 * s
            continue
        if first:
            keep, zero = classify(ks, has_static, scale)
        else:
            keep = ks.real >= 0.0
            zero = np.zeros(ks.size, dtype=bool)
        key = np.abs(ks.real)
        cand = np.flatnonzero(keep & (key >= lower))
        cut, inside = _cut(key[cand], s + rho, scale)
        take = cand[inside]
        short = ((count is not None and total + take.size < count)
                 or (count is None and kmax is not None and cut <= kmax))
        if (first and s > 0.0 and short and engine is not None and nev < cap
                and nev < 1.5 * nev_first):
            # the centred window holds too few roots below its cut: the engine
            # continues on the same factor (only the extra Krylov steps are paid)
            win.update(accepted=0, note="too few roots below the cut, continued with more")
            res.windows.append(win)
            deficit = (count - total - take.size) if count is not None else 0
            nev = int(min(max(_more_roots(nev, engine), nev + deficit + 2), cap))
            continue
        acc_k.append(ks[take])
        acc_X.append(X[:, take])
        acc_z.append(zero[take])
        total += int(take.size)
        win["accepted"] = int(take.size)
        res.windows.append(win)
        if (count is not None and total >= count) or (kmax is not None and cut > kmax):
            break
        if nev >= n2 - 2:
            break
        if not math.isfinite(cut) or take.size == 0:
            if nev >= cap:
                raise SolverError(
                    f"the damped eigensolver's window around σ = {sigma:.6g} 1/m found no "
                    f"complete set of modes with {nev} roots; the walls may be too absorbing "
                    f"for this solver (τ = {tau:.3g} 1/m)."
                )
            nev = int(min(2 * nev, cap))
            continue
        first = False
        lo_edge = max(lower, s - rho, 0.0)
        span = max(cut - lo_edge, 1e-12 * scale)
        density = take.size / span  # modes per unit of Re k
        lower = cut
        need = (count - total) if count is not None else max(n_estimate - total, 0)
        nev = int(min(max(int(1.25 * need) + 8, 16, int(3.0 * density * tau) + 8), cap))
        half = max(0.5 * nev / density, 1.2 * tau)
        rho_next = math.sqrt(half * half - tau * tau)
        s = cut + 0.6 * rho_next
    else:
        raise SolverError("the damped eigensolver's windows did not cover the requested range.")
    ks = np.concatenate(acc_k)
    X = np.hstack(acc_X)
    zero = np.concatenate(acc_z)
    return ks, X, zero


# ---------------------------------------------------------------------------
# nonlinear refinement (frequency-dependent walls)
# ---------------------------------------------------------------------------
class _Blocks:
    """A real (n, p) matrix kept as a list of column blocks, appended without copying.

    The refinement's basis grows by a block per outer step; a contiguous array
    would be copied (or over-allocated) as it grows, which cost as much memory
    as the basis itself at its peak.  Products run block by block.
    """

    def __init__(self, *blocks):
        self.blocks = [b for b in blocks if b.shape[1]]

    @property
    def p(self) -> int:
        return sum(b.shape[1] for b in self.blocks)

    def append(self, W):
        if W.shape[1]:
            self.blocks.append(np.asfortranarray(W))

    def dot(self, Cf):
        """V @ Cf for Cf (p, q), real or complex (complex via its real view)."""
        cplx = np.iscomplexobj(Cf)
        out = None
        j = 0
        for b in self.blocks:
            c = Cf[j:j + b.shape[1]]
            part = _real_times_complex(b, c) if cplx else b @ c
            out = part if out is None else out + part
            j += b.shape[1]
        return out

    def tdot(self, W):
        """V.T @ W for W (n, q), real or complex: (p, q)."""
        cplx = np.iscomplexobj(W)
        return np.vstack([_real_times_complex(b.T, W) if cplx else b.T @ W
                          for b in self.blocks])

    def rows(self, idx):
        """V[idx] (len(idx), p)."""
        return np.hstack([b[idx] for b in self.blocks])


def _m_orth_extend(V, MV, W, M, drop=1e-10):
    """The M-orthonormalised part of the real columns W against the M-orthonormal V.

    V, MV : _Blocks (n, p) (MV = M V, kept with the basis so that projections
    need no sparse product) or None; W (n, q).  Returns (Wn, MWn) (n, q'),
    q' <= q: M-orthonormal, M-orthogonal to V (CGS twice, then the Gram
    matrix's eigenvectors drop dependent directions, and a Cholesky step).
    """
    has_v = V is not None and V.p > 0
    for _ in range(2):
        if has_v:
            W = W - V.dot(MV.tdot(W))
    MW = M @ W
    G = W.T @ MW
    G = 0.5 * (G + G.T)
    w, U = np.linalg.eigh(G)
    if w.size == 0 or w.max() <= 0:
        return W[:, :0], MW[:, :0]
    keep = w > drop * max(w.max(), 1e-300)
    if has_v:
        # relative to the basis: a new direction must not be mostly round-off
        ref = np.linalg.norm(W, axis=0).max() ** 2
        keep &= w > 1e-20 * max(ref, 1e-300)
    T = U[:, keep] / np.sqrt(w[keep])
    Wn, MWn = W @ T, MW @ T
    # scaling weak directions up also scales up what is left of V in them: one
    # more pass when that could matter (weakest kept below 1e-6 of the strongest)
    if has_v and w[keep].min() < 1e-6 * w.max():
        Wn = Wn - V.dot(MV.tdot(Wn))
        MWn = M @ Wn
    G = Wn.T @ MWn
    L = np.linalg.cholesky(0.5 * (G + G.T))
    Li = sla.solve_triangular(L, np.eye(L.shape[0]), lower=True)  # small: one gemm each below
    return Wn @ Li.T, MWn @ Li.T


def _small_qep(A, C):
    """All roots of (A + ikC - k²I) y = 0 (dense g x g): (2g,) roots, (g, 2g) vectors."""
    g = A.shape[0]
    L = np.block([[np.zeros((g, g)), np.eye(g)], [A, 1j * C]])
    w, Z = np.linalg.eig(L)
    return w, Z[:g]


def _rayleigh_root(a, c, m, k_prev):
    """Root nearest k_prev of a + ik c - k² m = 0 (the bilinear Rayleigh functional)."""
    if m == 0:
        return k_prev
    disc = np.sqrt(complex(4.0 * a * m - c * c))
    r1 = (1j * c + disc) / (2.0 * m)
    r2 = (1j * c - disc) / (2.0 * m)
    return r1 if abs(r1 - k_prev) <= abs(r2 - k_prev) else r2


def _solve_shifted(Qk, rhs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return sla.solve(Qk, rhs, check_finite=False)
        except (np.linalg.LinAlgError, ValueError):
            return np.linalg.lstsq(Qk, rhs, rcond=None)[0]


def _projected(KV, BV, pencil, ks, Y, todo, tol=1e-13, max_it=40):
    """Solve the projected nonlinear problem for the modes ``todo`` (in place).

    KV : (p, p), BV : list of (p, p) (one per impedance surface), M-orthonormal
    basis so the projected mass is I.  ks (m,), Y (p, m) current approximations.
    Returns the inner iteration counts (m,).
    """
    p = KV.shape[0]
    I = np.eye(p)
    its = np.zeros(ks.size, dtype=int)
    nK = np.abs(KV).sum(axis=1).max()
    nB = [np.abs(b).sum(axis=1).max() for b in BV]

    def Cof(f):
        beta = pencil.betas(np.array([f]))[:, 0]
        return sum((b * Bm for b, Bm in zip(beta, BV)), np.zeros((p, p), complex)), beta

    # groups of close modes (relative 2 %), separated first by block steps
    idx = np.asarray(todo)[np.argsort(np.abs(ks[todo].real), kind="stable")]
    groups = []
    cur = [idx[0]] if idx.size else []
    for a, b in zip(idx[:-1], idx[1:]):
        if abs(ks[b] - ks[a]) <= 0.02 * max(abs(ks[b]), abs(ks[a]), 1e-300):
            cur.append(b)
        else:
            groups.append(cur)
            cur = [b]
    if cur:
        groups.append(cur)
    for grp in groups:
        if len(grp) > 1:
            f = float(np.mean(pencil.frequency(ks[grp])))
            C, _ = Cof(f)
            for _ in range(8):
                W = np.column_stack([
                    _solve_shifted(KV + 1j * ks[i] * C - ks[i] ** 2 * I,
                                   (1j * C - 2 * ks[i] * I) @ Y[:, i]) for i in grp])
                U, _ = np.linalg.qr(W)
                w, Z = _small_qep(U.conj().T @ KV @ U, U.conj().T @ C @ U)
                used = np.zeros(w.size, dtype=bool)
                moved = 0.0
                for i in grp:
                    d = np.where(used, np.inf, np.abs(w - ks[i]))
                    j = int(np.argmin(d))
                    used[j] = True
                    moved = max(moved, abs(w[j] - ks[i]) / max(abs(w[j]), 1e-300))
                    ks[i] = w[j]
                    y = U @ Z[:, j]
                    Y[:, i] = y / np.linalg.norm(y)
                    its[i] += 1
                if moved < 1e-12:
                    break
        for i in grp:
            k = ks[i]
            y = Y[:, i] / np.linalg.norm(Y[:, i])
            f_prev = None
            for _ in range(max_it):
                f = float(pencil.frequency(k))
                C, beta = Cof(f)
                k = _rayleigh_root(y @ KV @ y, y @ C @ y, y @ y, k)
                Qk = KV + 1j * k * C - k * k * I
                nC = sum(abs(b) * nb for b, nb in zip(beta, nB))
                rr = np.abs(Qk @ y).max() / ((nK + abs(k) * nC + abs(k) ** 2) * np.abs(y).max())
                its[i] += 1
                f_ok = f_prev is not None and abs(f - f_prev) <= 1e-13 * max(f, 1e-300)
                if rr < tol and (f_ok or not pencil.frequency_dependent):
                    break
                f_prev = f
                y = _solve_shifted(Qk, (1j * C - 2 * k * I) @ y)
                y = y / np.linalg.norm(y)
            ks[i] = k
            Y[:, i] = y
    return its


def refine_nonlinear(pencil: Pencil, ks, X, precondition, *, tol=REFINE_TOL, max_outer=40,
                     count=None, fmax=None):
    """Refine eigenpairs of the frozen-β problem on T(k) = K + ik C(f(k)) - k² M.

    Parameters
    ----------
    pencil : Pencil (its walls give β_s(f))
    ks : (m,) complex, X : (n, m) complex -- starting eigenpairs
    precondition : callable, complex (n, j) -> (n, j), a real preconditioner
    tol : backward-error target
    count, fmax : the selection the caller makes afterwards (the lowest ``count``
        by frequency, or every mode with f <= fmax Hz; None: all).  Only the
        selected modes are driven to ``tol``; the candidates past it (a margin,
        refined because the wall moves modes across the band's edge) only to
        MARGIN_TOL, enough to order them -- and become selected, and strict,
        when they move into the band.

    Returns
    -------
    ks (m,), X (n, m), residuals (m,), info dict (outer iterations, basis size,
    per-mode inner iterations, per-mode outer iteration at convergence).
    """
    K, M = pencil.K, pencil.M
    m = ks.size
    ks = np.array(ks, dtype=complex)
    X = np.asarray(X, dtype=complex)
    W0, MW0 = _m_orth_extend(None, None, np.hstack([X.real, X.imag]), M)
    V, MV = _Blocks(W0), _Blocks(MW0)
    KV = W0.T @ (K @ W0)
    BV = [W0[rows].T @ (Bw @ W0[rows]) for rows, Bw in pencil.wall_blocks]
    Y = MV.tdot(X)
    conv = np.zeros(m, dtype=bool)
    inner = np.zeros(m, dtype=int)
    outer_at = np.full(m, -1)
    rel = np.full(m, np.inf)
    outer = 0

    def tolerances():
        """Per-mode targets: ``tol`` for the selection, MARGIN_TOL past it."""
        f = pencil.frequency(ks)
        rank = np.empty(m, dtype=int)
        rank[np.argsort(f, kind="stable")] = np.arange(m)
        sel = np.ones(m, dtype=bool)
        if count is not None:
            sel &= rank < count
        if fmax is not None:
            sel &= f <= fmax
        return np.where(sel, tol, max(tol, MARGIN_TOL))

    for outer in range(1, max_outer + 1):
        todo = np.flatnonzero(~conv)
        with threadpool_limits(1, user_api="blas"):  # small dense problems (p <= a few 100)
            inner += _projected(0.5 * (KV + KV.T), [0.5 * (b + b.T) for b in BV], pencil, ks,
                                Y, todo)
        Xt = V.dot(Y[:, todo])
        kt = ks[todo]
        betas = pencil.betas(pencil.frequency(kt))
        R = pencil.apply(kt, Xt, betas)
        r = pencil.backward_errors(kt, Xt, betas, R)
        rel[todo] = r
        # a mode held loosely that has moved into the selection is taken up again
        conv = rel < tolerances()
        ok = conv[todo]
        outer_at[todo[ok]] = outer
        if conv.all():
            break
        # expand by the preconditioned residuals of the modes not converged
        T = precondition(R[:, ~ok])
        del R, Xt
        Wn, MWn = _m_orth_extend(V, MV, np.hstack([T.real, T.imag]), M)
        del T
        added = Wn.shape[1]
        if added == 0:
            break
        KW = K @ Wn
        VtKW = V.tdot(KW)
        KV = np.block([[KV, VtKW], [VtKW.T, Wn.T @ KW]])
        del KW
        for s_, (rows, Bw) in enumerate(pencil.wall_blocks):  # on the wall's DOFs only
            Vr, Wr = V.rows(rows), Wn[rows]
            BW = Bw @ Wr
            BV[s_] = np.block([[BV[s_], Vr.T @ BW], [BW.T @ Vr, Wr.T @ BW]])
        V.append(Wn)
        MV.append(MWn)
        del Wn, MWn
        Y = np.vstack([Y, np.zeros((added, m), complex)])
    X = V.dot(Y)
    info = dict(outer_iterations=int(outer), basis_size=int(V.p),
                inner_iterations=inner.tolist(), converged_at_outer=outer_at.tolist())
    return ks, X, rel, info


# ---------------------------------------------------------------------------
# first-order perturbation of the rigid modes
# ---------------------------------------------------------------------------
def first_order(pencil: Pencil, lam, Phi):
    """First-order damped roots from rigid modes (module notes).

    Parameters
    ----------
    pencil : Pencil
    lam : (m,) ascending rigid eigenvalues k² (0 for the uniform mode)
    Phi : (n, m) real, M-orthonormal rigid shapes

    Returns
    -------
    ks : (m,) complex first-order roots, shapes (n, m) complex with
    shapesᵀ M shapes = I on the diagonal, zero_mode (m,) bool.
    β of a frequency-dependent wall is taken at the rigid frequency (a close
    group's mean).
    """
    m = lam.size
    kr = np.sqrt(np.clip(lam, 0.0, None))
    BPhi = [t.B @ Phi for t in pencil.terms]
    diag = np.array([np.einsum("ij,ij->j", Phi, bp) for bp in BPhi]).reshape(len(BPhi), m)
    betas = pencil.betas(pencil.frequency(kr))
    cdiag = (betas * diag).sum(axis=0) if len(BPhi) else np.zeros(m, complex)
    kscale = max(float(kr.max()) if m else 1.0, 1e-300)
    zero_mode = kr <= 1e-8 * kscale
    ks = np.empty(m, dtype=complex)
    shapes = Phi.astype(complex)
    # groups: rigid roots closer than 5 |c| (10 x the first-order shift) or degenerate
    groups = []
    cur = [0] if m else []
    for j in range(1, m):
        gap = kr[j] - kr[j - 1]
        near = gap <= 5.0 * max(abs(cdiag[j]), abs(cdiag[j - 1])) + 1e-8 * kscale
        if near and not zero_mode[j - 1] and not zero_mode[j]:
            cur.append(j)
        else:
            groups.append(cur)
            cur = [j]
    if cur:
        groups.append(cur)
    for g in groups:
        if len(g) == 1:
            j = g[0]
            ks[j] = 1j * cdiag[j] if zero_mode[j] else kr[j] + 0.5j * cdiag[j]
            continue
        f = float(np.mean(pencil.frequency(kr[g])))
        beta = pencil.betas(np.array([f]))[:, 0]
        PhiG = Phi[:, g]
        with threadpool_limits(1, user_api="blas"):  # (g, n) x (n, g): threads only cost
            CG = sum(b * (PhiG.T @ bp[:, g]) for b, bp in zip(beta, BPhi))
        w, Z = np.linalg.eig(np.diag(kr[g]).astype(complex) + 0.5j * CG)
        o = np.argsort(w.real)
        w, Z = w[o], Z[:, o]
        Z = Z / np.sqrt(np.einsum("ij,ij->j", Z, Z))
        ks[g] = w
        shapes[:, g] = PhiG @ Z
    return ks, shapes, zero_mode

