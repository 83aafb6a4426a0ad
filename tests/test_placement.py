"""Source placement (:func:`acoustic_fem.optimise_placement`) judged outside its modal model.

Scenario (our own): a 5.0 x 3.6 x 2.4 m rectangular room, every surface
lightly absorbing (absorption coefficient 0.1 at normal incidence, so that
the responses are finite), low-frequency sources on the floor at the walls,
nine seats at ear height 1.2 m, band 20-100 Hz.

References, named again beside each check:

* Common practice: symmetric layouts of low-frequency sources — two at
  the midpoints of opposite walls, four at the four wall midpoints, four in
  the corners — as recommended in the trade literature (e.g. T. Welti and
  A. Devantier, "Low-frequency optimization using multiple subwoofers",
  J. Audio Eng. Soc. 54(5), 2006; from memory).  These are rules of thumb,
  marked "common practice" where used.
* Independent evaluation: every layout is re-solved by the sparse direct
  solve, ``solve_response(method="direct")`` — one LU factorisation of the
  full finite element system per frequency, no modal model — and its
  objective computed here with numpy (np.std over seats, mean over the band;
  rms deviation from the mean level), not by the optimiser's code.
* Superposition of the linear Helmholtz problem (the pressure of several
  sources is the sum of each source's pressure; e.g. Pierce, *Acoustics*,
  1989, §4.1, from memory) for the brute-force search over all candidate
  pairs from per-candidate direct solves.
* Lipschitz bounds (elementary): for level tables L, L' with
  Δ = L' - L, |std(L') - std(L)| <= std(Δ) <= max|Δ| (the triangle
  inequality of the centred 2-norm), so the "spread" objective (a mean of
  stds) moves by at most max|Δ|; likewise the rms deviation from the mean.

Tolerances.  The modal model is refined until every source's full-system
relative residual is below tol = 1e-3; solve_response's notes measured
0.002-0.013 dB SPL error for that tol on a 7.4 k DOF room.  Seat SPL is
required within 0.1 dB of the direct solve (a margin of ~8x over that
measurement); by the Lipschitz bound the objectives then agree within
max|ΔL|, and "at least as good as common practice" is tested as
J_direct(chosen) <= J_direct(reference) + 2 max|ΔL| (each side may carry
one model error).
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest

import acoustic_fem as af
from acoustic_fem import InputError, Objective, PointSource
from acoustic_fem.verification import structured_box

# the 1.6 cells/m structured mesh resolves 100 Hz with ~4.5 P2 elements per
# wavelength (>= 3.5, MIN_ELEMENTS_PER_WAVELENGTH); any warning for the modal
# basis above the band is suppressed inside the library
ROOM = (5.0, 3.6, 2.4)
BAND = (20.0, 100.0)
N_F = 21  # log-spaced over 20-100 Hz: about 1/9 octave apart
Q = 1e-3
SPL_TOL = 0.1  # dB, see the module notes
SLOW = pytest.mark.slow


def _walls():
    return {n: af.Impedance(alpha=0.1) for n in ("x0", "x1", "y0", "y1", "z0", "z1")}


def _candidates():
    """16 floor positions along the walls: corners, wall midpoints, quarter points."""
    xs, ys = np.linspace(0, ROOM[0], 5), np.linspace(0, ROOM[1], 5)
    return np.array([(x, y, 0.0) for x in xs for y in ys
                     if x in (0.0, ROOM[0]) or y in (0.0, ROOM[1])])


SEATINGS = {
    # centred block of 3 x 3 seats, and a block towards one end wall
    "centred": np.array([(x, y, 1.2) for x in np.linspace(1.5, 3.5, 3)
                         for y in np.linspace(1.2, 2.4, 3)]),
    "rear": np.array([(x, y, 1.2) for x in np.linspace(2.8, 4.2, 3)
                      for y in np.linspace(0.9, 2.7, 3)]),
}

Lx, Ly = ROOM[0], ROOM[1]
# common practice (Welti & Devantier 2006, from memory): symmetric layouts
COMMON_PRACTICE = {
    2: {"opposite midpoints of the end walls": [(0, Ly / 2, 0), (Lx, Ly / 2, 0)],
        "opposite midpoints of the side walls": [(Lx / 2, 0, 0), (Lx / 2, Ly, 0)]},
    4: {"four wall midpoints": [(0, Ly / 2, 0), (Lx, Ly / 2, 0), (Lx / 2, 0, 0),
                                (Lx / 2, Ly, 0)],
        "four corners": [(0, 0, 0), (Lx, 0, 0), (0, Ly, 0), (Lx, Ly, 0)]},
}


@pytest.fixture(scope="module")
def room():
    mesh = structured_box(ROOM, 1.6)
    asm = af.assemble(mesh, 2)
    with warnings.catch_warnings():  # basis modes above the band: coarse there by design
        warnings.simplefilter("ignore", af.ResolutionWarning)
        modes = af.solve_modes(mesh, {}, order=2, fmax=1.5 * BAND[1], assembly=asm)
    return mesh, asm, modes


@pytest.fixture(scope="module")
def reference_spl(room):
    """Direct-solve seat SPL of each common-practice layout, per seating (computed once)."""
    cache = {}

    def get(seating, n_sources, name, freqs):
        key = (seating, n_sources, name)
        if key not in cache:
            pos = COMMON_PRACTICE[n_sources][name]
            cache[key] = _direct(room, [PointSource(p, Q) for p in pos], SEATINGS[seating],
                                 freqs).spl
        return cache[key]

    return get


def _direct(room, sources, seats, freqs):
    mesh, asm, _ = room
    return af.solve_response(mesh, _walls(), sources=sources, receivers=seats, frequencies=freqs,
                             method="direct", assembly=asm)


def _objective_numpy(spl, objective):
    """The objectives of the placement module notes, recomputed with plain numpy."""
    if objective == "spread":
        return float(np.mean(np.std(spl, axis=1)))
    return float(np.sqrt(np.mean((spl - spl.mean()) ** 2)))


def _optimise(room, seats, n_sources, objective, **kw):
    mesh, asm, modes = room
    return af.optimise_placement(mesh, _walls(), candidates=_candidates(), seats=seats,
                                 n_sources=n_sources, band=BAND, n_frequencies=N_F,
                                 objective=objective, modes=modes, assembly=asm, **kw)


# ------------------------------------------------------------- acceptance
# every factor (sources, objective, seating) at both levels in the default
# suite; the other half of the full factorial is marked slow

@pytest.mark.parametrize("n_sources, objective, seating", [
    (2, "spread", "centred"), (4, "spread", "rear"), (2, "flat", "rear"), (4, "flat", "centred"),
    pytest.param(2, "spread", "rear", marks=SLOW), pytest.param(4, "spread", "centred", marks=SLOW),
    pytest.param(2, "flat", "centred", marks=SLOW), pytest.param(4, "flat", "rear", marks=SLOW),
])
def test_at_least_as_good_as_common_practice_by_direct_solves(room, reference_spl, seating,
                                                              objective, n_sources):
    """Chosen layout vs the symmetric layouts of common practice, all solved directly.

    Reference layouts: common practice (Welti & Devantier 2006, from memory).
    Judge: solve_response(method="direct") and numpy objectives (module notes).
    """
    seats = SEATINGS[seating]
    r = _optimise(room, seats, n_sources, objective)
    d = _direct(room, r.layout.sources(Q), seats, r.frequencies)
    # the modal model's seat SPL agrees with the direct solve (tolerance: module notes)
    dL = float(np.max(np.abs(d.spl - r.spl)))
    assert dL <= SPL_TOL
    j_chosen = _objective_numpy(d.spl, objective)
    # Lipschitz bound (module notes): the objectives differ by at most max|ΔL|
    assert abs(j_chosen - r.value) <= dL + 1e-9
    for name in COMMON_PRACTICE[n_sources]:  # common practice
        j_ref = _objective_numpy(reference_spl(seating, n_sources, name, r.frequencies),
                                 objective)
        assert j_chosen <= j_ref + 2 * SPL_TOL, (name, j_chosen, j_ref)
        # the references are among the candidates, so the modal search saw them:
        # a strict check with the modal error bound as the only slack
        assert j_chosen <= j_ref + 2 * dL + 1e-9, (name, j_chosen, j_ref)
    assert r.improvement_db == pytest.approx(r.baseline_value - r.value)
    assert r.layout.positions.shape == (n_sources, 3)
    assert r.spl.shape == (N_F, len(seats))


def test_exhaustive_search_finds_the_direct_optimum_over_candidate_pairs(room):
    """Brute force over all 28 pairs of 8 candidates from per-candidate direct solves.

    Superposition (Pierce 1989 §4.1, from memory): the pair's seat pressure is
    the sum of the two single-source pressures, each from
    solve_response(method="direct").  Unit gains, no delays.
    """
    seats = SEATINGS["rear"]
    mesh, asm, modes = room
    # the corners and wall midpoints
    cand = np.array([c for c in _candidates()
                     if (c[0] in (0.0, Lx / 2, Lx)) and (c[1] in (0.0, Ly / 2, Ly))])
    assert len(cand) == 8
    r = af.optimise_placement(mesh, _walls(), candidates=cand, seats=seats, n_sources=2,
                              band=BAND, n_frequencies=13, modes=modes, assembly=asm,
                              gains=False, delays=False)
    P = np.stack([_direct(room, [PointSource(tuple(c), Q)], seats, r.frequencies).pressure
                  for c in cand], axis=-1)  # (n_f, n_r, n_c)
    vals = {}
    for i, j in itertools.combinations(range(len(cand)), 2):
        p = P[:, :, i] + P[:, :, j]
        vals[(i, j)] = _objective_numpy(20 * np.log10(np.abs(p) / (math.sqrt(2) * 20e-6)),
                                        "spread")
    best = min(vals, key=vals.get)
    chosen = tuple(int(c) for c in r.layout.candidates)
    assert r.info["n_layouts_scored"] == 28 and r.info["search"] == "exhaustive"
    # the same pair, or one whose direct objective is within the model error
    assert chosen == best or vals[chosen] <= vals[best] + 2 * SPL_TOL
    assert abs(vals[chosen] - r.value) <= SPL_TOL


@pytest.mark.parametrize("objective", ["flat", pytest.param("spread", marks=SLOW)])
def test_modal_objective_agrees_with_direct(room, objective):
    """Baseline and chosen layouts: modal objective vs direct (verify=True) and numpy.

    Tolerance SPL_TOL (module notes), Lipschitz bound for the objective (the
    chosen layout's seat SPL is also compared in the acceptance test above).
    """
    seats = SEATINGS["rear"]
    r = _optimise(room, seats, 2, objective, verify=True)
    assert abs(r.info["direct_value"] - r.value) <= SPL_TOL
    assert abs(r.info["direct_baseline_value"] - r.baseline_value) <= SPL_TOL
    d = _direct(room, r.baseline.sources(Q), seats, r.frequencies)
    assert np.max(np.abs(d.spl - r.baseline_spl)) <= SPL_TOL
    assert _objective_numpy(d.spl, objective) == pytest.approx(r.info["direct_baseline_value"],
                                                               abs=1e-9)
    assert r.info["max_residual"] <= 1e-3


def test_gains_delays_deterministic_and_never_worse(room):
    """Same seed, same layout; the continuous step never loses to unit gains."""
    seats = SEATINGS["rear"]
    plain = _optimise(room, seats, 2, "spread", gains=False, delays=False)
    a = _optimise(room, seats, 2, "spread", seed=7, n_polish=2)
    b = _optimise(room, seats, 2, "spread", seed=7, n_polish=2)
    np.testing.assert_array_equal(a.layout.gains, b.layout.gains)
    np.testing.assert_array_equal(a.layout.delays, b.layout.delays)
    np.testing.assert_array_equal(a.layout.candidates, b.layout.candidates)
    assert a.value <= plain.value + 1e-12
    assert np.all(plain.layout.gains == 1.0) and np.all(plain.layout.delays == 0.0)
    assert a.layout.delays.min() == 0.0 and a.layout.gains.max() == pytest.approx(1.0)
    assert a.info["n_continuous_evaluations"] > 0


@pytest.mark.parametrize("objective, target", [("spread", None), ("flat", None), ("flat", 90.0)])
def test_objective_gradient_against_central_differences(objective, target):
    """Analytic gradient of the continuous step vs central differences (error O(h²))."""
    from acoustic_fem.placement import _value_and_gradient

    rng = np.random.default_rng(1)
    H = rng.normal(size=(7, 5, 3)) + 1j * rng.normal(size=(7, 5, 3))
    w = 2 * np.pi * np.linspace(20, 100, 7)
    g, d = rng.random(3) + 0.2, rng.random(3) * 0.01
    obj = Objective(objective)
    _, dg, dd = _value_and_gradient(H, w, g, d, obj, target)
    for j in range(3):
        for x, h, an in ((g, 1e-6, dg), (d, 1e-8, dd)):
            e = np.zeros(3)
            e[j] = h
            xp, xm = x + e, x - e
            args = ((xp, d), (xm, d)) if x is g else ((g, xp), (g, xm))
            num = (_value_and_gradient(H, w, *args[0], obj, target)[0]
                   - _value_and_gradient(H, w, *args[1], obj, target)[0]) / (2 * h)
            # the O(h²) truncation and rounding (1e-16 J / h) are both < 1e-6 relative here
            assert an[j] == pytest.approx(num, rel=1e-5, abs=1e-6 * np.abs(an).max())


def test_baseline_layout_given_and_flat_target(room):
    """A user baseline (PointSources off the candidate grid) and a fixed target level.

    Judge: direct solve of the baseline, objective recomputed with numpy
    against the fixed target.
    """
    seats = SEATINGS["centred"]
    base = [PointSource((1.0, 1.0, 0.5), Q), PointSource((4.0, 2.6, 0.5), Q, gain=0.5,
                                                        delay=2e-3)]
    target = 70.0
    r = _optimise(room, seats, 2, "flat", baseline=base, target_db=target)
    d = _direct(room, base, seats, r.frequencies)
    j = float(np.sqrt(np.mean((d.spl - target) ** 2)))
    assert abs(j - r.baseline_value) <= SPL_TOL
    assert list(r.baseline.candidates) == [-1, -1]
    np.testing.assert_allclose(r.baseline.gains, [1.0, 0.5])
    assert r.target_db == target and r.value <= r.baseline_value


def test_seat_selection_matches_direct_brute_force(room):
    """optimise_seats vs all 3-seat subsets of 9 candidate seats, from one direct solve."""
    mesh, asm, modes = room
    seats = SEATINGS["centred"]
    srcs = [PointSource(p, Q) for p in COMMON_PRACTICE[2]["opposite midpoints of the end walls"]]
    r = af.optimise_seats(mesh, _walls(), sources=srcs, seat_candidates=seats, n_seats=3,
                          band=BAND, n_frequencies=N_F, modes=modes, assembly=asm)
    d = _direct(room, srcs, seats, r.frequencies)
    vals = {c: _objective_numpy(d.spl[:, list(c)], "spread")
            for c in itertools.combinations(range(len(seats)), 3)}
    best = min(vals, key=vals.get)
    chosen = tuple(int(s) for s in r.seats)
    assert chosen == best or vals[chosen] <= vals[best] + 2 * SPL_TOL
    assert abs(vals[chosen] - r.value) <= SPL_TOL
    assert r.info["n_sets_scored"] == 84 and r.value <= r.baseline_value


# --------------------------------------------------------------- bad input
@pytest.mark.parametrize("change, match", [
    (dict(candidates=[(1.0, 1.0, 0.0), (6.0, 1.0, 0.0)]), r"candidate 1 .*outside"),
    (dict(candidates=np.zeros((0, 3))), r"candidates is empty"),
    (dict(band=(0.0, 100.0)), r"low edge must be > 0"),
    (dict(band=(-10.0, 100.0)), r"low edge must be > 0"),
    (dict(band=(100.0, 20.0)), r"high edge must exceed"),
    (dict(band=(20.0, math.inf)), r"must be finite"),
    (dict(band=20.0), r"band=20.0 must be \(f_low, f_high\)"),
    (dict(n_sources=3), r"n_sources=3 exceeds the 2 candidate"),
    (dict(n_sources=0), r"n_sources=0 must be a whole number >= 1"),
    (dict(objective="loudest"), r"objective='loudest' is not one of \['spread', 'flat'\]"),
    (dict(seats=[(2.0, 2.0, 1.2)]), r"needs at least 2 seats"),
    (dict(seats=[(2.0, 2.0, 1.2), (2.0, 2.0, 3.0)]), r"seat 1 .*outside"),
    (dict(gain_range=(0.5, 0.2)), r"gain_range"),
    (dict(baseline=[(9.0, 1.0, 0.0)]), r"baseline source 0 .*outside"),
    (dict(n_frequencies=1), r"n_frequencies=1"),
    (dict(tol=0.0), r"tol=0.0 must be positive"),
    (dict(modes=5), r"modes=5 must be None or a Modes"),
    (dict(baseline=[PointSource((1, 1, 0), Q), (2.0, 1.0, 0.0)]), r"mixes PointSource"),
])
def test_bad_input(room, change, match):
    mesh, asm, _ = room
    kw = dict(candidates=[(0.0, 1.0, 0.0), (5.0, 1.0, 0.0)],
              seats=[(2.0, 2.0, 1.2), (3.0, 2.0, 1.2)], n_sources=2, band=BAND, assembly=asm)
    kw.update(change)
    with pytest.raises(InputError, match=match):
        af.optimise_placement(mesh, _walls(), **kw)


def test_bad_input_seats_and_objective_enum(room):
    mesh, asm, _ = room
    assert Objective("flat") is Objective.FLAT
    with pytest.raises(InputError, match=r"n_seats=5 exceeds the 2 candidate seat"):
        af.optimise_seats(mesh, _walls(), sources=PointSource((0, 1, 0), Q),
                          seat_candidates=[(2, 2, 1.2), (3, 2, 1.2)], n_seats=5, assembly=asm)
    with pytest.raises(InputError, match=r"spl has shape"):
        af.layout_objective(np.zeros(3))
