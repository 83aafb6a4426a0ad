"""The distributed eigensolver path: SLEPc Krylov–Schur with shift-and-invert under MPI.

For models whose one-machine factorisation is too slow or too large, the
lowest eigenpairs of K x = λ M x are computed by SLEPc (Krylov–Schur on the
shift-and-invert transform (K - σM)⁻¹M, σ below the lowest eigenvalue as on
the default path — never σ = 0, where an all-rigid room's K is singular),
the shifted matrix factorised by MUMPS across the MPI ranks.

How it runs.  The project's own interpreter assembles K and M (so the
matrices are exactly those of the default path), writes them as ``.npy``
CSR arrays into a work folder and starts

    mpirun -n RANKS PYTHON acoustic_fem/_mpi_worker.py WORKFOLDER

where PYTHON is an interpreter that has petsc4py, slepc4py and mpi4py —
on Debian ``/usr/bin/python3`` with ``python3-slepc4py-real`` (a different
interpreter from a pyenv or venv Python, which is why the exchange goes
through files).  Each rank memory-maps the arrays and keeps only its own rows;
rank r writes its rows of the eigenvectors into one ``.npy`` file.  Back in
this process the eigenpairs are checked (backward error), M-normalised and
sign-normalised exactly as on the default path, so the two compare mode by
mode.  On a cluster the work folder must be on a file system every node sees
(``MpiSolver(workdir=...)``).
"""

from __future__ import annotations

import enum
import functools
import glob
import json
import math
import numbers
import os
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from ._errors import ConvergenceError, InputError, MissingDependencyError, SolverError

__all__ = ["MpiSolver", "FactorKind", "petsc_available", "solve_mpi", "PETSC_INSTALL"]

#: how to install the optional distributed path (Debian / Ubuntu, as root)
PETSC_INSTALL = ("apt-get install -y python3-slepc4py-real python3-petsc4py-real "
                 "python3-mpi4py   (or, from a source checkout: bash .ci/install_petsc)")

_WORKER = Path(__file__).with_name("_mpi_worker.py")
#: Debian's interpreter, which its python3-petsc4py-real package serves
_SYSTEM_PYTHON = "/usr/bin/python3"
_PROBE = ("import numpy, mpi4py, petsc4py, slepc4py\n"
          "from petsc4py import PETSc\nfrom slepc4py import SLEPc\n"
          "print('.'.join(map(str, PETSc.Sys.getVersion())), "
          "'.'.join(map(str, SLEPc.Sys.getVersion())))")


class FactorKind(str, enum.Enum):
    """The MUMPS factorisation of K - σM on the distributed path."""

    CHOLESKY = "cholesky"  # symmetric LDLᵀ: about half the memory of LU
    LU = "lu"


@dataclass(frozen=True)
class MpiSolver:
    """Options of the distributed (PETSc/SLEPc, MPI) eigensolver.

    Pass an instance, or the string ``"petsc"`` for the defaults, as
    ``solve_modes(..., backend=...)``.

    Attributes
    ----------
    ranks : int
        MPI processes (default 2).  Each runs single-threaded BLAS unless
        OMP_NUM_THREADS / OPENBLAS_NUM_THREADS are set.
    python : str or None
        Interpreter with petsc4py, slepc4py and mpi4py.  None: the
        ACOUSTIC_FEM_MPI_PYTHON environment variable, else this interpreter
        when it has them, else Debian's /usr/bin/python3.
    launcher : tuple of str
        The MPI start command before the interpreter; ``{ranks}`` is
        replaced.  Default ``("mpirun", "-n", "{ranks}")``; on a Slurm
        cluster e.g. ``("srun", "-n", "{ranks}")``.
    factor : FactorKind or {"cholesky", "lu"}
    tol : float
        SLEPc's relative convergence tolerance (default 1e-12).
    workdir : str or None
        Folder for the exchange files (a temporary folder is made inside it
        and removed afterwards); None: the system's temporary folder.  On a
        cluster: a folder every node can read.
    timeout : float or None
        Seconds after which the MPI run is stopped (None: no limit).
    petsc_options : str
        Extra PETSc/SLEPc options (PETSC_OPTIONS), e.g. ``"-eps_view"``.
    """

    ranks: int = 2
    python: str | None = None
    launcher: tuple = ("mpirun", "-n", "{ranks}")
    factor: FactorKind = FactorKind.CHOLESKY
    tol: float = 1e-12
    workdir: str | None = None
    timeout: float | None = None
    petsc_options: str = ""

    def __post_init__(self) -> None:
        if (isinstance(self.ranks, bool) or not isinstance(self.ranks, numbers.Integral)
                or self.ranks < 1):
            raise InputError(f"MpiSolver(ranks={self.ranks!r}): give a whole number >= 1 of "
                             "MPI processes, e.g. ranks=2.")
        try:
            object.__setattr__(self, "factor", FactorKind(self.factor))
        except ValueError:
            raise InputError(f"MpiSolver(factor={self.factor!r}) is not known: use "
                             f"{[f.value for f in FactorKind]}.") from None
        if not (isinstance(self.tol, numbers.Real) and 0 < self.tol <= 1e-4):
            raise InputError(f"MpiSolver(tol={self.tol!r}): give a tolerance in (0, 1e-4], "
                             "e.g. 1e-12.")
        launcher = tuple(self.launcher)
        if not launcher or not all(isinstance(a, str) for a in launcher):
            raise InputError(f"MpiSolver(launcher={self.launcher!r}): give the MPI start "
                             "command as a tuple of strings, e.g. ('mpirun', '-n', '{ranks}').")
        object.__setattr__(self, "launcher", launcher)
        if self.timeout is not None and not (isinstance(self.timeout, numbers.Real)
                                             and self.timeout > 0):
            raise InputError(f"MpiSolver(timeout={self.timeout!r}): give seconds > 0 or None.")


