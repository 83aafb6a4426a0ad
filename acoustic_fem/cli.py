"""The ``acoustic-fem`` command line.

Errors of the library are printed as one line on stderr, with exit code 2
for bad input and 1 for other failures; no traceback.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from . import __version__
from ._errors import AcousticFemError, InputError, MeshError
from ._atomic import OutputExistsError

CAUTION = (
    "Caution: these are model predictions (finite-element estimates under idealised wall "
    "conditions). Verify by measurement before relying on them, and defer to local codes "
    "and licensed practice wherever hearing exposure, safety or structural noise control "
    "is concerned."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit 2
        self.exit(2, f"acoustic-fem: error: {message} (see --help)\n")


def _say(args, text):
    if not getattr(args, "quiet", False):
        print(text)


def _summary(modes, title: str) -> str:
    lines = [title, "", f"{len(modes)} modes, P{modes.order} elements, {modes.dofs.n_dofs} DOFs, "
             f"c = {modes.air.c:.2f} m/s", "", "  #   frequency (Hz)   elements/wavelength"]
    epw = modes.elements_per_wavelength()
    for i, f in enumerate(modes.frequencies):
        lines.append(f"{i:3d}   {f:14.3f}   {epw[i]:10.1f}")
    lines += ["", CAUTION, ""]
    return "\n".join(lines)


def _write_results(out: Path, modes, title: str, force: bool) -> None:
    from ._atomic import atomic_folder
    from .export import write_modes_csv, write_vtk

    with atomic_folder(out, overwrite=force) as tmp:
        write_modes_csv(tmp / "modes.csv", modes)
        write_vtk(tmp / "modes.vtu", modes)
        (tmp / "summary.txt").write_text(_summary(modes, title), encoding="utf-8")


def _cmd_demo(args) -> int:
    from ._demo import DEMO_FMAX, demo_room
    from .air import Air
    from .modes import solve_modes
    from .walls import PressureRelease

    out = Path(args.out)
    if out.exists() and not args.force:
        raise OutputExistsError(f"{out} exists; use --force to replace it.")
    t0 = time.perf_counter()
    fmax = DEMO_FMAX if args.fmax is None else args.fmax
    _say(args, f"demo: meshing the Alder Lane rehearsal room (P2, fmax {fmax:g} Hz) ...")
    mesh = demo_room(h=343.0 / fmax / 6.0)
    _say(args, f"demo: {mesh.n_cells} tetrahedra; solving modes up to {fmax:g} Hz ...")
    modes = solve_modes(mesh, {"doorway": PressureRelease()}, order=2, fmax=fmax, air=Air(20.0))
    _write_results(out, modes, "Demo: Room 2 of the Alder Lane rehearsal house (invented), "
                   "doorway open (pressure-release), other surfaces rigid", args.force)
    _say(args, f"demo: {len(modes)} modes, lowest {modes.frequencies[:4].round(2).tolist()} Hz; "
               f"wrote {out}/modes.csv, modes.vtu, summary.txt in {time.perf_counter() - t0:.1f} s")
    return 0


def _parse_walls(items):
    from .walls import PressureRelease, Rigid

    kinds = {"rigid": Rigid, "release": PressureRelease, "pressure-release": PressureRelease}
    walls = {}
    for item in items or []:
        name, sep, kind = item.partition("=")
        if not sep or kind not in kinds:
            raise InputError(
                f"--wall {item!r} must look like NAME=rigid or NAME=release (pressure-release)."
            )
        walls[name] = kinds[kind]()
    return walls


def _cmd_modes(args) -> int:
    from .air import Air
    from .mesh_io import read_mesh
    from .modes import solve_modes

    if args.count is None and args.fmax is None:
        raise InputError("give --count N or --fmax HZ.")
    out = Path(args.out)
    if out.exists() and not args.force:
        raise OutputExistsError(f"{out} exists; use --force to replace it.")
    mesh = read_mesh(args.mesh)
    modes = solve_modes(mesh, _parse_walls(args.wall), order=args.order, count=args.count,
                        fmax=args.fmax, air=Air(args.temperature))
    _write_results(out, modes, f"Modes of {args.mesh}", args.force)
    _say(args, f"{len(modes)} modes from {modes.frequencies[0]:.2f} to "
               f"{modes.frequencies[-1]:.2f} Hz; wrote {out}")
    return 0


def _cmd_info(args) -> int:
    from .mesh_io import read_mesh

    mesh = read_mesh(args.mesh)
    print(repr(mesh))
    unit = {1: "m", 2: "m²", 3: "m³"}[mesh.dim]
    bunit = {1: "", 2: "m", 3: "m²"}[mesh.dim]
    print(f"size: {mesh.measure:.6g} {unit}, longest edge {mesh.h_max:.4g} m")
    for name in mesh.volume_names:
        print(f"  volume  {name}: {mesh.region_measure(name):.6g} {unit}")
    for name in mesh.surface_names:
        print(f"  surface {name}: {mesh.region_measure(name):.6g} {bunit}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="acoustic-fem", description=(
        "Acoustic eigenmodes of enclosures by the finite element method. " + CAUTION))
    p.add_argument("--version", action="version", version=f"acoustic-fem {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    d = sub.add_parser("demo", help="mesh and solve the built-in demo room, write its results")
    d.add_argument("--out", required=True, help="results folder to create")
    d.add_argument("--fmax", type=float, default=None, help="highest frequency in Hz")
    d.add_argument("--force", action="store_true", help="replace an existing results folder")
    d.add_argument("--quiet", action="store_true", help="print nothing on success")
    d.set_defaults(func=_cmd_demo)

    m = sub.add_parser("modes", help="solve the modes of a mesh file (gmsh .msh or meshio format)")
    m.add_argument("mesh", help="mesh file with named surfaces")
    m.add_argument("--out", required=True, help="results folder to create")
    g = m.add_argument_group("how many modes (one or both)")
    g.add_argument("--count", type=int, help="number of lowest modes")
    g.add_argument("--fmax", type=float, help="every mode up to this frequency (Hz)")
    m.add_argument("--order", type=int, default=2, choices=(1, 2), help="element order")
    m.add_argument("--wall", action="append", metavar="NAME=KIND",
                   help="wall condition of a surface: rigid or release (repeatable)")
    m.add_argument("--temperature", type=float, default=20.0, help="air temperature in °C")
    m.add_argument("--force", action="store_true", help="replace an existing results folder")
    m.add_argument("--quiet", action="store_true", help="print nothing on success")
    m.set_defaults(func=_cmd_modes)

    i = sub.add_parser("info", help="print the regions, areas and volume of a mesh file")
    i.add_argument("mesh")
    i.set_defaults(func=_cmd_info)
    return p


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except (InputError, MeshError, OutputExistsError, FileNotFoundError) as exc:
        print(f"acoustic-fem: error: {exc}", file=sys.stderr)
        return 2
    except AcousticFemError as exc:
        print(f"acoustic-fem: failed: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("acoustic-fem: interrupted; no partial results were kept.", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: still one line, but say so
        print(f"acoustic-fem: internal error: {type(exc).__name__}: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
