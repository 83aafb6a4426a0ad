"""Meshing speed, default sizing and the cost model.

    python bench/bench_meshing.py                 # Delaunay vs HXT + default sizing
    python bench/bench_meshing.py --fmax 260      # bigger room mesh (more tetrahedra)
    python bench/bench_meshing.py --calibrate     # refit / check the cost model

1. Meshing time per million tetrahedra of gmsh's 3D Delaunay
   (``Mesh.Algorithm3D = 1``) against its HXT algorithm (10), both in this
   process on the same room and mesh size, one thread each; peak resident
   memory of each (``VmHWM`` after resetting it through
   ``/proc/self/clear_refs``).
2. The builders' default sizing: elements per wavelength reached at fmax,
   modes below fmax, DOFs per mode and the largest relative error of those
   modes against the exact box modes (Morse & Ingard §9.4), for P1 and P2.
3. ``--calibrate``: mesh counts of builder boxes against the model of
   ``acoustic_fem._cost`` (least-squares refit printed), and the peak
   memory of ``solve_modes(fmax=...)`` in a fresh process per case against
   the estimate.

Results go to ``bench/results/meshing.json`` and
``bench/results/cost_calibration.json``.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from _common import save

ROOM = (5.2, 4.1, 2.8)  # our own test room (m)


def _hwm_reset() -> bool:
    try:
        Path("/proc/self/clear_refs").write_text("5")
        return True
    except OSError:
        return False


def _hwm_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def mesh_room(algorithm: int, h: float) -> dict:
    """Mesh ROOM at size h with one gmsh 3D algorithm; time and memory of generate(3)."""
    import gmsh

    gmsh.initialize(readConfigFiles=False, interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.NumThreads", 1)
        gmsh.model.add("bench")
        gmsh.model.occ.addBox(0, 0, 0, *ROOM)
        gmsh.model.occ.synchronize()
        gmsh.option.setNumber("Mesh.MeshSizeMax", h)
        gmsh.option.setNumber("Mesh.MeshSizeMin", 0.3 * h)
        gmsh.option.setNumber("Mesh.Algorithm3D", algorithm)
        gmsh.model.mesh.generate(2)
        reset = _hwm_reset()
        before = _hwm_mb()
        t0 = time.perf_counter()
        gmsh.model.mesh.generate(3)
        dt = time.perf_counter() - t0
        peak = _hwm_mb()
        _, tags, _ = gmsh.model.mesh.getElements(3)
        n = int(sum(len(t) for t in tags))
    finally:
        gmsh.finalize()
    return dict(algorithm=algorithm, tetrahedra=n, seconds=dt,
                seconds_per_million=dt / n * 1e6, tets_per_second=n / dt,
                peak_rss_mb=peak if reset else float("nan"),
                rss_before_mb=before if reset else float("nan"),
                bytes_per_tet=(peak - before) * 2**20 / n if reset else float("nan"))


def default_sizing(fmax_box: float) -> list[dict]:
    """Resolution, DOFs per mode and accuracy of the builders' default sizing."""
    import acoustic_fem as af
    from acoustic_fem.geometry import box

    rows = []
    c = af.Air().c
    exact = af.analytic.box_modes(ROOM, c=c, fmax=fmax_box).frequencies
    for order in (2, 1):
        t0 = time.perf_counter()
        mesh = box(ROOM, fmax=fmax_box, order=order)
        t_mesh = time.perf_counter() - t0
        rep = af.mesh_report(mesh, fmax=fmax_box)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", af.ResolutionWarning)
            modes = af.solve_modes(mesh, order=order, fmax=fmax_box * 1.01)
        fe = modes.frequencies[: len(exact)]
        rel = np.abs(fe[1:] / exact[1:] - 1.0)
        n_below = int(np.count_nonzero(modes.frequencies <= fmax_box))
        rows.append(dict(
            order=order, fmax=fmax_box, tetrahedra=mesh.n_cells, n_dofs=modes.dofs.n_dofs,
            elements_per_wavelength=rep.elements_per_wavelength,
            elements_per_wavelength_max_edge=rep.elements_per_wavelength_max_edge,
            modes_below_fmax=n_below, exact_modes_below_fmax=len(exact),
            weyl_modes=rep.modes_below_fmax, dofs_per_mode=modes.dofs.n_dofs / n_below,
            max_rel_error=float(rel.max()), rel_error_at_top=float(rel[-1]),
            mesh_seconds=t_mesh, solve_seconds=modes.info["total_seconds"],
            quality_min=rep.quality_min, quality_mean=rep.quality_mean,
            dihedral_min_deg=rep.angle_min_deg, dihedral_max_deg=rep.angle_max_deg,
        ))
        r = rows[-1]
        print(f"P{order} default sizing at {fmax_box:g} Hz: {r['tetrahedra']} tets, "
              f"{r['n_dofs']} DOFs, {r['elements_per_wavelength']:.2f} elements/wavelength "
              f"(mean edge), {n_below} modes (exact {len(exact)}), "
              f"{r['dofs_per_mode']:.0f} DOFs/mode, max rel error {r['max_rel_error']:.2e}")
    return rows


