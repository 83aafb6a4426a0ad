"""Damped modes vs undamped modes of the same P2 room, in the same process.

    python bench/bench_damped.py                 # ~100 k P2 DOFs, 30 modes, real and complex β
    python bench/bench_damped.py --h 0.3         # a quick small run
    python bench/bench_damped.py --engine arpack # the ARPACK engine instead of block TOAR

The room is the benchmark box of ``bench_modes.py`` (5.2 x 4.1 x 2.8 m).
Reference: the undamped solve (all walls rigid; CHOLMOD + block Lanczos).
Damped runs: the same count of modes; first every wall absorbing, with a
real admittance (β = 0.05: the first window's Krylov method runs in real
arithmetic on a real Cholesky) and then a complex one (β = 0.05 + 0.03i: by
default complex block TOAR Krylov-Schur on a MUMPS LDLᵀ of Q(σ), σ centred
in the band; ``--engine arpack`` runs ARPACK instead; ``--complex-path gmres``
solves Q(iτ) by GMRES preconditioned by the real Cholesky instead,
``--complex-path proxy`` takes the roots at Re β and refines them to β), and
with ``damping="perturbation"``; then two frequency-dependent walls, a porous
layer on the ceiling and an octave-band α table on the side walls (a frozen-β
solve and the nonlinear refinement; ``--constant-only`` skips them).  Memory: ``rss_increase_mb`` (sampled
resident size, which sees CHOLMOD's and MUMPS's own allocations) beside the
traced numpy peak.  The assembly is
shared (done once, not timed).  Reports times, peak traced memory (numpy)
and process peak RSS, and their ratios to the undamped solve; the target is
within 3x in time and memory.  The machine's 2 cores are shared with other
work: note the load average printed with the result.
"""

from __future__ import annotations

import argparse
import os
import tempfile
from pathlib import Path

import numpy as np

from _common import box_mesh, measured, save

