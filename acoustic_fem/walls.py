"""Wall conditions given to the named surfaces of an enclosure."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

from ._errors import InputError, UnknownSurfaceError
from .mesh import Mesh

__all__ = ["Wall", "Rigid", "PressureRelease", "resolve_walls"]


class Wall:
    """Base class of wall conditions."""

    #: True when the condition fixes the pressure (Dirichlet) on the surface.
    fixes_pressure: bool = False


@dataclass(frozen=True)
class Rigid(Wall):
    """Rigid wall: zero normal particle velocity, ∂p/∂n = 0.

    The natural condition of the Helmholtz weak form: it adds nothing to the
    matrices, and every surface not given another condition is rigid.
    """


@dataclass(frozen=True)
class PressureRelease(Wall):
    """Pressure-release surface: p = 0 (an idealised opening or free surface).

    Imposed exactly by removing the surface's DOFs from the system; mode
    shapes are zero there.
    """

    fixes_pressure = True


def resolve_walls(mesh: Mesh, walls: Mapping[str, Wall] | None) -> dict[str, Wall]:
    """Check a surface -> wall mapping against a mesh and complete it.

    Parameters
    ----------
    mesh : Mesh
    walls : mapping of surface name to a Wall, or None

    Returns
    -------
    dict
        One entry per boundary region of the mesh; surfaces not named are
        :class:`Rigid`.

    Raises
    ------
    UnknownSurfaceError
        A name is not a surface of the mesh (the message lists those that are).
    InputError
        A value is not a wall condition.
    """
    walls = {} if walls is None else dict(walls)
    if not isinstance(walls, dict):
        raise InputError(f"walls must map surface names to wall conditions, got {walls!r}.")
    names = mesh.surface_names
    for name, wall in walls.items():
        if name not in mesh.boundaries:
            raise UnknownSurfaceError(
                f"wall condition given for surface {name!r}, which the mesh does not have; "
                f"its surfaces are: {list(names) if names else '(none: the mesh has no named surfaces)'}."
            )
        if not isinstance(wall, Wall):
            raise InputError(
                f"wall condition for surface {name!r} is {wall!r}; use Rigid() or "
                "PressureRelease() (or another acoustic_fem wall condition)."
            )
    return {name: walls.get(name, Rigid()) for name in names}
