"""Tests of acoustic_fem.analytic against sources outside the project.

Sources used (named again beside each check):

* Morse & Ingard, *Theoretical Acoustics*, 1968, §9.4 -- rectangular-room
  modes ``f = (c/2) sqrt((nx/Lx)^2 + (ny/Ly)^2 + (nz/Lz)^2)`` and the
  axial / tangential / oblique classification.
* Kinsler, Frey, Coppens & Sanders, *Fundamentals of Acoustics*, 4th ed.,
  2000, §10.2 -- tube resonances.
* Abramowitz & Stegun, *Handbook of Mathematical Functions*, 1964, Table 9.5
  (zeros of J_n') and §10.1 (spherical Bessel functions).  Table values
  below are quoted from memory and are cross-checked against mpmath.
* mpmath (independent arbitrary-precision library): ``besseljzero`` and
  ``besselj``/``findroot``.

Brute-force enumerations in this file are written out independently of the
module's index-range logic: they loop over generous fixed index ranges.
"""

from __future__ import annotations

import itertools
import math

import mpmath
import numpy as np
import pytest

from acoustic_fem import analytic
from acoustic_fem._errors import InputError

C = 343.0  # m/s; any positive value works, this one is common practice for air


# ---------------------------------------------------------------------------
# rectangular box
# ---------------------------------------------------------------------------
def _brute_force(size, per_axis, fmax, nmax=40):
    """All (f, index tuple) with f <= fmax by looping over 0..nmax-1 per axis.

    per_axis[i](n) returns the spatial frequency k_i / (2 pi) in 1/m, or None
    when index n is not allowed on that axis.
    """
    out = []
    for idx in itertools.product(range(nmax), repeat=len(size)):
        parts = [per_axis[a](n) for a, n in enumerate(idx)]
        if any(p is None for p in parts):
            continue
        f = C * math.sqrt(sum(p * p for p in parts))
        if f <= fmax:
            out.append((f, idx))
    out.sort()
    return out


def test_rigid_box_matches_brute_force_rectangular_room_formula():
    # Morse & Ingard 1968, §9.4: f = (c/2) sqrt(sum (n_i / L_i)^2), n_i >= 0.
    size = (3.1, 2.3, 1.7)
    fmax = 250.0
    ref = _brute_force(size, [lambda n, L=L: n / (2 * L) for L in size], fmax)
    # 39 * c / (2 * 1.7) >> 250 Hz, so nmax = 40 is complete.
    modes = analytic.box_modes(size, c=C, fmax=fmax)
    assert len(modes) == len(ref) > 30
    # Frequencies: same numbers to rounding (rtol 1e-12: both are a sqrt of a
    # few products, a few ulps apart at most).
    np.testing.assert_allclose(modes.frequencies, [f for f, _ in ref], rtol=1e-12)
    assert {tuple(i) for i in modes.indices.tolist()} == {i for _, i in ref}
    assert np.all(np.diff(modes.frequencies) >= -1e-12 * modes.frequencies[1:])
    assert modes.indices.shape == (len(ref), 3)
    assert modes.frequencies[0] == 0.0 and tuple(modes.indices[0]) == (0, 0, 0)


def test_mixed_walls_match_brute_force():
    # Per axis (Morse & Ingard 1968, §9.4, separable solutions):
    # x: rigid at 0, release at L  -> k/(2pi) = (2n+1)/(4L), n >= 0
    # y: release at both ends     -> k/(2pi) = n/(2L),      n >= 1
    # z: release at 0, rigid at L -> k/(2pi) = (2n+1)/(4L), n >= 0
    size = (2.9, 1.9, 1.3)
    walls = {"x1": "pressure_release", "y0": "pressure_release",
             "y1": "pressure_release", "z0": "pressure_release"}
    per_axis = [
        lambda n: (2 * n + 1) / (4 * size[0]),
        lambda n: None if n == 0 else n / (2 * size[1]),
        lambda n: (2 * n + 1) / (4 * size[2]),
    ]
    fmax = 400.0
    ref = _brute_force(size, per_axis, fmax)
    modes = analytic.box_modes(size, c=C, walls=walls, fmax=fmax)
    assert len(modes) == len(ref) > 30
    np.testing.assert_allclose(modes.frequencies, [f for f, _ in ref], rtol=1e-12)
    assert {tuple(i) for i in modes.indices.tolist()} == {i for _, i in ref}
    assert modes.frequencies[0] > 0.0  # no 0 Hz mode once a face is released


