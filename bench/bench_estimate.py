"""Cost of the a-posteriori error estimate against the solve it accompanies.

    python bench/bench_estimate.py                 # ~100 k P2 DOFs, lowest 50 modes
    python bench/bench_estimate.py --h 0.2         # smaller

Solves the lowest ``--count`` modes of a rigid box room with P2 elements
(:func:`acoustic_fem.solve_modes`), then estimates their errors
(:func:`acoustic_fem.estimate.estimate_errors`: hierarchical P3 enrichment,
W-block CG solves, Rayleigh–Ritz), and reports both times, their ratio
(target: estimate <= 1.5x the solve) and the split of the estimate's time.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

from _common import box_mesh, measured, save

SIZE = (5.2, 4.1, 2.8)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--h", type=float, default=0.155)
    ap.add_argument("--count", type=int, default=50)
    ap.add_argument("--indicators", action="store_true", help="also the element-wise indicators")
    args = ap.parse_args()

    import acoustic_fem as af
    from acoustic_fem.estimate import estimate_errors

    mesh = box_mesh(Path(tempfile.gettempdir()) / f"bench_box_{args.h}.msh", SIZE, args.h)
    t = {}
    with measured(t, "solve"):
        modes = af.solve_modes(mesh, order=2, count=args.count)
    with measured(t, "estimate"):
        err = estimate_errors(modes, indicators=args.indicators)
    exact = af.analytic.box_modes(SIZE, c=modes.air.c, count=args.count).frequencies
    nz = exact > 0
    true = modes.frequencies[nz] / exact[nz] - 1.0
    eff = err.frequency_errors[nz] / true
    row = dict(h=args.h, n_dofs=modes.dofs.n_dofs, n_w=err.info["n_w"], count=args.count,
               solve_seconds=t["solve"]["seconds"], estimate_seconds=t["estimate"]["seconds"],
               ratio=t["estimate"]["seconds"] / t["solve"]["seconds"],
               estimate_assembly_seconds=err.info["assembly_seconds"],
               estimate_cg_seconds=err.info["solve_seconds"],
               cg_max_iterations=err.info["cg_max_iterations"],
               solve_peak_mb=t["solve"]["peak_mb"], estimate_peak_mb=t["estimate"]["peak_mb"],
               process_peak_rss_mb=t["estimate"]["process_peak_rss_mb"],
               effectivity_min=float(eff.min()), effectivity_max=float(eff.max()),
               true_error_max=float(np.abs(true).max()),
               corrected_error_max=float(np.abs(err.corrected_frequencies[nz] / exact[nz]
                                                - 1.0).max()))
    print(f"{row['n_dofs']} P2 DOFs ({row['n_w']} enrichment functions), {args.count} modes: "
          f"solve {row['solve_seconds']:.1f} s, estimate {row['estimate_seconds']:.1f} s "
          f"(ratio {row['ratio']:.2f}; enriched assembly {row['estimate_assembly_seconds']:.1f} s, "
          f"CG {row['estimate_cg_seconds']:.1f} s, {row['cg_max_iterations']} iterations); "
          f"effectivity {row['effectivity_min']:.2f}-{row['effectivity_max']:.2f}; "
          f"largest error raw {row['true_error_max']:.2e}, corrected "
          f"{row['corrected_error_max']:.2e}")
    print("saved", save("estimate", row))


if __name__ == "__main__":
    main()
