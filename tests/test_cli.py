"""The command line: subcommands, exit codes, one-line errors, atomic results, interrupts.

These check behaviour the project promises (no outside source needed)
except where a physics value is compared: its source is named beside it.
"""

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import meshio
import numpy as np
import pytest

from acoustic_fem.cli import Reporter, main

PY = sys.executable
ROOT = Path(__file__).resolve().parents[1]
COMMANDS = ("run", "demo", "check", "mesh", "export", "materials", "modes", "info", "verify")

SMALL = """\
[scenario]
title = "cli test room"

[geometry]
builder = "box"
size = [2.2, 1.7, 1.4]

[frequencies]
min_hz = 40.0
max_hz = 140.0
step_hz = 50.0

[solver]
response_method = "direct"

[surfaces]
z0 = "carpet_on_concrete"

[[sources]]
position_m = [0.3, 0.3, 0.3]

[[receivers]]
name = "seat"
position_m = [1.4, 1.0, 1.0]

[outputs]
vtk = false
mode_slices = 3
"""


def _run(*args, cwd=None, timeout=600):
    return subprocess.run([PY, "-m", "acoustic_fem", *args], capture_output=True, text=True,
                          cwd=cwd, timeout=timeout)


def _one_line_error(r, code=2):
    assert r.returncode == code, (r.returncode, r.stderr)
    assert r.stderr.count("\n") == 1, r.stderr
    assert r.stderr.startswith("acoustic-fem: error: ") and "Traceback" not in r.stderr


def test_help_lists_commands():
    r = _run("--help")
    assert r.returncode == 0
    for cmd in COMMANDS:
        assert cmd in r.stdout
    assert "Verify by measurement" in r.stdout.replace("\n", " ")
    assert "exit codes: 0 success, 2 bad input, 1 failure" in r.stdout.replace("\n", " ")



@pytest.mark.parametrize("cmd", COMMANDS)
def test_every_subcommand_has_help(cmd, capsys):
    with pytest.raises(SystemExit) as ei:
        main([cmd, "--help"])
    assert ei.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: acoustic-fem {cmd}") and "exit codes" in out


def test_bad_option_is_one_line_exit_2():
    r = _run("run")
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "--help" in r.stderr


# ---------------------------------------------------------------- run
@pytest.fixture(scope="module")
def small(tmp_path_factory):
    d = tmp_path_factory.mktemp("small")
    (d / "room.toml").write_text(SMALL, encoding="utf-8")
    return d / "room.toml"