def test_count_is_head_of_fmax_list_and_ties_follow_index_order():
    # Cube of side 2 m: f(1,0,0) = c/(2L) = 85.75 Hz (Morse & Ingard §9.4),
    # triply degenerate; ties ordered by index tuple (module contract).
    modes = analytic.box_modes((2.0, 2.0, 2.0), c=C, count=7)
    assert modes.indices.tolist() == [
        [0, 0, 0], [0, 0, 1], [0, 1, 0], [1, 0, 0], [0, 1, 1], [1, 0, 1], [1, 1, 0],
    ]
    np.testing.assert_allclose(
        modes.frequencies, [0, 85.75, 85.75, 85.75] + [85.75 * math.sqrt(2)] * 3,
        rtol=1e-14)
    # count=N gives the N lowest of the full fmax list
    size = (4.3, 3.7, 2.6)
    full = analytic.box_modes(size, c=C, fmax=300.0)
    for n in (1, 2, 17, len(full)):
        head = analytic.box_modes(size, c=C, count=n)
        np.testing.assert_array_equal(head.indices, full.indices[:n])
        np.testing.assert_array_equal(head.frequencies, full.frequencies[:n])


def test_fmax_is_inclusive():
    # c/(2L) with L = 2 m is 85.75 Hz exactly in binary too (343/4).
    at = analytic.box_modes((2.0, 2.0, 2.0), c=C, fmax=85.75)
    below = analytic.box_modes((2.0, 2.0, 2.0), c=C, fmax=85.75 * (1 - 1e-9))
    assert len(at) == 4 and len(below) == 1
    # fmax = 0 keeps only the uniform mode of an all-rigid box
    assert analytic.box_modes((1.0, 1.0), c=C, fmax=0.0).kind.tolist() == ["uniform"]
    empty = analytic.box_modes((1.0,), c=C, walls={"x0": "pressure_release"}, fmax=0.0)
    assert len(empty) == 0 and empty.indices.shape == (0, 1)


def test_kind_classification():
    # Morse & Ingard 1968, §9.4: axial = one nonzero index, tangential = two,
    # oblique = three (rigid room).  0 Hz labelled "uniform" (module contract).
    modes = analytic.box_modes((3.0, 2.0, 1.5), c=C, fmax=300.0)
    names = np.array(["uniform", "axial", "tangential", "oblique"])
    np.testing.assert_array_equal(modes.kind, names[np.count_nonzero(modes.indices, axis=1)])
    assert set(modes.kind.tolist()) == set(names)
    lookup = {tuple(i): k for i, k in zip(modes.indices.tolist(), modes.kind.tolist())}
    assert lookup[(1, 0, 0)] == "axial"
    assert lookup[(0, 1, 1)] == "tangential"
    assert lookup[(1, 1, 1)] == "oblique"
    # With release faces no wavenumber is zero on that axis.
    released = analytic.box_modes(
        (3.0, 2.0, 1.5), c=C, walls={f: "pressure_release" for f in
                                     ("x0", "x1", "y0", "y1", "z0", "z1")}, count=10)
    assert set(released.kind.tolist()) == {"oblique"}
    rect = analytic.box_modes((3.0, 2.0), c=C, count=20)
    assert set(rect.kind.tolist()) == {"uniform", "axial", "tangential"}


def test_one_and_two_dimensional_cases():
    # 1D rigid tube: f = n c / (2L) (Kinsler et al. 2000, §10.2).
    tube = analytic.box_modes((1.5,), c=C, count=5)
    np.testing.assert_allclose(tube.frequencies, np.arange(5) * C / 3.0, rtol=1e-14)
    assert tube.indices.shape == (5, 1)
    assert tube.kind.tolist() == ["uniform"] + ["axial"] * 4
    # 2D rectangle, brute force of the same formula (Morse & Ingard §9.4).
    size = (1.7, 1.1)
    ref = _brute_force(size, [lambda n, L=L: n / (2 * L) for L in size], 800.0)
    rect = analytic.box_modes(size, c=C, fmax=800.0)
    np.testing.assert_allclose(rect.frequencies, [f for f, _ in ref], rtol=1e-12)


