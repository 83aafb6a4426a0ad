"""acoustic_fem: acoustic eigenmodes and sound fields of enclosures by finite elements.

The public surface is re-exported here; modules whose names start with an
underscore are private.
"""

from ._errors import (
    AcousticFemError,
    ConvergenceError,
    InputError,
    MeshError,
    MeshReadError,
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
from .modes import Modes, ResolutionWarning, solve_modes
from .walls import PressureRelease, Rigid, Wall
from . import analytic, geometry

__version__ = "0.1.0"

__all__ = [
    "AcousticFemError", "ConvergenceError", "InputError", "MeshError", "MeshReadError",
    "SolverError", "UnknownSurfaceError", "OutputExistsError", "MeshWarning",
    "Air", "Assembly", "assemble", "boundary_mass", "DofMap", "CellType", "Mesh",
    "read_mesh", "write_mesh", "from_meshio", "Modes", "solve_modes", "ResolutionWarning",
    "Rigid", "PressureRelease", "Wall", "Impedance", "Incidence", "PorousModel",
    "absorption_coefficient", "impedance_from_absorption", "write_vtk", "write_modes_csv", "analytic", "geometry",
]