# -------------------------------------------------------------- calibration
SHAPES = [(5.2, 4.1, 2.8), (3.0, 3.0, 3.0), (8.0, 2.0, 2.5), (10.0, 7.0, 3.5)]


def count_fit() -> dict:
    """Fit count = a V/h³ + b S/h² + c √S/h (relative least squares) on builder boxes.

    The boxes are meshed with first-order geometry (the counts do not depend
    on the geometry order, only on h); h = mesh_size(fmax, order=1).
    """
    from acoustic_fem import _cost
    from acoustic_fem.geometry import box, mesh_size

    rows = []
    for size in SHAPES:
        V = float(np.prod(size))
        S = 2 * (size[0] * size[1] + size[1] * size[2] + size[0] * size[2])
        for fmax in (30, 45, 60, 90, 120, 160, 220):
            h = mesh_size(fmax, order=1)
            if V / h**3 > 400000:  # about 1.6 M tetrahedra
                continue
            m = box(size, fmax=fmax, order=1)
            est = _cost.estimate_cost(V, S, fmax=fmax, order=2, h=h)
            nv = int(np.unique(m.vertices).size)
            rows.append(dict(size=size, fmax=fmax, h=h, x=V / h**3, y=S / h**2,
                             z=math.sqrt(S) / h, cells=m.n_cells, vertices=nv,
                             boundary_facets=len(m.boundary_facets), edges=len(m.edges),
                             est_cells=est.n_cells, est_p2_dofs=est.n_dofs,
                             p2_dofs=nv + len(m.edges)))
    X = np.array([[r["x"], r["y"], r["z"]] for r in rows])
    fit = {}
    for key in ("cells", "vertices", "boundary_facets"):
        y = np.array([r[key] for r in rows], float)
        coef, *_ = np.linalg.lstsq(X / y[:, None], np.ones(len(y)), rcond=None)
        fit[key] = coef.tolist()
        print(f"{key}: a = {coef[0]:.4f}, b = {coef[1]:.4f}, c = {coef[2]:.3f}, max rel err "
              f"{np.max(np.abs(X @ coef / y - 1)):.3f}")
    d = np.array([r["est_p2_dofs"] / r["p2_dofs"] for r in rows])
    e = np.array([r["est_cells"] / r["cells"] for r in rows])
    print(f"current model: predicted/measured P2 DOFs in [{d.min():.3f}, {d.max():.3f}], "
          f"cells in [{e.min():.3f}, {e.max():.3f}] over {len(rows)} meshes of "
          f"{min(r['cells'] for r in rows)}-{max(r['cells'] for r in rows)} tetrahedra")
    return dict(rows=rows, fit=fit, p2_dof_ratio=[float(d.min()), float(d.max())],
                cell_ratio=[float(e.min()), float(e.max())])


