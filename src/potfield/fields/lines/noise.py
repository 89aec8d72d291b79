"""Noise and spike measures along survey lines.

All functions work on one long array holding many lines one after another; ``groups`` (one
integer code per sample, equal within a line, lines contiguous) stops every window at the line
ends, so no value leaks from one line into the next.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: Fourth-difference stencil (common practice in airborne magnetic QC). A spike of height A gives
#: A x (1, -4, 6, -4, 1); a cubic gives exactly 0.
FOURTH_DIFFERENCE_STENCIL = np.array([1.0, -4.0, 6.0, -4.0, 1.0])


def fourth_difference(values, groups=None, normalised: bool = False) -> np.ndarray:
    """Centred fourth difference T[i-2] - 4T[i-1] + 6T[i] - 4T[i+1] + T[i+2].

    Parameters
    ----------
    values : array
        Samples, lines one after another.
    groups : array of int, optional
        Line code of each sample; the difference is NaN where the stencil would cross a line end.
    normalised : bool
        Divide by 16 (a convention some specifications use) when true.

    Returns
    -------
    numpy.ndarray
        The fourth difference (NaN within two samples of a line end or next to a NaN).
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    out = np.full(n, np.nan)
    if n < 5:
        return out
    g = None if groups is None else np.asarray(groups)
    core = (x[:-4] - 4 * x[1:-3] + 6 * x[2:-2] - 4 * x[3:-1] + x[4:])
    valid = np.ones(n - 4, dtype=bool)
    if g is not None:
        valid &= g[:-4] == g[4:]  # contiguous groups: ends equal means the whole window is inside
    out[2:-2] = np.where(valid, core, np.nan)
    if normalised:
        out /= 16.0
    return out


def _odd_reflect(x: np.ndarray, groups: np.ndarray, half: int):
    """Pad every line at both ends by odd reflection (2 x[end] - x[end -+ k]), which keeps a
    linear trend across the line ends. Returns padded values, their groups and a body mask."""
    codes, starts = np.unique(groups, return_index=True)
    ends = np.r_[starts[1:], groups.size] - 1
    order_lines = np.argsort(starts)
    codes, starts, ends = codes[order_lines], starts[order_lines], ends[order_lines]
    k = np.arange(1, half + 1)
    head_idx = np.minimum(starts[:, None] + k[::-1][None, :], ends[:, None])
    tail_idx = np.maximum(ends[:, None] - k[None, :], starts[:, None])
    head = 2 * x[starts][:, None] - x[head_idx]
    tail = 2 * x[ends][:, None] - x[tail_idx]
    nlines = codes.size
    rank = np.empty(groups.size, dtype=np.int64)
    rank_of_code = np.empty(codes.max() + 1 if codes.size else 0, dtype=np.int64)
    rank_of_code[codes] = np.arange(nlines)
    rank = rank_of_code[groups]
    values = np.concatenate([head.ravel(), x, tail.ravel()])
    line_key = np.concatenate([np.repeat(np.arange(nlines), half), rank, np.repeat(np.arange(nlines), half)])
    part = np.concatenate([np.zeros(nlines * half, np.int8), np.ones(x.size, np.int8),
                           np.full(nlines * half, 2, np.int8)])
    pos = np.concatenate([np.tile(np.arange(half), nlines), np.arange(x.size), np.tile(np.arange(half), nlines)])
    order = np.lexsort((pos, part, line_key))
    return values[order], line_key[order], part[order] == 1


def rolling_median(values, groups, window: int) -> np.ndarray:
    """Centred rolling median of width ``window`` restarted at every group (line).

    Each line is padded by odd reflection at its ends first, so a sloping line's first and last
    samples are not mistaken for departures. Lines must be contiguous in the arrays.
    """
    x = np.asarray(values, dtype=float)
    g = np.asarray(groups)
    if x.size == 0:
        return x.copy()
    half = max(int(window) // 2, 1)
    padded, pgroups, body = _odd_reflect(x, g, half)
    series = pd.Series(padded)
    med = (
        series.groupby(pgroups, sort=False)
        .rolling(int(window), center=True, min_periods=1)
        .median()
        .reset_index(level=0, drop=True)
        .sort_index()
        .to_numpy()
    )
    return med[body]


def robust_spikes(values, groups, window: int = 11, threshold: float = 6.0,
                  minimum: float = 0.0, fourth=None) -> tuple[np.ndarray, np.ndarray]:
    """Flag spikes as large departures from a rolling median, in robust standard deviations.

    The departure r = T - median_window(T) is compared with ``threshold`` x sigma, where the
    line's noise sigma is estimated robustly from its fourth difference: for white noise the
    fourth difference has standard deviation sqrt(70) sigma (sum of squared stencil weights), and
    1.4826 x MAD is the normal-consistent robust scale (Rousseeuw and Croux 1993, JASA 88:1273).
    The MAD of r itself is useless on sloping lines (the window median is then the sample itself
    for most samples). ``minimum`` is an absolute floor (field units).

    Returns
    -------
    flags : numpy.ndarray of bool
    departure : numpy.ndarray
        T minus the rolling median.
    """
    x = np.asarray(values, dtype=float)
    g = np.asarray(groups)
    departure = x - rolling_median(x, g, window)
    if fourth is None:  # the caller may pass the (un-normalised) fourth difference it has
        fourth = fourth_difference(x, g)
    d4 = pd.Series(np.abs(np.asarray(fourth, dtype=float)))
    sigma = 1.4826 * d4.groupby(g, sort=False).transform("median").to_numpy() / np.sqrt(70.0)
    sigma = np.nan_to_num(sigma, nan=0.0)
    floor = max(minimum, 1e-12)  # a perfectly smooth line must not flag everything
    limit = np.maximum(threshold * sigma, floor)
    flags = (np.abs(departure) > limit) & np.isfinite(x)
    return flags, departure


def line_noise(fourth: np.ndarray, groups: np.ndarray, usable: np.ndarray | None = None) -> pd.DataFrame:
    """Per-line fourth-difference envelope: max |d4|, 95th percentile |d4| and RMS of d4."""
    d4 = np.abs(np.asarray(fourth, dtype=float))
    if usable is not None:
        d4 = np.where(usable, d4, np.nan)
    frame = pd.DataFrame({"g": groups, "d4": d4, "d4sq": d4**2})
    grouped = frame.groupby("g", sort=False)
    return pd.DataFrame({
        "fourth_difference_max": grouped["d4"].max(),
        "fourth_difference_p95": grouped["d4"].quantile(0.95),
        "fourth_difference_rms": np.sqrt(grouped["d4sq"].mean()),
    })