def _petsc_env(ranks: int) -> dict:
    env = dict(os.environ)
    # Debian's petsc4py/slepc4py are found through PETSC_DIR/SLEPC_DIR
    for var, pattern in (("PETSC_DIR", "/usr/lib/petscdir/petsc*/*-real"),
                         ("SLEPC_DIR", "/usr/lib/slepcdir/slepc*/*-real")):
        if not env.get(var):
            found = sorted(glob.glob(pattern))
            if found:
                env[var] = found[-1]
    # one BLAS thread per rank unless the user says otherwise: ranks x threads
    # beyond the cores only slows the run down
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        env.setdefault(var, "1")
    # Open MPI: allow a root user (containers) and more ranks than physical
    # cores (it counts cores, not hardware threads); other MPIs ignore these
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        env.setdefault("OMPI_ALLOW_RUN_AS_ROOT", "1")
        env.setdefault("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1")
    env.setdefault("OMPI_MCA_rmaps_base_oversubscribe", "1")
    env.pop("PYTHONHOME", None)  # belongs to this interpreter, not the worker's
    return env


def _candidates(python: str | None) -> list[str]:
    if python:
        return [python]
    if os.environ.get("ACOUSTIC_FEM_MPI_PYTHON"):
        return [os.environ["ACOUSTIC_FEM_MPI_PYTHON"]]
    out = [sys.executable]
    if os.path.exists(_SYSTEM_PYTHON) and os.path.realpath(_SYSTEM_PYTHON) != os.path.realpath(
            sys.executable):
        out.append(_SYSTEM_PYTHON)
    return out


@functools.lru_cache(maxsize=8)
def _probe(python: str) -> tuple[bool, str]:
    try:
        r = subprocess.run([python, "-c", _PROBE], env=_petsc_env(1), capture_output=True,
                           text=True, timeout=120)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return False, str(exc)
    if r.returncode != 0:
        lines = [ln for ln in r.stderr.strip().splitlines() if ln.strip()]
        return False, lines[-1] if lines else f"exit code {r.returncode}"
    return True, r.stdout.strip()


def find_petsc_python(python: str | None = None) -> tuple[str, str]:
    """The interpreter that has petsc4py/slepc4py/mpi4py and their versions.

    Raises
    ------
    MissingDependencyError
        None of the candidate interpreters has them (the message names the
        install command).
    """
    reasons = []
    for cand in _candidates(python):
        ok, text = _probe(cand)
        if ok:
            return cand, text
        reasons.append(f"{cand}: {text}")
    raise MissingDependencyError(
        "the distributed eigensolver (backend='petsc') needs PETSc/SLEPc with petsc4py, "
        f"slepc4py and mpi4py, which were not found ({'; '.join(reasons)}). Install them with: "
        f"{PETSC_INSTALL}; or name an interpreter that has them with "
        "MpiSolver(python=...) or ACOUSTIC_FEM_MPI_PYTHON.",
        install=PETSC_INSTALL,
    )


def petsc_available(python: str | None = None) -> bool:
    """True when the distributed path can run here (PETSc/SLEPc interpreter and mpirun)."""
    try:
        find_petsc_python(python)
    except MissingDependencyError:
        return False
    return shutil.which(MpiSolver().launcher[0]) is not None


def _write_csr(folder: Path, name: str, A) -> None:
    A = sp.csr_matrix(A)
    A.sort_indices()
    np.save(folder / f"{name}_indptr.npy", A.indptr.astype(np.int64))
    np.save(folder / f"{name}_indices.npy", A.indices)
    np.save(folder / f"{name}_data.npy", A.data.astype(float))


def _stop(proc: subprocess.Popen) -> None:
    """Terminate the launcher's process group (the launcher and its ranks)."""
    import signal

    for sig, wait in ((signal.SIGTERM, 5.0), (signal.SIGKILL, 5.0)):
        try:
            os.killpg(proc.pid, sig)
        except (ProcessLookupError, PermissionError):
            return
        try:
            proc.wait(timeout=wait)
            return
        except subprocess.TimeoutExpired:
            continue


