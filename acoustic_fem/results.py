"""The results folder of a scenario run: tables, VTK files, plots and an HTML report.

:func:`write_results` writes everything into a temporary folder beside the
destination and moves it into place only when complete
(:func:`acoustic_fem._atomic.atomic_folder`): an interrupted or failed run
leaves no partial folder, and an existing folder is replaced only when asked.

Layout (``OUT/``)::

    <scenario>.toml            the scenario file, copied verbatim
    modes.csv, modes.json      the modes table (same content; JSON uses null for ∞);
                               with an error estimate also estimated_relative_error
                               and corrected_frequency_hz (:data:`ESTIMATE_COLUMNS`)
    modes.pvd, vtk/mode_NNN.vtu
                               one VTK file per mode, collected so that a viewer
                               steps through the modes (the "time" is the frequency);
                               with an estimate, cell data estimated_error_indicator
    response.pvd, vtk/response_NNN.vtu
                               the forced-response field on the whole mesh at the
                               SPL-map frequencies, one file each (real arrays:
                               pressure_real_pa, pressure_imag_pa,
                               pressure_magnitude_pa, spl_db), collected likewise
    modes_at_receivers.csv     |mode shape| at each receiver, relative to its maximum
    spl_at_receivers.csv       SPL (dB re 20 µPa) at each receiver over the sweep
    seat_statistics.csv        mean / min / max / spread / standard deviation over seats
    pressure_at_receivers.json complex pressure amplitudes at the receivers
    plots/*.png                the figures of the report
    report.html                self-contained report (images embedded, no external resource)
    summary.txt                a short text summary
    run.json                   versions, timings, solver details, input checksums

The response files appear when the scenario has sources and receivers and
the response solver is available; plots and VTK files can be switched off
in ``[outputs]``.
"""

from __future__ import annotations

import base64
import csv
import hashlib
import html
import io
import json
import math
import platform
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from ._atomic import atomic_folder, atomic_path
from ._errors import InputError

__all__ = [
    "MODE_COLUMNS",
    "ESTIMATE_COLUMNS",
    "write_results",
    "modes_table",
    "box_mode_types",
    "write_pvd",
    "write_field_vtus",
    "RESPONSE_ARRAYS",
    "render_report",
    "export_results",
    "EXPORT_FORMATS",
]

#: Columns of the modes table and their meaning (units in the names).
MODE_COLUMNS = {
    "index": "mode number, from 0 in ascending frequency",
    "frequency_hz": "eigenfrequency (Hz)",
    "decay_rate_per_s": "decay rate δ of the mode's pressure, e^{-δt} (1/s)",
    "t60_s": "modal reverberation time 3 ln(10)/δ (s; inf/null without absorption)",
    "q": "quality factor ω/(2δ) (inf/null without absorption)",
    "mode_type": "axial / tangential / oblique (box geometries only; 'uniform' is the 0 Hz mode)",
    "box_indices": "mode indices (nx, ny, nz) of the matching analytic box mode",
    "elements_per_wavelength": "wavelength / mean edge length at this frequency",
    "estimated_error_percent": "discretisation error estimate from the 1D dispersion of the "
                               "elements ((kh)^4/1440 for P2, (kh)^2/24 for P1)",
}

#: Columns added to the modes table when the modes carry an a-posteriori error
#: estimate (``solve_modes(estimate=True)`` or ``tol=``; scenario ``[solver]
#: estimate_errors`` / ``[frequencies] error_target``); empty (CSV) or null
#: (JSON) where the estimate is not available (damped modes).
ESTIMATE_COLUMNS = {
    "estimated_relative_error": "a-posteriori estimate of this mode's relative frequency error "
                                "(f_h - f)/f, hierarchical P(p)->P(p+1) enrichment (Bank & "
                                "Smith, SIAM J. Numer. Anal. 30(4), 1993)",
    "corrected_frequency_hz": "corrected eigenfrequency (Hz): the enriched-space P(p+1) "
                              "Rayleigh-Ritz value, usually more accurate than frequency_hz; "
                              "an estimate, not the solved value",
    "estimated_decay_rate_error": "a-posteriori estimate of the relative decay-rate error "
                                  "|d_h - d|/d (damped modes; 0 without absorption, where the "
                                  "decay rate 0 is exact)",
    "corrected_decay_rate_per_s": "corrected decay rate (1/s), the enriched-space value beside "
                                  "decay_rate_per_s; an estimate, not the solved value",
}


# ==========================================================================
# tables
# ==========================================================================
def _finite_or_none(x: float):
    return None if not math.isfinite(x) else float(x)


def box_mode_types(sol) -> tuple[list[str], list[str]] | None:
    """Axial / tangential / oblique type of each mode of a box scenario.

    Each finite-element mode is matched to the analytic box mode
    (:func:`acoustic_fem.analytic.box_modes`, Morse & Ingard §9.4) whose
    shape it correlates with best in the mass-matrix inner product; the type
    is that mode's (one, two or three nonzero wavenumber components).
    Pressure-release faces keep their condition; every other face is taken
    as rigid for the matching (absorbing walls shift frequencies but hardly
    change the shapes).

    Returns
    -------
    (types, indices) lists of str, one per mode, or None if the geometry is
    not a box.
    """
    from .analytic import box_modes
    from .assembly import assemble
    from .scenario import GeometryKind

    sc, modes = sol.scenario, sol.modes
    geo = sc.geometry
    if geo.kind is not GeometryKind.BUILDER or geo.builder != "box" or len(modes) == 0:
        return None
    size = tuple(float(v) for v in geo.params["size"])
    conds = {}
    for face in ("x0", "x1", "y0", "y1", "z0", "z1"):
        w = sol.walls.get(geo.rename.get(face, face))
        conds[face] = "pressure_release" if getattr(w, "fixes_pressure", False) else "rigid"
    fmax = float(np.max(modes.frequencies))
    ref = box_modes(size, c=modes.air.c, walls=conds, fmax=1.25 * fmax + 5.0)
    if len(ref) == 0:
        return None
    pts = modes.dofs.points
    S = ref.shape(pts)                                   # (n_dofs, n_ref)
    M = assemble(modes.mesh, modes.order).mass
    F = np.asarray(modes.shapes)                         # (n_dofs, n_modes)
    MS = M @ S
    G = F.conj().T @ MS                                   # (n_modes, n_ref)
    nF = np.sqrt(np.abs(np.einsum("ij,ij->j", F.conj(), M @ F)))
    nS = np.sqrt(np.abs(np.einsum("ij,ij->j", S, MS)))
    corr = np.abs(G) / np.maximum(np.outer(nF, nS), 1e-300)
    best = corr.argmax(axis=1)
    types = [str(ref.kind[j]) for j in best]
    idx = ["(" + ", ".join(str(int(v)) for v in ref.indices[j]) + ")" for j in best]
    return types, idx


