"""acoustic_fem: acoustic eigenmodes and sound fields of enclosures by finite elements.

The public surface is re-exported here; modules whose names start with an
underscore are private.
"""

from ._errors import (
    AcousticFemError,
    BudgetExceededError,
    ConvergenceError,
    InputError,
    MeshError,
    MeshReadError,
    ModelTooLargeError,
    SolverError,
    UnknownSurfaceError,
)
from ._atomic import OutputExistsError
from .air import Air
from .assembly import Assembly, assemble, boundary_mass
from .dofs import DofMap
from .elements import CellType
from .export import write_modes_csv, write_vtk
from .impedance import (
    Impedance,
    Incidence,
    PorousModel,
    absorption_coefficient,
    impedance_from_absorption,
)
from .mesh import Mesh, MeshWarning
from .mesh_io import from_meshio, read_mesh, write_mesh
from .modes import DampingMethod, EstimateWarning, Modes, ResolutionWarning, solve_modes
from .walls import PressureRelease, Rigid, Wall
from .study import BoxModel, Combine, SweepResult, plot_tracks, sweep
from .tracking import Tracks, mac_matrix, track_modes
from . import analytic, geometry
from ._cost import CostEstimate, available_memory, check_memory, estimate_cost
from .cad import FacesInBox, FacesOnPlane, cad_faces, import_cad, import_stl, stl_patches
from .mesh_report import MeshReport, cell_angles, cell_quality, mesh_report
from . import cad

__version__ = "0.1.0"

__all__ = [
    "AcousticFemError", "ConvergenceError", "InputError", "MeshError", "MeshReadError",
    "SolverError", "UnknownSurfaceError", "OutputExistsError", "MeshWarning",
    "Air", "Assembly", "assemble", "boundary_mass", "DofMap", "CellType", "Mesh",
    "read_mesh", "write_mesh", "from_meshio", "Modes", "solve_modes", "DampingMethod",
    "ResolutionWarning", "EstimateWarning", "BudgetExceededError",
    "Rigid", "PressureRelease", "Wall", "Impedance", "Incidence", "PorousModel",
    "absorption_coefficient", "impedance_from_absorption", "write_vtk", "write_modes_csv", "analytic", "geometry",
    "ModelTooLargeError", "CostEstimate", "estimate_cost", "check_memory", "available_memory",
    "import_cad", "import_stl", "cad_faces", "stl_patches", "FacesInBox", "FacesOnPlane", "cad",
    "MeshReport", "mesh_report", "cell_quality", "cell_angles",
]

__all__ += [
    "BoxModel", "Combine", "SweepResult", "plot_tracks", "sweep", "Tracks", "mac_matrix",
    "track_modes",
]

# a-posteriori error estimates, accuracy target, refinement, verification report
from .estimate import AccurateModes, ModeErrors, estimate_errors, solve_to_tolerance
from .refine import refine_uniform
from . import verification

__all__ += [
    "AccurateModes", "ModeErrors", "estimate_errors", "solve_to_tolerance", "refine_uniform",
    "verification",
]

# forced harmonic response at listening seats
from .response import (Method, PointSource, PressureField, ReceiverPlane, Response,
                       SmoothingWindow, receiver_line, receiver_plane, solve_response)

__all__ += [
    "PointSource", "solve_response", "Response", "Method", "SmoothingWindow", "ReceiverPlane",
    "receiver_line", "receiver_plane", "PressureField",
]

# placement of sources (and seats) for even low-frequency coverage
from .placement import (Objective, PlacementResult, SeatResult, SourceLayout, layout_objective,
                        optimise_placement, optimise_seats)

__all__ += [
    "Objective", "PlacementResult", "SeatResult", "SourceLayout", "layout_objective",
    "optimise_placement", "optimise_seats",
]

# eigensolver paths for large models: PETSc/SLEPc under MPI, AMG-preconditioned LOBPCG
from ._errors import MissingDependencyError
from ._distributed_eigen import FactorKind, MpiSolver, petsc_available
from ._eigen import LargeModelBackend
from ._lean_eigen import AmgSolver

__all__ += [
    "MissingDependencyError", "MpiSolver", "FactorKind", "petsc_available", "AmgSolver",
    "LargeModelBackend",
]
