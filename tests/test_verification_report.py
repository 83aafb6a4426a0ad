"""The verification report: runs, passes on this install, and fails visibly when broken.

The checks inside the report compare with published solutions (Kinsler et
al. 2000 §10.2 tubes, Morse & Ingard 1968 §9.4 ducts and boxes, Abramowitz
& Stegun 1964 §9.5/§10.1 cylinder and sphere, Strang & Fix 1973 ch. 6
convergence rates); these tests check the runner and its report, and that a
deliberately broken solver makes the report fail.
"""

from __future__ import annotations

import csv

import pytest

import acoustic_fem as af
from acoustic_fem import verification as ver
from acoustic_fem._atomic import OutputExistsError
from acoustic_fem._errors import InputError


def _read_csv(folder):
    with open(folder / "verification.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def quick_results():
    return ver.run_checks(quick=True, groups=["tube", "duct"])


def test_quick_checks_pass_and_report(quick_results, tmp_path):
    res = quick_results
    assert len(res) >= 40
    assert all(r.passed for r in res), [r for r in res if not r.passed]
    # every row names its source and has a finite, positive tolerance
    assert all(r.source and r.tolerance > 0 for r in res)
    assert {r.group for r in res} == {"tube", "duct"}
    out = ver.write_report(res, tmp_path / "report")
    rows = _read_csv(out)
    assert len(rows) == len(res)
    assert list(rows[0]) == list(ver._CSV_COLUMNS)
    assert {r["passed"] for r in rows} == {"pass"}
    page = (out / "verification.html").read_text(encoding="utf-8")
    assert "all checks passed" in page and "FAIL" not in page
    assert page.count("<tr class=\"pass\">") == len(res)
    assert "Kinsler" in page and "Morse" in page


def test_perturbed_speed_of_sound_fails_visibly(monkeypatch, tmp_path):
    # A deliberately broken solver: every FE frequency 0.1 % too high (as if
    # the speed of sound were wrong by 0.1 %).  The P2 tube tolerances are
    # ~1e-4 and below, so the report must show failures.
    real = af.Air.frequency

    def broken(self, eigenvalue):
        return 1.001 * real(self, eigenvalue)

    monkeypatch.setattr(af.Air, "frequency", broken)
    res = ver.run_checks(quick=True, groups=["tube"])
    failed = [r for r in res if not r.passed]
    assert len(failed) >= 10
    # the 0 Hz rows stay correct (0 * 1.001 = 0): only real errors fail
    assert all(r.expected > 0 for r in failed)
    out = ver.write_report(res, tmp_path / "broken")
    rows = _read_csv(out)
    assert sum(r["passed"] == "FAIL" for r in rows) == len(failed)
    page = (out / "verification.html").read_text(encoding="utf-8")
    assert f"{len(failed)} of {len(res)} checks FAILED" in page
    assert page.count('<tr class="fail">') == len(failed)


def test_perturbed_mass_matrix_fails_visibly(monkeypatch):
    # break the assembly instead: a mass matrix 0.5 % too large lowers every
    # eigenvalue by 0.5 % -> frequencies 0.25 % low, far beyond the 2D duct
    # tolerances (<= 2e-3 at P1, ~1e-5 at P2)
    import acoustic_fem.assembly as asm
    import acoustic_fem.modes as modes_mod

    real = asm.assemble

    def broken(mesh, order=2):
        a = real(mesh, order)
        return asm.Assembly(a.stiffness, 1.005 * a.mass, a.dofs)

    monkeypatch.setattr(modes_mod, "assemble", broken)
    res = ver.run_checks(quick=True, groups=["duct"])
    assert sum(not r.passed for r in res) >= 8


def test_report_is_not_overwritten_unless_asked(quick_results, tmp_path):
    dest = tmp_path / "r"
    ver.write_report(quick_results[:3], dest)
    with pytest.raises(OutputExistsError, match="overwrite"):
        ver.write_report(quick_results, dest)
    ver.write_report(quick_results, dest, overwrite=True)
    assert len(_read_csv(dest)) == len(quick_results)


def test_bad_input():
    with pytest.raises(InputError, match="unknown verification group"):
        ver.run_checks(groups=["boxes"])
    with pytest.raises(InputError, match="CheckResult"):
        ver.write_report([1, 2], "nowhere")


def test_response_checks_pass_when_available():
    if not ver._have_response():
        pytest.skip("acoustic_fem.response is not part of this version")
    res = ver.run_checks(groups=["response"])
    assert len(res) == 4 and all(r.passed for r in res), res


def test_unavailable_checks_are_named():
    for name, why in ver.unavailable_checks():
        assert name and why


def test_full_quick_report_passes(tmp_path):
    # the whole quick report, as a user runs it on a fresh install
    res = ver.run_checks(quick=True)
    failed = [r for r in res if not r.passed]
    assert not failed, failed
    expected = set(ver.GROUPS) - (set() if ver._have_response() else {"response"})
    assert {r.group for r in res} == expected
    ver.write_report(res, tmp_path / "full")


def test_damped_checks_pass_and_fail_when_the_wall_is_wrong(monkeypatch):
    # the damped group compares with the impedance-terminated tube (Kinsler,
    # Frey, Coppens & Sanders 2000 §10.2) and the separable box with one
    # admittance wall (Morse & Ingard 1968 §9.4 with the wall condition)
    res = ver.run_checks(quick=True, groups=["damped"])
    assert len(res) >= 18 and all(r.passed for r in res), [r for r in res if not r.passed]
    assert {r.quantity for r in res} == {"frequency (Hz)", "decay rate (1/s)"}
    # a deliberately broken wall: every admittance 1 % too large raises every
    # decay rate by about 1 % (δ ∝ Re β to first order), far beyond the
    # decay tolerances (<= 1.4e-3 relative)
    from acoustic_fem.impedance import Impedance

    real = Impedance.admittance_at

    def broken(self, frequencies, air=None):
        return 1.01 * real(self, frequencies, air)

    monkeypatch.setattr(Impedance, "admittance_at", broken)
    bad = ver.run_checks(quick=True, groups=["damped"])
    failed = [r for r in bad if not r.passed and r.quantity == "decay rate (1/s)"]
    assert len(failed) >= 8, failed