SIZE = (5.2, 4.1, 2.8)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--h", type=float, default=0.155)
    ap.add_argument("--count", type=int, default=30)
    ap.add_argument("--betas", default="0.05,0.05+0.03j",
                    help="comma-separated admittances of all walls")
    ap.add_argument("--complex-path", choices=["mumps", "proxy", "gmres"], default="mumps",
                    help="how the sparse solver treats a complex β (acoustic_fem._damped): "
                         "MUMPS factors of Q(σ) (the default when built), the real-part proxy "
                         "+ refinement, or GMRES preconditioned by a real Cholesky")
    ap.add_argument("--constant-only", action="store_true",
                    help="skip the two frequency-dependent walls (porous layer, α table)")
    ap.add_argument("--engine", choices=["toar", "arpack"], default="toar",
                    help="Krylov engine of the damped windows (acoustic_fem._damped.KRYLOV_ENGINE)")
    args = ap.parse_args()
    import acoustic_fem as af
    from acoustic_fem import _damped

    _damped.KRYLOV_ENGINE = args.engine

    if args.complex_path == "mumps":
        from acoustic_fem import _zsym
        if not _zsym.available():
            raise SystemExit(f"--complex-path mumps: {_zsym.unavailable_reason()}")
        _damped.USE_MUMPS = True
        _damped.COMPLEX_PATH = "gmres"  # the Krylov path; its solves then use MUMPS
    else:
        _damped.USE_MUMPS = False
        _damped.COMPLEX_PATH = args.complex_path

    mesh = box_mesh(Path(tempfile.gettempdir()) / f"bench_box_{args.h}.msh", SIZE, args.h)
    air = af.Air(c=343.0)
    asm = af.assemble(mesh, 2)
    load0 = os.getloadavg()
    t = {}
    with measured(t, "undamped"):
        rigid = af.solve_modes(mesh, order=2, count=args.count, air=air, assembly=asm)
    base = t["undamped"]
    print(f"{asm.n_dofs} P2 DOFs, {args.count} modes; undamped {base['seconds']:.1f} s, "
          f"peak {base['peak_mb']:.0f} MB traced, RSS +{base['rss_increase_mb']:.0f} MB")
    runs = []
    # (label, walls, damping): constant admittances on every wall, then two
    # frequency-dependent walls (our own invented treatments): a porous layer
    # on the ceiling, and octave-band absorption coefficients on the side walls
    cases = [(f"β = {complex(b):g}", {n: af.Impedance(admittance=complex(b))
                                        for n in mesh.surface_names}, "exact")
             for b in args.betas.split(",")]
    b0 = complex(args.betas.split(",")[0])
    cases.append((f"β = {b0:g}", {n: af.Impedance(admittance=b0) for n in mesh.surface_names},
                  "perturbation"))
    if not args.constant_only:
        cases.append(("porous layer on the ceiling (σ = 10 kPa s/m², 100 mm + 50 mm gap)",
                      {"z1": af.Impedance.porous_layer(10_000.0, 0.10, air_gap=0.05)}, "exact"))
        table = af.Impedance.from_table([63, 125, 250, 500, 1000],
                                        [0.10, 0.15, 0.25, 0.40, 0.50], quantity="alpha")
        cases.append(("α table on the four side walls", {n: table for n in
                                                          ("x0", "x1", "y0", "y1")}, "exact"))
    for label, walls, damping in cases:
        key = f"{label}-{damping}"
        with measured(t, key):
            modes = af.solve_modes(mesh, walls, order=2, count=args.count, air=air,
                                   assembly=asm, damping=damping)
        r = t[key]
        w = modes.info["windows"][-1]  # the last window (a continued engine counts all its work)
        row = dict(walls=label, damping=damping, seconds=r["seconds"],
                   peak_mb=r["peak_mb"], process_peak_rss_mb=r["process_peak_rss_mb"],
                   time_ratio=r["seconds"] / base["seconds"],
                   memory_ratio=r["peak_mb"] / base["peak_mb"],
                   rss_increase_mb=r["rss_increase_mb"],
                   rss_ratio=r["rss_increase_mb"] / base["rss_increase_mb"],
                   method=modes.info["method"], first_window=modes.info["windows"][0],
                   windows=modes.info["windows"],
                   max_backward_error=modes.info.get("max_backward_error"),
                   max_frequency_shift_hz=float(np.abs(modes.frequencies
                                                       - rigid.frequencies).max()),
                   decay_rates_range=[float(modes.decay_rates.min()),
                                      float(modes.decay_rates.max())],
                   refinement={k: v for k, v in modes.info.get("refinement", {}).items()
                               if k in ("outer_iterations", "basis_size")})
        runs.append(row)
        print(f"  {label} {damping}: {r['seconds']:.1f} s ({row['time_ratio']:.2f}x), "
              f"peak {r['peak_mb']:.0f} MB ({row['memory_ratio']:.2f}x), RSS +"
              f"{r['rss_increase_mb']:.0f} MB ({row['rss_ratio']:.2f}x); {w.get('engine', '')} "
              f"{w.get('applications', '')} applications"
              + (f" in {w['blocks']} blocks" if "blocks" in w else "")
              + (f", {w['gmres_iterations']} GMRES iterations" if "gmres_iterations" in w else "")
              + (f"; refinement to β: {w['complex_refinement']['outer_iterations']} outer "
                 f"steps, {w['complex_refinement']['preconditioned_columns']} preconditioned "
                 f"columns, basis {w['complex_refinement']['basis_size']}"
                 if "complex_refinement" in w else "")
              + (f"; nonlinear refinement {row['refinement']['outer_iterations']} outer steps"
                 if row["refinement"] else ""))
    res = dict(n_dofs=int(asm.n_dofs), count=args.count, complex_path=args.complex_path,
               engine=args.engine,
               undamped=dict(seconds=base["seconds"], peak_mb=base["peak_mb"],
                             rss_increase_mb=base["rss_increase_mb"],
                             process_peak_rss_mb=base["process_peak_rss_mb"],
                             windows=rigid.info["windows"]),
               damped=runs, load_average_before=list(load0),
               load_average_after=list(os.getloadavg()))
    print("load average before / after:", [round(x, 2) for x in load0],
          [round(x, 2) for x in os.getloadavg()])
    suffix = ("" if args.engine == "toar" else f"_{args.engine}") + (
        "" if args.complex_path == "mumps" else f"_{args.complex_path}")
    print("wrote", save(f"damped_h{args.h}{suffix}", res))


if __name__ == "__main__":
    main()
