"""Timing and memory helpers shared by the benchmarks (``benchmarks/run.py`` puts this folder on
``sys.path``)."""

from __future__ import annotations

import resource
import time


def peak_rss_mb() -> float:
    """Peak resident set size of this process so far.

    Returns
    -------
    float
        MB (``ru_maxrss`` is in KiB on Linux).
    """
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def timed(fn, *args, **kwargs):
    """Call ``fn(*args, **kwargs)`` and time it.

    Parameters
    ----------
    fn : callable
        Function to call.
    *args, **kwargs
        Its arguments.

    Returns
    -------
    tuple
        ``(result, seconds)``: what ``fn`` returned and the wall-clock time it took.
    """
    started = time.perf_counter()
    result = fn(*args, **kwargs)
    return result, time.perf_counter() - started