MIXED = {"x1": "pressure_release", "y0": "pressure_release", "z0": "pressure_release",
         "z1": "pressure_release"}


def _mixed_box():
    return analytic.box_modes((1.3, 1.0, 0.8), c=C, walls=MIXED, count=25)


def test_shapes_satisfy_boundary_conditions():
    modes = _mixed_box()
    size = modes.size
    rng = np.random.default_rng(1)
    h = 1e-4
    kmax = 2 * math.pi * modes.frequencies.max() / C
    for axis in range(3):
        cond = {0: "rigid", 1: "rigid"}
        cond.update({int(k[1]): v for k, v in MIXED.items() if k[0] == "xyz"[axis]})
        for end in (0, 1):
            pts = rng.uniform(0, 1, (20, 3)) * size
            pts[:, axis] = end * size[axis]
            p0 = modes.shape(pts)
            if cond[end] == "pressure_release":
                # p = 0 on a release face; the shapes are O(1), so 1e-12
                # absolute is rounding of sin(n pi) only.
                assert np.max(np.abs(p0)) < 1e-12
            else:
                # dp/dn = 0 on a rigid face: one-sided second-order difference
                # (-3 p0 + 4 p1 - p2) / (2h), truncation ~ h^2 k^3 / 3 < 1e-6
                # here; tolerance 1e-5 * kmax is far below the |dp/dn| ~ k
                # that a wrong (sin instead of cos) factor would give.
                inward = 1.0 if end == 0 else -1.0
                p1 = pts.copy(); p1[:, axis] += inward * h
                p2 = pts.copy(); p2[:, axis] += inward * 2 * h
                dpdn = (-3 * p0 + 4 * modes.shape(p1) - modes.shape(p2)) / (2 * h)
                assert np.max(np.abs(dpdn)) < 1e-5 * kmax
                assert np.max(np.abs(p0)) > 0.1  # the face is not trivially a node


def test_shapes_solve_helmholtz_with_the_returned_frequency():
    # Laplacian(p) = -k^2 p with k = 2 pi f / c (the Helmholtz equation, Morse
    # & Ingard 1968, §9.4).  Central second difference, h = 1e-3: truncation
    # h^2 k^4 / 12 < 1e-3 and rounding 4 eps / h^2 ~ 1e-9, against k^2 up to
    # ~100 here, so rtol 1e-4 of k^2 is ample yet catches any wrong k.
    modes = _mixed_box()
    pts = np.random.default_rng(2).uniform(0.1, 0.7, (15, 3))
    h = 1e-3
    p = modes.shape(pts)
    lap = np.zeros_like(p)
    for axis in range(3):
        e = np.zeros(3); e[axis] = h
        lap += (modes.shape(pts + e) - 2 * p + modes.shape(pts - e)) / h**2
    k2 = (2 * math.pi * modes.frequencies / C) ** 2
    assert np.max(np.abs(lap + k2 * p)) < 1e-4 * k2.max()


def test_shapes_are_orthogonal():
    # Eigenfunctions of a self-adjoint problem are orthogonal (general
    # Sturm-Liouville property, e.g. Courant & Hilbert, Methods of
    # Mathematical Physics, vol. I, ch. V -- from memory).  Gauss-Legendre
    # with 40 nodes per axis integrates these trig products to ~1e-14.
    modes = analytic.box_modes((1.3, 0.9), c=C, walls={"x1": "pressure_release",
                                                      "y0": "pressure_release"}, count=15)
    xg, wg = np.polynomial.legendre.leggauss(40)
    x = (xg + 1) / 2 * 1.3
    y = (xg + 1) / 2 * 0.9
    X, Y = np.meshgrid(x, y, indexing="ij")
    W = np.outer(wg * 1.3 / 2, wg * 0.9 / 2).ravel()
    phi = modes.shape(np.column_stack([X.ravel(), Y.ravel()]))
    gram = phi.T @ (W[:, None] * phi)
    # each unnormalised product of cos/sin has squared norm area/4
    np.testing.assert_allclose(np.diag(gram), 1.3 * 0.9 / 4, rtol=1e-12)
    off = gram - np.diag(np.diag(gram))
    assert np.max(np.abs(off)) < 1e-12