_CHILD = r"""
import json, sys, time, warnings
def hwm():  # peak resident MB of this process image (ru_maxrss would include the parent's)
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
size = tuple(json.loads(sys.argv[1])); fmax = float(sys.argv[2]); order = int(sys.argv[3])
import acoustic_fem as af
from acoustic_fem.geometry import box
t0 = time.perf_counter()
m = box(size, fmax=fmax, order=order)
t_mesh = time.perf_counter() - t0
mesh_mb = hwm()
with warnings.catch_warnings():
    warnings.simplefilter("ignore", af.ResolutionWarning)
    modes = af.solve_modes(m, order=order, fmax=fmax)
print(json.dumps(dict(n_cells=m.n_cells, n_dofs=modes.dofs.n_dofs, n_modes=len(modes),
                      mesh_rss_mb=mesh_mb, t_mesh=t_mesh, t_solve=modes.info["total_seconds"],
                      peak_rss_mb=hwm(),
                      windows=[w.get("nev") for w in modes.info["windows"]])))
"""


def memory_check(cases) -> list[dict]:
    """Peak RSS of box + solve_modes(fmax) in a fresh process per case, against the estimate."""
    from acoustic_fem import _cost

    rows = []
    for size, fmax, order in cases:
        out = subprocess.run([sys.executable, "-c", _CHILD, json.dumps(size), str(fmax),
                              str(order)], capture_output=True, text=True, check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        V = float(np.prod(size))
        S = 2 * (size[0] * size[1] + size[1] * size[2] + size[0] * size[2])
        est = _cost.estimate_cost(V, S, fmax=fmax, order=order)
        r.update(size=size, fmax=fmax, order=order, est_dofs=est.n_dofs,
                 est_peak_mb=est.peak_bytes / 2**20, est_modes=est.n_modes,
                 est_seconds=est.seconds["meshing"] + est.seconds["solve"],
                 dof_ratio=est.n_dofs / r["n_dofs"],
                 memory_ratio=est.peak_bytes / 2**20 / r["peak_rss_mb"])
        rows.append(r)
        print(f"P{order} fmax {fmax:g}: {r['n_dofs']} DOFs (est {est.n_dofs}), {r['n_modes']} "
              f"modes (est {est.n_modes:.0f}), peak {r['peak_rss_mb']:.0f} MB (est "
              f"{r['est_peak_mb']:.0f}), {r['t_mesh'] + r['t_solve']:.0f} s (est "
              f"{r['est_seconds']:.0f})")
    return rows


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--fmax", type=float, default=300.0,
                    help="P2 builder sizing of the room for the Delaunay/HXT comparison")
    ap.add_argument("--sizing-fmax", type=float, default=200.0)
    ap.add_argument("--calibrate", action="store_true")
    args = ap.parse_args()
    if args.calibrate:
        cases = [(ROOM, f, 2) for f in (100, 150, 200, 250, 300)] + \
                [(ROOM, f, 1) for f in (80, 100, 120)] + [((10.0, 7.0, 3.5), 150, 2)]
        res = dict(memory=memory_check(cases))  # first: the children start from a small parent
        res["counts"] = count_fit()
        print("wrote", save("cost_calibration", res))
        return
    from acoustic_fem.geometry import mesh_size

    h = mesh_size(args.fmax, order=1)  # P1 sizing: a fine mesh of the room
    res = dict(room=ROOM, h=h, note="2 cores shared with other jobs; one gmsh thread")
    runs = []
    for alg in (10, 1):  # HXT, then Delaunay
        r = mesh_room(alg, h)
        runs.append(r)
        name = {1: "Delaunay", 10: "HXT"}[alg]
        print(f"{name:8s}: {r['tetrahedra']} tets in {r['seconds']:.1f} s = "
              f"{r['seconds_per_million']:.1f} s per million ({r['tets_per_second']:.0f} tets/s), "
              f"peak RSS {r['peak_rss_mb']:.0f} MB ({r['bytes_per_tet']:.0f} B/tet over the "
              "surface mesh)")
    res["algorithms"] = runs
    res["hxt_speedup"] = runs[1]["seconds_per_million"] / runs[0]["seconds_per_million"]
    print(f"HXT is {res['hxt_speedup']:.1f}x faster per tetrahedron")
    res["default_sizing"] = default_sizing(args.sizing_fmax)
    print("wrote", save("meshing", res))


if __name__ == "__main__":
    main()
