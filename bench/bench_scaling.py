"""Time and peak memory vs DOFs for the eigensolver paths, with a PNG plot.

    python bench/bench_scaling.py                                  # 4 sizes, 20 k .. 200 k DOFs
    python bench/bench_scaling.py --sizes 1e6 --paths default,mpi2 --count 20   # the 10⁶ case
    python bench/bench_scaling.py --sizes 8e3,16e3,32e3,64e3 --count 10        # a quick check

A rigid box room (5.2 x 4.1 x 2.8 m, gmsh tetrahedra, P2) at each size; the
mesh size h is chosen for the requested number of P2 DOFs (the actual count
is reported).  For each size, each path runs in a fresh process (so that its
peak resident memory is its own; ru_maxrss of a process only grows):

* ``assembly``: ``assemble(mesh, 2)`` alone;
* ``default``: ``solve_modes`` with its default backend (CHOLMOD/SuperLU
  shift-invert block Lanczos), assembly included;
* ``mpi1``, ``mpi2``: ``backend=MpiSolver(ranks=1 / 2)`` (SLEPc Krylov–Schur,
  shift-invert, MUMPS; needs ``bash .ci/install_petsc``), assembly included;
  the memory reported is this process's peak plus the sum of the ranks' peaks;
* ``lean``: ``backend="amg"`` (AMG-preconditioned LOBPCG; needs pyamg).

The reference of each run is the default path in the same size: the JSON
has each path's time and memory ratio to it and the largest relative
eigenfrequency difference from it.  Writes bench/results/scaling.json and
bench/results/scaling.png.  Run on an otherwise idle machine; sizes above
~200 k DOFs take minutes per path on 2 cores.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from _common import HERE, box_mesh, save

SIZE = (5.2, 4.1, 2.8)
VOLUME = SIZE[0] * SIZE[1] * SIZE[2]
#: P2 DOFs per m³ times h³ for gmsh's box meshes (bench_modes: h = 0.155 m gives
#: 101 k DOFs in 59.7 m³)
DOF_DENSITY = 101_000 * 0.155**3 / VOLUME
PATHS = ("assembly", "default", "mpi1", "mpi2", "lean")


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def run_one(path: str, h: float, count: int) -> dict:
    """One measurement in this (fresh) process; returns a JSON-able row."""
    import warnings

    import acoustic_fem as af

    mesh = box_mesh(Path(tempfile.gettempdir()) / f"bench_scaling_box_{h:.5f}.msh", SIZE, h)
    base_mb = _rss_mb()  # imports + mesh: not part of the measured step
    row = dict(path=path, h=h, base_rss_mb=base_mb)
    t0 = time.perf_counter()
    if path == "assembly":
        asm = af.assemble(mesh, 2)
        row.update(seconds=time.perf_counter() - t0, n_dofs=int(asm.dofs.n_dofs))
    else:
        backend = {"default": "auto", "mpi1": af.MpiSolver(ranks=1),
                   "mpi2": af.MpiSolver(ranks=2), "lean": "amg"}[path]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            modes = af.solve_modes(mesh, order=2, count=count, backend=backend)
        row.update(seconds=time.perf_counter() - t0, n_dofs=int(modes.dofs.n_dofs),
                   assembly_seconds=modes.info["assembly_seconds"],
                   eigen_seconds=modes.info["eigen_seconds"], method=modes.info["method"],
                   frequencies=modes.frequencies.tolist(), windows=modes.info["windows"])
    row["peak_rss_mb"] = _rss_mb()
    ranks = [w.get("rank_peak_rss_mb") for w in row.get("windows", [])]
    ranks = [r for r in ranks if r]
    if ranks:  # the MPI ranks are separate processes: add their (largest run's) peaks
        row["ranks_peak_rss_mb"] = max(ranks, key=sum)
        row["total_peak_rss_mb"] = row["peak_rss_mb"] + sum(row["ranks_peak_rss_mb"])
    else:
        row["total_peak_rss_mb"] = row["peak_rss_mb"]
    return row


def _spawn(path, h, count, timeout):
    cmd = [sys.executable, str(Path(__file__).resolve()), "--one", path, "--h", repr(h),
           "--count", str(count)]
    env = dict(os.environ)
    try:
        r = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, env=env)
    except subprocess.TimeoutExpired:
        return dict(path=path, h=h, error=f"timeout after {timeout} s")
    if r.returncode != 0:
        tail = (r.stderr.strip().splitlines() or ["?"])[-1]
        return dict(path=path, h=h, error=tail)
    return json.loads(r.stdout.strip().splitlines()[-1])


def _plot(rows, out: Path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax_t, ax_m) = plt.subplots(1, 2, figsize=(11, 4.5))
    for path in PATHS:
        pts = sorted((r["n_dofs"], r["seconds"], r["total_peak_rss_mb"]) for r in rows
                     if r["path"] == path and "error" not in r)
        if not pts:
            continue
        n, s, m = (np.array(v) for v in zip(*pts))
        label = {"assembly": "assembly (K, M)", "default": "default solve",
                 "mpi1": "MPI solve, 1 rank", "mpi2": "MPI solve, 2 ranks",
                 "lean": "lean (AMG + LOBPCG)"}[path]
        ax_t.loglog(n, s, "o-", label=label)
        ax_m.loglog(n, m, "o-", label=label)
    for ax, what in ((ax_t, "wall time (s)"), (ax_m, "peak resident memory (MB)")):
        ax.set_xlabel("degrees of freedom (P2)")
        ax.set_ylabel(what)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8)
    ax_t.set_title("time vs DOFs")
    ax_m.set_title("peak memory vs DOFs (all processes of the path)")
    fig.tight_layout()
    tmp = out.with_suffix(".tmp.png")
    fig.savefig(tmp, dpi=110)
    plt.close(fig)
    os.replace(tmp, out)  # atomic


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="2e4,5e4,1e5,2e5",
                    help="comma-separated target P2 DOF counts (default 4 sizes up to 200 k)")
    ap.add_argument("--paths", default=",".join(PATHS), help=f"subset of {','.join(PATHS)}")
    ap.add_argument("--count", type=int, default=20, help="lowest modes per solve")
    ap.add_argument("--timeout", type=float, default=3600.0, help="seconds per run")
    ap.add_argument("--name", default="scaling", help="results/NAME.json and NAME.png")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--h", type=float, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.one:
        print(json.dumps(run_one(args.one, args.h, args.count)))
        return
    paths = [p.strip() for p in args.paths.split(",") if p.strip()]
    unknown = sorted(set(paths) - set(PATHS))
    if unknown:
        sys.exit(f"bench_scaling: unknown path(s) {unknown}; choose from {list(PATHS)}.")
    try:
        targets = [float(v) for v in args.sizes.split(",")]
    except ValueError:
        sys.exit(f"bench_scaling: --sizes {args.sizes!r} must be numbers such as 2e4,5e4.")
    import acoustic_fem as af

    if any(p.startswith("mpi") for p in paths) and not af.petsc_available():
        print("bench_scaling: PETSc/SLEPc/MPI not installed (bash .ci/install_petsc); "
              "skipping the MPI paths.")
        paths = [p for p in paths if not p.startswith("mpi")]
    rows = []
    for target in targets:
        h = round((DOF_DENSITY * VOLUME / target) ** (1 / 3), 5)
        box_mesh(Path(tempfile.gettempdir()) / f"bench_scaling_box_{h:.5f}.msh", SIZE, h)
        ref = None
        for path in paths:
            row = _spawn(path, h, args.count, args.timeout)
            row["target_dofs"] = target
            rows.append(row)
            if "error" in row:
                print(f"{path:8s} h={h}: FAILED: {row['error']}")
                continue
            if path == "default":
                ref = row
            msg = (f"{path:8s} {row['n_dofs']:>9d} DOFs: {row['seconds']:8.2f} s, peak "
                   f"{row['total_peak_rss_mb']:8.0f} MB")
            if ref is not None and path not in ("assembly", "default"):
                f_ref, f = np.array(ref["frequencies"]), np.array(row["frequencies"])
                if f.shape == f_ref.shape:
                    sc = np.where(f_ref > 0, f_ref, f_ref[f_ref > 0].min())
                    row["max_rel_freq_diff_vs_default"] = float(np.max(np.abs(f - f_ref) / sc))
                row["time_ratio_vs_default"] = row["seconds"] / ref["seconds"]
                row["memory_ratio_vs_default"] = row["total_peak_rss_mb"] / ref["total_peak_rss_mb"]
                msg += (f"  ({row['time_ratio_vs_default']:.2f}x time, "
                        f"{row['memory_ratio_vs_default']:.2f}x memory of default; "
                        f"freqs within {row.get('max_rel_freq_diff_vs_default', math.nan):.1e})")
            print(msg, flush=True)
    exponents = {}
    for path in paths:
        pts = [(r["n_dofs"], r["seconds"]) for r in rows if r["path"] == path and "error" not in r]
        if len(pts) >= 2:
            n, s = np.log(np.array(pts, float)).T
            exponents[path] = float(np.polyfit(n, s, 1)[0])
    if exponents:
        print("time grows as DOFs^p:", {k: round(v, 2) for k, v in exponents.items()})
    for r in rows:  # keep the JSON small: frequencies only for the first few
        if "frequencies" in r:
            r["frequencies"] = r["frequencies"][:args.count]
    out = save(args.name, dict(count=args.count, box=SIZE, order=2, time_exponents=exponents,
                               runs=rows))
    png = HERE / "results" / f"{args.name}.png"
    _plot(rows, png)
    print("wrote", out, "and", png)


if __name__ == "__main__":
    main()
