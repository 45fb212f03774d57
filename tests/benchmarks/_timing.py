"""Timing helper shared by the benchmark scripts (not collected by pytest)."""

import statistics
import time
from typing import Any, NamedTuple


class Timing(NamedTuple):
    """Wall-clock seconds of repeated calls and the last call's return value."""

    min: float
    median: float
    value: Any


def timed(fn, repeats: int) -> Timing:
    """Call ``fn()`` ``repeats`` times; the fastest and median time (s) and its value.

    Index ``[0]`` and ``[1]`` (or ``.min``, ``.median``) for the times.
    """
    out, value = [], None
    for _ in range(max(1, int(repeats))):
        t0 = time.perf_counter()
        value = fn()
        out.append(time.perf_counter() - t0)
    return Timing(min(out), statistics.median(out), value)
