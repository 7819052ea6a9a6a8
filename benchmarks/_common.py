"""Shared helpers for lensrec benchmarks: wall-clock timing, a reference transform, peak memory.

Benchmarks report ratios measured side by side in one run (for example a lensed simulation against one
ducc0 spin-2 HEALPix synthesis of the same size), never absolute timing asserts.
"""

from __future__ import annotations

import json
import os
import resource
import sys
import time

import numpy as np


def best_time(function, repeat: int = 3) -> float:
    """Best wall time in seconds of ``function()`` over ``repeat`` calls."""
    best = np.inf
    for _ in range(repeat):
        start = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - start)
    return best


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far, in MB (Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def spin2_synthesis_seconds(nside: int, lmax: int, nthreads: int, repeat: int = 3) -> float:
    """Time one ducc0 spin-2 HEALPix synthesis (E, B to Q, U) at this size: the unit of cost."""
    import ducc0

    from lensrec import harmonics

    rng = np.random.default_rng(0)
    nalm = (lmax + 1) * (lmax + 2) // 2
    alm = (rng.normal(size=(2, nalm)) + 1j * rng.normal(size=(2, nalm))).astype(np.complex128)
    del ducc0
    return best_time(lambda: harmonics.alm2map(alm, nside, lmax, spin=2, nthreads=nthreads), repeat)


def report(name: str, rows: list[dict]) -> None:
    """Print a small table and write benchmarks/results/<name>.json."""
    print(f"\n== {name} ==")
    for row in rows:
        print("  " + ", ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}" for k, v in row.items()))
    out = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results")
    os.makedirs(out, exist_ok=True)
    with open(os.path.join(out, f"{name}.json"), "w") as handle:
        json.dump(rows, handle, indent=1)
    sys.stdout.flush()
