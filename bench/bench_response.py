"""Forced response sweep: modal fast path vs independent sparse direct solves.

    python bench/bench_response.py                 # 101 k P2 DOFs, 200 frequencies, 10 seats
    python bench/bench_response.py --n-ref 4       # fewer timed reference solves

Scenario (our own): a 5.2 x 4.1 x 2.8 m listening room (the mesh of
bench_modes.py, h = 0.155 m, P2: ~101 k DOFs), carpet-like floor
(β = 0.12 + 0.05i), absorbing ceiling panel face (β = 0.25), a slightly
absorbing front wall (β = 0.04), other walls rigid; two loudspeakers (the
second with gain 0.8 and a 1.5 ms delay); 10 seats in two rows at ear
height 1.2 m; 200 frequencies from 20 Hz to 200 Hz.

Reference, in the same process on the same matrices:
``scipy.sparse.linalg.spsolve(A(f), b(f))`` with its defaults (SuperLU,
COLAMD ordering; UMFPACK is not installed) for each frequency.  200 such
solves would take hours, so ``--n-ref`` of them (default 10, spread over the
sweep) are timed and the time scaled by 200 / n_ref (stated in the output);
a budget (``--ref-budget``, default 2 h) may cut the timed set short (at least
two; the order alternates between the low and high ends of the sweep);
their solutions are also the accuracy reference (SPL difference in dB,
separately below fmax/2 and over the whole sweep).

Wall-clock and CPU (process) times are both recorded: the machine has 2 cores
shared with other jobs, so the wall time depends on the load (recorded too).
On a loaded machine run with ``OPENBLAS_NUM_THREADS=1``: multithreaded BLAS
on oversubscribed cores slowed both paths several-fold in our runs.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np

from _common import box_mesh, measured, save

SIZE = (5.2, 4.1, 2.8)


def scenario():
    import acoustic_fem as af

    walls = {
        "z0": af.Impedance(admittance=0.12 + 0.05j),  # floor
        "z1": af.Impedance(admittance=0.25),  # ceiling panel
        "x0": af.Impedance(admittance=0.04),  # front wall
    }
    sources = [af.PointSource((0.35, 1.1, 1.0), 1e-3),
               af.PointSource((0.35, 3.0, 1.0), 1e-3, gain=0.8, delay=1.5e-3)]
    ys = np.linspace(1.0, 3.1, 5)
    seats = np.array([(x, y, 1.2) for x in (3.0, 3.9) for y in ys])
    return walls, sources, seats


def reference(mesh, walls, sources, seats, freqs, air, budget):
    """scipy spsolve (defaults) per frequency on the same discrete system.

    Stops after the frequency during which ``budget`` seconds (wall) were
    exceeded, but not before two solves; returns what was solved.
    """
    import scipy.sparse.linalg as spla

    import acoustic_fem as af
    from acoustic_fem._locate import interpolation_matrix, locate

    asm = af.assemble(mesh, 2)
    B = {n: af.boundary_mass(asm.dofs, n) for n in walls}
    Es = interpolation_matrix(asm.dofs, locate(mesh, np.array([s.position for s in sources])))
    Er = interpolation_matrix(asm.dofs, locate(mesh, seats))
    out, cpu, wall = [], 0.0, 0.0
    for f in freqs:
        k, w = 2 * np.pi * f / air.c, 2 * np.pi * f
        A = asm.K - k * k * asm.M + 0j
        for n, wl in walls.items():
            A = A + (1j * k * complex(wl.admittance_at(np.array([f]), air)[0])) * B[n]
        A = A.tocsc()
        q = np.array([s.amplitude(np.array([f]))[0] for s in sources])
        b = 1j * w * air.rho * (Es.T @ q)
        t0, c0 = time.perf_counter(), time.process_time()
        x = spla.spsolve(A, b)
        wall += time.perf_counter() - t0
        cpu += time.process_time() - c0
        out.append(Er @ x)
        print(f"   reference spsolve at {f:.1f} Hz: {time.perf_counter() - t0:.1f} s wall",
              flush=True)
        if wall > budget and len(out) >= 2:
            break
    return np.array(out), wall, cpu


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--h", type=float, default=0.155)
    ap.add_argument("--fmin", type=float, default=20.0)
    ap.add_argument("--fmax", type=float, default=200.0)
    ap.add_argument("--n-freq", type=int, default=200)
    ap.add_argument("--n-ref", type=int, default=10)
    ap.add_argument("--modal-factor", type=float, default=1.5)
    ap.add_argument("--tol", type=float, default=1e-3)
    ap.add_argument("--ref-budget", type=float, default=7200.0,
                    help="stop timing reference solves after this many seconds (>= 2 solves)")
    args = ap.parse_args()

    import acoustic_fem as af

    air = af.Air()
    mesh = box_mesh(Path(tempfile.gettempdir()) / f"bench_box_{args.h}.msh", SIZE, args.h)
    walls, sources, seats = scenario()
    freqs = np.linspace(args.fmin, args.fmax, args.n_freq)
    res = dict(load_average_start=os.getloadavg(),
               openblas_num_threads=os.environ.get("OPENBLAS_NUM_THREADS", "default"), h=args.h, n_frequencies=args.n_freq,
               n_seats=len(seats), fmin=args.fmin, fmax=args.fmax)

    t = {}
    c0 = time.process_time()
    with measured(t, "modal"):
        r = af.solve_response(mesh, walls, sources=sources, receivers=seats, frequencies=freqs,
                              order=2, air=air, method="modal", modal_factor=args.modal_factor,
                              tol=args.tol)
    cpu_modal = time.process_time() - c0
    info = dict(r.info)
    res.update(n_dofs=info["n_dofs"], elements_per_wavelength_at_fmax=air.c / args.fmax
               / mesh.h_mean, modal_seconds=t["modal"]["seconds"], modal_cpu_seconds=cpu_modal,
               modal_peak_mb=t["modal"]["peak_mb"],
               modal_process_peak_rss_mb=t["modal"]["process_peak_rss_mb"],
               n_modes=info["n_modes"], modes_top_hz=info["modes_top_hz"],
               n_basis=info["n_basis"], modes_seconds=info["modes_seconds"],
               reduced_seconds=info["reduced_seconds"], refine_rounds=len(info["refine_rounds"]),
               max_residual=float(r.residuals.max()),
               max_energy_imbalance=float(np.nanmax(r.energy_imbalance)))
    print(f"{info['n_dofs']} P2 DOFs, {len(freqs)} frequencies, {len(seats)} seats: modal path "
          f"{t['modal']['seconds']:.1f} s wall, {cpu_modal:.1f} s CPU ({info['n_modes']} modes up "
          f"to {info['modes_top_hz']:.0f} Hz in {info['modes_seconds']:.1f} s, basis "
          f"{info['n_basis']}, {len(info['refine_rounds'])} refinement rounds, reduced part "
          f"{info['reduced_seconds']:.1f} s); max residual {r.residuals.max():.2e}", flush=True)

    n_ref = max(1, min(args.n_ref, len(freqs)))
    ridx = np.unique(np.round(np.linspace(0, len(freqs) - 1, n_ref)).astype(int))
    # alternate low and high frequencies so a budget cut keeps both halves
    ridx = ridx[np.argsort(np.abs(np.arange(len(ridx)) - (len(ridx) - 1) / 2))[::-1]]
    p_ref, wall_ref, cpu_ref = reference(mesh, walls, sources, seats, freqs[ridx], air,
                                         args.ref_budget)
    ridx = ridx[: len(p_ref)]
    scale = len(freqs) / len(ridx)
    db = np.abs(20 * np.log10(np.abs(r.pressure[ridx]) / np.abs(p_ref)))
    low = freqs[ridx] <= args.fmax / 2
    res.update(reference_solves_timed=int(len(ridx)), reference_frequencies=freqs[ridx].tolist(),
               reference_seconds_timed=wall_ref, reference_cpu_seconds_timed=cpu_ref,
               reference_seconds_scaled_to_all=wall_ref * scale,
               reference_cpu_seconds_scaled_to_all=cpu_ref * scale,
               speedup_wall=wall_ref * scale / t["modal"]["seconds"],
               speedup_cpu=cpu_ref * scale / cpu_modal,
               max_db_error_below_half_fmax=float(db[low].max()) if low.any() else None,
               max_db_error_all=float(db.max()),
               db_error_per_reference_frequency=db.max(axis=1).tolist(),
               load_average_end=os.getloadavg())
    print(f"reference: {len(ridx)} spsolve calls {wall_ref:.1f} s wall / {cpu_ref:.1f} s CPU, "
          f"scaled x{scale:.0f} to all {len(freqs)} frequencies: {wall_ref * scale:.0f} s wall / "
          f"{cpu_ref * scale:.0f} s CPU -> speed-up {res['speedup_wall']:.1f}x wall, "
          f"{res['speedup_cpu']:.1f}x CPU; SPL error vs reference: max "
          f"{res['max_db_error_below_half_fmax']} dB below fmax/2, {db.max():.3g} dB overall")
    print("wrote", save(f"response_h{args.h}", res))


if __name__ == "__main__":
    main()
