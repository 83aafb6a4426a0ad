"""End to end: assembly + the lowest 50 modes of a rigid box room.

    python bench/bench_modes.py --h 0.155 --reference     # ~100 k P2 DOFs
    python bench/bench_modes.py --scaling                 # time vs DOFs, 3+ sizes

The reference, run in the same process on the same mesh, is scikit-fem's
assembly followed by ``scipy.sparse.linalg.eigsh(K, 50, M, sigma=-1)`` with
its default settings (SuperLU).  Reports times, peak traced memory, their
ratios, and the largest relative eigenvalue difference.
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np

from _common import box_mesh, measured, save

SIZE = (5.2, 4.1, 2.8)


def ours(mesh, count, backend="auto"):
    import acoustic_fem as af

    t = {}
    with measured(t, "run"):
        modes = af.solve_modes(mesh, order=2, count=count, backend=backend)
    return modes, t["run"]


def reference(mesh, count):
    import scipy.sparse.linalg as spla
    import skfem
    from skfem.models.poisson import laplace, mass

    t = {}
    with measured(t, "run"):
        basis = skfem.Basis(skfem.MeshTet(mesh.points.T.copy(), mesh.cells.T.copy()),
                            skfem.ElementTetP2())
        K = laplace.assemble(basis)
        M = mass.assemble(basis)
        lam = spla.eigsh(K, count, M, sigma=-1.0, return_eigenvectors=False)
    return np.sort(lam), t["run"]


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--h", type=float, default=0.155)
    ap.add_argument("--count", type=int, default=50)
    ap.add_argument("--reference", action="store_true", help="also run scikit-fem + eigsh")
    ap.add_argument("--scaling", action="store_true", help="time vs DOFs over several sizes")
    ap.add_argument("--backend", default="auto")
    args = ap.parse_args()
    res = {}
    sizes = [0.3, 0.22, 0.155, 0.12] if args.scaling else [args.h]
    rows = []
    for h in sizes:
        mesh = box_mesh(Path(tempfile.gettempdir()) / f"bench_box_{h}.msh", SIZE, h)
        modes, t = ours(mesh, args.count, args.backend)
        row = dict(h=h, n_dofs=modes.dofs.n_dofs, seconds=t["seconds"], peak_mb=t["peak_mb"],
                   process_peak_rss_mb=t["process_peak_rss_mb"],
                   assembly_seconds=modes.info["assembly_seconds"],
                   eigen_seconds=modes.info["eigen_seconds"],
                   windows=modes.info["windows"])
        print(f"h={h}: {row['n_dofs']} P2 DOFs, {args.count} modes in {t['seconds']:.1f} s "
              f"(assembly {row['assembly_seconds']:.1f} s), peak {t['peak_mb']:.0f} MB, "
              f"engine {[w.get('engine') for w in row['windows']]}")
        if args.reference:
            lam_ref, tr = reference(mesh, args.count)
            lam = modes.eigenvalues
            scale = lam_ref.max()
            row.update(reference_seconds=tr["seconds"], reference_peak_mb=tr["peak_mb"],
                       speedup=tr["seconds"] / t["seconds"],
                       max_rel_eig_diff=float(np.max(np.abs(lam - lam_ref)) / scale))
            print(f"   reference (scikit-fem + eigsh default): {tr['seconds']:.1f} s, peak "
                  f"{tr['peak_mb']:.0f} MB; speed-up {row['speedup']:.1f}x; eigenvalues agree "
                  f"to {row['max_rel_eig_diff']:.1e} (relative to the largest)")
        rows.append(row)
    if len(rows) >= 3:
        n = np.array([r["n_dofs"] for r in rows], float)
        s = np.array([r["seconds"] for r in rows])
        res["time_exponent"] = float(np.polyfit(np.log(n), np.log(s), 1)[0])
        print(f"time grows as DOFs^{res['time_exponent']:.2f}")
    res["runs"] = rows
    name = "modes_scaling" if args.scaling else f"modes_h{args.h}"
    print("wrote", save(name, res))


if __name__ == "__main__":
    main()