# ---------------------------------------------------------------------------
# tube and duct
# ---------------------------------------------------------------------------
@pytest.mark.parametrize(
    "ends, expected",
    [
        # Kinsler, Frey, Coppens & Sanders 2000, §10.2, L = 0.5 m, c = 343 m/s
        (("rigid", "rigid"), [0.0, 343.0, 686.0, 1029.0]),                 # n c / 2L, n >= 0
        (("pressure_release", "pressure_release"), [343.0, 686.0, 1029.0, 1372.0]),  # n >= 1
        (("rigid", "pressure_release"), [171.5, 514.5, 857.5, 1200.5]),    # (2n+1) c / 4L
        (("pressure_release", "rigid"), [171.5, 514.5, 857.5, 1200.5]),
    ],
)
def test_tube_formulas(ends, expected):
    f = analytic.tube_modes(0.5, c=C, ends=ends, count=4)
    assert f.shape == (4,)
    np.testing.assert_allclose(f, expected, rtol=1e-14, atol=1e-12)


def test_duct_2d_formula_and_box_equivalence():
    L, H = 1.2, 0.4
    ref = sorted(C * math.sqrt(((2 * n + 1) / (4 * L)) ** 2 + (m / (2 * H)) ** 2)
                 for n in range(40) for m in range(40))[:30]
    f = analytic.duct_2d_modes(L, H, c=C, count=30)
    np.testing.assert_allclose(f, ref, rtol=1e-12)
    box = analytic.box_modes((L, H), c=C, walls={"x1": "pressure_release"}, count=30)
    np.testing.assert_array_equal(f, box.frequencies)
    # lowest: quarter-wave plane mode c / (4L) (Kinsler et al. 2000, §10.2)
    assert f[0] == pytest.approx(C / (4 * L), rel=1e-14)


# ---------------------------------------------------------------------------
# cylinder / disc
# ---------------------------------------------------------------------------
def _disc_roots(count):
    # a = 1 m and c = 2 pi m/s make f numerically equal to j'_{m,s}.
    return analytic.cylinder_modes(1.0, None, c=2 * math.pi, count=count)


def test_jn_prime_zeros_against_abramowitz_stegun_table_9_5():
    # A&S 1964, Table 9.5 (values from memory, 5 decimals; A&S counts x = 0
    # as j'_{0,1}, so 3.83171 is their j'_{0,2} and our (m=0, s=1)).
    table = {(1, 1): 1.84118, (2, 1): 3.05424, (0, 1): 3.83171, (3, 1): 4.20119,
             (1, 2): 5.33144, (2, 2): 6.70613, (0, 2): 7.01559}
    disc = _disc_roots(40)
    got = {}
    for m, s, x in zip(disc.m.tolist(), disc.s.tolist(), disc.radial_root.tolist()):
        got[(m, s)] = x
    for key, value in table.items():
        assert got[key] == pytest.approx(value, abs=6e-6)  # half a unit in the 5th decimal
    np.testing.assert_allclose(disc.frequencies, disc.radial_root, rtol=1e-14)


def test_jn_prime_zeros_against_mpmath():
    # mpmath.besseljzero(m, s, derivative=1) uses the A&S/DLMF numbering
    # (j'_{0,1} = 0), i.e. mpmath index = s + 1 for m = 0 and = s otherwise.
    disc = _disc_roots(120)
    seen = set()
    for m, s, x in zip(disc.m.tolist(), disc.s.tolist(), disc.radial_root.tolist()):
        if (m, s) in seen or (m > 12) or (s > 3):
            continue
        seen.add((m, s))
        ref = float(mpmath.besseljzero(m, s + 1 if m == 0 else s, derivative=1))
        assert x == pytest.approx(ref, rel=1e-12, abs=1e-14)  # double-precision roots
    assert len(seen) > 20


