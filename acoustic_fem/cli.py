"""The ``acoustic-fem`` command line.

Subcommands::

    run SCENARIO --out DIR      solve a scenario file, write its results folder
    demo --out DIR              write the invented demo scenario into DIR and run it
    check SCENARIO              validate a scenario and estimate DOFs, memory and time
    mesh SCENARIO --out FILE    mesh a scenario's geometry only (gmsh .msh)
    export RESULTS --format F --out FILE
                                convert a results folder's modes (vtu, xdmf, vtk-legacy, markdown)
    materials                   list the material library with its sources
    modes MESH --out DIR        modes of a mesh file without a scenario
    info MESH                   regions, areas and volume of a mesh file
    verify --out DIR [--quick]  run the published-reference checks, write CSV + HTML

Exit codes: 0 success, 2 bad input (the scenario, a file, an option, an
existing output), 1 failure (a solve that did not succeed, an internal
error, a verification check that failed), 130 interrupted (Ctrl-C; no
partial results are kept).  Errors are one line on stderr, no traceback.  Progress bars go to stderr when it is a
terminal (never with ``--quiet``); the library itself never prints, it
reports progress through callbacks.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from . import __version__
from ._atomic import OutputExistsError
from ._errors import AcousticFemError, InputError, MeshError

CAUTION = (
    "Caution: these are model predictions (finite-element estimates under idealised wall "
    "conditions). Verify by measurement before relying on them, and defer to local codes "
    "and licensed practice wherever hearing exposure, safety or structural noise control "
    "is concerned."
)

_EPILOG = ("exit codes: 0 success, 2 bad input, 1 failure, 130 interrupted. "
           "Errors are printed as one line on stderr.")

#: Stage names of the progress callbacks and how the bars label them.
STAGES = {"meshing": "meshing", "assembly": "assembly", "modes": "modes",
          "sweep": "frequency sweep", "writing": "writing VTK",
          "verify": "verification groups"}


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit 2
        self.exit(2, f"acoustic-fem: error: {message} (see --help)\n")


class Reporter:
    """Progress bars and messages of one command (stderr), silent with --quiet.

    Called as ``reporter(stage, done, total)`` by the library's progress
    callbacks: a bar per stage (tqdm), shown when ``stream`` is a terminal or
    ``force`` is true; with ``verbose`` each stage's start and duration is
    also printed as a line.
    """

    def __init__(self, *, quiet=False, verbose=False, stream=None, force=False):
        self.quiet, self.verbose = quiet, verbose
        self.stream = sys.stderr if stream is None else stream
        self.bars_on = not quiet and (force or self.stream.isatty())
        self._bars: dict = {}
        self._t0: dict = {}

    def __call__(self, stage: str, done: int, total: int) -> None:
        if self.quiet:
            return
        label = STAGES.get(stage, stage)
        if stage not in self._t0:
            self._t0[stage] = time.perf_counter()
            if self.verbose:
                self.line(f"{label} ...")
            if self.bars_on:
                from tqdm import tqdm

                import shutil

                cols = shutil.get_terminal_size((100, 24)).columns
                self._bars[stage] = tqdm(total=total, desc=f"{label:>15}", file=self.stream,
                                         leave=True, ncols=cols if cols >= 40 else 100,
                                         bar_format="{desc}: {percentage:3.0f}%|{bar}| "
                                                    "{n_fmt}/{total_fmt} [{elapsed}]")
        bar = self._bars.get(stage)
        if bar is not None:
            bar.total = total
            bar.n = done
            bar.refresh()
        if done >= total and stage in self._t0 and self._t0[stage] is not None:
            if bar is not None:
                bar.close()
                self._bars.pop(stage, None)
            if self.verbose:
                self.line(f"{label} done in {time.perf_counter() - self._t0[stage]:.2f} s")
            self._t0[stage] = None

    def line(self, text: str) -> None:
        if not self.quiet:
            print(f"acoustic-fem: {text}", file=self.stream, flush=True)

    def close(self) -> None:
        for bar in self._bars.values():
            bar.close()
        self._bars.clear()


def _say(args, text: str) -> None:
    if not getattr(args, "quiet", False):
        print(text, flush=True)


def _reporter(args) -> Reporter:
    return Reporter(quiet=args.quiet, verbose=args.verbose)


def _check_out_free(out: Path, force: bool) -> None:
    if out.exists() and not force:
        raise OutputExistsError(f"{out} exists; use --force to replace it.")


def _run_scenario(sc, out: Path, args) -> int:
    from .results import write_results
    from .scenario import solve_scenario

    rep = _reporter(args)
    try:
        sol = solve_scenario(sc, progress=rep)
        if args.verbose:
            rep.line(f"{len(sol.modes)} modes, {sol.modes.dofs.n_dofs} DOFs, "
                     f"{sol.mesh.n_cells} cells")
        write_results(sol, out, overwrite=args.force, progress=rep)
    finally:
        rep.close()
    m = sol.modes
    low = ", ".join(f"{f:.1f}" for f in m.frequencies[:5])
    _say(args, f"{sc.title}: {len(m)} modes up to {sc.sweep.max_hz:g} Hz (lowest {low} Hz)"
               + ("; response at " + str(len(sc.receivers)) + " receivers"
                  if sol.response is not None else ""))
    for note in sol.notes:
        _say(args, f"note: {note}")
    _say(args, f"wrote {out}/ (report: {out / 'report.html'})")
    return 0


def _cmd_run(args) -> int:
    from .scenario import load_scenario

    out = Path(args.out)
    _check_out_free(out, args.force)
    sc = load_scenario(args.scenario)
    return _run_scenario(sc, out, args)


def _cmd_demo(args) -> int:
    from ._demo import DEMO_FILENAME, DEMO_SCENARIO
    from .scenario import parse_scenario

    out = Path(args.out)
    _check_out_free(out, args.force)
    sc = parse_scenario(DEMO_SCENARIO, (out / DEMO_FILENAME).absolute())
    t0 = time.perf_counter()
    code = _run_scenario(sc, out, args)
    _say(args, f"demo: {out / DEMO_FILENAME} is the scenario; rerun it with "
               f"`acoustic-fem run {out / DEMO_FILENAME} --out OTHER` "
               f"({time.perf_counter() - t0:.1f} s)")
    return code


def _cmd_check(args) -> int:
    from .scenario import estimate_scenario_cost, load_scenario

    t0 = time.perf_counter()
    sc = load_scenario(args.scenario)
    est = estimate_scenario_cost(sc)
    if args.quiet:
        return 0
    g = sc.geometry
    src = g.builder if g.builder else f"{g.kind.value} {g.path.name}"
    print(f"{args.scenario}: valid scenario \"{sc.title}\"")
    print(f"  geometry: {src}; {len(sc.surfaces)} surfaces assigned, {len(sc.sources)} sources, "
          f"{len(sc.receivers)} receivers")
    if est is None:
        print("  cost: not known before meshing this geometry; `acoustic-fem mesh` counts it")
        return 0
    print(f"  mesh: {est.cells} cells, {est.dofs} DOFs (P{sc.element_order}), mesh size "
          f"{est.mesh_size_m:.3g} m — {est.basis}")
    print(f"  modes up to {sc.sweep.max_hz:g} Hz: about {est.modes} (Weyl estimate); "
          f"sweep: {est.frequencies} frequencies")
    print(f"  estimated peak memory {est.memory_bytes / 2**30:.2f} GiB; solve time roughly "
          f"{_duration(est.seconds)} on 2 cores (cost model; small models add some seconds "
          "of fixed overhead)")
    if args.verbose:
        print(f"  checked in {time.perf_counter() - t0:.2f} s")
    return 0


def _duration(s: float) -> str:
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"


def _cmd_mesh(args) -> int:
    from .mesh_io import write_mesh
    from .scenario import build_mesh, check_on_mesh, load_scenario

    out = Path(args.out)
    _check_out_free(out, args.force)
    if out.suffix.lower() != ".msh":
        raise InputError(f"--out {out} must end in .msh (gmsh format, keeps the surface names).")
    sc = load_scenario(args.scenario)
    rep = _reporter(args)
    try:
        mesh = build_mesh(sc, progress=rep)
    finally:
        rep.close()
    check_on_mesh(sc, mesh)
    write_mesh(out, mesh, overwrite=args.force)
    if not args.quiet:
        print(_mesh_text(mesh, sc))
        print(f"wrote {out}")
    return 0


def _mesh_text(mesh, sc) -> str:
    try:
        from .mesh_report import mesh_report
    except ImportError:
        mesh_report = None
    if mesh_report is not None:
        return str(mesh_report(mesh, fmax=sc.sweep.max_hz, air=sc.air))
    lines = [repr(mesh), f"volume {mesh.measure:.6g} m³, mean edge {mesh.h_mean:.4g} m, "
                         f"longest {mesh.h_max:.4g} m"]
    lines += [f"  surface {n}: {mesh.region_measure(n):.6g} m²" for n in mesh.surface_names]
    return "\n".join(lines)


def _cmd_export(args) -> int:
    from .results import export_results

    p = export_results(args.results, args.format, args.out, overwrite=args.force)
    _say(args, f"wrote {p}")
    return 0


def _cmd_materials(args) -> int:
    from .materials import LIBRARY, POROUS_PRESETS, TYPICAL_VALUES_NOTE

    print("Absorption coefficients (random incidence) by octave band:")
    bands = (125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0)
    print(f"  {'name':<24}" + "".join(f"{b:>7g}" for b in bands))
    for m in LIBRARY.values():
        t = m.table()
        print(f"  {m.name:<24}" + "".join(f"{t[b]:>7.2f}" if b in t else f"{'-':>7}"
                                           for b in bands) + f"   {m.description}")
    print("\nPorous-layer presets (flow resistivity, thickness, air gap):")
    for p in POROUS_PRESETS.values():
        gap = f", gap {p.air_gap * 1000:g} mm" if p.air_gap else ""
        print(f"  {p.name:<24} {p.flow_resistivity:>7g} Pa·s/m², {p.thickness * 1000:g} mm{gap}"
              f"   {p.description}")
    if args.verbose:
        print("\nSources:")
        for m in [*LIBRARY.values(), *POROUS_PRESETS.values()]:
            print(f"  {m.name}: {m.source}")
    print(f"\n{TYPICAL_VALUES_NOTE}")
    return 0


# ---------------------------------------------------------------- mesh-file commands
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
    from ._atomic import atomic_folder
    from .air import Air
    from .export import write_modes_csv, write_vtk
    from .mesh_io import read_mesh
    from .modes import solve_modes

    if args.count is None and args.fmax is None:
        raise InputError("give --count N or --fmax HZ.")
    out = Path(args.out)
    _check_out_free(out, args.force)
    mesh = read_mesh(args.mesh)
    rep = _reporter(args)
    rep("modes", 0, 1)
    modes = solve_modes(mesh, _parse_walls(args.wall), order=args.order, count=args.count,
                        fmax=args.fmax, air=Air(args.temperature))
    rep("modes", 1, 1)
    rep.close()
    with atomic_folder(out, overwrite=args.force) as tmp:
        write_modes_csv(tmp / "modes.csv", modes)
        write_vtk(tmp / "modes.vtu", modes)
        (tmp / "summary.txt").write_text(_summary(modes, f"Modes of {args.mesh}"),
                                         encoding="utf-8")
    _say(args, f"{len(modes)} modes from {modes.frequencies[0]:.2f} to "
               f"{modes.frequencies[-1]:.2f} Hz; wrote {out}")
    return 0


def _summary(modes, title: str) -> str:
    lines = [title, "", f"{len(modes)} modes, P{modes.order} elements, {modes.dofs.n_dofs} DOFs, "
             f"c = {modes.air.c:.2f} m/s", "", "  #   frequency (Hz)   elements/wavelength"]
    epw = modes.elements_per_wavelength()
    for i, f in enumerate(modes.frequencies):
        lines.append(f"{i:3d}   {f:14.3f}   {epw[i]:10.1f}")
    lines += ["", CAUTION, ""]
    return "\n".join(lines)


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


def _cmd_verify(args) -> int:
    from .verification import GROUPS, run_checks, write_report

    out = Path(args.out)
    _check_out_free(out, args.force)
    groups = None
    if args.group:
        bad = [g for g in args.group if g not in GROUPS]
        if bad:
            raise InputError(f"--group {bad[0]!r} is not a verification group; choose from "
                             f"{', '.join(GROUPS)}.")
        groups = list(dict.fromkeys(args.group))
    rep = _reporter(args)
    t0 = time.perf_counter()
    results = []
    try:
        for i, g in enumerate(groups or GROUPS):  # a loop over check groups, for progress
            rep("verify", i, len(groups or GROUPS))
            results.extend(run_checks(quick=args.quick, groups=[g]))
        rep("verify", len(groups or GROUPS), len(groups or GROUPS))
    finally:
        rep.close()
    write_report(results, out, overwrite=args.force)
    n_fail = sum(not r.passed for r in results)
    mode = "quick" if args.quick else "full"
    status = ("all passed" if n_fail == 0 else f"{n_fail} FAILED")
    line = (f"verification ({mode}): {len(results)} checks, {status} in "
            f"{time.perf_counter() - t0:.0f} s; wrote {out / 'verification.csv'} and "
            f"{out / 'verification.html'}")
    if n_fail:
        # one line on stderr, shown even with --quiet, like every failure
        print(f"acoustic-fem: failed: {line}; see the FAIL rows", file=sys.stderr)
        return 1
    _say(args, line)
    return 0


# ---------------------------------------------------------------- parser
def build_parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    g = common.add_mutually_exclusive_group()
    g.add_argument("-q", "--quiet", action="store_true",
                   help="print nothing on success (errors still go to stderr)")
    g.add_argument("-v", "--verbose", action="store_true",
                   help="also print each stage's start and duration")
    force = argparse.ArgumentParser(add_help=False)
    force.add_argument("--force", action="store_true",
                       help="replace an existing output (only once the new one is complete)")

    p = _Parser(prog="acoustic-fem", epilog=_EPILOG, description=(
        "Acoustic eigenmodes and low-frequency sound fields of enclosures by the finite "
        "element method. " + CAUTION))
    p.add_argument("--version", action="version", version=f"acoustic-fem {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    r = sub.add_parser("run", parents=[common, force], epilog=_EPILOG,
                       help="solve a scenario file and write its results folder",
                       description="Mesh, solve and report a scenario (TOML file; see "
                                   "meshes/mixing_room.toml for a commented example).")
    r.add_argument("scenario", help="scenario file (.toml)")
    r.add_argument("--out", required=True, help="results folder to create")
    r.set_defaults(func=_cmd_run)

    d = sub.add_parser("demo", parents=[common, force], epilog=_EPILOG,
                       help="write the invented demo scenario into a folder and run it",
                       description="Write the demo scenario (an invented mixing room) into "
                                   "DIR and run it; DIR then holds the scenario file and all "
                                   "its results.")
    d.add_argument("--out", required=True, help="folder to create")
    d.set_defaults(func=_cmd_demo)

    c = sub.add_parser("check", parents=[common], epilog=_EPILOG,
                       help="validate a scenario and estimate its cost (no solving)",
                       description="Validate a scenario file and estimate DOFs, memory and "
                                   "time before any heavy work.")
    c.add_argument("scenario", help="scenario file (.toml)")
    c.set_defaults(func=_cmd_check)

    ms = sub.add_parser("mesh", parents=[common, force], epilog=_EPILOG,
                        help="mesh a scenario's geometry only",
                        description="Build (or import) and check a scenario's mesh and write "
                                    "it as a gmsh .msh file with its surface names.")
    ms.add_argument("scenario", help="scenario file (.toml)")
    ms.add_argument("--out", required=True, help="mesh file to write (.msh)")
    ms.set_defaults(func=_cmd_mesh)

    from .results import EXPORT_FORMATS

    e = sub.add_parser("export", parents=[common, force], epilog=_EPILOG,
                       help="convert a results folder's modes to another format",
                       description="Convert the modes of a results folder: " + "; ".join(
                           f"{k}: {v}" for k, v in EXPORT_FORMATS.items()) + ".")
    e.add_argument("results", help="results folder written by run or demo")
    e.add_argument("--format", required=True, choices=list(EXPORT_FORMATS), help="output format")
    e.add_argument("--out", required=True, help="file to write")
    e.set_defaults(func=_cmd_export)

    mt = sub.add_parser("materials", parents=[common], epilog=_EPILOG,
                        help="list the material library (typical values) and its sources",
                        description="List the library's materials and porous-layer presets; "
                                    "--verbose adds where each value comes from.")
    mt.set_defaults(func=_cmd_materials)

    m = sub.add_parser("modes", parents=[common, force], epilog=_EPILOG,
                       help="modes of a mesh file without a scenario (gmsh .msh or meshio format)")
    m.add_argument("mesh", help="mesh file with named surfaces")
    m.add_argument("--out", required=True, help="results folder to create")
    gr = m.add_argument_group("how many modes (one or both)")
    gr.add_argument("--count", type=int, help="number of lowest modes")
    gr.add_argument("--fmax", type=float, help="every mode up to this frequency (Hz)")
    m.add_argument("--order", type=int, default=2, choices=(1, 2), help="element order")
    m.add_argument("--wall", action="append", metavar="NAME=KIND",
                   help="wall condition of a surface: rigid or release (repeatable)")
    m.add_argument("--temperature", type=float, default=20.0, help="air temperature in °C")
    m.set_defaults(func=_cmd_modes)

    i = sub.add_parser("info", parents=[common], epilog=_EPILOG,
                       help="print the regions, areas and volume of a mesh file")
    i.add_argument("mesh")
    i.set_defaults(func=_cmd_info)

    from .verification import GROUPS

    v = sub.add_parser("verify", parents=[common, force], epilog=_EPILOG,
                       help="run the published-reference checks and write a report (CSV + HTML)",
                       description="Solve cases with known answers (tubes, ducts, boxes with "
                                   "every wall mix, cylinder, sphere, convergence slopes, the "
                                   "error estimate, pressure-chamber limit, reciprocity, damped "
                                   "tube and box) on "
                                   "this machine and write verification.csv and "
                                   "verification.html into DIR. Exit 0 if every check passes, "
                                   "1 if any fails.")
    v.add_argument("--out", required=True, help="report folder to create")
    v.add_argument("--quick", action="store_true",
                   help="smaller set of cases (a few minutes on 2 cores)")
    v.add_argument("--group", action="append", metavar="GROUP",
                   help="run only this group (repeatable): " + ", ".join(GROUPS))
    v.set_defaults(func=_cmd_verify)
    return p


def _one_line(exc) -> str:
    return " ".join(str(exc).split("\n")).strip()


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except (InputError, MeshError, OutputExistsError, FileNotFoundError) as exc:
        print(f"acoustic-fem: error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except AcousticFemError as exc:
        print(f"acoustic-fem: failed: {_one_line(exc)}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("acoustic-fem: interrupted; no partial results were kept.", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: still one line, but say so
        print(f"acoustic-fem: internal error: {type(exc).__name__}: {_one_line(exc)}",
              file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