def modes_table(sol) -> list[dict]:
    """One dict per mode with the :data:`MODE_COLUMNS` (floats; inf for no absorption)."""
    from .scenario import dispersion_error

    m = sol.modes
    epw = m.elements_per_wavelength()
    err = 100.0 * np.where(np.isfinite(epw), dispersion_error(np.where(np.isfinite(epw), epw, 1.0),
                                                              m.order), 0.0)
    kinds = box_mode_types(sol)
    rows = []
    for i in range(len(m)):
        rows.append({
            "index": i,
            "frequency_hz": float(m.frequencies[i]),
            "decay_rate_per_s": float(m.decay_rates[i]),
            "t60_s": float(m.t60[i]),
            "q": float(m.quality_factors[i]),
            "mode_type": kinds[0][i] if kinds else "",
            "box_indices": kinds[1][i] if kinds else "",
            "elements_per_wavelength": float(epw[i]),
            "estimated_error_percent": float(err[i]),
        })
    if getattr(m, "errors", None) is not None:  # the a-posteriori estimate, when attached
        cols = m.errors.columns()  # name -> (n_modes,), the ESTIMATE_COLUMNS
        for i, r in enumerate(rows):
            r.update({k: float(cols[k][i]) for k in ESTIMATE_COLUMNS})
    return rows


def _has_estimate(rows) -> bool:
    return bool(rows) and "estimated_relative_error" in rows[0]


def _fmt(x: float, digits: int = 6) -> str:
    if isinstance(x, str):
        return x
    if isinstance(x, int):
        return str(x)
    if math.isinf(x):
        return "inf"
    return f"{x:.{digits}g}"


def _write_modes_csv(path: Path, rows: list[dict]) -> None:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        est = _has_estimate(rows)
        w.writerow(list(MODE_COLUMNS) + (list(ESTIMATE_COLUMNS) if est else []))
        for r in rows:
            extra = ([_fmt_est(r["estimated_relative_error"], 4),
                      _fmt_est(r["corrected_frequency_hz"], 9),
                      _fmt_est(r["estimated_decay_rate_error"], 4),
                      _fmt_est(r["corrected_decay_rate_per_s"], 9)] if est else [])
            w.writerow([_fmt(r["index"]), _fmt(r["frequency_hz"], 9), _fmt(r["decay_rate_per_s"]),
                        _fmt(r["t60_s"]), _fmt(r["q"]), r["mode_type"], r["box_indices"],
                        _fmt(r["elements_per_wavelength"], 4),
                        _fmt(r["estimated_error_percent"], 3)] + extra)


def _fmt_est(x: float, digits: int) -> str:
    """An estimate for the CSV: empty where not available (NaN), never a made-up number."""
    return "" if math.isnan(x) else _fmt(x, digits)


def _round(x: float, digits: int):
    if not math.isfinite(x):
        return None
    return float(f"{x:.{digits}g}")


