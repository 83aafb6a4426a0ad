"""The results folder: tables, VTK collection, plots, the HTML report, atomic writing, export.

Physics checks name their outside source beside the assertion; the rest
checks what the results folder promises (layout, self-contained report,
nothing half-written).
"""

import base64
import csv
import json
import os
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import meshio
import numpy as np
import pytest

from acoustic_fem import analytic
from acoustic_fem._atomic import OutputExistsError
from acoustic_fem.results import export_results, write_results
from acoustic_fem.scenario import load_scenario, solve_scenario

BOX = """\
[scenario]
title = "results test box"
description = "A small invented box room for the results tests."

[geometry]
builder = "box"
size = [2.4, 1.9, 1.5]

[frequencies]
min_hz = 30.0
max_hz = 150.0
step_hz = 10.0

[surfaces]
z1 = "pressure_release"

[[sources]]
name = "sub"
position_m = [0.3, 0.3, 0.3]

[[receivers]]
name = "mix"
position_m = [1.2, 1.0, 0.8]

[[seat_grids]]
name = "row"
first_seat_m = [0.6, 1.3, 0.8]
last_seat_m = [1.8, 1.3, 0.8]
rows = 1
columns = 3

[outputs]
ear_height_m = 0.8
mode_slices = 4
map_spacing_m = 0.1
"""


@pytest.fixture(scope="module")
def solved(tmp_path_factory):
    d = tmp_path_factory.mktemp("scenario")
    p = d / "box.toml"
    p.write_text(BOX, encoding="utf-8")
    sc = load_scenario(p)
    return solve_scenario(sc)


@pytest.fixture(scope="module")
def folder(solved, tmp_path_factory):
    out = tmp_path_factory.mktemp("res") / "out"
    write_results(solved, out)
    return out


def test_layout(folder):
    names = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file())
    top = {n for n in names if "/" not in n}
    assert top == {"box.toml", "modes.csv", "modes.json", "modes.pvd", "modes_at_receivers.csv",
                   "spl_at_receivers.csv", "seat_statistics.csv", "pressure_at_receivers.json",
                   "report.html", "summary.txt", "run.json", "response.pvd"}
    plots = {n for n in names if n.startswith("plots/")}
    assert plots == {f"plots/{n}.png" for n in ("mode_frequencies", "mode_slices", "seat_spl",
                                                "seat_spread", "spl_map")}
    assert (folder / "box.toml").read_text() == BOX  # the scenario, copied verbatim
    assert not any(n.startswith(".") for n in os.listdir(folder.parent))  # no temp leftovers


