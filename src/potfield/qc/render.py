"""Drawing the report's figures on every core.

Each figure is an independent ``draw()`` call (a :func:`functools.partial` of a plotting function
of :mod:`potfield.qc.maps`) that writes one PNG and returns its path. A figure costs about 0.2 s
of matplotlib (layout, text, rasterising, PNG encoding), so a report of 25 figures is mostly
this; drawn by a pool of forked processes (they inherit the loaded modules and the data, nothing
is pickled but an index and a path) it takes the time of the slowest share.

The pool is used only where it is safe and worth it: on Linux-like systems with ``fork``, in a
process that may have children (not inside a daemonic batch worker), with more than one usable
core and more than one figure. Otherwise the figures are drawn one after the other, with the same
results: each draw writes its file atomically, whoever draws it.
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Sequence
from pathlib import Path

#: Environment variable capping the drawing processes (``1``: draw in this process).
WORKERS_ENV = "POTFIELD_DRAW_WORKERS"

_DRAWS: Sequence[Callable[[], Path]] = ()


def usable_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system reports it)."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover (not Linux)
        return os.cpu_count() or 1


def draw_workers(count: int) -> int:
    """How many processes draw ``count`` figures: 1 when a pool is not possible or not useful."""
    try:
        limit = int(os.environ.get(WORKERS_ENV, "0")) or usable_cores()
    except ValueError:
        limit = usable_cores()
    if (
        count < 2
        or limit < 2
        or "fork" not in multiprocessing.get_all_start_methods()
        or multiprocessing.current_process().daemon
    ):
        return 1
    return min(limit, count)


def _draw(index: int) -> Path:
    return _DRAWS[index]()


def render_all(draws: Sequence[Callable[[], Path]]) -> list[Path]:
    """Run every ``draw()``; their paths in the same order."""
    global _DRAWS
    workers = draw_workers(len(draws))
    if workers == 1:
        return [draw() for draw in draws]
    _DRAWS = draws
    try:
        with multiprocessing.get_context("fork").Pool(workers) as pool:
            return pool.map(_draw, range(len(draws)), chunksize=1)
    finally:
        _DRAWS = ()