def _write_modes_json(path: Path, rows: list[dict], sol) -> None:
    est = _has_estimate(rows)
    out = {
        "title": sol.scenario.title,
        "columns": {**MODE_COLUMNS, **(ESTIMATE_COLUMNS if est else {})},
        "note": "null stands for infinity (no absorption)" + (
            "; in the estimate columns, null means not available (damping = "
            "'perturbation', or the relative frequency error of a near-0 Hz damped mode)."
            if est else "."),
        "element_order": sol.modes.order,
        "speed_of_sound_m_s": _round(sol.modes.air.c, 9),
        "modes": [{
            "index": r["index"],
            "frequency_hz": _round(r["frequency_hz"], 9),
            "decay_rate_per_s": _round(r["decay_rate_per_s"], 6),
            "t60_s": _round(r["t60_s"], 6),
            "q": _round(r["q"], 6),
            "mode_type": r["mode_type"] or None,
            "box_indices": r["box_indices"] or None,
            "elements_per_wavelength": _round(r["elements_per_wavelength"], 4),
            "estimated_error_percent": _round(r["estimated_error_percent"], 3),
            **({"estimated_relative_error": _round(r["estimated_relative_error"], 4),
                "corrected_frequency_hz": _round(r["corrected_frequency_hz"], 9),
                "estimated_decay_rate_error": _round(r["estimated_decay_rate_error"], 4),
                "corrected_decay_rate_per_s": _round(r["corrected_decay_rate_per_s"], 9)}
               if est else {}),
        } for r in rows],
    }
    if est:
        out["error_estimate_method"] = sol.modes.errors.method
    path.write_text(json.dumps(out, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")


def _receiver_mode_amplitudes(sol) -> np.ndarray:
    """(n_modes, n_r) |p_i(x_r)| / max over the DOFs of |p_i|."""
    from .scenario import sample_field

    sc, m = sol.scenario, sol.modes
    if not sc.receivers or len(m) == 0:
        return np.zeros((len(m), 0))
    vals = sample_field(m.dofs, np.asarray(m.shapes), sc.receiver_positions)  # (n_r, n_modes)
    peak = np.max(np.abs(np.asarray(m.shapes)), axis=0)
    return (np.abs(vals) / np.maximum(peak, 1e-300)[None, :]).T


def _seat_indices(sc) -> np.ndarray:
    """Receivers counted as seats: those of seat grids, else every receiver."""
    idx = [i for i, r in enumerate(sc.receivers) if r.group]
    return np.array(idx if idx else range(len(sc.receivers)), dtype=int)


def _seat_stats(spl: np.ndarray) -> dict:
    """Statistics over seats of an (n_f, n_seats) SPL array (dB)."""
    energy = 10.0 * np.log10(np.mean(10.0 ** (spl / 10.0), axis=1))
    return {
        "mean_db": np.mean(spl, axis=1),
        "energy_mean_db": energy,
        "min_db": np.min(spl, axis=1),
        "max_db": np.max(spl, axis=1),
        "spread_db": np.max(spl, axis=1) - np.min(spl, axis=1),
        "std_db": np.std(spl, axis=1),
    }


# ==========================================================================
# VTK
# ==========================================================================
def write_pvd(path, entries: Sequence[tuple[float, str, str]], *, overwrite=False) -> Path:
    """Write a ParaView-style collection (.pvd) of VTK files.

    Parameters
    ----------
    path : str or Path
    entries : sequence of (timestep, relative file, name)
        A viewer steps through the files in timestep order; the modes use
        their frequency in Hz as the timestep, so the viewer's time display
        reads the frequency.  Equal frequencies (degenerate modes) are kept
        apart by 1e-6 Hz, as a collection needs distinct timesteps.
    """
    lines = ['<?xml version="1.0"?>',
             '<VTKFile type="Collection" version="0.1" byte_order="LittleEndian">',
             "<Collection>"]
    last = -math.inf
    for t, file, name in entries:
        t = max(float(t), last + 1e-6)
        last = t
        lines.append(f'<DataSet timestep="{t:.9g}" group="" part="0" '
                     f'file="{html.escape(file, quote=True)}" name="{html.escape(name, quote=True)}"/>')
    lines += ["</Collection>", "</VTKFile>", ""]
    p = Path(path)
    with atomic_path(p, overwrite=overwrite) as tmp:
        tmp.write_text("\n".join(lines), encoding="utf-8")
    return p


def _write_mode_vtus(folder: Path, sol, progress=None) -> list[str]:
    from .export import write_fields_vtu

    m = sol.modes
    (folder / "vtk").mkdir()
    entries = []
    files = []
    ind = getattr(m, "cell_indicators", None)  # (n_cells, n_modes) or None
    for i in range(len(m)):
        f = float(m.frequencies[i])
        rel = f"vtk/mode_{i:03d}.vtu"
        fd = {"frequency_hz": [f], "mode_index": [float(i)],
              "decay_rate_per_s": [float(m.decay_rates[i])]}
        if getattr(m, "errors", None) is not None:
            fd.update({k: [float(v[i])] for k, v in m.errors.columns().items()})
        # the element-wise indicator: each cell's share of this mode's
        # estimated relative frequency error (sums to estimated_relative_error)
        cd = None if ind is None else {"estimated_error_indicator": ind[:, i]}
        write_fields_vtu(folder / rel, m.dofs, {"mode_shape": np.asarray(m.shapes)[:, i]},
                         field_data=fd, cell_data=cd)
        entries.append((f, rel, f"mode {i}: {f:.2f} Hz"))
        files.append(rel)
        if progress:
            progress("writing", i + 1, len(m))
    write_pvd(folder / "modes.pvd", entries)
    return files


#: Point arrays of a response VTK file (all real; units in the names).
RESPONSE_ARRAYS = {
    "pressure_real_pa": "real part of the complex pressure amplitude p̂ (Pa, e^{+iωt})",
    "pressure_imag_pa": "imaginary part of p̂ (Pa)",
    "pressure_magnitude_pa": "|p̂| (Pa, amplitude; the rms value is |p̂|/√2)",
    "spl_db": "SPL of |p̂|/√2 re 20 µPa (dB; NaN where p̂ = 0, on pressure-release surfaces)",
}


def write_field_vtus(folder, field, *, prefix: str = "response") -> list[str]:
    """Write a PressureField as one .vtu per frequency and a .pvd collection.

    Files: ``<folder>/vtk/<prefix>_NNN.vtu`` (NNN counts the frequencies from
    0) and ``<folder>/<prefix>.pvd`` whose timesteps are the frequencies in
    Hz.  Each .vtu holds the real point arrays of :data:`RESPONSE_ARRAYS`
    (never a complex array) and the field data ``frequency_hz``.  Each file
    is written atomically; existing files are not overwritten.

    Parameters
    ----------
    folder : str or Path (an existing folder)
    field : PressureField (``pressure`` (n_k, n_dofs) complex)
    prefix : str

    Returns
    -------
    list of the relative paths written (the .vtu files, then the .pvd).
    """
    from .export import write_fields_vtu

    folder = Path(folder)
    (folder / "vtk").mkdir(exist_ok=True)
    P = np.asarray(field.pressure)
    spl = np.asarray(field.spl)
    entries, files = [], []
    for j, f in enumerate(np.asarray(field.frequencies, dtype=float)):
        rel = f"vtk/{prefix}_{j:03d}.vtu"
        write_fields_vtu(folder / rel, field.dofs, {
            "pressure_real_pa": P[j].real, "pressure_imag_pa": P[j].imag,
            "pressure_magnitude_pa": np.abs(P[j]), "spl_db": spl[j]},
            field_data={"frequency_hz": [float(f)]})
        entries.append((float(f), rel, f"response at {f:.2f} Hz"))
        files.append(rel)
    write_pvd(folder / f"{prefix}.pvd", entries)
    return files + [f"{prefix}.pvd"]


# ==========================================================================
# plots
# ==========================================================================
_TYPE_COLOURS = {"axial": "tab:blue", "tangential": "tab:orange", "oblique": "tab:green",
                 "uniform": "tab:gray", "": "tab:blue"}


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110)
    import matplotlib.pyplot as plt

    plt.close(fig)
    return buf.getvalue()


def _plt():
    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 10, "axes.titlesize": 11, "axes.labelsize": 10,
                         "figure.titlesize": 12})
    return plt


def plot_mode_frequencies(sol, rows) -> tuple[bytes, str]:
    """Mode frequencies with their decay (T60), coloured by type for boxes."""
    plt = _plt()
    f = np.array([r["frequency_hz"] for r in rows])
    t60 = np.array([r["t60_s"] for r in rows])
    types = [r["mode_type"] for r in rows]
    damped = np.isfinite(t60).any()
    fig, ax = plt.subplots(figsize=(9, 4.2), layout="constrained")
    if damped:
        y = np.where(np.isfinite(t60), t60, np.nan)
        ax.set_ylabel("modal T60 (s)")
        ax.set_ylim(0, np.nanmax(y) * 1.15 if np.isfinite(np.nanmax(y)) else 1)
    else:
        y = np.ones_like(f)
        ax.set_yticks([])
        ax.set_ylabel("(no absorption: T60 infinite)")
        ax.set_ylim(0, 1.3)
    seen = set()
    for fi, yi, ty in zip(f, y, types):
        lab = ty if (ty and ty not in seen) else None
        seen.add(ty)
        ax.vlines(fi, 0, yi if np.isfinite(yi) else 0, color=_TYPE_COLOURS.get(ty, "tab:blue"),
                  lw=2, label=lab)
        ax.plot([fi], [yi], "o", color=_TYPE_COLOURS.get(ty, "tab:blue"), ms=4)
    sc = sol.scenario
    ax.axvspan(sc.sweep.min_hz, sc.sweep.max_hz, color="0.93", zorder=-1)
    ax.set_xlim(-0.02 * sc.sweep.max_hz, sc.sweep.max_hz * 1.03)
    ax.set_xlabel("frequency (Hz)")
    ax.set_title(f"Room modes up to {sc.sweep.max_hz:g} Hz ({len(f)} modes)")
    if any(types):
        ax.legend(loc="upper left", fontsize=9, title="box mode type")
    ax.grid(True, axis="x", alpha=0.3)
    if len(f) <= 40:  # number the modes above their lines
        for i, (fi, yi) in enumerate(zip(f, y)):
            if np.isfinite(yi):
                ax.annotate(str(i), (fi, yi), textcoords="offset points", xytext=(0, 5),
                            ha="center", fontsize=7, color="0.3")
    cap = (f"Each line is an eigenfrequency of the room ({len(f)} up to {sc.sweep.max_hz:g} Hz); "
           + ("its height is the mode's reverberation time T60 = 3 ln(10)/δ. "
              if damped else "no surface absorbs in this model, so no mode decays. ")
           + "The shaded band is the frequency range of the sweep.")
    return _png(fig), cap


