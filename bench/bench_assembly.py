"""Assembly of K and M: acoustic_fem against scikit-fem on the same mesh.

    python bench/bench_assembly.py [--h 0.09]

Reports, for P1 and P2 on a box mesh of >= 250 k tetrahedra, the wall time
and peak traced memory of both assemblers in the same process, and their
ratios (scikit-fem / acoustic_fem).  Also checks that both give the same
matrices (Frobenius norms).
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import scipy.sparse.linalg as spla

from _common import box_mesh, measured, save


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--h", type=float, default=0.095, help="mesh size of the 5.2x4.1x2.8 m box")
    args = ap.parse_args()
    import skfem
    from skfem.models.poisson import laplace, mass

    import acoustic_fem as af

    tmp = Path(tempfile.gettempdir()) / f"bench_box_{args.h}.msh"
    mesh = box_mesh(tmp, (5.2, 4.1, 2.8), args.h)
    print(f"mesh: {mesh.n_cells} tetrahedra, {mesh.n_points} nodes")
    sk_mesh = skfem.MeshTet(mesh.points.T.copy(), mesh.cells.T.copy())
    res = dict(n_tets=mesh.n_cells)
    for order, el in ((1, skfem.ElementTetP1()), (2, skfem.ElementTetP2())):
        t = {}
        # best of two runs each (the first pays page faults and caches)
        for rep in range(2):
            fresh = af.Mesh(mesh.points, mesh.cells, mesh.cell_type)  # no cached topology,
            with measured(t, f"ours{rep}"):                      # like skfem's MeshTet
                a = af.assemble(fresh, order)
            with measured(t, f"skfem{rep}"):
                basis = skfem.Basis(sk_mesh, el)
                K = laplace.assemble(basis)
                M = mass.assemble(basis)
        for who in ("ours", "skfem"):
            t[who] = min((t[f"{who}0"], t[f"{who}1"]), key=lambda r: r["seconds"])
        dk = abs(spla.norm(K) - spla.norm(a.K)) / spla.norm(K)
        dm = abs(spla.norm(M) - spla.norm(a.M)) / spla.norm(M)
        r = dict(n_dofs=a.n_dofs, ours=t["ours"], skfem=t["skfem"],
                 time_ratio=t["skfem"]["seconds"] / t["ours"]["seconds"],
                 memory_ratio=t["skfem"]["peak_mb"] / t["ours"]["peak_mb"],
                 frobenius_rel_diff_K=dk, frobenius_rel_diff_M=dm)
        res[f"P{order}"] = r
        print(f"P{order}: {a.n_dofs} DOFs; ours {t['ours']['seconds']:.2f} s "
              f"{t['ours']['peak_mb']:.0f} MB; scikit-fem {t['skfem']['seconds']:.2f} s "
              f"{t['skfem']['peak_mb']:.0f} MB; time ratio {r['time_ratio']:.1f}x, memory "
              f"ratio {r['memory_ratio']:.1f}x; |K|,|M| agree to {max(dk, dm):.1e}")
        del a, K, M, basis
    print("wrote", save("assembly", res))


if __name__ == "__main__":
    main()
