"""Shared helpers of the benchmark scripts (not part of the library)."""

from __future__ import annotations

import json
import platform
import sys
import time
import tracemalloc
from contextlib import contextmanager
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))  # meshgen


@contextmanager
def measured(store: dict, key: str):
    """Wall time and peak traced memory of a block.

    ``peak_mb`` counts numpy and Python allocations (tracemalloc), not memory
    that C libraries such as CHOLMOD or SuperLU allocate themselves;
    ``process_peak_rss_mb`` is the process's peak resident size so far
    (covers everything, but is monotone over the run).
    """
    tracemalloc.start()
    tracemalloc.reset_peak()
    t0 = time.perf_counter()
    try:
        yield
    finally:
        import resource

        store[key] = dict(seconds=time.perf_counter() - t0,
                          peak_mb=tracemalloc.get_traced_memory()[1] / 2**20,
                          process_peak_rss_mb=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
                          / 1024)
        tracemalloc.stop()


def box_mesh(path: Path, size, h, order=1):
    import meshgen

    import acoustic_fem as af

    if not path.exists():
        meshgen.box_msh(path, size=size, h=h, order=order)
    return af.read_mesh(path)


def save(name: str, data: dict) -> Path:
    out = HERE / "results" / f"{name}.json"
    out.parent.mkdir(exist_ok=True)
    data = dict(data, machine=dict(python=platform.python_version(), cpu=platform.processor(),
                                   date=time.strftime("%Y-%m-%d %H:%M")))
    out.write_text(json.dumps(data, indent=2))
    return out
