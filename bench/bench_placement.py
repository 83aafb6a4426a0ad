"""Source placement: modal transfer functions vs per-candidate direct solves, and the gain
over common-practice layouts.

    python bench/bench_placement.py              # 5.0 x 3.6 x 2.4 m room, 2 cells/m, P2
    python bench/bench_placement.py --n 1.6      # coarser mesh (as in the tests)

Scenario (our own): the room of tests/test_placement.py — every surface with
absorption coefficient 0.1 (normal incidence), 16 candidate floor positions
along the walls, two 3 x 3 seat blocks (centred, rear) at 1.2 m, 20-100 Hz
at 31 log-spaced frequencies.

Timing (same process, same matrices): :func:`optimise_placement` (modes,
reduced model, all 16 transfer functions, search) against the reference
route of the same search on transfer functions from 16 direct sweeps
(``solve_response(method="direct")``, one per candidate).  Reported as the
ratio reference / optimiser.

Figures: for 2 and 4 sources, both objectives and both seatings, the
objective of the optimised layout and of each common-practice layout
(two sources at opposite wall midpoints, four at the wall midpoints, four
in the corners; rules of thumb from the trade literature, e.g. Welti &
Devantier, J. AES 54(5), 2006, from memory), all evaluated by direct
solves.  Predictions are model estimates; verify by measurement.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np

from _common import save

os.environ.setdefault("OMP_NUM_THREADS", "1")

import acoustic_fem as af  # noqa: E402
from acoustic_fem.verification import structured_box  # noqa: E402

ROOM = (5.0, 3.6, 2.4)
Lx, Ly = ROOM[0], ROOM[1]
Q = 1e-3
COMMON = {
    2: {"end-wall midpoints": [(0, Ly / 2, 0), (Lx, Ly / 2, 0)],
        "side-wall midpoints": [(Lx / 2, 0, 0), (Lx / 2, Ly, 0)]},
    4: {"four wall midpoints": [(0, Ly / 2, 0), (Lx, Ly / 2, 0), (Lx / 2, 0, 0), (Lx / 2, Ly, 0)],
        "four corners": [(0, 0, 0), (Lx, 0, 0), (0, Ly, 0), (Lx, Ly, 0)]},
}
SEATINGS = {
    "centred": np.array([(x, y, 1.2) for x in np.linspace(1.5, 3.5, 3)
                         for y in np.linspace(1.2, 2.4, 3)]),
    "rear": np.array([(x, y, 1.2) for x in np.linspace(2.8, 4.2, 3)
                      for y in np.linspace(0.9, 2.7, 3)]),
}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=float, default=2.0, help="cells per metre of the structured mesh")
    ap.add_argument("--n-frequencies", type=int, default=31)
    args = ap.parse_args()
    warnings.simplefilter("ignore", af.ResolutionWarning)
    mesh = structured_box(ROOM, args.n)
    walls = {n: af.Impedance(alpha=0.1) for n in ("x0", "x1", "y0", "y1", "z0", "z1")}
    xs, ys = np.linspace(0, Lx, 5), np.linspace(0, Ly, 5)
    cand = np.array([(x, y, 0.0) for x in xs for y in ys if x in (0, Lx) or y in (0, Ly)])
    asm = af.assemble(mesh, 2)
    out = dict(room_m=ROOM, cells_per_m=args.n, n_dofs=int(asm.n_dofs), n_candidates=len(cand),
               n_frequencies=args.n_frequencies, band_hz=[20.0, 100.0])

    # ---- timing: optimiser (modal) vs reference (direct transfer functions)
    seats = SEATINGS["rear"]
    t0 = time.perf_counter()
    r = af.optimise_placement(mesh, walls, candidates=cand, seats=seats, n_sources=2,
                              n_frequencies=args.n_frequencies, assembly=asm, gains=False,
                              delays=False)
    t_opt = time.perf_counter() - t0
    t0 = time.perf_counter()
    P = np.stack([af.solve_response(mesh, walls, sources=[af.PointSource(tuple(c), Q)],
                                    receivers=seats, frequencies=r.frequencies, method="direct",
                                    assembly=asm).pressure for c in cand], axis=-1)
    import itertools

    best = min(itertools.combinations(range(len(cand)), 2), key=lambda ij: af.layout_objective(
        20 * np.log10(np.abs(P[:, :, ij[0]] + P[:, :, ij[1]]) / (np.sqrt(2) * 20e-6))))
    t_ref = time.perf_counter() - t0
    out["timing"] = dict(optimiser_seconds=t_opt, reference_direct_seconds=t_ref,
                         speedup=t_ref / t_opt, same_choice=sorted(best) == sorted(
                             int(c) for c in r.layout.candidates),
                         optimiser_info={k: v for k, v in r.info.items()
                                         if isinstance(v, (int, float, str))})
    print(f"{asm.n_dofs} DOFs: optimiser {t_opt:.2f} s, direct reference {t_ref:.2f} s, "
          f"ratio {t_ref / t_opt:.2f}, same pair: {out['timing']['same_choice']}")

    # ---- figures: optimised vs common practice, by direct solves
    rows = []
    for seating, seats in SEATINGS.items():
        for ns in (2, 4):
            for obj in ("spread", "flat"):
                r = af.optimise_placement(mesh, walls, candidates=cand, seats=seats,
                                          n_sources=ns, objective=obj,
                                          n_frequencies=args.n_frequencies, assembly=asm,
                                          verify=True)
                row = dict(seating=seating, n_sources=ns, objective=obj,
                           optimised_modal_db=r.value, optimised_direct_db=r.info["direct_value"],
                           layout=dict(positions=r.layout.positions.tolist(),
                                       gains=r.layout.gains.tolist(),
                                       delays_ms=(1e3 * r.layout.delays).tolist()),
                           seconds=r.info["total_seconds"], common_practice={})
                for name, pos in COMMON[ns].items():
                    d = af.solve_response(mesh, walls, sources=[af.PointSource(p, Q) for p in pos],
                                          receivers=seats, frequencies=r.frequencies,
                                          method="direct", assembly=asm)
                    row["common_practice"][name] = af.layout_objective(d.spl, obj)
                best_cp = min(row["common_practice"].values())
                row["improvement_over_best_common_practice_db"] = best_cp - row[
                    "optimised_direct_db"]
                rows.append(row)
                cp = ", ".join(f"{k} {v:.2f}" for k, v in row["common_practice"].items())
                print(f"{seating:8s} {ns} src {obj:6s}: optimised {row['optimised_direct_db']:.2f}"
                      f" dB (modal {r.value:.2f}); common practice {cp}; gain "
                      f"{row['improvement_over_best_common_practice_db']:.2f} dB")
    out["comparison"] = rows
    print("saved", save(f"placement_n{args.n:g}", out))


if __name__ == "__main__":
    main()
