"""Sparse LDLᵀ of complex symmetric matrices through MUMPS (optional).

The damped-mode solver factorises Q(σ) = K + iσC - σ²M, complex symmetric
(Qᵀ = Q, not Hermitian) when a wall's admittance is complex.  SciPy offers
only SuperLU's LU for it, which on 3D P2 meshes is some 50x slower than a
Cholesky of the same pattern (18 s at 17 k DOFs, measured); CHOLMOD does
Hermitian matrices only.  MUMPS (open source, https://mumps-solver.org; P. R.
Amestoy et al., SIAM J. Matrix Anal. Appl. 23 (2001) 15-41) factorises
complex symmetric matrices as LDLᵀ with 1x1/2x2 pivots (SYM = 2).  This
module loads the small C layer ``_zsym_c.c`` (built by ``setup.py`` against
Debian's ``libmumps-seq-dev`` when present) with ctypes.

Measured on the 101,631-DOF P2 benchmark room (2 cores): factorisation 10.7 s
with SCOTCH ordering (CHOLMOD's real Cholesky of the same pattern: 4.3 s),
one solve 0.19 s, 8 right-hand sides 0.32 s -- multi-column solves are
4-5x cheaper per column, which the damped solver's block Krylov method uses.

``available()`` says whether the layer loaded; set the environment variable
``ACOUSTIC_FEM_NO_MUMPS=1`` to pretend it is absent (tests of the fallback).
"""

from __future__ import annotations

import ctypes
import glob
import importlib.machinery
import os
from pathlib import Path

import numpy as np
import scipy.sparse as sp

from ._errors import SolverError

__all__ = ["available", "ComplexSymmetricFactor", "unavailable_reason"]

#: MUMPS ICNTL(7) ordering used: 3 = SCOTCH (best fill of those Debian's build has,
#: measured: SCOTCH 45 M factor entries, PORD 57 M, AMF 73 M, QAMD 91 M)
ORDERING = 3
#: MUMPS ICNTL(14): percentage of extra working space (doubled once on failure)
RELAX = 30

_lib = None
_why = None


def _load():
    global _lib, _why
    if _lib is not None or _why is not None:
        return _lib
    if os.environ.get("ACOUSTIC_FEM_NO_MUMPS"):
        _why = "disabled by ACOUSTIC_FEM_NO_MUMPS"
        return None
    here = Path(__file__).resolve().parent
    cands = []
    for suf in importlib.machinery.EXTENSION_SUFFIXES:
        cands += glob.glob(str(here / f"_zsym_c{suf}"))
    cands += glob.glob(str(here / "_zsym_c*.so"))
    if not cands:
        _why = ("the MUMPS layer acoustic_fem/_zsym_c*.so is not built (install "
                "libmumps-seq-dev, e.g. `apt-get install libmumps-seq-dev`, then reinstall "
                "acoustic_fem: `pip install -e .`)")
        return None
    try:
        lib = ctypes.CDLL(cands[0])
    except OSError as exc:
        _why = f"the MUMPS layer {cands[0]} did not load ({exc})"
        return None
    lib.zsym_new.restype = ctypes.c_void_p
    lib.zsym_new.argtypes = [ctypes.c_int, ctypes.POINTER(ctypes.c_int)]
    lib.zsym_factor.restype = ctypes.c_int
    lib.zsym_factor.argtypes = [ctypes.c_void_p, ctypes.c_int, ctypes.c_int64, ctypes.c_void_p,
                                ctypes.c_void_p, ctypes.c_void_p, ctypes.c_int, ctypes.c_int,
                                ctypes.c_void_p]
    lib.zsym_solve.restype = ctypes.c_int
    lib.zsym_solve.argtypes = [ctypes.c_void_p, ctypes.c_int, ctypes.c_void_p]
    lib.zsym_info.restype = None
    lib.zsym_info.argtypes = [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_void_p]
    lib.zsym_free.restype = None
    lib.zsym_free.argtypes = [ctypes.c_void_p]
    _lib = lib
    return lib


def available() -> bool:
    """True when the MUMPS layer is built and loads."""
    return _load() is not None


def unavailable_reason() -> str | None:
    """Why :func:`available` is False (None when it is True)."""
    _load()
    return None if _lib is not None else _why


class ComplexSymmetricFactor:
    """LDLᵀ factor of a complex symmetric sparse matrix A (n x n), reused for solves.

    Parameters
    ----------
    A : (n, n) sparse, Aᵀ = A (only its upper triangle is read)

    Attributes
    ----------
    n : int
    factor_entries : int -- entries of the factor (MUMPS INFOG(29))
    factor_megabytes : int -- memory of the factorisation (INFOG(22), MB)
    """

    def __init__(self, A):
        lib = _load()
        if lib is None:
            raise SolverError(f"complex symmetric factorisation unavailable: {_why}.")
        A = sp.csr_matrix(A)
        n = A.shape[0]
        if A.shape != (n, n):
            raise SolverError(f"a square matrix is needed, got shape {A.shape}.")
        T = sp.triu(A).tocoo()
        self.n = n
        # MUMPS keeps pointers to these until the handle is freed
        self._irn = np.ascontiguousarray(T.row + 1, dtype=np.int32)
        self._jcn = np.ascontiguousarray(T.col + 1, dtype=np.int32)
        self._a = np.ascontiguousarray(T.data, dtype=np.complex128)
        err = ctypes.c_int(0)
        self._h = lib.zsym_new(2, ctypes.byref(err))
        if not self._h:
            raise SolverError(f"MUMPS did not initialise (INFOG(1) = {err.value}).")
        self._lib = lib
        info = lib.zsym_factor(self._h, n, int(self._a.size), self._irn.ctypes.data,
                               self._jcn.ctypes.data, self._a.ctypes.data, ORDERING, RELAX,
                               None)
        infog, _ = self.info()
        if info < 0:
            self.free()
            if info == -10:
                raise SolverError("the shifted matrix is numerically singular (MUMPS "
                                  "INFOG(1) = -10); retry with a slightly different band.")
            raise SolverError(f"MUMPS factorisation failed (INFOG(1) = {info}, "
                              f"INFOG(2) = {infog[1]}).")
        self.factor_entries = int(infog[28])
        self.factor_megabytes = int(infog[21])

    def info(self):
        """(INFOG (80,) int32, RINFOG (40,) float) of the last MUMPS call."""
        infog = np.zeros(80, dtype=np.int32)
        rinfog = np.zeros(40)
        self._lib.zsym_info(self._h, infog.ctypes.data, rinfog.ctypes.data)
        return infog, rinfog

    def solve(self, b):
        """Solve A x = b for b of shape (n,) or (n, m); returns complex x of b's shape."""
        if self._h is None:
            raise SolverError("this factorisation was freed.")
        b = np.asarray(b)
        if b.shape[0] != self.n:
            raise SolverError(f"right-hand side has {b.shape[0]} rows, the matrix {self.n}.")
        x = np.array(b, dtype=np.complex128, order="F", copy=True)
        m = 1 if x.ndim == 1 else x.shape[1]
        if m == 0:
            return x
        info = self._lib.zsym_solve(self._h, m, x.ctypes.data)
        if info < 0:
            raise SolverError(f"MUMPS solve failed (INFOG(1) = {info}).")
        return x

    def free(self):
        """Release the factor's memory now (also done when the object is collected)."""
        if getattr(self, "_h", None):
            self._lib.zsym_free(self._h)
        self._h = None

    def __del__(self):
        try:
            self.free()
        except Exception:
            pass