def _grid_image(sol, values: np.ndarray) -> np.ndarray:
    return sol.plane.grid(np.asarray(values, dtype=float))


def _extent(plane):
    xs, ys = plane.x, plane.y
    dx = xs[1] - xs[0] if len(xs) > 1 else 1.0
    dy = ys[1] - ys[0] if len(ys) > 1 else 1.0
    return (xs[0] - dx / 2, xs[-1] + dx / 2, ys[0] - dy / 2, ys[-1] + dy / 2)


def _plan_markers(ax, sc):
    if sc.sources:
        P = sc.source_positions
        ax.plot(P[:, 0], P[:, 1], "k^", ms=7, label="source")
    if sc.receivers:
        R = sc.receiver_positions
        ax.plot(R[:, 0], R[:, 1], "ko", ms=4, mfc="white", label="receiver / seat")


def plot_mode_slices(sol, rows) -> tuple[bytes, str] | None:
    """Mode shapes on the horizontal plane at ear height, lowest modes."""
    from .scenario import sample_field

    sc, m = sol.scenario, sol.modes
    sel = [i for i in range(len(m)) if m.frequencies[i] > 0.5][: sc.outputs.mode_slices]
    if not sel or len(sol.plane.points) == 0:
        return None
    plt = _plt()
    shapes = np.asarray(m.shapes)[:, sel]
    # a complex (damped) shape is rotated so that its largest value is real
    k = np.abs(shapes).argmax(axis=0)
    rot = shapes[k, np.arange(len(sel))]
    shapes = (shapes * np.exp(-1j * np.angle(rot))[None, :]).real if np.iscomplexobj(
        shapes) else shapes
    peak = np.max(np.abs(shapes), axis=0)
    vals = sample_field(m.dofs, shapes / peak[None, :], sol.plane.points)   # (n_m, n_sel)
    # each panel is scaled to its own largest value on the plane, so that a
    # mode weak at ear height still shows its pattern; that value, as a share
    # of the mode's maximum in the room, is written in the panel
    here = np.maximum(np.nanmax(np.abs(vals), axis=0), 1e-12)              # (n_sel,)
    vals = vals / here[None, :]
    ncol = min(3, len(sel))
    nrow = int(math.ceil(len(sel) / ncol))
    ext = _extent(sol.plane)
    aspect = (ext[3] - ext[2]) / max(ext[1] - ext[0], 1e-9)
    fig, axes = plt.subplots(nrow, ncol, figsize=(3.6 * ncol + 1.2, 3.3 * nrow * aspect + 1.0),
                             squeeze=False, layout="constrained")
    im = None
    for ax, j, i in zip(axes.flat, range(len(sel)), sel):
        im = ax.imshow(_grid_image(sol, vals[:, j]), origin="lower", extent=ext,
                       cmap="RdBu_r", vmin=-1, vmax=1, interpolation="nearest")
        _plan_markers(ax, sc)
        ty = rows[i]["mode_type"]
        ax.set_title(f"mode {i}: {m.frequencies[i]:.1f} Hz" + (f" ({ty})" if ty else ""))
        ax.text(0.02, 0.97, f"peak here {100 * here[j]:.0f} % of room max", transform=ax.transAxes,
                ha="left", va="top", fontsize=8,
                bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "0.6", "alpha": 0.85})
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
    for ax in list(axes.flat)[len(sel):]:
        ax.axis("off")
    fig.suptitle(f"Mode shapes at ear height z = {sol.plane.height:.2f} m")
    if im is not None:
        cb = fig.colorbar(im, ax=axes.ravel().tolist(), shrink=0.8)
        cb.set_label("relative pressure (largest on the plane = ±1)")
    cap = (f"Pressure of the lowest {len(sel)} modes on a horizontal plane at "
           f"{sol.plane.height:.2f} m, each scaled to its largest value on that plane; the box in "
           "each panel gives that value as a percentage of the mode's maximum anywhere in the "
           "room (a low percentage: the mode is weak at this height). Red and blue are opposite "
           "phase; white is a pressure node. Triangles: sources; circles: receivers.")
    return _png(fig), cap


def plot_seat_spl(sol) -> tuple[bytes, str]:
    """SPL at every receiver over the sweep."""
    plt = _plt()
    sc, r = sol.scenario, sol.response
    spl = np.asarray(r.spl)
    fig, ax = plt.subplots(figsize=(9, 4.8), layout="constrained")
    for j, rec in enumerate(sc.receivers):
        lw = 2.0 if not rec.group else 1.0
        ax.plot(sol.frequencies, spl[:, j], lw=lw, label=rec.name)
    for fm in sol.modes.frequencies:
        if sc.sweep.min_hz <= fm <= sc.sweep.max_hz:
            ax.axvline(fm, color="0.8", lw=0.8, zorder=-1)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("SPL (dB re 20 µPa)")
    ax.set_title("Sound pressure level at each receiver")
    ax.set_xlim(sc.sweep.min_hz, sc.sweep.max_hz)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, ncol=2 if len(sc.receivers) > 8 else 1, loc="best")
    cap = ("SPL at every receiver and seat for the sources as given (volume velocities and "
           "phases of the scenario), against frequency; thin grey lines mark the eigenfrequencies.")
    return _png(fig), cap


def plot_seat_spread(sol) -> tuple[bytes, str]:
    """Seat-to-seat spread (max - min) and standard deviation over the seats."""
    plt = _plt()
    sc = sol.scenario
    seats = _seat_indices(sc)
    st = _seat_stats(np.asarray(sol.response.spl)[:, seats])
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(9, 5.6), sharex=True, layout="constrained",
                                 gridspec_kw={"height_ratios": [1.4, 1]})
    a1.fill_between(sol.frequencies, st["min_db"], st["max_db"], color="tab:blue", alpha=0.25,
                    label="range over seats")
    a1.plot(sol.frequencies, st["energy_mean_db"], color="tab:blue", lw=1.8,
            label="energy mean over seats")
    a1.set_ylabel("SPL (dB re 20 µPa)")
    a1.set_title(f"Seat-to-seat variation over {len(seats)} seats")
    a1.grid(True, alpha=0.3)
    a1.legend(fontsize=8)
    a2.plot(sol.frequencies, st["spread_db"], color="tab:red", lw=1.5, label="max − min")
    a2.plot(sol.frequencies, st["std_db"], color="tab:purple", lw=1.2, label="standard deviation")
    a2.set_xlabel("frequency (Hz)")
    a2.set_ylabel("spread (dB)")
    a2.set_xlim(sc.sweep.min_hz, sc.sweep.max_hz)
    a2.grid(True, alpha=0.3)
    a2.legend(fontsize=8)
    cap = ("Top: the band between the quietest and the loudest seat, and the energy mean over "
           "the seats. Bottom: the spread (loudest minus quietest seat) and the standard "
           "deviation across seats, in dB, against frequency.")
    return _png(fig), cap


