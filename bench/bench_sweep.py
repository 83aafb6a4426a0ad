"""Sweep throughput: 2 worker processes vs a plain loop over the same variants.

Variants: the rigid room (Lx, 3.0, 2.4) m, Lx evenly from 3.5 to 5.5 m, each
meshed by ``geometry.box`` and solved for every mode up to ``--fmax`` Hz
(P2).  Measured in one process, one after the other:

* ``loop``: ``for Lx in ...: model(Lx=Lx)`` with the libraries' default BLAS
  threads — the plain loop a user would write;
* ``loop_1thread``: the same loop with BLAS limited to one thread — what each
  sweep worker does, so the ratio against it is the parallel speed-up alone;
* ``sweep_2``: ``sweep(model, ..., workers=2)`` without a cache, including
  starting the worker processes (from a forkserver by default, started by
  this first sweep), sampling the shapes and tracking.

Throughput is variants per minute; the target is sweep_2 >= 1.7x loop.  The
development machine's 2 cores are shared with other jobs: the 1-minute load
average before and after each phase is recorded with the times, and so are
the CPU seconds used and ``cores_used`` (CPU seconds per wall second).  With
the kernel's session autogroups (``/proc/sys/kernel/sched_autogroup_enabled``)
every process of one session shares that session's slice of the CPU, so
while other sessions keep the cores busy a second worker gains nothing:
``cores_used`` then shows the ceiling, and the ratio means something only on
an otherwise idle machine.

    python3 bench/bench_sweep.py [--variants 20] [--fmax 120]
"""

from __future__ import annotations

import argparse
import os
import resource
import time

import numpy as np
from threadpoolctl import threadpool_limits

from _common import save

from acoustic_fem.study import BoxModel, sweep


def _children_cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--variants", type=int, default=20)
    ap.add_argument("--fmax", type=float, default=120.0)
    args = ap.parse_args()

    model = BoxModel(size=(4.5, 3.0, 2.4), fmax=args.fmax)
    lx = [float(v) for v in np.linspace(3.5, 5.5, args.variants)]
    model(Lx=lx[0])  # warm-up: imports, gmsh start-up
    out = dict(variants=len(lx), fmax=args.fmax, cpu_count=os.cpu_count(), phases={})

    def phase(name, fn):
        load0 = os.getloadavg()[0]
        t0 = time.perf_counter()
        c0 = time.process_time()
        extra = dict(fn() or {})
        dt = time.perf_counter() - t0
        cpu = extra.pop("cpu_seconds", time.process_time() - c0)
        # cores this process group actually got: CPU seconds per wall second
        out["phases"][name] = dict(seconds=dt, variants_per_minute=60.0 * len(lx) / dt,
                                   cpu_seconds=cpu, cores_used=cpu / dt, load_before=load0,
                                   load_after=os.getloadavg()[0], **extra)
        print(f"{name:14s} {dt:7.1f} s  {60 * len(lx) / dt:6.1f} variants/min  "
              f"cpu {cpu:6.1f} s ({cpu / dt:.2f} cores)  "
              f"(load {load0:.1f} -> {os.getloadavg()[0]:.1f})", flush=True)

    def loop():
        dofs = [model(Lx=v).dofs.n_dofs for v in lx]
        return dict(n_dofs_min=min(dofs), n_dofs_max=max(dofs))

    def loop_1():
        with threadpool_limits(limits=1):
            for v in lx:
                model(Lx=v)

    def sweep_2():
        c0 = time.process_time() + _children_cpu()
        r = sweep(model, {"Lx": lx}, workers=2)
        # this process's CPU, the workers' CPU inside their variants, and any
        # reaped child's (spawned workers' start-up; a forkserver's children
        # are not ours, so their start-up is not counted)
        var_cpu = float(np.sum(r.info["variant_cpu_seconds"]))
        return dict(executor=r.info["executor"], workers=r.info["workers"],
                    start_method=r.info["start_method"], tracked_modes=r.tracks.n_tracks,
                    mean_variant_seconds=float(np.mean(r.info["variant_seconds"])),
                    variant_cpu_seconds=var_cpu,
                    cpu_seconds=time.process_time() + _children_cpu() - c0 + var_cpu)

    phase("loop", loop)
    phase("loop_1thread", loop_1)
    phase("sweep_2", sweep_2)
    p = out["phases"]
    out["ratio_vs_loop"] = p["sweep_2"]["variants_per_minute"] / p["loop"]["variants_per_minute"]
    out["ratio_vs_loop_1thread"] = (p["sweep_2"]["variants_per_minute"]
                                    / p["loop_1thread"]["variants_per_minute"])
    print(f"sweep_2 / loop = {out['ratio_vs_loop']:.2f}x   "
          f"sweep_2 / loop_1thread = {out['ratio_vs_loop_1thread']:.2f}x   (target >= 1.7x)")
    print("written", save("sweep", out))


if __name__ == "__main__":
    main()