def test_disc_is_complete_with_multiplicities():
    # Independent list from mpmath: all j'_{m,s} <= 14 for m <= 20 (j'_{m,1} > m,
    # so higher m cannot contribute), each m > 0 twice (cos/sin).
    xmax = 14.0
    ref = []
    for m in range(0, 21):
        s = 1
        while True:
            x = float(mpmath.besseljzero(m, s, derivative=1))
            if x > xmax:
                break
            ref += [x] * (1 if m == 0 else 2)
            s += 1
    ref.sort()
    disc = analytic.cylinder_modes(1.0, None, c=2 * math.pi, fmax=xmax)
    assert disc.q is None
    np.testing.assert_allclose(disc.frequencies, ref, rtol=1e-12, atol=1e-14)
    # degenerate partners: m > 0 appears as cos and sin, m = 0 only as cos
    for m, s in set(zip(disc.m.tolist(), disc.s.tolist())):
        sel = (disc.m == m) & (disc.s == s)
        assert sorted(disc.angular[sel].tolist()) == (["cos"] if m == 0 else ["cos", "sin"])


def test_cylinder_three_d_combines_radial_and_axial():
    # k^2 = (j'_{m,s}/a)^2 + (q pi / h)^2 (separation of variables in
    # cylindrical coordinates; j' from mpmath as above).
    a, h = 0.4, 1.1
    fmax = 900.0
    kmax = 2 * math.pi * fmax / C
    radial = [(0, 0.0)]
    for m in range(0, 15):
        s = 1
        while True:
            x = float(mpmath.besseljzero(m, s, derivative=1))
            if x > kmax * a:
                break
            if x > 0:
                radial.append((m, x))
            s += 1
    ref = []
    for m, x in radial:
        for q in range(20):
            f = C / (2 * math.pi) * math.sqrt((x / a) ** 2 + (q * math.pi / h) ** 2)
            if f <= fmax:
                ref += [f] * (1 if m == 0 else 2)
    ref.sort()
    cyl = analytic.cylinder_modes(a, h, c=C, fmax=fmax)
    np.testing.assert_allclose(cyl.frequencies, ref, rtol=1e-12)
    assert cyl.frequencies[0] == 0.0
    # pure axial modes q c / (2h) as in a rigid tube (Kinsler et al. §10.2)
    axial = cyl.frequencies[(cyl.m == 0) & (cyl.s == 0)]
    np.testing.assert_allclose(axial, np.arange(axial.size) * C / (2 * h), rtol=1e-14)
    head = analytic.cylinder_modes(a, h, c=C, count=len(cyl))
    np.testing.assert_array_equal(head.frequencies, cyl.frequencies)
    np.testing.assert_array_equal(head.q, cyl.q)


# ---------------------------------------------------------------------------
# sphere
# ---------------------------------------------------------------------------
def _mp_djl(l, x):
    """j_l'(x) with mpmath: j_l = sqrt(pi/(2x)) J_{l+1/2} (A&S 10.1.1) and
    (2l+1) j_l' = l j_{l-1} - (l+1) j_{l+1} (A&S 10.1.20; both from memory)."""
    def jl(n):
        return mpmath.sqrt(mpmath.pi / (2 * x)) * mpmath.besselj(n + 0.5, x)
    return (l * jl(l - 1) - (l + 1) * jl(l + 1)) / (2 * l + 1)


def _mp_roots(l, xmax, step=0.1):
    """Zeros of j_l' in (0, xmax] by mpmath evaluation + bracketed findroot."""
    xs = [mpmath.mpf(0.05) + step * i for i in range(int(xmax / step) + 1)]
    ys = [_mp_djl(l, x) for x in xs]
    out = []
    for x0, x1, y0, y1 in zip(xs, xs[1:], ys, ys[1:]):
        if y0 * y1 < 0:
            out.append(float(mpmath.findroot(lambda t: _mp_djl(l, t), (x0, x1),
                                             solver="anderson")))
    return out


def test_sphere_roots_known_values():
    # From memory: l=1 first zero 2.0816, l=2 first 3.3421, l=0 first nonzero
    # 4.4934 (the first positive root of tan x = x, since j_0' = -j_1).
    sph = analytic.sphere_modes(1.0, c=2 * math.pi, count=40)  # f == x numerically
    first = {}
    for l, n, x in zip(sph.l.tolist(), sph.n.tolist(), sph.radial_root.tolist()):
        first.setdefault((l, n), x)
    assert first[(1, 1)] == pytest.approx(2.0816, abs=5e-5)
    assert first[(2, 1)] == pytest.approx(3.3421, abs=5e-5)
    assert first[(0, 1)] == pytest.approx(4.4934, abs=5e-5)
    tan_root = float(mpmath.findroot(lambda t: mpmath.tan(t) - t, 4.49))
    assert first[(0, 1)] == pytest.approx(tan_root, rel=1e-13)
    # The 0 Hz mode is l = 0, n = 0.
    assert (sph.l[0], sph.n[0], sph.frequencies[0]) == (0, 0, 0.0)


