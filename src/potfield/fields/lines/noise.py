"""Noise and spike measures along survey lines.

All functions work on one long array holding many lines one after another; ``groups`` (one
integer code per sample, equal within a line, lines contiguous) stops every window at the line
ends, so no value leaks from one line into the next.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from .._numerics import trailing_median

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

#: Fourth-difference stencil (common practice in airborne magnetic QC). A spike of height A gives
#: A x (1, -4, 6, -4, 1); a cubic gives exactly 0.
FOURTH_DIFFERENCE_STENCIL = np.array([1.0, -4.0, 6.0, -4.0, 1.0])
#: Largest share of the fourth difference's energy over a spike's five samples left unexplained
#: by the spike stencil for the sample to be called a spike (project choice).
SPIKE_SHAPE_MISFIT = 0.25


def fourth_difference(
    values: ArrayLike, groups: ArrayLike | None = None, normalised: bool = False
) -> np.ndarray:
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
    core = x[:-4] - 4 * x[1:-3] + 6 * x[2:-2] - 4 * x[3:-1] + x[4:]
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
    part = np.concatenate(
        [np.zeros(nlines * half, np.int8), np.ones(x.size, np.int8), np.full(nlines * half, 2, np.int8)]
    )
    pos = np.concatenate(
        [np.tile(np.arange(half), nlines), np.arange(x.size), np.tile(np.arange(half), nlines)]
    )
    order = np.lexsort((pos, part, line_key))
    return values[order], line_key[order], part[order] == 1


def rolling_median(values: ArrayLike, groups: ArrayLike, window: int) -> np.ndarray:
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


def _group_rolling_median(values: np.ndarray, groups: np.ndarray, window: int) -> np.ndarray:
    """Centred rolling median (NaN ignored, shorter windows at the ends) restarted at every
    group; lines must be contiguous."""
    series = pd.Series(np.asarray(values, dtype=float))
    return (
        series.groupby(np.asarray(groups), sort=False)
        .rolling(int(window), center=True, min_periods=1)
        .median()
        .reset_index(level=0, drop=True)
        .sort_index()
        .to_numpy()
    )


def _beside_median(values: np.ndarray, groups: np.ndarray, width: int) -> np.ndarray:
    """The larger of the medians of ``width`` samples left of i - 2 and right of i + 2 (same
    line), i.e. of the neighbourhood a spike's five-sample stencil does not touch; one side
    alone at a line end."""
    left = _shift(trailing_median(values, groups, width), groups, -3)
    right = _shift(trailing_median(values[::-1], groups[::-1], width)[::-1], groups, 3)
    return np.fmax(left, right)


def _shift(x: np.ndarray, groups: np.ndarray, k: int) -> np.ndarray:
    """x[i + k] where sample i + k is on the same line as i, else NaN."""
    if k == 0:
        return np.asarray(x, dtype=float).copy()
    out = np.full(x.size, np.nan)
    if k > 0 and x.size > k:
        out[:-k] = np.where(groups[:-k] == groups[k:], x[k:], np.nan)
    elif k < 0 and x.size > -k:
        out[-k:] = np.where(groups[-k:] == groups[:k], x[:k], np.nan)
    return out


def robust_spikes(
    values: ArrayLike,
    groups: ArrayLike,
    window: int = 11,
    threshold: float = 6.0,
    minimum: float = 0.0,
    fourth: ArrayLike | None = None,
    *,
    return_strength: bool = False,
) -> tuple[np.ndarray, ...]:
    """Flag single-sample spikes from the fourth difference, against the line's own roughness.

    The fourth difference d4 = T[i-2] - 4T[i-1] + 6T[i] - 4T[i+1] + T[i+2] is exactly zero for a
    cubic and gives A x (1, -4, 6, -4, 1) for a spike of height A (common practice; references.md),
    so ``d4 / 6`` is the departure of T[i] from the cubic through its four neighbours. A sample is
    a spike when

    * ``|d4[i]|`` exceeds ``threshold`` robust standard deviations of d4, where the scale is the
      larger of the line's (1.4826 x median |d4| over the line: the noise) and the local one
      (1.4826 x the running median of |d4| over ``window`` samples: the roughness of the signal
      as sampled: the larger of the medians of |d4| over ``window // 2`` samples on either
      side, beyond the five samples a spike's stencil touches). Smooth geology sampled coarsely
      has a large d4 over several neighbouring samples, which raises the local scale; a spike
      does not raise it, since its own stencil is left out. The scale is measured in samples, so it follows the
      along-line sample spacing: the same anomaly decimated to coarser sampling has a larger d4
      and a larger local scale alike. (Robust scale: Rousseeuw and Croux 1993, J. Am. Stat.
      Assoc. 88:1273.)
    * ``|d4[i]|`` is the largest within two samples (the spike's own stencil peaks at the
      centre, 6A against 4A), so the neighbours of a spike are not flagged too;
    * the departure ``|d4[i]| / 6`` exceeds ``minimum`` (field units).

    Samples within two of a line end (no full stencil) are never flagged.

    Parameters
    ----------
    values, groups : arrays
        Samples and line codes (lines contiguous).
    window : int
        Twice the samples on each side whose median |d4| is the local roughness.
    threshold : float
        Robust sigmas of d4.
    minimum : float
        Smallest departure (field units) called a spike.
    fourth : array, optional
        The un-normalised fourth difference when the caller has it.
    return_strength : bool
        Also return ``|d4| / scale`` (robust sigmas; NaN where there is no stencil), used to keep
        the strongest spikes when their number is capped (:func:`cap_flags`).

    Returns
    -------
    flags : numpy.ndarray of bool
    departure : numpy.ndarray
        ``d4 / 6``: T minus the cubic through its four neighbours.
    strength : numpy.ndarray
        Only with ``return_strength``.
    """
    x = np.asarray(values, dtype=float)
    g = np.asarray(groups)
    if fourth is None:  # the caller may pass the (un-normalised) fourth difference it has
        fourth = fourth_difference(x, g)
    d4 = np.asarray(fourth, dtype=float)
    a = np.abs(d4)
    line_scale = 1.4826 * pd.Series(a).groupby(g, sort=False).transform("median").to_numpy()
    local_scale = 1.4826 * _beside_median(a, g, max(int(window) // 2, 3)) if a.size else a
    scale = np.nan_to_num(np.fmax(line_scale, local_scale), nan=0.0)
    scale = np.maximum(scale, 1e-12)  # a perfectly smooth line must not flag everything
    strength = a / scale
    peak = np.isfinite(a)
    for k in (-2, -1, 1, 2):
        neighbour = _shift(a, g, k)
        peak &= ~(neighbour > a)
    # shape: the spike stencil A (1, -4, 6, -4, 1) must explain most of d4 over the five samples
    # (least-squares amplitude A = sum(w d4) / 70); coarsely sampled geology has another shape
    w = FOURTH_DIFFERENCE_STENCIL
    near = np.stack([np.nan_to_num(_shift(d4, g, k)) for k in (-2, -1, 0, 1, 2)])
    amp = (w[:, None] * near).sum(axis=0) / 70.0
    energy = (near**2).sum(axis=0)
    misfit = ((near - amp[None, :] * w[:, None]) ** 2).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        shaped = misfit <= SPIKE_SHAPE_MISFIT * energy
        flags = peak & shaped & (strength > threshold) & (a / 6.0 > minimum) & np.isfinite(x)
    departure = d4 / 6.0
    if return_strength:
        return flags, departure, strength
    return flags, departure


def cap_flags(flags: ArrayLike, strength: ArrayLike, max_fraction: float) -> tuple[np.ndarray, int]:
    """Keep at most ``max_fraction`` of the samples flagged: the strongest ones.

    A test that flags more than a few per cent of the readings is measuring the signal, not
    noise (common practice); beyond the cap only the ``floor(max_fraction x n)`` largest
    ``strength`` values stay flagged.

    Returns
    -------
    flags : numpy.ndarray of bool
    dropped : int
        How many flags were lifted.
    """
    flags = np.asarray(flags, dtype=bool).copy()
    limit = int(np.floor(max(float(max_fraction), 0.0) * flags.size))
    count = int(flags.sum())
    if count <= limit:
        return flags, 0
    idx = np.flatnonzero(flags)
    s = np.nan_to_num(np.asarray(strength, dtype=float)[idx], nan=0.0)
    keep = idx[np.argsort(-s, kind="stable")[:limit]]
    flags[:] = False
    flags[keep] = True
    return flags, count - limit


def first_difference_spikes(
    values: ArrayLike, groups: ArrayLike, window: int = 11, threshold: float = 6.0, floor: float = 3.0
) -> tuple[np.ndarray, np.ndarray]:
    """Spikes in one-minute observatory variation data from first differences.

    d1[i] = T[i] - T[i-1]. A spike at i is a jump away and straight back: d1[i] and d1[i+1] of
    opposite signs, both larger than ``max(threshold x s, floor)``, where s = 1.4826 x the
    running median of |d1| over ``window`` samples (the local rate of variation). A step (a
    sudden commencement, a baseline jump) has one large difference only and is not a spike; the
    floor of a few nT keeps the natural minute-to-minute variation of quiet days from being
    flagged (common practice in observatory data checking: first differences against a robust
    running scale; Rousseeuw and Croux 1993 for the scale).

    Returns
    -------
    flags : numpy.ndarray of bool
    limit : numpy.ndarray
        The threshold in force at each sample (field units).
    """
    x = np.asarray(values, dtype=float)
    g = np.asarray(groups)
    d1 = x - _shift(x, g, -1)  # T[i] - T[i-1]
    d1_next = _shift(d1, g, 1)  # T[i+1] - T[i]
    scale = 1.4826 * _group_rolling_median(np.abs(d1), g, window) if x.size else x
    limit = np.maximum(threshold * np.nan_to_num(scale, nan=0.0), float(floor))
    with np.errstate(invalid="ignore"):
        flags = (np.abs(d1) > limit) & (np.abs(d1_next) > limit) & (d1 * d1_next < 0)
    return flags & np.isfinite(x), limit


def line_noise(fourth: np.ndarray, groups: np.ndarray, usable: np.ndarray | None = None) -> pd.DataFrame:
    """Per-line fourth-difference envelope: max |d4|, 95th percentile |d4| and RMS of d4."""
    d4 = np.abs(np.asarray(fourth, dtype=float))
    if usable is not None:
        d4 = np.where(usable, d4, np.nan)
    frame = pd.DataFrame({"g": groups, "d4": d4, "d4sq": d4**2})
    grouped = frame.groupby("g", sort=False)
    return pd.DataFrame(
        {
            "fourth_difference_max": grouped["d4"].max(),
            "fourth_difference_p95": grouped["d4"].quantile(0.95),
            "fourth_difference_rms": np.sqrt(grouped["d4sq"].mean()),
        }
    )