def test_modes_tables_agree_and_match_the_box(folder, solved):
    with open(folder / "modes.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    js = json.loads((folder / "modes.json").read_text())["modes"]
    assert len(rows) == len(js) == len(solved.modes)
    f = np.array([float(r["frequency_hz"]) for r in rows])
    assert np.allclose(f, [m["frequency_hz"] for m in js], rtol=1e-8)
    assert np.allclose(f, solved.modes.frequencies, rtol=1e-8)
    # rigid box with a pressure-release ceiling (Morse & Ingard, Theoretical
    # Acoustics, §9.4: k_z = (2n+1)π/(2 Lz)); P2 at the default 0.5 % target:
    # every mode within 1 % (twice the 1D estimate), types as the analytic ones
    ref = analytic.box_modes((2.4, 1.9, 1.5), c=solved.modes.air.c, walls={"z1": "pressure_release"},
                             count=len(f))
    assert np.allclose(f, ref.frequencies, rtol=1e-2)
    assert [r["mode_type"] for r in rows] == list(ref.kind)
    assert [r["box_indices"] for r in rows] == [
        "(" + ", ".join(str(v) for v in idx) + ")" for idx in ref.indices]
    # no absorption: T60 and Q infinite, written inf (CSV) and null (JSON)
    assert all(r["t60_s"] == "inf" for r in rows) and all(m["t60_s"] is None for m in js)
    assert all(float(r["elements_per_wavelength"]) > 3 for r in rows)


def test_pvd_collects_one_vtu_per_mode_labelled_by_frequency(folder, solved):
    root = ET.parse(folder / "modes.pvd").getroot()
    assert root.get("type") == "Collection"
    sets = root.find("Collection").findall("DataSet")
    assert len(sets) == len(solved.modes)
    steps = np.array([float(s.get("timestep")) for s in sets])
    assert np.all(np.diff(steps) > 0)
    assert np.allclose(steps, solved.modes.frequencies, atol=1e-5)
    for i, s in enumerate(sets):
        assert f"{solved.modes.frequencies[i]:.2f} Hz" in s.get("name")
        m = meshio.read(folder / s.get("file"))
        assert float(np.ravel(m.field_data["frequency_hz"])[0]) == pytest.approx(steps[i], abs=1e-5)
        assert np.allclose(np.ravel(m.point_data["mode_shape"]), solved.modes.shapes[:, i])


def _tet10_value(mesh, values, x):
    """Value at x of a quadratic field on a meshio tetra10 mesh, from the file alone.

    Node order of VTK_QUADRATIC_TETRA (VTK file formats, cell type 24):
    vertices 0-3, then mid-edge nodes of the edges (0,1), (1,2), (0,2),
    (0,3), (1,3), (2,3).  Straight-sided cells: barycentric coordinates L of
    the vertices; quadratic Lagrange basis L_i(2L_i - 1) at a vertex and
    4 L_i L_j at the middle of edge (i, j) (Zienkiewicz & Taylor, The Finite
    Element Method, vol. 1, §8.8, tetrahedron family; from memory).
    """
    cells = mesh.cells_dict["tetra10"]
    V = mesh.points[cells[:, :4]]                                 # (n_c, 4, 3)
    T = np.transpose(V[:, 1:] - V[:, :1], (0, 2, 1))              # (n_c, 3, 3)
    lam = np.linalg.solve(T, (x - V[:, 0])[..., None])[..., 0]    # (n_c, 3)
    L = np.column_stack([1.0 - lam.sum(1), lam])
    c = int(np.argmax(L.min(axis=1)))                             # the cell holding x
    assert L[c].min() > -1e-9
    L = L[c]
    edges = [(0, 1), (1, 2), (0, 2), (0, 3), (1, 3), (2, 3)]
    N = np.concatenate([L * (2 * L - 1), [4 * L[i] * L[j] for i, j in edges]])
    return N @ values[cells[c]]


def test_response_vtus_round_trip(folder, solved):
    """The forced-response field files: one .vtu per SPL-map frequency with real
    arrays only, collected in response.pvd; read back with meshio they give
    the pressure the solver reported at the receivers."""
    from acoustic_fem.results import RESPONSE_ARRAYS, map_frequencies

    fmap = map_frequencies(solved)
    assert len(fmap) == 3 and solved.field is not None
    root = ET.parse(folder / "response.pvd").getroot()
    sets = root.find("Collection").findall("DataSet")
    steps = np.array([float(s.get("timestep")) for s in sets])
    assert np.allclose(steps, fmap, atol=1e-6)                  # the viewer's time is Hz
    P_rec = np.asarray(solved.response.pressure)                # (n_f, n_r)
    seats = np.array([r.position for r in solved.scenario.receivers])
    for s, f in zip(sets, fmap):
        assert f"{f:.2f} Hz" in s.get("name")
        m = meshio.read(folder / s.get("file"))
        assert float(np.ravel(m.field_data["frequency_hz"])[0]) == pytest.approx(f, abs=1e-9)
        assert set(m.point_data) == set(RESPONSE_ARRAYS)
        for a in m.point_data.values():
            assert np.isrealobj(a)                              # never complex in VTK
        pd = {k: np.ravel(v) for k, v in m.point_data.items()}
        p = pd["pressure_real_pa"] + 1j * pd["pressure_imag_pa"]
        assert np.allclose(pd["pressure_magnitude_pa"], np.abs(p), rtol=1e-12, atol=0)
        # SPL = 20 log10(|p|/√2 / 20 µPa) (IEC 61672 reference pressure);
        # NaN exactly where p = 0: the DOFs of the pressure-release ceiling
        zero = np.abs(p) == 0
        assert zero.any() and np.allclose(m.points[zero, 2], 1.5)
        assert np.all(np.isnan(pd["spl_db"][zero]))
        assert np.allclose(pd["spl_db"][~zero], 20 * np.log10(np.abs(p[~zero]) / np.sqrt(2) / 20e-6),
                           rtol=1e-12)
        # at each seat the file's field, interpolated by the quadratic basis
        # of the cells read from the file, is the solver's receiver pressure:
        # the same P2 function evaluated at the same point, so only rounding
        # differs (1e-9 of the largest |p| at the receivers)
        j = int(np.argmin(np.abs(solved.frequencies - f)))
        got = np.array([_tet10_value(m, p, x) for x in seats])
        assert np.allclose(got, P_rec[j], rtol=0, atol=1e-9 * np.abs(P_rec[j]).max())


def test_response_tables(folder, solved):
    with open(folder / "spl_at_receivers.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == ["frequency_hz", "mix", "row_r1c1", "row_r1c2", "row_r1c3"]
    spl = np.array([[float(v) for v in r[1:]] for r in rows[1:]])
    assert np.allclose(spl, solved.response.spl, atol=1e-3)
    with open(folder / "seat_statistics.csv", newline="") as fh:
        st = list(csv.DictReader(fh))
    seats = spl[:, 1:]  # the three seats of the grid (the single receiver is not a seat)
    assert np.allclose([float(r["spread_db"]) for r in st], seats.max(1) - seats.min(1), atol=2e-3)
    # SPL from the complex pressure: 20 log10(|p|/√2 / 20 µPa) (IEC 61672 reference)
    pj = json.loads((folder / "pressure_at_receivers.json").read_text())
    p = np.array(pj["receivers"][0]["real"]) + 1j * np.array(pj["receivers"][0]["imag"])
    assert np.allclose(20 * np.log10(np.abs(p) / np.sqrt(2) / 20e-6), spl[:, 0], atol=1e-3)


def test_mode_amplitudes_at_receivers(folder, solved):
    # the (1,0,0) axial mode cos(πx/Lx)·sin(πz/(2Lz)) (Morse & Ingard §9.4)
    # at the seat in the middle (x = Lx/2) is a pressure node
    with open(folder / "modes_at_receivers.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    with open(folder / "modes.csv", newline="") as fh:
        idx = [r["box_indices"] for r in csv.DictReader(fh)].index("(1, 0, 0)")
    assert float(rows[idx]["row_r1c2"]) < 0.03
    assert float(rows[idx]["row_r1c1"]) > 0.3


def test_report_is_self_contained(folder):
    from acoustic_fem.cli import CAUTION

    text = (folder / "report.html").read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    # no external resource of any kind: every src is a data URI, no links out
    srcs = re.findall(r'src="([^"]*)"', text)
    assert len(srcs) == 5 and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert "<link" not in text and "<script" not in text and "url(" not in text
    assert "http://" not in text and "https://" not in text
    for s in srcs:
        png = base64.b64decode(s.split(",", 1)[1])
        assert png[:8] == b"\x89PNG\r\n\x1a\n"
    assert CAUTION.partition(":")[2].replace("'", "&#x27;") in text
    assert "results test box" in text and "Mesh" in text and "[[seat_grids]]" in text


def test_plots_are_legible_pngs(folder):
    import matplotlib.image as mpimg

    for p in (folder / "plots").iterdir():
        img = mpimg.imread(p)
        h, w = img.shape[:2]
        assert w >= 800 and h >= 350, (p.name, w, h)
        assert np.ptp(img[..., :3]) > 0.5  # not blank


def test_existing_folder_is_kept_unless_asked(folder, solved):
    before = (folder / "modes.csv").read_text()
    with pytest.raises(OutputExistsError):
        write_results(solved, folder)
    assert (folder / "modes.csv").read_text() == before


def test_failure_while_writing_leaves_nothing(solved, tmp_path, monkeypatch):
    import acoustic_fem.results as R

    def boom(*a, **k):
        raise RuntimeError("disk full (simulated)")

    monkeypatch.setattr(R, "plot_seat_spread", boom)
    with pytest.raises(RuntimeError):
        write_results(solved, tmp_path / "out")
    assert os.listdir(tmp_path) == []


def test_replace_with_overwrite(solved, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "old.txt").write_text("old")
    write_results(solved, out, overwrite=True)
    assert not (out / "old.txt").exists() and (out / "modes.csv").exists()
    assert sorted(os.listdir(tmp_path)) == ["out"]


@pytest.mark.parametrize("fmt", ["vtu", "xdmf", "vtk-legacy"])
def test_export_meshes_carry_every_mode(folder, solved, tmp_path, fmt):
    p = export_results(folder, fmt, tmp_path / "modes")
    if fmt == "xdmf":
        with meshio.xdmf.TimeSeriesReader(p) as r:
            r.read_points_cells()
            got = [r.read_data(k) for k in range(r.num_steps)]
        assert np.allclose([t for t, _, _ in got], solved.modes.frequencies, atol=1e-5)
        for i, (_, pd, _) in enumerate(got):
            assert np.allclose(pd["mode_shape"], solved.modes.shapes[:, i])
    else:
        m = meshio.read(p)
        names = sorted(k for k in m.point_data if k.startswith("mode_"))
        assert len(names) == len(solved.modes)
        for i, k in enumerate(names):
            assert np.allclose(m.point_data[k], solved.modes.shapes[:, i], atol=1e-6)


def test_export_markdown_and_bad_folder(folder, tmp_path):
    from acoustic_fem import InputError

    p = export_results(folder, "markdown", tmp_path / "modes")
    text = p.read_text()
    assert p.suffix == ".md" and text.count("\n|") >= 3 and "axial" in text
    with pytest.raises(InputError, match="not a results folder"):
        export_results(tmp_path, "vtu", tmp_path / "x")


# ---------------------------------------------------------------- a real browser
def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


_PROBE = """<script>
window.addEventListener("load", () => {
  const imgs = [...document.images];
  const broken = imgs.filter(i => !(i.complete && i.naturalWidth > 0)).length;
  const fetched = performance.getEntriesByType("resource").map(e => e.name)
    .filter(n => !n.startsWith("data:"));
  document.body.setAttribute("data-probe",
    JSON.stringify({images: imgs.length, broken: broken, fetched: fetched}));
});
</script>"""


@pytest.mark.skipif(_chromium() is None, reason="chromium is not installed "
                    "(apt-get install -y chromium; .ci/setup installs it when it can)")
def test_report_opens_in_a_headless_browser(folder, tmp_path):
    import html as html_mod

    import matplotlib.image as mpimg

    def browse(page: Path, *extra):
        cmd = [_chromium(), "--headless=new", "--no-sandbox", "--disable-gpu",
               "--disable-dev-shm-usage", "--hide-scrollbars", "--virtual-time-budget=10000",
               f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1200,9000",
               *extra, page.as_uri()]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=180)

    def probe(page: Path) -> dict:
        # a copy of the page with a script that records, once loaded, how many
        # images decoded and which resources were fetched (read back from the DOM)
        copy = page.with_name("probe_" + page.name)
        copy.write_text(page.read_text(encoding="utf-8").replace("</body>", _PROBE + "</body>"),
                        encoding="utf-8")
        r = browse(copy, "--dump-dom")
        m = re.search(r'data-probe="([^"]*)"', r.stdout)
        assert m, (r.stdout[-500:], r.stderr[-1500:])
        return json.loads(html_mod.unescape(m.group(1)))

    # control: a page with a missing image is seen as broken, so the probe works
    bad = tmp_path / "bad.html"
    bad.write_text('<!DOCTYPE html><html><body><img src="missing.png"></body></html>')
    assert probe(bad)["broken"] == 1

    page = tmp_path / "report.html"
    shutil.copy(folder / "report.html", page)  # alone in its folder: nothing to borrow
    got = probe(page)
    assert got == {"images": 5, "broken": 0, "fetched": []}

    shot = tmp_path / "report.png"
    r = browse(page, f"--screenshot={shot}")
    assert r.returncode == 0 and shot.exists(), r.stderr[-1500:]
    img = mpimg.imread(shot)
    assert img.shape[0] >= 8000 and img.shape[1] >= 1100
    # the page is drawn: dark text and coloured figures on white, not a blank page
    rgb = img[..., :3]
    assert (rgb.mean(axis=2) < 0.3).mean() > 0.002
    assert (np.ptp(rgb, axis=2) > 0.3).mean() > 0.01