@pytest.fixture(scope="module")
def small_results(small):
    """`acoustic-fem run` on the small scenario, in a process that reports its peak memory."""
    out = small.parent / "results"
    # VmHWM (the high-water mark of this process image's resident memory); not
    # ru_maxrss, which Linux carries over from the forking parent across exec
    code = ("import re, sys; from acoustic_fem.cli import main; "
            f"rc = main(['run', {str(small)!r}, '--out', {str(out)!r}]); "
            "hwm = re.search(r'VmHWM:\\s*(\\d+)', open('/proc/self/status').read()).group(1); "
            "print('peak-rss-kb', hwm); sys.exit(rc)")
    r = subprocess.run([PY, "-c", code], capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    return out, r


def test_run_writes_the_results_folder(small_results):
    out, r = small_results
    names = set(os.listdir(out))
    assert {"room.toml", "modes.csv", "modes.json", "report.html", "summary.txt", "run.json",
            "spl_at_receivers.csv", "plots"} <= names
    assert "modes.pvd" not in names  # vtk = false
    assert "wrote" in r.stdout and "report.html" in r.stdout
    with open(out / "modes.csv", newline="") as fh:
        f = np.array([float(x["frequency_hz"]) for x in csv.DictReader(fh)])
    # all-rigid box: 0 Hz, then c/(2 Lx) (Morse & Ingard, Theoretical Acoustics, §9.4);
    # the carpet adds a little absorption, shifting it by far less than 1 %
    assert f[0] < 2.0
    assert f[1] == pytest.approx(343.2 / (2 * 2.2), rel=1e-2)


def test_run_refuses_to_overwrite_and_force_replaces(small, small_results, tmp_path):
    out, _ = small_results
    before = (out / "modes.csv").read_text()
    r = _run("run", str(small), "--out", str(out))
    _one_line_error(r)
    assert "--force" in r.stderr and (out / "modes.csv").read_text() == before


TINY = """\
[geometry]
builder = "box"
size = [1.0, 0.8, 0.6]
[frequencies]
max_hz = 300.0
accuracy_percent = 2.0
[outputs]
vtk = false
plots = false
report = false
"""


def test_quiet_and_verbose(tmp_path):
    p = tmp_path / "tiny.toml"
    p.write_text(TINY, encoding="utf-8")
    r = _run("run", str(p), "--out", str(tmp_path / "q"), "--quiet")
    assert r.returncode == 0 and r.stdout == "" and r.stderr == ""
    assert sorted(os.listdir(tmp_path / "q")) == ["modes.csv", "modes.json", "run.json",
                                                  "summary.txt", "tiny.toml"]
    r = _run("run", str(p), "--out", str(tmp_path / "v"), "--verbose")
    assert r.returncode == 0
    for stage in ("meshing", "assembly", "modes"):
        assert f"acoustic-fem: {stage} done in" in r.stderr
    assert "wrote" in r.stdout


def test_reporter_draws_bars_and_stage_lines():
    import io

    buf = io.StringIO()
    rep = Reporter(verbose=True, stream=buf, force=True)
    for stage, total in (("meshing", 1), ("sweep", 4)):
        for done in range(total + 1):
            rep(stage, done, total)
    rep.close()
    text = buf.getvalue()
    assert "frequency sweep" in text and "4/4" in text and "100%" in text
    assert "meshing done in" in text
    quiet = io.StringIO()
    Reporter(quiet=True, stream=quiet, force=True)("sweep", 1, 2)
    assert quiet.getvalue() == ""


# ---------------------------------------------------------------- bad scenarios
BAD = [
    ("toml syntax", ("max_hz = 140.0", "max_hz = = 140.0"), "TOML syntax error"),
    ("unknown key", ("step_hz = 50.0", "step = 50.0"), "frequencies.step"),
    ("wrong type", ("max_hz = 140.0", 'max_hz = "high"'), "frequencies.max_hz"),
    ("missing mesh file", ('builder = "box"\nsize = [2.2, 1.7, 1.4]', 'mesh_file = "gone.msh"'),
     "geometry.mesh_file"),
    ("unknown material", ('z0 = "carpet_on_concrete"', 'z0 = "shag_pile"'), "surfaces.z0"),
    ("surface not in geometry", ('z0 = "carpet_on_concrete"', 'carpet = "rigid"'),
     "surfaces.carpet"),
    ("seat outside the room", ("position_m = [1.4, 1.0, 1.0]", "position_m = [1.4, 3.0, 1.0]"),
     "receivers[1].position_m"),
]


@pytest.mark.parametrize("what, change, key", BAD, ids=[b[0] for b in BAD])
@pytest.mark.parametrize("cmd", ["run", "check"])
def test_bad_scenario_one_line_exit_2_nothing_written(tmp_path, capsys, what, change, key, cmd):
    text = SMALL.replace(*change)
    assert text != SMALL
    p = tmp_path / "bad.toml"
    p.write_text(text, encoding="utf-8")
    args = [cmd, str(p)] + (["--out", str(tmp_path / "out")] if cmd == "run" else [])
    code = main(args)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and err.startswith("acoustic-fem: error: "), err
    assert str(p) in err and key in err, err
    assert sorted(os.listdir(tmp_path)) == ["bad.toml"]  # nothing written, no temp folder


@pytest.mark.parametrize("what, change, key", [BAD[0], BAD[-1]], ids=["syntax", "seat"])
def test_bad_scenario_in_a_real_process(tmp_path, what, change, key):
    p = tmp_path / "bad.toml"
    p.write_text(SMALL.replace(*change), encoding="utf-8")
    r = _run("run", str(p), "--out", str(tmp_path / "out"), cwd=tmp_path)
    _one_line_error(r)
    assert str(p) in r.stderr and key in r.stderr
    assert sorted(os.listdir(tmp_path)) == ["bad.toml"]


def test_missing_scenario_file(tmp_path):
    r = _run("run", str(tmp_path / "nope.toml"), "--out", str(tmp_path / "o"))
    _one_line_error(r)
    assert "does not exist" in r.stderr


# ---------------------------------------------------------------- check, mesh, export
def test_check_estimates_within_a_factor_two_quickly(small, small_results):
    # the estimate against what the run measured (DOFs; peak memory of the run)
    out, _ = small_results
    t0 = time.perf_counter()
    r = _run("check", str(small), "--verbose")
    t_check = time.perf_counter() - t0
    assert r.returncode == 0, r.stderr
    t0 = time.perf_counter()
    subprocess.run([PY, "-c", "import acoustic_fem.scenario"], check=True)
    t_import = time.perf_counter() - t0
    # under 2 s of work beyond starting Python and importing the package
    # (the import alone takes ~0.7 s on an idle 2-core machine)
    assert t_check - t_import < 2.0, (t_check, t_import)
    run = json.loads((out / "run.json").read_text())
    from acoustic_fem.scenario import estimate_scenario_cost, load_scenario

    est = estimate_scenario_cost(load_scenario(small))
    assert f"{est.dofs} DOFs" in r.stdout
    assert 0.5 <= est.dofs / run["n_dofs"] <= 2.0


def test_memory_estimate_within_a_factor_two(small, small_results):
    from acoustic_fem.scenario import estimate_scenario_cost, load_scenario

    _, r = small_results
    line = [x for x in r.stdout.splitlines() if x.startswith("peak-rss-kb")][-1]
    peak = int(line.split()[1]) * 1024  # VmHWM is in kB
    est = estimate_scenario_cost(load_scenario(small))
    assert 0.5 <= est.memory_bytes / peak <= 2.0, (est.memory_bytes, peak)


def test_mesh_command_writes_a_named_mesh(small, tmp_path):
    from acoustic_fem import read_mesh

    out = tmp_path / "room.msh"
    r = _run("mesh", str(small), "--out", str(out))
    assert r.returncode == 0, r.stderr
    mesh = read_mesh(out)
    assert set(mesh.surface_names) == {"x0", "x1", "y0", "y1", "z0", "z1"}
    assert mesh.measure == pytest.approx(2.2 * 1.7 * 1.4, rel=1e-9)
    r = _run("mesh", str(small), "--out", str(tmp_path / "room.vtu"))
    _one_line_error(r)


def test_export_command(small_results, tmp_path):
    out, _ = small_results
    r = _run("export", str(out), "--format", "markdown", "--out", str(tmp_path / "t"))
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "t.md").read_text().count("\n|") >= 3
    r = _run("export", str(out), "--format", "vtu", "--out", str(tmp_path / "v"))
    _one_line_error(r)  # this run wrote no VTK files (vtk = false)
    assert "vtk = true" in r.stderr


