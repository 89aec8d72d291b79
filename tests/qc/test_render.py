"""Report figures drawn by a pool of forked processes: the same files as drawn one by one
(common practice: a parallel path must not change results)."""

from __future__ import annotations

import multiprocessing
from functools import partial

import numpy as np
import pytest

from potfield.io.grids import make_grid
from potfield.qc import maps, render


def _grids():
    east = np.arange(0.0, 2000.0, 50.0)
    north = np.arange(0.0, 1500.0, 50.0)
    ee, nn = np.meshgrid(east, north)
    for k, name in enumerate(("anomaly", "residual", "tilt_angle")):
        values = np.sin(ee / (300.0 + 100 * k)) * np.cos(nn / 400.0) * 10.0
        yield make_grid(east, north, values, name=name, units="nT", long_name=name)


def _draws(folder):
    return [partial(maps.plot_grid, g, folder / f"{g.name}.png", "EPSG:32755") for g in _grids()]


@pytest.mark.skipif("fork" not in multiprocessing.get_all_start_methods(), reason="no fork here")
def test_figures_drawn_in_parallel_are_the_files_drawn_one_by_one(tmp_path, monkeypatch):
    (tmp_path / "pool").mkdir()
    (tmp_path / "serial").mkdir()
    monkeypatch.setenv(render.WORKERS_ENV, "2")
    assert render.draw_workers(3) == 2
    pooled = render.render_all(_draws(tmp_path / "pool"))
    monkeypatch.setenv(render.WORKERS_ENV, "1")
    assert render.draw_workers(3) == 1
    serial = render.render_all(_draws(tmp_path / "serial"))
    assert (
        [p.name for p in pooled]
        == [p.name for p in serial]
        == ["anomaly.png", "residual.png", "tilt_angle.png"]
    )
    for a, b in zip(pooled, serial, strict=True):
        assert a.read_bytes() == b.read_bytes()


def test_one_figure_or_one_core_draws_in_this_process(monkeypatch):
    monkeypatch.delenv(render.WORKERS_ENV, raising=False)
    assert render.draw_workers(1) == 1
    monkeypatch.setattr(render, "usable_cores", lambda: 1)
    assert render.draw_workers(10) == 1
    monkeypatch.setattr(render, "usable_cores", lambda: 2)
    assert render.draw_workers(10) == 2
    # a daemonic process (a batch worker) may not have children
    monkeypatch.setattr(multiprocessing.current_process(), "daemon", True)
    assert render.draw_workers(10) == 1