def test_sphere_roots_against_mpmath_complete():
    xmax = 13.0
    sph = analytic.sphere_modes(1.0, c=2 * math.pi, fmax=xmax)
    ref = []
    for l in range(0, 13):  # zeros of j_l' exceed sqrt(l(l+1)) > l
        for x in _mp_roots(l, xmax):
            ref += [x] * (2 * l + 1)
    ref = sorted([0.0] + ref)
    # rtol 1e-11: brentq to ~1e-15 absolute vs mpmath at 15 digits.
    np.testing.assert_allclose(sph.frequencies, ref, rtol=1e-11, atol=1e-14)
    # l = 0 cross-check with a different mpmath route: j_0' = -j_1, whose
    # zeros are those of J_{3/2} (A&S 10.1.1).
    l0 = sph.radial_root[(sph.l == 0) & (sph.n > 0)]
    mp_l0 = [float(mpmath.besseljzero(1.5, i)) for i in range(1, l0.size + 1)]
    np.testing.assert_allclose(l0, mp_l0, rtol=1e-12)


def test_sphere_multiplicities_and_frequency_scaling():
    sph = analytic.sphere_modes(0.7, c=C, fmax=1500.0)
    for l, n in set(zip(sph.l.tolist(), sph.n.tolist())):
        sel = (sph.l == l) & (sph.n == n)
        assert sorted(sph.m[sel].tolist()) == list(range(-l, l + 1))  # 2l+1 copies
    np.testing.assert_allclose(sph.frequencies, C * sph.radial_root / (2 * math.pi * 0.7),
                               rtol=1e-14)
    head = analytic.sphere_modes(0.7, c=C, count=len(sph))
    np.testing.assert_array_equal(head.frequencies, sph.frequencies)


# ---------------------------------------------------------------------------
# input errors
# ---------------------------------------------------------------------------
@pytest.mark.parametrize(
    "call, words",
    [
        (lambda: analytic.box_modes((-1.0, 2.0, 3.0), c=C, count=3), ["size[0]", "-1.0", "> 0"]),
        (lambda: analytic.box_modes((1.0, 2.0, 3.0, 4.0), c=C, count=3), ["1, 2 or 3"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C), ["exactly one", "fmax", "count"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, fmax=10.0, count=3), ["exactly one"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, walls={"top": "rigid"}, count=3),
         ["'top'", "x0, x1, y0, y1"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, walls={"z0": "rigid"}, count=3),
         ["'z0'", "x0, x1, y0, y1"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, walls={"x0": "soft"}, count=3),
         ["'soft'", "'rigid'", "'pressure_release'"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=-343.0, count=3), ["c", "-343.0", "m/s"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, count=0), ["count", "0", "positive"]),
        (lambda: analytic.box_modes((1.0, 2.0), c=C, fmax=float("nan")), ["fmax", "nan"]),
        (lambda: analytic.tube_modes(1.0, c=C, ends=("rigid",), count=3), ["ends", "pair"]),
        (lambda: analytic.tube_modes(1.0, c=C, ends=("rigid", "open"), count=3), ["'open'"]),
        (lambda: analytic.cylinder_modes(0.0, 1.0, c=C, count=3), ["radius", "0.0"]),
        (lambda: analytic.cylinder_modes(1.0, 1.0, c=C), ["exactly one"]),
        (lambda: analytic.sphere_modes(1.0, c=C, count=2.5), ["count", "2.5"]),
        (lambda: analytic.box_modes((1.0,), c=C, count=3).shape(np.zeros(3)), ["points", "(3,)"]),
    ],
)
def test_bad_input_raises_input_error(call, words):
    with pytest.raises(InputError) as info:
        call()
    for word in words:
        assert word in str(info.value)


def test_c_is_a_required_keyword():
    with pytest.raises(TypeError):
        analytic.box_modes((1.0, 2.0, 3.0), count=3)  # noqa - deliberately missing c
    with pytest.raises(TypeError):
        analytic.tube_modes(1.0, 343.0, count=3)  # c must be passed by keyword
