"""Fourth difference and spike detection (the clean stage's measures)."""

from __future__ import annotations

import numpy as np
import pandas as pd

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


# --- coarse sampling over strong smooth geology ------------------------------------------------


def _dipole_lines(spacing=50.0, depth=150.0, n_lines=12, length=20_000.0, seed=0):
    """Invented lines over buried vertical dipoles (total-field anomaly of a vertical dipole at
    the pole: A (z^3 / 2) (2 z^2 - x^2) / (x^2 + z^2)^(5/2), peak A at x = 0; Blakely 1995,
    Potential Theory, ch. 4), 0.05 nT noise, sampled every ``spacing`` m."""
    rng = np.random.default_rng(seed)
    x = np.arange(0.0, length, spacing)
    values, groups = [], []
    for line in range(n_lines):
        v = rng.normal(0, 0.05, x.size)
        for _ in range(8):
            x0, z, amp = rng.uniform(0, length), depth * rng.uniform(1, 3), rng.uniform(50, 800)
            v += amp * z**3 / 2 * (2 * z**2 - (x - x0) ** 2) / ((x - x0) ** 2 + z**2) ** 2.5
        values.append(v)
        groups.append(np.full(x.size, line))
    return np.concatenate(values), np.concatenate(groups)


def test_dipole_formula_peak():
    # the invented anomaly peaks at A over the source (vertical dipole at the pole; Blakely 1995)
    v, _ = _dipole_lines(n_lines=1)
    assert 50 < np.max(v) < 2000


def test_coarse_line_over_geology_flags_few_and_finds_true_spikes():
    values, groups = _dipole_lines()
    truth = values.copy()
    rng = np.random.default_rng(7)
    # true spikes where the geology is smooth at the sampling (|d4| of the geology < 5 nT within
    # 8 samples), away from line ends; a spike smaller than the geology's own d4 beside it cannot
    # be told from the geology and is not asked for
    d4 = pd.Series(np.abs(fourth_difference(truth, groups)))
    rough = d4.rolling(17, center=True).max().to_numpy()
    quiet = np.flatnonzero(rough < 5.0)
    idx = np.sort(rng.choice(quiet, 12, replace=False))
    amp = rng.choice([-1.0, 1.0], idx.size) * rng.uniform(5.0, 20.0, idx.size)
    values[idx] += amp
    flags, departure = robust_spikes(values, groups, window=11, threshold=6.0)
    # every true spike found, at its own sample (a spike of A gives d4 = 6A at the centre and
    # -4A beside it: the centre is the peak; references.md, common practice)
    assert set(idx) <= set(np.flatnonzero(flags))
    np.testing.assert_allclose(departure[idx], amp, atol=1.0)
    # and almost nothing else: the fraction flagged stays at the true spike rate (0.15 %)
    false = flags.sum() - idx.size
    assert false <= 0.001 * values.size
    assert flags.mean() < 0.005


def test_spike_at_the_line_end_is_found():
    # a spike three samples from the end: the local scale is measured beside the spike's own
    # stencil, so its five affected samples do not hide it
    rng = np.random.default_rng(2)
    values = rng.normal(0, 0.05, 100)
    values[96] += 4.0
    flags, _ = robust_spikes(values, np.zeros(100, int))
    assert np.flatnonzero(flags).tolist() == [96]


def test_cap_keeps_the_strongest():
    from potfield.fields.lines.noise import cap_flags

    flags = np.zeros(1000, bool)
    flags[:50] = True
    strength = np.arange(1000.0)
    capped, dropped = cap_flags(flags, strength, 0.02)
    assert dropped == 30 and capped.sum() == 20
    assert np.flatnonzero(capped).tolist() == list(range(30, 50))
    same, none = cap_flags(flags, strength, 0.1)
    assert none == 0 and same.sum() == 50


def _quiet_minutes(days=3, stations=4, seed=0):
    """Invented quiet one-minute variation data: a daytime bay of 20 nT, a random walk with
    heavy-tailed (Student t, 3 degrees of freedom) minute steps of ~0.05 nT at night and ~0.3 nT
    by day, values quantised to 0.1 nT as many observatories publish them."""
    rng = np.random.default_rng(seed)
    t = np.arange(days * 1440.0)
    values, groups = [], []
    for s in range(stations):
        day = np.clip(np.sin(2 * np.pi * t / 1440 + s), 0, None)
        v = 20 * day**2 + np.cumsum(rng.standard_t(3, t.size) * (0.05 + 0.3 * day))
        values.append(np.round(v, 1))
        groups.append(np.full(t.size, s))
    return np.concatenate(values), np.concatenate(groups)


def test_observatory_first_difference_test_on_quiet_minutes():
    from potfield.fields.lines.noise import first_difference_spikes

    values, groups = _quiet_minutes()
    flags, limit = first_difference_spikes(values, groups, window=11, threshold=6.0, floor=3.0)
    assert flags.mean() < 0.01  # quiet data: < 1 % flagged (common practice: quiet days are clean)
    assert limit.min() >= 3.0
    idx = np.array([500, 2000, 6000, 9000])
    spiked = values.copy()
    spiked[idx] += np.array([25.0, -40.0, 15.0, 60.0])
    flags, _ = first_difference_spikes(spiked, groups, window=11, threshold=6.0, floor=3.0)
    assert set(idx) <= set(np.flatnonzero(flags))
    # a step (sudden commencement, 30 nT) is not a spike: one large difference only
    stepped = values.copy()
    stepped[3000:4320] += 30.0
    flags, _ = first_difference_spikes(stepped, groups)
    assert not flags[2995:3005].any()