def _run(solver: MpiSolver, python: str, folder: Path) -> dict:
    cmd = [a.replace("{ranks}", str(solver.ranks)) for a in solver.launcher]
    if shutil.which(cmd[0]) is None:
        raise MissingDependencyError(
            f"the MPI launcher {cmd[0]!r} is not on PATH; install MPI ({PETSC_INSTALL}) or "
            "give MpiSolver(launcher=...).", install=PETSC_INSTALL)
    env = _petsc_env(solver.ranks)
    if solver.petsc_options:
        env["PETSC_OPTIONS"] = (env.get("PETSC_OPTIONS", "") + " " + solver.petsc_options).strip()
    cmd += [python, str(_WORKER), str(folder)]
    # a session of its own: on a timeout or an interrupt the launcher and every
    # rank it started are stopped together, none is left running
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            stdin=subprocess.DEVNULL, text=True, start_new_session=True)
    try:
        out, err = proc.communicate(timeout=solver.timeout)
    except subprocess.TimeoutExpired:
        _stop(proc)
        raise SolverError(f"the MPI eigensolver did not finish within {solver.timeout:g} s "
                          "(MpiSolver(timeout=...)); it was stopped.") from None
    except BaseException:
        _stop(proc)
        raise
    if proc.returncode != 0 or not (folder / "done.json").exists():
        tail = "\n".join((err or out).strip().splitlines()[-12:])
        raise SolverError(f"the MPI eigensolver failed (exit code {proc.returncode}) running "
                          f"{' '.join(cmd)}:\n{tail}")
    return json.loads((folder / "done.json").read_text())


def solve_mpi(K, M, solver: MpiSolver, *, count, lam_max, lam_guess, n_estimate):
    """Lowest eigenpairs of K x = λ M x on the distributed path.

    Parameters
    ----------
    K, M : (n, n) sparse symmetric (K positive semi-definite, M positive definite)
    solver : MpiSolver
    count, lam_max, lam_guess, n_estimate : as for ``_eigen.solve_generalized``

    Returns
    -------
    lam : (m,) ascending eigenvalues
    X : (n, m) eigenvectors (not yet normalised)
    runs : list of dict
        One entry per MPI run (shift, nev, converged, timings, versions).
    """
    from ._eigen import RESIDUAL_TOL, _residuals

    python, _versions = find_petsc_python(solver.python)
    n = K.shape[0]
    sigma = -0.1 * lam_guess  # below the lowest eigenvalue (K >= 0), as on the default path
    want = count if count is not None else n_estimate
    nev = int(min(want + max(4, want // 10), n - 1))
    runs = []
    if solver.workdir is not None:
        Path(solver.workdir).mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="acoustic_fem_mpi_", dir=solver.workdir) as tmp:
        folder = Path(tmp)
        _write_csr(folder, "K", K)
        _write_csr(folder, "M", M)
        for _attempt in range(8):
            for f in ("done.json", "lam.npy", "X.npy"):
                (folder / f).unlink(missing_ok=True)
            job = dict(n=int(n), nev=nev, sigma=float(sigma), tol=float(solver.tol),
                       max_it=10000, factor=solver.factor.value)
            (folder / "job.json").write_text(json.dumps(job))
            t0 = time.perf_counter()
            done = _run(solver, python, folder)
            # SLEPc guarantees the nev wanted pairs; extra converged ones
            # need not be contiguous, so only the nev nearest σ are kept
            lam = np.load(folder / "lam.npy")[:nev]
            X = np.load(folder / "X.npy")[:, :nev]
            runs.append(dict(sigma=float(sigma), nev=nev, accepted=int(lam.size),
                             backend=f"{done['factor_solver']} {done['pc_type']}",
                             engine=f"SLEPc {done['eps_type']} ({done['st_type']})",
                             ranks=done["ranks"], iterations=done["iterations"],
                             mpi_seconds=time.perf_counter() - t0,
                             solve_seconds=done["solve_seconds"],
                             rank_peak_rss_mb=done.get("rank_peak_rss_mb"), petsc=done["petsc"],
                             slepc=done["slepc"]))
            if lam.size < min(nev, want):
                raise ConvergenceError(
                    f"SLEPc converged {lam.size} of {nev} eigenpairs around σ = {sigma:.6g}; "
                    "ask for fewer modes or loosen MpiSolver(tol=...).")
            # the eigenpairs nearest σ < λ_min are the lowest ones: with fmax,
            # every λ <= lam_max is in when one beyond it was found
            if lam_max is None or lam[-1] > lam_max * (1 + 1e-12) or nev >= n - 1:
                break
            nev = int(min(math.ceil(1.5 * nev) + 8, n - 1))
        else:
            raise SolverError("the MPI eigensolver did not reach fmax after 8 enlargements.")
    res = _residuals(K, M, lam, X)
    if np.any(res >= RESIDUAL_TOL):
        raise ConvergenceError(
            f"{int(np.count_nonzero(res >= RESIDUAL_TOL))} eigenpairs from SLEPc have a "
            f"backward error above {RESIDUAL_TOL:g} (largest {res.max():.3g}); tighten "
            "MpiSolver(tol=...).")
    if lam_max is not None:
        keep = lam <= lam_max
        lam, X = lam[keep], X[:, keep]
    if count is not None:
        lam, X = lam[:count], X[:, :count]
    return lam, X, runs
