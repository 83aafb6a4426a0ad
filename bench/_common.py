"""Shared helpers of the benchmark scripts (not part of the library)."""

from __future__ import annotations

import json
import os
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
    ``rss_increase_mb`` is the peak resident size during the block (sampled
    every 20 ms) minus the size at its start: it covers what C libraries
    allocate; ``process_peak_rss_mb`` is the process's peak resident size so
    far (covers everything, but is monotone over the run).
    """
    import threading

    base = _rss_mb()
    peak = [base]
    stop = threading.Event()

    def sample():  # resident size every 20 ms: sees C libraries' memory too
        while not stop.wait(0.02):
            peak[0] = max(peak[0], _rss_mb())

    th = threading.Thread(target=sample, daemon=True)
    th.start()
    tracemalloc.start()
    tracemalloc.reset_peak()
    t0 = time.perf_counter()
    try:
        yield
    finally:
        import resource

        seconds = time.perf_counter() - t0
        traced = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        stop.set()
        th.join()
        peak[0] = max(peak[0], _rss_mb())
        store[key] = dict(seconds=seconds, peak_mb=traced,
                          rss_increase_mb=peak[0] - base,
                          process_peak_rss_mb=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
                          / 1024)


def _rss_mb() -> float:
    """Current resident set size of this process in MB (Linux /proc)."""
    try:
        with open("/proc/self/statm") as fh:
            return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20
    except OSError:
        return float("nan")


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
