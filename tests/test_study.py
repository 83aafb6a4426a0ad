"""Parametric sweeps, MAC mode tracking and the resumable cache (acoustic_fem.study).

References
----------
* Rectangular room modes: Morse & Ingard, *Theoretical Acoustics* (1968),
  §9.4 — f = (c/2) sqrt((nx/Lx)² + (ny/Ly)² + (nz/Lz)²), shape
  cos(nx π x/Lx) cos(ny π y/Ly) cos(nz π z/Lz) for rigid walls
  (acoustic_fem.analytic.box_modes implements it).
* Modal assurance criterion: Allemang & Brown, "A correlation coefficient for
  modal vector analysis", Proc. 1st International Modal Analysis Conference
  (1982): MAC = |φᴴψ|² / ((φᴴφ)(ψᴴψ)).
* Lagrange interpolation of degree p reproduces every polynomial of degree
  <= p exactly (Brenner & Scott, *The Mathematical Theory of Finite Element
  Methods*, 3rd ed., 2008, §3.3).
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import warnings
from pathlib import Path

import matplotlib
import numpy as np
import pytest

import acoustic_fem as af
from acoustic_fem import InputError, OutputExistsError
from acoustic_fem.analytic import box_modes
from acoustic_fem.study import BoxModel, SweepResult, plot_tracks, sweep
from acoustic_fem.tracking import (grid_fractions, locate_points, mac_matrix, sample_shapes,
                                   track_modes)

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

# ----------------------------------------------------------- shared models
#: Crossing sweep: room (Lx, 3.0, 2.4) with Lx from 2.9 to 4.9 m in 0.1 m
#: steps (21 variants).  It passes exact degeneracies at Lx = 3.0 ((1,0,0)
#: and (0,1,0), (1,0,1) and (0,1,1)), Lx = 4.0 ((0,0,1) and (1,1,0):
#: (1/8)² + (1/6)² = (1/4.8)²) and Lx = 4.8 ((2,0,0) and (0,0,1)) and
#: crossings between grid points (e.g. (2,0,0) with (1,0,1) at 2.4·√3 m).
CROSS_LX = [round(2.9 + 0.1 * i, 10) for i in range(21)]
CROSS_FMAX = 90.0
CROSS_MODEL = BoxModel(size=(4.5, 3.0, 2.4), fmax=CROSS_FMAX)

#: Small, fast model for the executor and cache tests.
SMALL = BoxModel(size=(4.0, 3.0, 2.4), fmax=70.0)
RESUME_LX = [3.6, 3.9, 4.2, 4.5]


def counted_box(Lx):
    """SMALL(Lx=Lx), logging each call; exits the process on call STOP_AFTER + 1.

    The log (AF_STUDY_LOG) counts the variants actually computed, across
    worker processes (O_APPEND writes of one short line are atomic); the exit
    (AF_STUDY_STOP_AFTER) imitates a sweep killed mid-way.
    """
    log = os.environ.get("AF_STUDY_LOG")
    stop = os.environ.get("AF_STUDY_STOP_AFTER")
    if log:
        n = len(Path(log).read_text().splitlines()) if Path(log).exists() else 0
        if stop is not None and n >= int(stop):
            os._exit(17)
        with open(log, "a") as fh:
            fh.write(f"{Lx!r}\n")
    return SMALL(Lx=Lx)


def analytic_columns(Lx, Ly=3.0):
    """A 'values' model: the three lowest rigid-box frequencies (Morse & Ingard §9.4)."""
    ref = box_modes((Lx, Ly, 2.4), c=343.0, count=3)
    return {"frequency_hz": ref.frequencies, "nx": ref.indices[:, 0], "volume_m3": Lx * Ly * 2.4}


def tube_model(length, temperature):
    """Plane-wave modes of a rigid tube (1D mesh): cheap Modes for the tracking tests."""
    air = af.Air(temperature=temperature)
    mesh = af.geometry.tube(length, fmax=400.0, air=air)
    return af.solve_modes(mesh, fmax=300.0, air=air)


def needs_two(Lx, Ly):
    return analytic_columns(Lx, Ly)


def warning_model(Lx):
    warnings.warn(f"deliberate warning at Lx={Lx}", af.ResolutionWarning, stacklevel=2)
    return analytic_columns(Lx)


def failing_model(Lx):
    if Lx > 4.1:
        raise ZeroDivisionError(f"deliberate failure at Lx={Lx}")
    return analytic_columns(Lx)


def _csv_text(result: SweepResult, tmp_path: Path, name: str) -> str:
    return result.write_csv(tmp_path / name).read_text()


def _triple_of(shape, fractions, size, c):
    """Index triple whose analytic shape has the largest MAC with ``shape``."""
    ref = box_modes(size, c=c, fmax=1.2 * CROSS_FMAX)
    mac = mac_matrix(shape[:, None], ref.shape(fractions * np.asarray(size)))[0]
    j = int(np.argmax(mac))
    return tuple(int(i) for i in ref.indices[j]), float(mac[j])


def _analytic_f(triple, size, c):
    return c / 2.0 * float(np.sqrt(sum((n / L) ** 2 for n, L in zip(triple, size))))


def _cos_shape(triple, fractions):
    return np.prod([np.cos(n * np.pi * fractions[:, a]) for a, n in enumerate(triple)], axis=0)


@pytest.fixture(scope="module")
def crossing():
    return sweep(CROSS_MODEL, {"Lx": CROSS_LX}, workers=2)


# --------------------------------------------------- tracking vs analytic
def test_tracked_modes_follow_their_own_triple_through_crossings(crossing):
    r = crossing
    T = r.tracks
    c = af.Air().c
    F = r.fractions
    assert r.n_variants == 21 and r.info["executor"] == "processes"
    triples = {}
    for t in range(T.n_tracks):
        rows = np.flatnonzero(T.mode_index[:, t] >= 0)
        k0 = rows[0]
        trip, mac0 = _triple_of(T.shapes[k0][:, t], F, CROSS_MODEL.dimensions(Lx=CROSS_LX[k0]), c)
        # the grid of 8 points per axis separates cosines of index < 8; two
        # distinct analytic shapes have a grid MAC of 0, a correct one 1 less
        # the P2 interpolation error, so 0.99 leaves room for the latter only
        assert mac0 > 0.99, (t, trip, mac0)
        assert trip not in triples, f"tracks {triples.get(trip)} and {t} both claim {trip}"
        triples[trip] = t
        for k in rows:
            size = CROSS_MODEL.dimensions(Lx=CROSS_LX[k])
            f_ref = _analytic_f(trip, size, c)  # Morse & Ingard §9.4
            f = T.frequencies[k, t]
            # Tolerance: P2 dispersion error (kh)⁴/1440 (1D consistent-mass
            # estimate, as in acoustic_fem.modes; Ihlenburg, *Finite Element
            # Analysis of Acoustic Scattering*, 1998, ch. 4, constant from
            # memory) with the mean edge up to 1.3 h, h = c/(6 fmax) (the
            # builder's size), so kh <= 1.361 f/fmax; doubled for 3D meshes,
            # plus degenerate_rtol (1e-3), the most a rotation inside a
            # degenerate cluster can move a frequency.
            tol = 2.0 * (1.361 * f / CROSS_FMAX) ** 4 / 1440.0 + 1e-3
            if f_ref == 0.0:
                assert abs(f) < 1e-6
            else:
                assert abs(f / f_ref - 1.0) < tol, (t, trip, CROSS_LX[k], f, f_ref)
            # identity kept: the tracked shape is the triple's own shape in
            # every variant, including the exactly degenerate ones
            mac = mac_matrix(T.shapes[k][:, [t]], _cos_shape(trip, F)[:, None])[0, 0]
            assert mac > 0.99, (t, trip, CROSS_LX[k], mac)
    # the sweep really crosses: analytic frequency order of tracked triples flips
    flips = set()
    trips = list(triples)
    fa = np.array([[_analytic_f(tr, CROSS_MODEL.dimensions(Lx=L), c) for tr in trips]
                   for L in CROSS_LX])
    for a in range(len(trips)):
        for b in range(a + 1, len(trips)):
            d = fa[:, a] - fa[:, b]
            if d.max() >= 0 >= d.min():
                flips.add((trips[a], trips[b]))
    assert len(flips) >= 4, flips
    assert {(1, 0, 0), (0, 0, 1), (2, 0, 0), (1, 1, 0), (0, 1, 0)} <= set(triples)


def test_exact_degeneracy_is_rotated_onto_the_neighbours(crossing):
    # at Lx = Ly = 3.0 the (1,0,0) and (0,1,0) modes share one frequency
    # (Morse & Ingard §9.4), so the solver's two eigenvectors are any basis of
    # the eigenspace; the tracker rotates them onto the neighbours' shapes.
    r = crossing
    k = CROSS_LX.index(3.0)
    T = r.tracks
    f = r.frequencies[k]
    pair = np.flatnonzero(np.abs(f / (af.Air().c / 6.0) - 1) < 0.01)  # c/(2 Ly), Ly = 3 m
    assert pair.size == 2
    tracked = [t for t in range(T.n_tracks) if T.mode_index[k, t] in pair]
    assert len(tracked) == 2 and T.rotated[k, tracked].all()
    # MAC of each rotated shape with the neighbouring variants' shapes of its track
    for t in tracked:
        for kk in (k - 1, k + 1):
            assert mac_matrix(T.shapes[k][:, [t]], T.shapes[kk][:, [t]])[0, 0] > 0.99


def test_tracker_on_analytic_shapes_with_scrambled_degenerate_bases():
    # Independent of the FE solver: analytic box shapes (Morse & Ingard §9.4)
    # on the grid, Lx passing Ly = 3.0 (exact degeneracy), the degenerate
    # eigenvectors mixed by a 45° rotation as a solver may return them.
    F = grid_fractions(8, 3)
    lxs = np.linspace(2.6, 3.4, 9)  # 3.0 included
    freqs, samples, truth = [], [], []
    for L in lxs:
        ref = box_modes((L, 3.0, 2.4), c=343.0, count=8)
        S = ref.shape(F * np.array([L, 3.0, 2.4]))
        f = ref.frequencies.copy()
        for g in np.split(np.arange(f.size), np.flatnonzero(np.diff(f) > 1e-9 * f[1:]) + 1):
            if g.size == 2:  # mix the degenerate pair
                a, b = S[:, g[0]].copy(), S[:, g[1]].copy()
                S[:, g[0]], S[:, g[1]] = (a + b) / np.sqrt(2), (a - b) / np.sqrt(2)
        freqs.append(f)
        samples.append(S)
        truth.append([tuple(i) for i in ref.indices])
    T = track_modes(freqs, samples)
    k3 = int(np.argmin(np.abs(lxs - 3.0)))
    for t in range(T.n_tracks):
        rows = np.flatnonzero(T.mode_index[:, t] >= 0)
        trip = truth[rows[0]][T.mode_index[rows[0], t]]
        for k in rows:
            mac = mac_matrix(T.shapes[k][:, [t]], _cos_shape(trip, F)[:, None])[0, 0]
            assert mac > 1 - 1e-9, (t, trip, lxs[k], mac)
            assert T.frequencies[k, t] == pytest.approx(
                _analytic_f(trip, (lxs[k], 3.0, 2.4), 343.0), rel=1e-12)
    assert T.rotated[k3].sum() >= 2
    # without the degenerate handling a mixed pair is matched at MAC 1/2 and
    # the identity is lost: some track's shape is no longer its own triple's
    T0 = track_modes(freqs, samples, degenerate_rtol=0.0)
    lost = 0
    for t in range(T0.n_tracks):
        rows = np.flatnonzero(T0.mode_index[:, t] >= 0)
        trip = truth[rows[0]][T0.mode_index[rows[0], t]]
        macs = [mac_matrix(T0.shapes[k][:, [t]], _cos_shape(trip, F)[:, None])[0, 0]
                for k in rows]
        lost += min(macs) < 0.6
    assert lost >= 2


def test_track_along_one_parameter_per_combination_of_the_others(tmp_path):
    lengths = [1.0, 1.2, 1.4]
    r = sweep(tube_model, {"temperature": [0.0, 30.0], "length": lengths},
              track_along="length", workers=1)
    T = r.tracks
    assert r.fractions.shape == (512, 3)  # default grid; a 1D model uses its 8 distinct x
    for t in range(T.n_tracks):
        rows = np.flatnonzero(T.mode_index[:, t] >= 0)
        temps = {r.variants[k]["temperature"] for k in rows}
        assert len(temps) == 1  # a track stays within its chain
        c = af.Air(temperature=temps.pop()).c
        x = np.unique(r.fractions[:, 0])
        f0 = T.frequencies[rows[0], t]
        n = int(round(f0 * 2 * r.variants[rows[0]]["length"] / c))
        for k in rows:
            L = r.variants[k]["length"]
            # rigid-rigid tube f = n c / (2L) (Kinsler, Frey, Coppens & Sanders,
            # Fundamentals of Acoustics, 4th ed., §10.2); tolerance 1e-3 covers
            # the P2 dispersion error (kh)⁴/1440 <= 3e-4 at 300 Hz with
            # h = c/(6·400 Hz) (builder size), as in acoustic_fem.modes
            assert T.frequencies[k, t] == pytest.approx(n * c / (2 * L), rel=1e-3, abs=1e-6)
            S = r.samples[k][:, T.mode_index[k, t]]
            assert mac_matrix(S[:, None], np.cos(n * np.pi * x)[:, None])[0, 0] > 0.999
    assert T.n_tracks >= 2 * 2  # at least modes 0 and 1 in each temperature chain
    with matplotlib.rc_context({"svg.fonttype": "none"}):  # keep the labels as text
        svg = plot_tracks(r, tmp_path / "tube.svg").read_text()  # x defaults to track_along
    assert ">length<" in svg and ">frequency (Hz)<" in svg  # a plain function has no units


def test_mac_matrix_definition():
    # Allemang & Brown (1982): invariant to complex scaling, 0 for orthogonal
    # vectors, |cos|² of the angle otherwise; NaN points are left out.
    rng = np.random.default_rng(1)
    a = rng.normal(size=(40, 3)) + 1j * rng.normal(size=(40, 3))
    b = np.column_stack([a[:, 0] * (2 - 3j), rng.normal(size=40)])
    M = mac_matrix(a, b)
    assert M.shape == (3, 2)
    assert M[0, 0] == pytest.approx(1.0, abs=1e-12)
    direct = abs(np.vdot(a[:, 1], b[:, 1])) ** 2 / (
        np.vdot(a[:, 1], a[:, 1]).real * np.vdot(b[:, 1], b[:, 1]).real)
    assert M[1, 1] == pytest.approx(direct, rel=1e-12)
    e = np.eye(4)
    assert np.allclose(mac_matrix(e, e), np.eye(4))
    x = np.array([1.0, 2.0, np.nan, 4.0])
    y = np.array([2.0, 4.0, 5.0, 8.0])
    assert mac_matrix(x, y)[0, 0] == pytest.approx(1.0, abs=1e-14)


@pytest.mark.parametrize("order", [1, 2])
def test_sample_shapes_reproduces_polynomials(order):
    # Lagrange P1 (P2) interpolation reproduces linear (quadratic) fields
    # exactly (Brenner & Scott §3.3), so sampled values equal the field.
    mesh = af.geometry.box((2.0, 1.5, 1.2), fmax={1: 70, 2: 190}[order], order=order)  # h ≈ 0.3 m
    dofs = af.DofMap(mesh, order)
    X = dofs.points

    def field(p):
        x, y, z = p[:, 0], p[:, 1], p[:, 2]
        return 1 + x - 2 * y + 0.5 * z + (order == 2) * (x * y - z * z + 0.3 * x * x)

    shapes = np.column_stack([field(X), 2 * field(X)])
    modes = af.Modes(np.array([0.0, 1.0]), np.array([0.0, 1.0]), shapes, dofs, af.Air(), {})
    rng = np.random.default_rng(7)
    Fr = rng.uniform(0, 1, size=(200, 3))
    got = sample_shapes(modes, Fr)
    want = field(Fr * np.array([2.0, 1.5, 1.2]))
    # exact up to rounding in the barycentric solve: 1e-12 of the field scale
    assert np.max(np.abs(got[:, 0] - want)) < 1e-12 * np.abs(want).max()
    assert np.allclose(got[:, 1], 2 * want, rtol=0, atol=1e-11)
    # the module's own locator (used where the shared one is absent) agrees
    cells, xi = locate_points(mesh, Fr * np.array([2.0, 1.5, 1.2]))
    assert np.all(cells >= 0)
    N = af.elements.reference_element(mesh.cell_type, order).values(xi)
    own = np.einsum("mb,mb->m", N, shapes[dofs.cell_dofs[cells], 0])
    assert np.max(np.abs(own - want)) < 1e-12 * np.abs(want).max()
    outside = locate_points(mesh, np.array([[2.5, 0.5, 0.5], [1.0, 0.7, 0.6]]))[0]
    assert outside[0] == -1 and outside[1] >= 0


# ------------------------------------------------------------- executors
def test_two_workers_give_the_same_results_as_one(tmp_path):
    # the crossing sweep uses the default start method (forkserver on Linux); spawn here
    params = {"Lx": [3.8, 4.6]}
    r1 = sweep(SMALL, params, workers=1)
    r2 = sweep(SMALL, params, workers=2, start_method="spawn")
    assert r1.info["executor"] == "in-process" and r2.info["executor"] == "processes"
    assert r2.info["start_method"] == "spawn"
    for a, b in zip(r1.samples, r2.samples):
        np.testing.assert_array_equal(a, b)
    assert _csv_text(r1, tmp_path, "a.csv") == _csv_text(r2, tmp_path, "b.csv")


def _resume_child(cache):  # run by the killed subprocess
    sweep(counted_box, {"Lx": RESUME_LX}, cache=cache, workers=1)


def test_killed_sweep_resumes_with_only_missing_variants(tmp_path, monkeypatch):
    cache = tmp_path / "cache"
    log1 = tmp_path / "calls1.txt"
    env = dict(os.environ, AF_STUDY_LOG=str(log1), AF_STUDY_STOP_AFTER="2",
               PYTHONPATH=os.pathsep.join([str(HERE), str(ROOT), os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.run(
        [sys.executable, "-c", f"import test_study; test_study._resume_child({str(cache)!r})"],
        env=env, cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 17, proc.stderr  # killed during the 3rd variant
    assert len(list(cache.glob("*.npz"))) == 2
    assert not list(cache.glob(".*part"))  # no half-written entry left behind

    log2 = tmp_path / "calls2.txt"
    monkeypatch.setenv("AF_STUDY_LOG", str(log2))
    monkeypatch.delenv("AF_STUDY_STOP_AFTER", raising=False)
    seen = []
    resumed = sweep(counted_box, {"Lx": RESUME_LX}, cache=cache, workers=1,
                    progress=lambda d, n: seen.append((d, n)))
    calls = [float(s) for s in log2.read_text().split()]
    assert sorted(calls) == RESUME_LX[2:]  # only the missing variants ran
    assert resumed.info["computed"] == [2, 3] and resumed.info["cached"] == [0, 1]
    assert seen[0] == (2, 4) and seen[-1] == (4, 4)

    monkeypatch.setenv("AF_STUDY_LOG", str(tmp_path / "calls3.txt"))
    fresh = sweep(counted_box, {"Lx": RESUME_LX}, workers=1)  # no cache: all computed
    assert _csv_text(resumed, tmp_path, "resumed.csv") == _csv_text(fresh, tmp_path, "fresh.csv")
    again = sweep(counted_box, {"Lx": RESUME_LX}, cache=cache)
    assert again.info["computed"] == [] and again.info["executor"] == "none"
    assert _csv_text(again, tmp_path, "again.csv") == _csv_text(fresh, tmp_path, "f2.csv")
    # another model_version is another key: nothing is reused
    other = sweep(analytic_columns, {"Lx": [4.0]}, cache=cache, model_version="2")
    assert other.info["computed"] == [0]


def test_cache_key_covers_the_model_and_its_parameters(tmp_path):
    from acoustic_fem import study

    F = grid_fractions(4, 3)

    def key(model, params, version=None):
        return study._key_document(study._identity(model), version, params, F)

    base = key(BoxModel(fmax=70.0), {"Lx": 4.0})
    assert base == key(BoxModel(fmax=70.0), {"Lx": 4.0})  # deterministic
    assert base != key(BoxModel(fmax=80.0), {"Lx": 4.0})  # model fields
    assert base != key(BoxModel(fmax=70.0), {"Lx": 4.0 + 1e-12})  # exact float repr
    assert base != key(BoxModel(fmax=70.0), {"Lx": 4.0}, version="2")
    assert base != study._key_document(study._identity(BoxModel(fmax=70.0)), None,
                                       {"Lx": 4.0}, grid_fractions(5, 3))  # tracking points
    assert key(counted_box, {"Lx": 4.0}) != key(analytic_columns, {"Lx": 4.0})
    with pytest.raises(InputError, match="cannot be keyed"):
        sweep(analytic_columns, {"Lx": [object()]}, cache=tmp_path / "c", workers=1)
    assert not (tmp_path / "c").exists()  # nothing created for a refused sweep


def test_values_model_table_progress_and_zip():
    seen = []
    r = sweep(analytic_columns, {"Lx": [4.0, 5.0], "Ly": [3.0, 3.5]}, combine="zip",
              workers=1, progress=lambda d, n: seen.append((d, n)))
    assert r.kind == "values" and r.n_variants == 2
    rows = r.table()
    assert len(rows) == 6 and rows[0].keys() >= {"variant", "Lx", "Ly", "row", "frequency_hz"}
    ref = box_modes((5.0, 3.5, 2.4), c=343.0, count=3)  # Morse & Ingard §9.4
    np.testing.assert_allclose([x["frequency_hz"] for x in rows[3:]], ref.frequencies,
                               rtol=1e-14)
    assert rows[3]["volume_m3"] == pytest.approx(5.0 * 3.5 * 2.4, rel=1e-15)
    assert seen == [(1, 2), (2, 2)]
    p = sweep(analytic_columns, {"Lx": [4.0, 5.0], "Ly": [3.0, 3.5]}, workers=1)
    assert p.n_variants == 4 and [v["Ly"] for v in p.variants] == [3.0, 3.5, 3.0, 3.5]


def test_worker_warnings_are_reissued_by_the_caller():
    with pytest.warns(af.ResolutionWarning) as rec:
        sweep(warning_model, {"Lx": [4.0, 5.0]}, workers=1)
    assert [str(w.message) for w in rec] == [
        "sweep variant 0 {'Lx': 4.0}: deliberate warning at Lx=4.0",
        "sweep variant 1 {'Lx': 5.0}: deliberate warning at Lx=5.0"]


def test_model_failure_propagates_and_keeps_finished_variants(tmp_path):
    with pytest.raises(ZeroDivisionError, match="deliberate"):
        sweep(failing_model, {"Lx": [3.9, 4.0, 4.2]}, cache=tmp_path, workers=1)
    assert len(list(tmp_path.glob("*.npz"))) == 2


def test_table_csv_and_plot(crossing, tmp_path):
    rows = crossing.table()
    assert set(rows[0]) == {"variant", "Lx", "mode", "index", "frequency_hz",
                            "decay_rate_per_s", "mac"}
    assert len(rows) == sum(len(f) for f in crossing.frequencies)
    out = crossing.write_csv(tmp_path / "t.csv")
    with pytest.raises(OutputExistsError):
        crossing.write_csv(out)
    lines = out.read_text().splitlines()
    assert len(lines) == len(rows) + 1
    png = plot_tracks(crossing, tmp_path / "tracks.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        svg = plot_tracks(crossing, tmp_path / "tracks.svg").read_text()
    assert ">Lx (m)<" in svg and ">frequency (Hz)<" in svg  # BoxModel.units
    assert all(f">mode {t}<" in svg for t in range(crossing.tracks.n_tracks))  # legend
    with pytest.raises(OutputExistsError):
        plot_tracks(crossing, png)
    plot_tracks(crossing, png, overwrite=True, title="room length sweep")


# ------------------------------------------------------------- bad input
def test_unknown_parameter_lists_accepted_names():
    with pytest.raises(InputError, match=r"unknown parameter.*'Lw'.*accepts.*'Lx'.*'temperature'"):
        sweep(SMALL, {"Lw": [4.0]})
    with pytest.raises(InputError, match=r"needs parameter.*'Ly'"):
        sweep(needs_two, {"Lx": [4.0]})
    with pytest.raises(InputError, match=r"variant 1 sets"):
        sweep(needs_two, [{"Lx": 4.0, "Ly": 3.0}, {"Lx": 4.0}])


@pytest.mark.parametrize("params", [{}, {"Lx": []}, [], {"Lx": 4.0}])
def test_empty_or_malformed_sweep(params):
    with pytest.raises(InputError, match=r"empty|list of values"):
        sweep(SMALL, params)


def test_bad_options():
    with pytest.raises(InputError, match="zip"):
        sweep(analytic_columns, {"Lx": [4.0, 5.0], "Ly": [3.0]}, combine="zip")
    with pytest.raises(InputError, match="combine"):
        sweep(analytic_columns, {"Lx": [4.0]}, combine="diagonal")
    with pytest.raises(InputError, match="track_along"):
        sweep(analytic_columns, {"Lx": [4.0]}, track_along="Lz")
    with pytest.raises(InputError, match="workers"):
        sweep(analytic_columns, {"Lx": [4.0]}, workers=0)
    with pytest.raises(InputError, match="start_method='vfork'"):
        sweep(analytic_columns, {"Lx": [4.0]}, start_method="vfork")
    with pytest.raises(InputError, match=r"column\(s\) \['Lx'\] have the names of sweep"):
        sweep(lambda Lx: {"Lx": Lx}, {"Lx": [4.0]}, workers=1)
    with pytest.raises(InputError, match="returned a float"):
        sweep(lambda Lx: Lx, {"Lx": [4.0]}, workers=1)


def test_unpicklable_model_with_workers_says_so(tmp_path):
    with pytest.raises(InputError, match=r"picklable.*module level.*workers=1"):
        sweep(lambda Lx: analytic_columns(Lx), {"Lx": [4.0, 5.0]}, workers=2)
    # in-process it runs
    r = sweep(lambda Lx: analytic_columns(Lx), {"Lx": [4.0, 5.0]}, workers=1)
    assert r.n_variants == 2
    with pytest.raises(InputError, match="lambda or nested"):
        sweep(lambda Lx: analytic_columns(Lx), {"Lx": [4.0]}, workers=1, cache=tmp_path / "c")
    assert not (tmp_path / "c").exists()


def test_dask_missing_gives_the_pip_command(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import raises ImportError
    with pytest.raises(InputError, match=r"pip install 'acoustic-fem\[study\]'"):
        sweep(analytic_columns, {"Lx": [4.0]}, client="tcp://127.0.0.1:8786")


def test_dask_address_that_does_not_answer_fails_fast():
    pytest.importorskip("distributed")
    s = socket.socket()
    s.bind(("127.0.0.1", 0))  # a free port on this machine: nothing listens there
    port = s.getsockname()[1]
    s.close()
    t0 = time.perf_counter()
    address = f"tcp://127.0.0.1:{port}"
    with pytest.raises(InputError, match=rf"no Dask scheduler answered at '{address}'"):
        sweep(analytic_columns, {"Lx": [4.0]}, client=f"tcp://127.0.0.1:{port}",
              connect_timeout=2)
    assert time.perf_counter() - t0 < 30  # the 2 s timeout plus dask's teardown, not a hang


def test_dask_local_cluster_matches_in_process(tmp_path):
    distributed = pytest.importorskip("distributed")
    params = {"Lx": [3.8, 4.2]}
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster, set_as_default=False) as client:
        rd = sweep(SMALL, params, client=client, cache=tmp_path / "c")
    assert rd.info["executor"] == "dask" and rd.info["computed"] == [0, 1]
    r1 = sweep(SMALL, params, workers=1)
    assert _csv_text(rd, tmp_path, "d.csv") == _csv_text(r1, tmp_path, "p.csv")


def test_dask_worker_processes(tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        rd = sweep(SMALL, {"Lx": [3.8, 4.2]}, client=cluster.scheduler_address)
    r1 = sweep(SMALL, {"Lx": [3.8, 4.2]}, workers=1)
    assert _csv_text(rd, tmp_path, "d.csv") == _csv_text(r1, tmp_path, "p.csv")