def map_frequencies(sol) -> list[float]:
    """Frequencies of the SPL maps: outputs.map_frequencies_hz, else the sweep
    frequencies nearest the three lowest nonzero modes in the sweep
    (:func:`acoustic_fem.scenario.map_frequencies`)."""
    from .scenario import map_frequencies as _map_frequencies

    return _map_frequencies(sol.scenario, sol.modes.frequencies, sol.frequencies)


def plot_spl_map(sol) -> tuple[bytes, str] | None:
    """SPL maps at ear height: the energy average over the sweep and single frequencies."""
    if sol.map_pressure is None or len(sol.plane.points) == 0:
        return None
    from .scenario import spl_db

    plt = _plt()
    sc = sol.scenario
    L = spl_db(sol.map_pressure)                                    # (n_f, n_m)
    panels = [("energy average " + f"{sc.sweep.min_hz:g}–{sc.sweep.max_hz:g} Hz",
               10.0 * np.log10(np.mean(10.0 ** (L / 10.0), axis=0)))]
    for fm in map_frequencies(sol):
        j = int(np.argmin(np.abs(sol.frequencies - fm)))
        panels.append((f"{sol.frequencies[j]:.1f} Hz", L[j]))
    ext = _extent(sol.plane)
    aspect = (ext[3] - ext[2]) / max(ext[1] - ext[0], 1e-9)
    ncol = min(2, len(panels))
    nrow = int(math.ceil(len(panels) / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(4.8 * ncol, 3.9 * nrow * aspect + 1.0),
                             squeeze=False, layout="constrained")
    for ax, (title, vals) in zip(axes.flat, panels):
        top = float(np.nanmax(vals))
        im = ax.imshow(_grid_image(sol, vals), origin="lower", extent=ext, cmap="viridis",
                       vmin=top - 30.0, vmax=top, interpolation="nearest")
        _plan_markers(ax, sc)
        ax.set_title(title)
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
        cb = fig.colorbar(im, ax=ax, shrink=0.85)
        cb.set_label("SPL (dB re 20 µPa)")
    for ax in list(axes.flat)[len(panels):]:
        ax.axis("off")
    fig.suptitle(f"SPL at ear height z = {sol.plane.height:.2f} m")
    cap = (f"Sound pressure level on a horizontal plane at {sol.plane.height:.2f} m: the energy "
           "average over the sweep, and at single frequencies (each panel's colour scale spans "
           "30 dB below its maximum). Triangles: sources; circles: receivers.")
    return _png(fig), cap


# ==========================================================================
# the HTML report
# ==========================================================================
_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Helvetica,Arial,sans-serif;margin:0;
 color:#1b1f23;background:#fff;line-height:1.45}
main{max-width:1000px;margin:0 auto;padding:24px}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:1px solid #ddd;padding-bottom:.2em;
 margin-top:1.8em}