def test_materials_command_lists_sources():
    r = _run("materials", "--verbose")
    assert r.returncode == 0
    assert "plasterboard_on_studs" in r.stdout and "from memory" in r.stdout
    assert "replace them by measured data" in r.stdout


# ---------------------------------------------------------------- interrupt
def test_interrupt_leaves_no_partial_folder_and_rerun_works(tmp_path):
    p = tmp_path / "room.toml"
    p.write_text(SMALL, encoding="utf-8")
    out = tmp_path / "out"
    proc = subprocess.Popen([PY, "-m", "acoustic_fem", "run", str(p), "--out", str(out), "-v"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seen = ""
    deadline = time.time() + 300
    while "modes ..." not in seen and time.time() < deadline:  # wait for the solve to start
        line = proc.stderr.readline()
        if not line:
            break
        seen += line
    assert "modes ..." in seen, seen
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=300)
    assert proc.returncode == 130, (proc.returncode, err)
    assert "interrupted" in err and "Traceback" not in err
    assert sorted(os.listdir(tmp_path)) == ["room.toml"]  # no folder, no temp leftovers
    r = _run("run", str(p), "--out", str(out), "-q")
    assert r.returncode == 0, r.stderr
    assert (out / "modes.csv").exists()


# ---------------------------------------------------------------- the demo
# not marked slow: demo + rerun take about 20 s on 2 shared cores
def test_demo_then_rerun_gives_identical_modes_tables(tmp_path):
    a, b = tmp_path / "A", tmp_path / "B"
    t0 = time.perf_counter()
    r = _run("demo", "--out", str(a))
    t_demo = time.perf_counter() - t0
    assert r.returncode == 0, r.stderr
    assert (a / "mixing_room.toml").exists() and (a / "report.html").exists()
    r = _run("run", str(a / "mixing_room.toml"), "--out", str(b))
    assert r.returncode == 0, r.stderr
    for name in ("modes.csv", "modes.json"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name
    assert (a / "mixing_room.toml").read_text() == (b / "mixing_room.toml").read_text()
    for png in ("mode_frequencies", "mode_slices", "seat_spl", "seat_spread", "spl_map"):
        assert (a / "plots" / f"{png}.png").exists()
    # the response field at the SPL-map frequencies, collected for a viewer
    assert (a / "response.pvd").exists() and (a / "vtk" / "response_000.vtu").exists()
    # the demo room's lowest nonzero mode lies near c/(2 L) with L the 4.6 m
    # length (Morse & Ingard §9.4 axial mode of a box of that length): the
    # sloped ceiling and cut corner move it by a few per cent only
    with open(a / "modes.csv", newline="") as fh:
        f = [float(x["frequency_hz"]) for x in csv.DictReader(fh)]
    c = 343.2 * np.sqrt((273.15 + 21.0) / 293.15)
    assert f[1] == pytest.approx(c / (2 * 4.6), rel=0.08)
    # under 60 s on an idle 2-core machine (skipped when the machine is busy)
    if os.getloadavg()[0] < 2.5:
        assert t_demo < 60.0, t_demo
    else:
        print(f"demo took {t_demo:.1f} s at load {os.getloadavg()[0]:.1f}; time not asserted")


def test_readme_quick_start_command_is_the_demo():
    text = (ROOT / "README.md").read_text()
    assert "python3 -m acoustic_fem demo --out demo_results" in text


# ---------------------------------------------------------------- mesh-file commands
def test_modes_command_on_mesh_file(tmp_path):
    import meshgen

    p = meshgen.box_msh(tmp_path / "b.msh", size=(1.2, 1.0, 0.9), h=0.3, order=1)
    out = tmp_path / "res"
    assert main(["modes", p, "--count", "6", "--wall", "z1=release", "--out", str(out),
                 "--quiet"]) == 0
    with open(out / "modes.csv", newline="") as fh:
        f = np.array([float(r["frequency_hz"]) for r in csv.DictReader(fh)])
    # first mode with a pressure-release ceiling: c/(4 Lz) (Morse & Ingard §9.4
    # with a quarter-wave axis); coarse P2 mesh -> 1 % tolerance
    assert f[0] == pytest.approx(343.2 / (4 * 0.9), rel=1e-2)
    m = meshio.read(out / "modes.vtu")
    assert np.allclose(np.asarray(m.field_data["frequencies_hz"]).ravel(), f, rtol=1e-8)


@pytest.mark.parametrize(
    "args, fragment",
    [
        (["modes", "nope.msh", "--count", "3", "--out", "x"], "does not exist"),
        (["modes", "{box}", "--count", "0", "--out", "{tmp}/a"], "count=0"),
        (["modes", "{box}", "--fmax", "-5", "--out", "{tmp}/b"], "fmax=-5"),
        (["modes", "{box}", "--count", "3", "--wall", "ceiling=release", "--out", "{tmp}/c"],
         "'ceiling'"),
        (["modes", "{box}", "--count", "3", "--wall", "z1=soft", "--out", "{tmp}/d"], "z1=soft"),
        (["modes", "{box}", "--out", "{tmp}/e"], "--count"),
    ],
)
def test_modes_bad_input_one_line_exit_2(tmp_path, args, fragment):
    import meshgen

    box = meshgen.box_msh(tmp_path / "box.msh", size=(1, 1, 1), h=0.5)
    args = [a.format(box=box, tmp=tmp_path) for a in args]
    r = _run(*args, cwd=tmp_path)
    _one_line_error(r)
    assert fragment in r.stderr
    assert not any(p.name in "abcde" for p in tmp_path.iterdir() if p.is_dir())


def test_info_prints_regions(tmp_path, capsys):
    import meshgen

    box = meshgen.box_msh(tmp_path / "box.msh", size=(2, 1, 1), h=0.5)
    assert main(["info", box]) == 0
    out = capsys.readouterr().out
    assert "volume  air: 2 m³" in out and "surface x0: 1 m²" in out


# ---------------------------------------------------------------- verify
def _verification_rows(folder):
    with open(folder / "verification.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_verify_quick_passes_and_writes_the_report(tmp_path, capsys):
    # the tube and duct groups compare with Kinsler, Frey, Coppens & Sanders,
    # Fundamentals of Acoustics (2000) §10.2 and Morse & Ingard, Theoretical
    # Acoustics (1968) §9.4 (the sources are in every row); the whole quick
    # report is run by tests/test_verification_report.py
    out = tmp_path / "qa"
    assert main(["verify", "--quick", "--group", "tube", "--group", "duct", "--out",
                 str(out)]) == 0
    printed = capsys.readouterr()
    lines = printed.out.strip().splitlines()
    assert len(lines) == 1 and "all passed" in lines[0] and "verification (quick)" in lines[0]
    rows = _verification_rows(out)
    assert len(rows) >= 40 and {r["passed"] for r in rows} == {"pass"}
    assert {r["group"] for r in rows} == {"tube", "duct"}
    assert all(r["source"] for r in rows)
    assert "all checks passed" in (out / "verification.html").read_text(encoding="utf-8")
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".part")]  # atomic
    # not overwritten without --force (exit 2, one line), replaced with it
    assert main(["verify", "--quick", "--group", "tube", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--force" in err
    assert len(_verification_rows(out)) == len(rows)
    assert main(["verify", "--quick", "--group", "tube", "--out", str(out), "--force",
                 "-q"]) == 0
    assert capsys.readouterr().out == ""
    assert {r["group"] for r in _verification_rows(out)} == {"tube"}


def test_verify_fails_visibly_with_a_perturbed_solver(tmp_path, monkeypatch, capsys):
    # a deliberately broken solver (as in test_verification_report.py): every
    # FE frequency 0.1 % high, as if the speed of sound were 0.1 % off; the P2
    # tube tolerances of the report are ~1e-4 and below (Kinsler et al. 2000
    # §10.2 references), so rows must fail and the command must exit 1
    import acoustic_fem as af

    real = af.Air.frequency
    monkeypatch.setattr(af.Air, "frequency", lambda self, lam: 1.001 * real(self, lam))
    out = tmp_path / "broken"
    assert main(["verify", "--quick", "--group", "tube", "--out", str(out)]) == 1
    printed = capsys.readouterr()
    assert printed.err.count("\n") == 1 and "FAILED" in printed.err
    assert printed.err.startswith("acoustic-fem: failed: ") and "Traceback" not in printed.err
    rows = _verification_rows(out)  # the report is still written, with the failures
    n_fail = sum(r["passed"] == "FAIL" for r in rows)
    assert n_fail >= 10
    assert f"{n_fail} of {len(rows)} checks FAILED" in (out / "verification.html").read_text(
        encoding="utf-8")


def test_verify_bad_input_exit_2(tmp_path, capsys):
    assert main(["verify", "--group", "boxes", "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'boxes'" in err and "tube" in err
    assert not (tmp_path / "x").exists()
    r = _run("verify")  # --out missing: argparse, one line, exit 2
    assert r.returncode == 2 and r.stderr.count("\n") == 1 and "--out" in r.stderr
