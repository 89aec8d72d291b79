"""Fourth difference and spike detection (the clean stage's measures)."""

from __future__ import annotations

import numpy as np

from potfield.fields.lines.noise import fourth_difference, robust_spikes


def test_cubic_gives_zero():
    # A cubic along a line gives exactly 0 (finite differences of order 4; common practice).
    x = np.arange(50.0)
    values = 3 + 2 * x - 0.5 * x**2 + 0.01 * x**3
    d4 = fourth_difference(values)
    assert np.nanmax(np.abs(d4)) < 1e-9
    assert np.isnan(d4[:2]).all() and np.isnan(d4[-2:]).all()


def test_spike_gives_binomial_stencil():
    # A spike of height A gives A x (1, -4, 6, -4, 1) (references.md, QC tolerances; common practice)
    values = np.zeros(21)
    values[10] = 5.0
    d4 = fourth_difference(values)
    np.testing.assert_allclose(d4[8:13], 5.0 * np.array([1, -4, 6, -4, 1]))
    np.testing.assert_allclose(fourth_difference(values, normalised=True)[10], 30.0 / 16)


def test_stencil_stops_at_line_ends():
    values = np.r_[np.zeros(10), np.full(10, 100.0)]
    groups = np.r_[np.zeros(10, int), np.ones(10, int)]
    d4 = fourth_difference(values, groups)
    # Without groups the step would leak into both lines; with groups it must not.
    assert np.nanmax(np.abs(d4)) == 0.0
    assert np.isnan(d4[8:12]).all()


def test_robust_spikes_finds_injected_spikes_only():
    rng = np.random.default_rng(3)
    x = np.linspace(0, 20, 4000)
    values = 100 * np.sin(x / 3) + rng.normal(0, 0.05, x.size)
    idx = np.array([500, 1700, 3100])
    values[idx] += np.array([3.0, -4.0, 2.5])
    flags, _ = robust_spikes(values, np.zeros(x.size, int), window=11, threshold=8.0)
    assert set(np.flatnonzero(flags)) == set(idx)
