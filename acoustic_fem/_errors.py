"""Exception classes of acoustic_fem.

Every error the library raises on purpose is an instance of
:class:`AcousticFemError`, so callers can catch the library's errors apart
from programming errors.  The subclasses also derive from the matching
built-in exception (``ValueError``, ``FileNotFoundError``, ...) so that code
written against the built-ins keeps working.
"""

from __future__ import annotations

__all__ = [
    "AcousticFemError",
    "InputError",
    "MeshError",
    "MeshReadError",
    "UnknownSurfaceError",
    "ModelTooLargeError",
    "SolverError",
    "ConvergenceError",
    "BudgetExceededError",
]


class AcousticFemError(Exception):
    """Base class of every error raised on purpose by acoustic_fem."""


class InputError(AcousticFemError, ValueError):
    """A value given by the caller is not acceptable; the message names it."""


class MeshError(AcousticFemError, ValueError):
    """A mesh is unusable (degenerate cells, orphan nodes, bad tags, ...)."""


class MeshReadError(MeshError):
    """A mesh file could not be read (missing, unreadable, wrong format)."""


class UnknownSurfaceError(InputError, KeyError):
    """A wall condition names a surface the mesh does not have."""

    def __str__(self) -> str:  # KeyError would quote the message
        return str(self.args[0]) if self.args else ""


class ModelTooLargeError(InputError):
    """A model's estimated memory exceeds the budget; refused before meshing.

    Attributes
    ----------
    estimate : CostEstimate or None
        The estimate that was refused (predicted cells, DOFs, bytes).
    budget : int or None
        The memory budget in bytes it was compared with.
    """

    def __init__(self, message: str, estimate=None, budget=None):
        super().__init__(message)
        self.estimate = estimate
        self.budget = budget


class SolverError(AcousticFemError, RuntimeError):
    """A numerical solve failed."""


class ConvergenceError(SolverError):
    """The eigensolver did not converge for every requested mode.

    Attributes
    ----------
    partial : Modes or None
        The modes that did converge, so that work done is not lost.
    """

    def __init__(self, message: str, partial=None):
        super().__init__(message)
        self.partial = partial


class BudgetExceededError(ConvergenceError):
    """An accuracy-target solve stopped because its next step would exceed the budget.

    Raised by ``solve_modes(..., tol=...)`` and
    :func:`~acoustic_fem.solve_to_tolerance` *before* a step that is predicted
    to need more DOFs or seconds than the budget stated up front
    (``max_dofs``, ``max_seconds``) or more solves than ``max_steps``.

    Attributes
    ----------
    partial : Modes, AccurateModes or None
        What was solved so far (the last step, its error estimates attached;
        ``solve_modes`` gives a :class:`~acoustic_fem.Modes`,
        ``solve_to_tolerance`` an :class:`~acoustic_fem.AccurateModes`); None
        when the very first step was refused.
    steps : tuple of dict
        One entry per solve made (DOFs, largest estimated error, seconds, action).
    budget : mapping
        The budget stated before the first solve.
    """

    def __init__(self, message: str, partial=None, steps=(), budget=None):
        super().__init__(message, partial=partial)
        self.steps = tuple(steps)
        self.budget = budget


class MissingDependencyError(AcousticFemError, ImportError):
    """An optional part (PETSc/SLEPc and MPI, pyamg, ...) is needed but not installed.

    Attributes
    ----------
    install : str
        The command that installs the missing part.
    """

    def __init__(self, message: str, install: str = ""):
        super().__init__(message)
        self.install = install