table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
th,td{border:1px solid #d0d7de;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#f3f4f6}td.num{text-align:right;font-variant-numeric:tabular-nums}
.caution{background:#fff8e1;border:1px solid #e0b000;padding:10px 14px;border-radius:4px}
.note{background:#eef6ff;border:1px solid #8db8e8;padding:8px 12px;border-radius:4px;
 margin:.4em 0}
figure{margin:1.2em 0}figure img{max-width:100%;border:1px solid #eee}
figcaption{font-size:.9em;color:#444;margin-top:.3em}
pre{background:#f6f8fa;padding:10px;overflow-x:auto;font-size:.82em}
.muted{color:#666;font-size:.9em}
"""


def _e(x) -> str:
    return html.escape(str(x))


def _table(header: Sequence[str], rows: Sequence[Sequence], num_cols=()) -> str:
    out = ["<table><thead><tr>", *(f"<th>{_e(h)}</th>" for h in header), "</tr></thead><tbody>"]
    for r in rows:
        out.append("<tr>" + "".join(
            f'<td class="num">{_e(v)}</td>' if j in num_cols else f"<td>{_e(v)}</td>"
            for j, v in enumerate(r)) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _geometry_rows(sc) -> list[tuple[str, str]]:
    from .scenario import GeometryKind

    g = sc.geometry
    rows = [("source", g.kind.value)]
    if g.kind is GeometryKind.BUILDER:
        rows.append(("builder", g.builder))
        for k, v in g.params.items():
            if isinstance(v, tuple) and v and dataclasses_is(v[0]):
                for o in v:
                    rows.append((k, repr(o)))
            else:
                rows.append((k, json.dumps(v)))
    else:
        rows.append(("file", str(g.path)))
        for k, v in g.params.items():
            rows.append((k, repr(v)))
    for old, new in g.rename.items():
        rows.append(("renamed", f"{old} → {new}"))
    return rows


def dataclasses_is(x) -> bool:
    import dataclasses

    return dataclasses.is_dataclass(x) and not isinstance(x, type)


def _mesh_section(sol) -> str:
    mesh, sc = sol.mesh, sol.scenario
    try:
        from .mesh_report import mesh_report
    except ImportError:
        mesh_report = None
    if mesh_report is not None:
        rep = mesh_report(mesh, fmax=sc.sweep.max_hz, air=sc.air)
        return f"<pre>{_e(str(rep))}</pre>"
    from .dofs import DofMap
    from .scenario import dispersion_error

    n = DofMap(mesh, sc.element_order).n_dofs
    epw = sc.air.c / sc.sweep.max_hz / mesh.h_mean
    rows = [("cells", f"{mesh.n_cells} {mesh.cell_type.name.lower()} (geometry order "
                      f"{mesh.geometry_order})"),
            ("DOFs", f"{n} (P{sc.element_order})"),
            ("volume", f"{mesh.measure:.4g} m³"),
            ("boundary area", f"{mesh.boundary_measure:.4g} m²"),
            ("edges", f"mean {mesh.h_mean:.3g} m, longest {mesh.h_max:.3g} m"),
            ("elements per wavelength at max_hz",
             f"{epw:.2f} (estimated error {100 * float(dispersion_error(epw, sc.element_order)):.2g} %;"
             f" target {sc.sweep.accuracy_percent:g} %)")]
    return _table(("quantity", "value"), rows)


def render_report(sol, rows, images: Sequence[tuple[str, bytes, str]], *,
                  version: str, files: Sequence[str]) -> str:
    """The self-contained HTML report (images as base64 data URIs, no external resources).

    Parameters
    ----------
    sol : Solution
    rows : the modes table (:func:`modes_table`)
    images : sequence of (title, PNG bytes, caption)
    version : str
    files : names of the files in the results folder
    """
    from .cli import CAUTION
    from .materials import TYPICAL_VALUES_NOTE

    sc, m = sol.scenario, sol.modes
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(sc.title)}</title><style>{_CSS}</style></head><body><main>",
        f"<h1>{_e(sc.title)}</h1>",
    ]
    if sc.description:
        parts.append(f"<p>{_e(sc.description)}</p>")
    parts.append(f'<p class="muted">acoustic-fem {_e(version)} — scenario '
                 f'{_e(sc.path.name if sc.path else "(text)")}</p>')
    lib_used = any(ms.from_library for ms in sc.materials.values())
    head, _, rest = CAUTION.partition(":")
    parts.append(f'<div class="caution"><strong>{_e(head)}:</strong>{_e(rest)}'
                 + (f" {_e(TYPICAL_VALUES_NOTE)}" if lib_used else "") + "</div>")
    if sol.notes:
        parts.append("<h2>Notes from the run</h2>")
        parts += [f'<div class="note">{_e(n)}</div>' for n in sol.notes]

    # inputs
    parts.append("<h2>Inputs</h2><h3>Geometry</h3>")
    parts.append(_table(("item", "value"), _geometry_rows(sc)))
    parts.append("<h3>Air and frequencies</h3>")
    parts.append(_table(("item", "value"), [
        ("air", f"{sc.air.temperature:g} °C, {sc.air.pressure:g} Pa: c = {sc.air.c:.2f} m/s, "
                f"ρ = {sc.air.rho:.4g} kg/m³"),
        ("sweep", f"{sc.sweep.min_hz:g} to {sc.sweep.max_hz:g} Hz in steps of "
                  f"{sc.sweep.step_hz:g} Hz ({len(sol.frequencies)} frequencies)"),
        ("modes", f"every mode up to {sc.sweep.max_hz:g} Hz"),
        ("accuracy target", f"{sc.sweep.accuracy_percent:g} % (dispersion estimate at max_hz)"),
        ("elements", f"P{sc.element_order} Lagrange"),
    ]))
    parts.append("<h3>Surfaces</h3>")
    srows = []
    for name in sol.mesh.surface_names:
        mat = sc.surfaces.get(name, "rigid")
        spec = sc.materials.get(mat)
        what = spec.summary() if spec else ("pressure-release (p = 0)"
                                            if mat == "pressure_release" else "rigid")
        src = spec.source if spec else ""
        srows.append((name, f"{sol.mesh.region_measure(name):.3g}", mat, what, src))
    parts.append(_table(("surface", "area (m²)", "material", "condition", "source of the values"),
                        srows, num_cols=(1,)))
    if sc.sources:
        parts.append("<h3>Sources</h3>")
        parts.append(_table(("name", "x (m)", "y (m)", "z (m)", "|Q| (m³/s)", "phase (°)"), [
            (s.name, *(f"{v:.3f}" for v in s.position), f"{abs(s.volume_velocity):.3g}",
             f"{math.degrees(np.angle(s.volume_velocity)):.1f}") for s in sc.sources],
            num_cols=(1, 2, 3, 4, 5)))
    if sc.receivers:
        parts.append("<h3>Receivers and seats</h3>")
        parts.append(_table(("name", "group", "x (m)", "y (m)", "z (m)"), [
            (r.name, r.group or "—", *(f"{v:.3f}" for v in r.position)) for r in sc.receivers],
            num_cols=(2, 3, 4)))

    parts.append("<h2>Mesh</h2>")
    parts.append(_mesh_section(sol))

    parts.append("<h2>Modes</h2>")
    header = ["#", "f (Hz)", "δ (1/s)", "T60 (s)", "Q"]
    box = any(r["mode_type"] for r in rows)
    if box:
        header += ["type", "(nx, ny, nz)"]
    header += ["elements/λ", "est. error (%)"]
    est = _has_estimate(rows)
    damped_est = est and any(r["decay_rate_per_s"] > 0 for r in rows)
    if est:
        header += ["a-posteriori error estimate", "corrected f (Hz)"]
    if damped_est:
        header += ["est. δ error", "corrected δ (1/s)"]
    trs = []
    for r in rows:
        row = [r["index"], f"{r['frequency_hz']:.2f}", _fmt(r["decay_rate_per_s"], 3),
               _fmt(r["t60_s"], 3), _fmt(r["q"], 3)]
        if box:
            row += [r["mode_type"], r["box_indices"]]
        row += [f"{r['elements_per_wavelength']:.1f}", _fmt(r["estimated_error_percent"], 2)]
        if est:
            e, fc = r["estimated_relative_error"], r["corrected_frequency_hz"]
            row += ["n/a" if math.isnan(e) else f"{e:.2e}",
                    "n/a" if math.isnan(fc) else f"{fc:.3f}"]
        if damped_est:
            e, dc = r["estimated_decay_rate_error"], r["corrected_decay_rate_per_s"]
            row += ["n/a" if math.isnan(e) else f"{e:.2e}",
                    "n/a" if math.isnan(dc) else _fmt(dc, 4)]
        trs.append(row)
    parts.append(_table(header, trs, num_cols=tuple(range(len(header)))))
    if est:
        parts.append(
            '<p class="muted">est. error (%): rule-of-thumb dispersion estimate from the '
            "elements per wavelength. a-posteriori error estimate: the estimated relative "
            "frequency error (f_h − f)/f of each mode, by "
            f"{_e(m.errors.method)}; corrected f: the enriched-space frequency, labelled "
            "corrected — an estimate beside the solved f, not a measurement"
            + ("; est. δ error and corrected δ: the same for the decay rate" if damped_est
               else "") + ". Neither covers errors of the model itself (wall data, speed of "
            "sound, geometry). n/a: not available (damping = 'perturbation', or the "
            "relative frequency error of a near-0 Hz mode).</p>")
        target = dict(m.info).get("accuracy_target")
        if target:
            parts.append(
                f'<p class="muted">Accuracy target {target["tol"]:g} '
                f'({"met" if target["met"] else "NOT met"}) after {len(target["steps"])} '
                f'solve(s), budget {target["budget"].get("max_dofs")} DOFs / '
                f'{target["budget"].get("max_seconds")} s; last solve '
                f'{target["steps"][-1]["n_dofs"]} DOFs.</p>')
    info = dict(m.info)
    parts.append(f'<p class="muted">{len(m)} modes, {info.get("n_dofs", m.dofs.n_dofs)} DOFs, '
                 f'solver: {_e(info.get("method", ""))}.</p>')

    if sol.response is not None:
        seats = _seat_indices(sc)
        st = _seat_stats(np.asarray(sol.response.spl)[:, seats])
        j = int(np.argmax(st["spread_db"]))
        parts.append("<h2>Response at the seats</h2>")
        parts.append(_table(("quantity", "value"), [
            ("seats", str(len(seats))),
            ("largest seat-to-seat spread", f"{st['spread_db'][j]:.1f} dB at "
                                            f"{sol.frequencies[j]:g} Hz"),
            ("mean spread over the sweep", f"{np.mean(st['spread_db']):.1f} dB"),
            ("solver", f"{sc.response_method} method; largest relative residual "
                       f"{np.nanmax(sol.response.residuals):.2g}"
                       + (f", largest energy imbalance "
                          f"{np.nanmax(sol.response.energy_imbalance):.2g}"
                          if np.isfinite(sol.response.energy_imbalance).any() else "")),
        ]))

    parts.append("<h2>Figures</h2>")
    for title, png, cap in images:
        data = base64.b64encode(png).decode("ascii")
        parts.append(f'<figure><img alt="{_e(title)}" src="data:image/png;base64,{data}">'
                     f"<figcaption><strong>{_e(title)}.</strong> {_e(cap)}</figcaption></figure>")

    parts.append("<h2>Run</h2>")
    trows = [(k, f"{v:.2f} s") for k, v in sol.timings.items()]
    parts.append(_table(("stage", "time"), trows, num_cols=(1,)))
    parts.append("<p>Files in this folder: " + ", ".join(f"<code>{_e(f)}</code>" for f in files)
                 + ".</p>")
    parts.append("<h2>Scenario file</h2>")
    parts.append(f"<pre>{_e(sc.text)}</pre>")
    parts.append("</main></body></html>")
    return "\n".join(parts)


# ==========================================================================
# the folder
# ==========================================================================
def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _versions() -> dict:
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for pkg in ("acoustic-fem", "numpy", "scipy", "gmsh", "meshio", "matplotlib"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    return out


def _summary_text(sol, rows) -> str:
    from .cli import CAUTION

    sc, m = sol.scenario, sol.modes
    lines = [sc.title, "", f"{len(m)} modes up to {sc.sweep.max_hz:g} Hz, P{m.order} elements, "
             f"{m.dofs.n_dofs} DOFs, c = {m.air.c:.2f} m/s", "",
             "  #   frequency (Hz)   T60 (s)   type         elements/wavelength"]
    for r in rows:
        lines.append(f"{r['index']:3d}   {r['frequency_hz']:14.3f}   {_fmt(r['t60_s'], 3):>7}   "
                     f"{r['mode_type'] or '-':<12} {r['elements_per_wavelength']:10.1f}")
    if sol.notes:
        lines += ["", "Notes:"] + [f"- {n}" for n in sol.notes]
    lines += ["", CAUTION, ""]
    return "\n".join(lines)


def write_results(sol, out, *, overwrite: bool = False,
                  progress: Callable[[str, int, int], None] | None = None) -> Path:
    """Write the results folder of a solved scenario.

    Parameters
    ----------
    sol : Solution (from :func:`acoustic_fem.scenario.solve_scenario`)
    out : str or Path
        The folder to create.
    overwrite : bool
        Replace an existing folder (only once the new one is complete).
    progress : callable(stage, done, total), optional

    Returns
    -------
    Path of the folder.
    """
    from . import __version__

    sc = sol.scenario
    out = Path(out)
    rows = modes_table(sol)
    with atomic_folder(out, overwrite=overwrite) as tmp:
        name = sc.path.name if sc.path is not None else "scenario.toml"
        (tmp / name).write_text(sc.text, encoding="utf-8")
        _write_modes_csv(tmp / "modes.csv", rows)
        _write_modes_json(tmp / "modes.json", rows, sol)
        files = [name, "modes.csv", "modes.json"]
        amp = _receiver_mode_amplitudes(sol)
        if amp.shape[1]:
            with open(tmp / "modes_at_receivers.csv", "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh, lineterminator="\n")
                w.writerow(["index", "frequency_hz", *(r.name for r in sc.receivers)])
                for i in range(len(sol.modes)):
                    w.writerow([i, _fmt(float(sol.modes.frequencies[i]), 9),
                                *(f"{v:.4f}" for v in amp[i])])
            files.append("modes_at_receivers.csv")
        if sol.response is not None:
            spl = np.asarray(sol.response.spl)
            with open(tmp / "spl_at_receivers.csv", "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh, lineterminator="\n")
                w.writerow(["frequency_hz", *(r.name for r in sc.receivers)])
                for k, f in enumerate(sol.frequencies):
                    w.writerow([f"{f:.6g}", *(f"{v:.3f}" for v in spl[k])])
            seats = _seat_indices(sc)
            st = _seat_stats(spl[:, seats])
            with open(tmp / "seat_statistics.csv", "w", newline="", encoding="utf-8") as fh:
                w = csv.writer(fh, lineterminator="\n")
                w.writerow(["frequency_hz", *st])
                for k, f in enumerate(sol.frequencies):
                    w.writerow([f"{f:.6g}", *(f"{st[c][k]:.3f}" for c in st)])
            P = np.asarray(sol.response.pressure)
            (tmp / "pressure_at_receivers.json").write_text(json.dumps({
                "note": "complex pressure amplitudes (Pa), e^{+iωt} convention; SPL = "
                        "20 log10(|p|/√2 / 20 µPa)",
                "frequencies_hz": [float(f) for f in sol.frequencies],
                "receivers": [{"name": r.name, "position_m": [float(v) for v in r.position],
                               "real": P[:, j].real.tolist(), "imag": P[:, j].imag.tolist()}
                              for j, r in enumerate(sc.receivers)],
            }, indent=1) + "\n", encoding="utf-8")
            files += ["spl_at_receivers.csv", "seat_statistics.csv", "pressure_at_receivers.json"]
        if sc.outputs.vtk and len(sol.modes):
            _write_mode_vtus(tmp, sol, progress)
            files += ["modes.pvd", "vtk/"]
        if sc.outputs.vtk and getattr(sol, "field", None) is not None:
            write_field_vtus(tmp, sol.field)
            files += ["response.pvd"] + ([] if "vtk/" in files else ["vtk/"])
        images: list[tuple[str, bytes, str]] = []
        if sc.outputs.plots or sc.outputs.report:
            plots = [("Mode frequencies and decay", "mode_frequencies.png",
                      plot_mode_frequencies(sol, rows)),
                     ("Mode shapes at ear height", "mode_slices.png", plot_mode_slices(sol, rows))]
            if sol.response is not None:
                plots += [("SPL at each seat", "seat_spl.png", plot_seat_spl(sol)),
                          ("Seat-to-seat spread", "seat_spread.png", plot_seat_spread(sol)),
                          ("SPL map at ear height", "spl_map.png", plot_spl_map(sol))]
            plots = [(t, f, r) for t, f, r in plots if r is not None]
            if sc.outputs.plots:
                (tmp / "plots").mkdir()
                for t, f, (png, cap) in plots:
                    (tmp / "plots" / f).write_bytes(png)
                files.append("plots/")
            images = [(t, png, cap) for t, f, (png, cap) in plots]
        files += ["summary.txt", "run.json"]
        if sc.outputs.report:
            files.append("report.html")
            (tmp / "report.html").write_text(
                render_report(sol, rows, images, version=__version__, files=files),
                encoding="utf-8")
        (tmp / "summary.txt").write_text(_summary_text(sol, rows), encoding="utf-8")
        inputs = {}
        if sc.path is not None and sc.path.exists():
            inputs[str(sc.path)] = _sha256(sc.path)
        if sc.geometry.path is not None:
            inputs[str(sc.geometry.path)] = _sha256(sc.geometry.path)
        run = {
            "title": sc.title,
            "versions": _versions(),
            "timings_s": dict(sol.timings),
            "solver": {k: v for k, v in dict(sol.modes.info).items()},
            "n_modes": len(sol.modes),
            "n_dofs": int(sol.modes.dofs.n_dofs),
            "n_cells": int(sol.mesh.n_cells),
            "notes": list(sol.notes),
            "inputs_sha256": inputs,
            "response": sol.response is not None,
            "spl_map_frequencies_hz": map_frequencies(sol) if sol.response is not None else [],
        }
        (tmp / "run.json").write_text(json.dumps(run, indent=1, default=str) + "\n",
                                      encoding="utf-8")
    return out


# ==========================================================================
# export / convert
# ==========================================================================
#: Formats :func:`export_results` writes.
EXPORT_FORMATS = {
    "vtu": "one .vtu holding every mode as its own point array (mode_NNN_<f>Hz)",
    "xdmf": "an XDMF time series (frequency as time), data inline in one file",
    "vtk-legacy": "one legacy .vtk file with every mode, for older viewers",
    "markdown": "the modes table as a Markdown table (for pasting into documents)",
}


def _read_modes_json(folder: Path) -> dict:
    p = folder / "modes.json"
    if not p.exists():
        raise InputError(f"{folder} is not a results folder of acoustic-fem (no modes.json); "
                         "give the folder `acoustic-fem run` wrote.")
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{p} cannot be read as JSON: {exc}.") from None


def _read_mode_vtus(folder: Path, table: dict):
    import meshio

    modes = table["modes"]
    if not modes:
        raise InputError(f"{folder} holds no modes to export.")
    arrays = []
    mesh0 = None
    for m in modes:
        p = folder / "vtk" / f"mode_{m['index']:03d}.vtu"
        if not p.exists():
            raise InputError(f"{p} is missing: the results were written with vtk = false; "
                             "rerun with [outputs] vtk = true.")
        mm = meshio.read(p)
        if mesh0 is None:
            mesh0 = mm
        keys = [k for k in mm.point_data if k.startswith("mode_shape")]
        arrays.append({k.replace("mode_shape", ""): np.asarray(mm.point_data[k]).reshape(
            len(mm.points), -1)[:, 0] for k in keys})  # one component per array
    return mesh0, arrays


def export_results(folder, fmt: str, out, *, overwrite: bool = False) -> Path:
    """Convert a results folder's modes into another format.

    Parameters
    ----------
    folder : str or Path
        A results folder written by :func:`write_results`.
    fmt : one of :data:`EXPORT_FORMATS`
    out : str or Path
        Destination file (its suffix is added if missing).
    overwrite : bool

    Returns
    -------
    Path of the file written.
    """
    import meshio

    folder = Path(folder)
    if fmt not in EXPORT_FORMATS:
        raise InputError(f"format {fmt!r} is not supported; choose one of "
                         f"{', '.join(EXPORT_FORMATS)}.")
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder; give a results folder.")
    table = _read_modes_json(folder)
    out = Path(out)
    suffix = {"vtu": ".vtu", "xdmf": ".xdmf", "vtk-legacy": ".vtk", "markdown": ".md"}[fmt]
    if out.suffix.lower() != suffix:
        out = out.with_name(out.name + suffix)
    if fmt == "markdown":
        cols = ["index", "frequency_hz", "t60_s", "q", "mode_type", "elements_per_wavelength"]
        lines = ["| " + " | ".join(cols) + " |", "|" + "---|" * len(cols)]
        for m in table["modes"]:
            lines.append("| " + " | ".join("∞" if m.get(c) is None and c in ("t60_s", "q")
                                            else str(m.get(c) if m.get(c) is not None else "")
                                            for c in cols) + " |")
        with atomic_path(out, overwrite=overwrite) as tmp:
            tmp.write_text(f"{table.get('title', '')}\n\n" + "\n".join(lines) + "\n",
                           encoding="utf-8")
        return out
    mesh0, arrays = _read_mode_vtus(folder, table)
    freqs = [m["frequency_hz"] for m in table["modes"]]
    if fmt in ("vtu", "vtk-legacy"):
        pd = {}
        for m, arr, f in zip(table["modes"], arrays, freqs):
            for suf, a in arr.items():
                pd[f"mode_{m['index']:03d}_{f:.3f}Hz{suf}"] = a
        mesh = meshio.Mesh(mesh0.points, mesh0.cells, point_data=pd,
                           field_data={"frequencies_hz": np.array(freqs)})
        with atomic_path(out, overwrite=overwrite) as tmp:
            tmpf = tmp.with_suffix(suffix)
            try:
                meshio.write(tmpf, mesh, file_format="vtu" if fmt == "vtu" else "vtk",
                             **({"binary": True} if fmt == "vtk-legacy" else {}))
                tmpf.replace(tmp)
            finally:
                tmpf.unlink(missing_ok=True)
        return out
    # XDMF time series with the data inline (XML), a single self-contained file
    with atomic_path(out, overwrite=overwrite) as tmp:
        tmpf = tmp.with_suffix(".xdmf")
        try:
            with meshio.xdmf.TimeSeriesWriter(tmpf, data_format="XML") as w:
                w.write_points_cells(mesh0.points, mesh0.cells)
                for f, arr in zip(freqs, arrays):
                    w.write_data(f, point_data={f"mode_shape{suf}": a for suf, a in arr.items()})
            tmpf.replace(tmp)
        finally:
            tmpf.unlink(missing_ok=True)
    return out
