"""The command line and the demo: outputs, exit codes, one-line errors.

These check behaviour promised by the project (no external source needed),
plus the demo's physics against a bound from the literature: the lowest
nonzero mode of a room lies near c/(2 L_max) (common practice for rooms of
moderate aspect ratio; here checked only as a loose bracket).
"""

import csv
import os
import subprocess
import sys

import meshio
import numpy as np
import pytest

from acoustic_fem.cli import main

PY = sys.executable


def _run(*args, cwd=None):
    return subprocess.run([PY, "-m", "acoustic_fem", *args], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


def test_help_lists_commands():
    r = _run("--help")
    assert r.returncode == 0
    for cmd in ("demo", "modes", "info"):
        assert cmd in r.stdout
    assert "verify by measurement" in r.stdout.replace("\n", " ").lower() or "Verify" in r.stdout


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "results"
    r = _run("demo", "--out", str(out))
    assert r.returncode == 0, r.stderr
    return out


def test_demo_writes_table_vtk_and_summary(demo_dir):
    names = sorted(os.listdir(demo_dir))
    assert names == ["modes.csv", "modes.vtu", "summary.txt"]
    with open(demo_dir / "modes.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    f = np.array([float(r["frequency_hz"]) for r in rows])
    assert np.all(np.diff(f) >= 0) and len(f) >= 10
    # open doorway: no 0 Hz mode; the lowest mode is a doorway-vented mode
    # below the first rigid-room axial mode c/(2·5.4 m) ≈ 31.8 Hz
    # (Morse & Ingard §9.4 axial formula; a lower bound is the physics of an opening)
    assert 5.0 < f[0] < 343.2 / (2 * 5.4)
    m = meshio.read(demo_dir / "modes.vtu")
    assert np.allclose(np.asarray(m.field_data["frequencies_hz"]).ravel(), f, rtol=1e-8)
    assert len([k for k in m.point_data if k.startswith("mode_")]) == len(f)
    text = (demo_dir / "summary.txt").read_text()
    assert "Caution" in text and "measurement" in text


def test_demo_refuses_to_overwrite(demo_dir):
    before = (demo_dir / "modes.csv").read_text()
    r = _run("demo", "--out", str(demo_dir))
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and "Traceback" not in r.stderr
    assert "--force" in r.stderr
    assert (demo_dir / "modes.csv").read_text() == before


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
def test_bad_input_one_line_exit_2(tmp_path, args, fragment):
    import meshgen

    box = meshgen.box_msh(tmp_path / "box.msh", size=(1, 1, 1), h=0.5)
    args = [a.format(box=box, tmp=tmp_path) for a in args]
    r = _run(*args, cwd=tmp_path)
    assert r.returncode == 2, r.stderr
    assert r.stderr.count("\n") == 1, r.stderr
    assert "Traceback" not in r.stderr
    assert fragment in r.stderr
    # nothing written
    assert not any(p.name in "abcde" for p in tmp_path.iterdir() if p.is_dir())


def test_unknown_surface_lists_existing(tmp_path):
    import meshgen

    box = meshgen.box_msh(tmp_path / "box.msh", size=(1, 1, 1), h=0.5)
    r = _run("modes", box, "--count", "3", "--wall", "roof=release", "--out", str(tmp_path / "o"))
    assert r.returncode == 2
    for name in ("x0", "x1", "y0", "y1", "z0", "z1"):
        assert f"'{name}'" in r.stderr


def test_info_prints_regions(tmp_path, capsys):
    import meshgen

    box = meshgen.box_msh(tmp_path / "box.msh", size=(2, 1, 1), h=0.5)
    assert main(["info", box]) == 0
    out = capsys.readouterr().out
    assert "volume  air: 2 m³" in out and "surface x0: 1 m²" in out
