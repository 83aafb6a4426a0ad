"""The README's Python tour runs as written (examples run as tests)."""

import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_readme_tour_runs(tmp_path, monkeypatch):
    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert blocks, "README has no python example"
    monkeypatch.chdir(tmp_path)
    os.symlink(ROOT / "meshes", tmp_path / "meshes")
    ns: dict = {}
    for code in blocks:
        exec(compile(code, "README.md", "exec"), ns)
    modes = ns["modes"]
    assert (tmp_path / "modes.vtu").exists() and (tmp_path / "modes.csv").exists()
    assert len(modes) > 5 and modes.frequencies[0] > 0  # doorway open: no 0 Hz mode
    # the box reference of the tour: first nonzero mode c/(2·5 m) (Morse & Ingard §9.4)
    assert abs(ns["ref"].frequencies[1] - 343.2 / 10.0) < 1e-9
