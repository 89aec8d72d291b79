"""Line levelling: crossovers, tie-line and traverse-line adjustment, micro-levelling.

Airborne and marine surveys are flown as parallel traverse lines crossed by tie lines. At every
intersection (a *crossover*) the two lines measured the same field, so their difference (the
*misclosure*) measures level errors: residual diurnal variation, heading error, altitude changes,
drift. Levelling finds smooth per-line corrections that minimise the misclosures:

* :func:`find_crossovers` intersects the tracks (segment intersection with spatial bucketing)
  and interpolates value, time and height on both lines at each crossing;
* :func:`adjust_ties` levels the tie lines to each other (a constant per tie line);
* :func:`adjust_lines` levels every traverse line to the adjusted tie lines (a constant or a
  low-order polynomial in time), robustly (Huber weights by iteratively reweighted least squares);
* :func:`micro_level` estimates the residual line-parallel corrugation in a grid by directional
  filtering, and :func:`lowpass_along_lines` / :func:`sample_grid` bring it back to the readings.

Sign conventions used throughout: a *difference* (misclosure) is ``value_line - value_tie``; a
*correction* is the value **added** to a reading. After levelling, the misclosure at a crossover
``c`` between lines ``i`` and ``j`` is ``d_c + f_i(t_c) - f_j(t_c)``.

References
----------
Foster, M. R., Jines, W. R. and van der Weg, K. (1970). Statistical estimation of systematic
errors at intersections of lines of aeromagnetic survey data. Journal of Geophysical Research,
75(8), 1507-1511.

Yarger, H. L., Robertson, R. R. and Wentland, R. L. (1978). Diurnal drift removal from
aeromagnetic data using least squares. Geophysics, 43(6), 1148-1156.

Luyendyk, A. P. J. (1997). Processing of airborne magnetic data. AGSO Journal of Australian
Geology and Geophysics, 17(2), 31-38.

Mauring, E., Beard, L. P., Kihle, O. and Smethurst, M. A. (2002). A comparison of aeromagnetic
levelling techniques with an introduction to median levelling. Geophysical Prospecting, 50(1),
43-54.

Minty, B. R. S. (1991). Simple micro-levelling for aeromagnetic data. Exploration Geophysics,
22(4), 591-592.

Huber, P. J. (1964). Robust estimation of a location parameter. Annals of Mathematical
Statistics, 35(1), 73-101.

Huber, P. J. (1981). Robust Statistics. Wiley (the MAD as a robust scale, sec. 5.1).

Adaptive levelling over rough terrain (:func:`height_gate`, :func:`vertical_gradient_at`,
:func:`height_corrected_differences`, :func:`neighbour_corrections`): crossovers are gated by
the robust spread of their own height differences instead of a fixed few metres, the part of
each misclosure due to the height difference is removed with the local vertical gradient
estimated from the data (Luyendyk 1997 lists altitude differences among the causes of
misclosures), and lines without enough crossovers of their own take the correction of the
lines flown before and after them (level errors are mostly slow drifts in time; Mauring et
al. 2002 level such lines from their neighbours' medians).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from ..errors import BadGeometry, BadParameter, NotEnoughData

if TYPE_CHECKING:
    from collections.abc import Iterable

    import xarray as xr
    from numpy.typing import ArrayLike

__all__ = [
    "find_crossovers",
    "usable_crossovers",
    "huber_weights",
    "robust_lstsq",
    "adjust_ties",
    "TieAdjustment",
    "adjust_lines",
    "LineAdjustment",
    "adjust_network",
    "height_gate",
    "vertical_gradient_at",
    "height_corrected_differences",
    "neighbour_corrections",
    "line_azimuth",
    "micro_level",
    "sample_grid",
    "lowpass_along_lines",
]

#: Polynomial degree of each traverse-line correction model.
MODEL_DEGREE = {"constant": 0, "linear": 1, "quadratic": 2}

#: Consistency factor of the median absolute deviation for a normal distribution (common practice).
MAD_TO_SIGMA = 1.4826


# ---------------------------------------------------------------------------------------------
# Crossovers
# ---------------------------------------------------------------------------------------------
def _time_to_int(time, n):
    """Times as int64 (ns for datetime64, else float seconds) plus a flag telling which."""
    if time is None:
        return np.zeros(n, dtype=float), False
    time = np.asarray(time)
    if np.issubdtype(time.dtype, np.datetime64):
        return time.astype("datetime64[ns]").astype(np.int64), True
    return time.astype(float), False


def _segments(x, y, codes, max_segment_length):
    """Segments between consecutive readings of the same line.

    Returns the start/end reading indices (into the original arrays), whether each segment is
    the last of an unbroken run (its end point then belongs to it), and the median segment
    length.
    """
    order = np.argsort(codes, kind="stable")
    start, end = order[:-1], order[1:]
    same = (codes[start] == codes[end]) & (codes[start] >= 0)  # -1: reading without a line
    finite = np.isfinite(x[start]) & np.isfinite(y[start]) & np.isfinite(x[end]) & np.isfinite(y[end])
    valid = same & finite
    length = np.hypot(x[end] - x[start], y[end] - y[start])
    positive = valid & (length > 0)
    median = float(np.median(length[positive])) if positive.any() else 0.0
    if max_segment_length is None:
        max_segment_length = 5.0 * median  # gap rule of the clean stage (common practice)
    valid &= length <= max_segment_length
    valid &= length > 0
    # A segment closes its run when the next sorted segment is not a valid continuation.
    nxt = np.append(valid[1:], False)
    contiguous_next = np.append(end[:-1] == start[1:], False)
    closes = valid & ~(nxt & contiguous_next)
    keep = np.flatnonzero(valid)
    return start[keep], end[keep], closes[keep], median


def _cells(x0, y0, x1, y1, cell, origin, ncx):
    """Expand segments into the grid cells their bounding boxes cover.

    Returns the segment index and cell id of every (segment, cell) entry, and the lowest cell
    column and row of each segment's bounding box.
    """
    ix0 = np.floor((np.minimum(x0, x1) - origin[0]) / cell).astype(np.int64)
    ix1 = np.floor((np.maximum(x0, x1) - origin[0]) / cell).astype(np.int64)
    iy0 = np.floor((np.minimum(y0, y1) - origin[1]) / cell).astype(np.int64)
    iy1 = np.floor((np.maximum(y0, y1) - origin[1]) / cell).astype(np.int64)
    nx = ix1 - ix0 + 1
    count = nx * (iy1 - iy0 + 1)
    seg = np.repeat(np.arange(x0.size, dtype=np.int64), count)
    first = np.cumsum(count) - count
    k = np.arange(seg.size, dtype=np.int64) - np.repeat(first, count)
    cx = ix0[seg] + k % nx[seg]
    cy = iy0[seg] + k // nx[seg]
    return seg, cy * ncx + cx, ix0, iy0


def _candidate_pairs(a, b, cell, origin, ncx, group_a, group_b, ordered=False):
    """Pairs (index into a, index into b) of segments of different lines sharing a bucket cell.

    ``ordered`` keeps only pairs with ``group_a < group_b`` (a set of lines against itself).
    A pair sharing several cells is kept once, in the first cell of the overlap of the two
    bounding-box cell ranges (the lowest column and row both cover), without sorting pairs.
    """
    seg_a, cell_a, ix_a, iy_a = _cells(*a, cell, origin, ncx)
    seg_b, cell_b, ix_b, iy_b = _cells(*b, cell, origin, ncx)
    order = np.argsort(cell_a, kind="stable")
    seg_a, cell_a = seg_a[order], cell_a[order]
    left = np.searchsorted(cell_a, cell_b, side="left")
    right = np.searchsorted(cell_a, cell_b, side="right")
    n = right - left
    hit = n > 0
    left, n, seg_b, cell_b = left[hit], n[hit], seg_b[hit], cell_b[hit]
    pb = np.repeat(seg_b, n)
    pcell = np.repeat(cell_b, n)
    first = np.cumsum(n) - n
    k = np.arange(pb.size, dtype=np.int64) - np.repeat(first, n)
    pa = seg_a[np.repeat(left, n) + k]
    ga, gb = group_a[pa], group_b[pb]
    keep = ga < gb if ordered else ga != gb
    pa, pb, pcell = pa[keep], pb[keep], pcell[keep]
    ref = np.maximum(iy_a[pa], iy_b[pb]) * ncx + np.maximum(ix_a[pa], ix_b[pb])
    once = pcell == ref
    return pa[once], pb[once]


def _intersect(a, b, closes_a, closes_b):
    """Vectorised segment intersection; returns mask and fractions along a and b.

    Solves ``p + t r = q + u s`` (the cross-product form; e.g. Goldman 1990, Graphics Gems,
    "Intersection of two lines in three-space"). Intervals are half open, ``0 <= t < 1``, so a
    crossing exactly at a shared reading is counted once; the last segment of an unbroken run
    includes its end point. Parallel and collinear segments do not intersect.
    """
    px, py, qx, qy = a[0], a[1], b[0], b[1]
    rx, ry = a[2] - px, a[3] - py
    sx, sy = b[2] - qx, b[3] - qy
    denom = rx * sy - ry * sx
    dx, dy = qx - px, qy - py
    scale = np.hypot(rx, ry) * np.hypot(sx, sy)
    ok = np.abs(denom) > 1e-12 * scale
    with np.errstate(divide="ignore", invalid="ignore"):
        t = (dx * sy - dy * sx) / denom
        u = (dx * ry - dy * rx) / denom
    in_t = (t >= 0) & ((t < 1) | (closes_a & (t <= 1)))
    in_u = (u >= 0) & ((u < 1) | (closes_b & (u <= 1)))
    return ok & in_t & in_u, t, u


def find_crossovers(
    easting: ArrayLike,
    northing: ArrayLike,
    line_ids: ArrayLike,
    is_tie: ArrayLike,
    values: ArrayLike,
    time: ArrayLike | None = None,
    height: ArrayLike | None = None,
    *,
    flagged: ArrayLike | None = None,
    max_segment_length: float | None = None,
    cell_size: float | None = None,
    tie_tie: bool = True,
) -> pd.DataFrame:
    """Find every intersection of traverse-line tracks with tie-line tracks.

    Each line's track is the polyline through its readings in input order (the readings table is
    sorted by line then time). Segments longer than ``max_segment_length`` are gaps and are not
    bridged. Candidate segment pairs come from spatial bucketing (square cells over the segments'
    bounding boxes), then an exact segment-intersection test; value, time and height are
    interpolated linearly along both segments at the crossing point. A line that crosses the same
    tie several times gives one crossover per crossing.

    Parameters
    ----------
    easting, northing : array_like, shape (n,)
        Projected coordinates of the readings (m).
    line_ids : array_like, shape (n,)
        Line name of each reading.
    is_tie : array_like of bool, shape (n,)
        True for readings on tie lines.
    values : array_like, shape (n,)
        The value to level (e.g. magnetic anomaly in nT).
    time : array_like, shape (n,), optional
        ``datetime64`` times or float seconds; interpolated at the crossing.
    height : array_like, shape (n,), optional
        Sensor heights (m); interpolated at the crossing.
    flagged : array_like of bool, shape (n,), optional
        Readings excluded from fits. A crossover whose segment on either line touches a flagged
        reading (or has a non-finite value) gets ``flagged=True``.
    max_segment_length : float, optional
        Longest segment (m) that joins two consecutive readings; default 5 x the median segment
        length (common practice for gap detection).
    cell_size : float, optional
        Bucket cell size (m); default 4 x the median segment length.
    tie_tie : bool
        Also intersect tie lines with each other (``kind="tie-tie"`` rows; needed by
        :func:`adjust_ties`).

    Returns
    -------
    pandas.DataFrame
        One row per crossover with columns ``kind`` ("traverse-tie" or "tie-tie"), ``line``,
        ``tie`` (for tie-tie rows: the two tie lines), ``easting``, ``northing``, ``time_line``,
        ``time_tie``, ``value_line``, ``value_tie``, ``difference`` (line - tie), ``height_line``,
        ``height_tie``, ``height_difference`` (line - tie), ``index_line`` and ``index_tie``
        (0-based position in the input arrays of the reading starting the crossing segment;
        the segment ends at the next reading of that line), ``fraction_line`` and
        ``fraction_tie`` (position along the segment, 0..1) and ``flagged``.

    References
    ----------
    Foster, Jines and van der Weg (1970), J. Geophys. Res. 75:1507 (crossover differences);
    Luyendyk (1997), AGSO J. Aust. Geol. Geophys. 17(2):31 (crossover computation in practice).
    """
    x = np.asarray(easting, dtype=float)
    y = np.asarray(northing, dtype=float)
    n = x.size
    line_ids = np.asarray(line_ids)
    is_tie = np.asarray(is_tie, dtype=bool)
    v = np.asarray(values, dtype=float)
    tnum, is_datetime = _time_to_int(time, n)
    h = np.full(n, np.nan) if height is None else np.asarray(height, dtype=float)
    bad = np.zeros(n, dtype=bool) if flagged is None else np.asarray(flagged, dtype=bool).copy()
    bad |= ~np.isfinite(v)
    if not (
        y.size == n
        and line_ids.size == n
        and is_tie.size == n
        and v.size == n
        and h.size == n
        and tnum.size == n
        and bad.size == n
    ):
        raise BadGeometry("find_crossovers: all arrays must have the same length")

    codes, names = pd.factorize(pd.Series(line_ids), sort=False)
    codes = np.asarray(codes, dtype=np.int64)
    start, end, closes, median = _segments(x, y, codes, max_segment_length)
    empty = _empty_crossovers(is_datetime)
    if start.size == 0:
        return empty
    seg_tie = is_tie[start]
    if cell_size is None:
        cell_size = 4.0 * median if median > 0 else 1.0
    origin = (float(np.nanmin(x)), float(np.nanmin(y)))
    ncx = np.int64(np.floor((np.nanmax(x) - origin[0]) / cell_size) + 2)

    def geometry(idx):
        s, e = start[idx], end[idx]
        return (x[s] - origin[0], y[s] - origin[1], x[e] - origin[0], y[e] - origin[1])

    ta = np.flatnonzero(~seg_tie)
    tb = np.flatnonzero(seg_tie)
    frames = []
    jobs = [("traverse-tie", ta, tb)]
    if tie_tie:
        jobs.append(("tie-tie", tb, tb))
    local_origin = (0.0, 0.0)
    for kind, ia, ib in jobs:
        if ia.size == 0 or ib.size == 0:
            continue
        ga, gb = geometry(ia), geometry(ib)
        # tie-tie: each pair of ties once (ordered line codes), never a tie with itself
        pa, pb = _candidate_pairs(
            ga,
            gb,
            cell_size,
            local_origin,
            ncx,
            codes[start[ia]],
            codes[start[ib]],
            ordered=(kind == "tie-tie"),
        )
        sa, sb = ia[pa], ib[pb]
        ga = tuple(g[pa] for g in ga)
        gb = tuple(g[pb] for g in gb)
        hit, t, u = _intersect(ga, gb, closes[sa], closes[sb])
        sa, sb, t, u = sa[hit], sb[hit], t[hit], u[hit]
        ga = tuple(g[hit] for g in ga)
        frames.append(
            _crossover_frame(
                kind, sa, sb, t, u, ga, start, end, origin, names, codes, v, tnum, is_datetime, h, bad
            )
        )
    if not frames:
        return empty
    out = pd.concat(frames, ignore_index=True)
    return out.sort_values(["kind", "line", "tie", "time_line"], kind="stable", ignore_index=True)


def _crossover_frame(kind, sa, sb, t, u, ga, start, end, origin, names, codes, v, tnum, is_datetime, h, bad):
    s_a, e_a, s_b, e_b = start[sa], end[sa], start[sb], end[sb]

    def lerp(arr, s, e, f):
        return arr[s] + f * (arr[e] - arr[s])

    def tlerp(s, e, f):
        if is_datetime:
            nat = np.iinfo(np.int64).min
            missing = (tnum[s] == nat) | (tnum[e] == nat)
            step = np.where(missing, 0, tnum[e] - tnum[s]).astype(float)
            out = tnum[s] + np.round(f * step).astype(np.int64)
            return np.where(missing, nat, out).astype("datetime64[ns]")
        return lerp(tnum, s, e, f)

    value_line, value_tie = lerp(v, s_a, e_a, t), lerp(v, s_b, e_b, u)
    height_line, height_tie = lerp(h, s_a, e_a, t), lerp(h, s_b, e_b, u)
    return pd.DataFrame(
        {
            "kind": kind,
            "line": np.asarray(names)[codes[s_a]],
            "tie": np.asarray(names)[codes[s_b]],
            "easting": ga[0] + t * (ga[2] - ga[0]) + origin[0],
            "northing": ga[1] + t * (ga[3] - ga[1]) + origin[1],
            "time_line": tlerp(s_a, e_a, t),
            "time_tie": tlerp(s_b, e_b, u),
            "value_line": value_line,
            "value_tie": value_tie,
            "difference": value_line - value_tie,
            "height_line": height_line,
            "height_tie": height_tie,
            "height_difference": height_line - height_tie,
            "index_line": s_a,
            "index_tie": s_b,
            "fraction_line": t,
            "fraction_tie": u,
            "flagged": bad[s_a] | bad[e_a] | bad[s_b] | bad[e_b],
        }
    )


def _empty_crossovers(is_datetime):
    tdtype = "datetime64[ns]" if is_datetime else float
    return pd.DataFrame(
        {
            "kind": pd.Series([], dtype=object),
            "line": pd.Series([], dtype=object),
            "tie": pd.Series([], dtype=object),
            **{c: pd.Series([], dtype=float) for c in ("easting", "northing")},
            "time_line": pd.Series([], dtype=tdtype),
            "time_tie": pd.Series([], dtype=tdtype),
            **{
                c: pd.Series([], dtype=float)
                for c in (
                    "value_line",
                    "value_tie",
                    "difference",
                    "height_line",
                    "height_tie",
                    "height_difference",
                )
            },
            "index_line": pd.Series([], dtype=np.int64),
            "index_tie": pd.Series([], dtype=np.int64),
            "fraction_line": pd.Series([], dtype=float),
            "fraction_tie": pd.Series([], dtype=float),
            "flagged": pd.Series([], dtype=bool),
        }
    )


# ---------------------------------------------------------------------------------------------
# Robust least squares
# ---------------------------------------------------------------------------------------------
def huber_weights(residuals: ArrayLike, threshold: float, scale: float | None = None) -> np.ndarray:
    """Huber weights ``w = min(1, threshold * sigma / |r|)``.

    Parameters
    ----------
    residuals : array_like
        Residuals of the current fit.
    threshold : float
        Huber threshold in robust standard deviations (1.345 gives 95 % efficiency for normal
        errors; Huber 1964, Holland and Welsch 1977).
    scale : float, optional
        Standard deviation to use; default the robust one, 1.4826 x the median absolute
        deviation of the residuals.

    Returns
    -------
    numpy.ndarray
        Weights in (0, 1].

    References
    ----------
    Huber, P. J. (1964). Robust estimation of a location parameter. Ann. Math. Stat. 35:73.
    """
    r = np.asarray(residuals, dtype=float)
    if scale is None:
        scale = MAD_TO_SIGMA * np.median(np.abs(r - np.median(r))) if r.size else 0.0
    limit = threshold * scale
    absr = np.abs(r)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(absr <= limit, 1.0, limit / absr)
    return np.clip(np.nan_to_num(w, nan=1.0), 1e-8, 1.0)


def robust_lstsq(
    design: ArrayLike,
    target: ArrayLike,
    threshold: float | None = 1.5,
    *,
    max_iter: int = 50,
    tol: float = 1e-10,
) -> tuple[np.ndarray, np.ndarray]:
    """Least squares ``design @ x ~ target`` with Huber weights by IRLS.

    Rank-deficient systems (e.g. a tie network, defined only up to a constant) get the
    minimum-norm solution at every iteration.

    Parameters
    ----------
    design : numpy.ndarray, shape (m, p)
    target : numpy.ndarray, shape (m,)
    threshold : float or None
        Huber threshold in robust sigmas; None or inf gives ordinary least squares.
    max_iter : int
        Iteration limit of the reweighting.
    tol : float
        Stop when the solution changes by less than ``tol * (1 + max|x|)``.

    Returns
    -------
    x : numpy.ndarray, shape (p,)
    weights : numpy.ndarray, shape (m,)
        Final Huber weights (all ones for ordinary least squares).

    References
    ----------
    Holland, P. W. and Welsch, R. E. (1977). Robust regression using iteratively reweighted
    least-squares. Communications in Statistics - Theory and Methods, 6(9), 813-827.
    """
    a = np.asarray(design, dtype=float)
    b = np.asarray(target, dtype=float)
    w = np.ones(b.size)
    x = np.linalg.lstsq(a, b, rcond=None)[0]
    if threshold is None or not np.isfinite(threshold) or b.size <= a.shape[1]:
        return x, w
    for _ in range(max_iter):
        r = b - a @ x
        scale = MAD_TO_SIGMA * np.median(np.abs(r - np.median(r)))
        if scale <= 1e-12 * (1.0 + np.max(np.abs(b))):
            break  # the majority fits exactly: weights stay as they are
        w = huber_weights(r, threshold, scale)
        sw = np.sqrt(w)
        new = np.linalg.lstsq(a * sw[:, None], b * sw, rcond=None)[0]
        done = np.max(np.abs(new - x)) < tol * (1.0 + np.max(np.abs(new)))
        x = new
        if done:
            break
    return x, w


# ---------------------------------------------------------------------------------------------
# Tie lines
# ---------------------------------------------------------------------------------------------
@dataclass
class TieAdjustment:
    """Result of :func:`adjust_ties`.

    Attributes
    ----------
    corrections : pandas.Series
        Constant correction (value added) per tie line; the mean over the adjusted ties is zero.
    method : pandas.Series
        Per tie: "network" (from tie-tie crossovers), "misclosure" (from the mean traverse
        misclosure) or "none" (no usable crossover: correction 0).
    weights : numpy.ndarray
        Final Huber weight per crossover row of the input (NaN where not used).
    """

    corrections: pd.Series
    method: pd.Series
    weights: np.ndarray


def usable_crossovers(
    crossovers: pd.DataFrame, use: ArrayLike | None = None, max_height_difference: float | None = None
) -> np.ndarray:
    """Mask of crossovers a fit may use: not flagged, finite difference, height within limit.

    Parameters
    ----------
    crossovers : pandas.DataFrame
        Output of :func:`find_crossovers`.
    use : array_like of bool, optional
        Extra per-row mask.
    max_height_difference : float, optional
        Crossovers with ``|height_difference|`` above this (m) are dropped (common practice:
        the two lines then measured at different distances from the sources). Unknown (NaN)
        height differences keep the crossover.

    Returns
    -------
    numpy.ndarray of bool
    """
    ok = ~crossovers["flagged"].to_numpy(dtype=bool) & np.isfinite(crossovers["difference"].to_numpy(float))
    if use is not None:
        ok &= np.asarray(use, dtype=bool)
    if max_height_difference is not None:
        dh = np.abs(crossovers["height_difference"].to_numpy(float))
        ok &= ~(dh > max_height_difference)  # NaN heights (not known) keep the crossover
    return ok


def adjust_ties(
    crossovers: pd.DataFrame,
    ties: Iterable[str] | None = None,
    *,
    huber_threshold: float | None = 1.5,
    max_height_difference: float | None = None,
    use: ArrayLike | None = None,
) -> TieAdjustment:
    """Level the tie lines: one constant per tie line.

    Where tie lines cross each other, the constants ``a`` minimise
    ``sum_c w_c (d_c + a_i - a_j)^2`` over the tie-tie crossovers ``c`` (``d_c`` = value on tie
    ``i`` minus value on tie ``j``) with Huber weights. The network fixes the constants only up to
    one shift per connected group of ties; each group (and each tie crossing no other tie) is
    then shifted so that its robust mean traverse misclosure (line minus adjusted tie) is zero.

    **Datum**: finally the mean over the adjusted ties is removed, so the mean tie correction is
    zero and the levelled survey keeps the average level of its tie lines.

    The misclosure step assumes that the ties of different groups cross much the same traverse
    lines (their level errors then average out alike); where they do not, solve the whole
    network at once with :func:`adjust_network`.

    Parameters
    ----------
    crossovers : pandas.DataFrame
        Output of :func:`find_crossovers` (with ``kind`` "tie-tie" and "traverse-tie" rows).
    ties : sequence of str, optional
        All tie-line names (ties without usable crossovers get 0); default those in the table.
    huber_threshold : float or None
        Huber threshold in robust sigmas; None for ordinary least squares.
    max_height_difference : float, optional
        Crossovers with ``|height_difference|`` above this (m) are not used (common practice).
    use : array_like of bool, optional
        Extra per-row mask of crossovers that may be used.

    Returns
    -------
    TieAdjustment

    References
    ----------
    Yarger, Robertson and Wentland (1978), Geophysics 43:1148 (least-squares levelling);
    Luyendyk (1997), AGSO J. Aust. Geol. Geophys. 17(2):31 (ties first, then lines to ties).
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    ok = usable_crossovers(crossovers, use, max_height_difference)
    kind = crossovers["kind"].to_numpy()
    tt = np.flatnonzero(ok & (kind == "tie-tie"))
    lt = np.flatnonzero(ok & (kind == "traverse-tie"))
    if ties is None:
        ties = pd.unique(
            np.concatenate(
                [
                    crossovers["tie"].to_numpy()[kind == "traverse-tie"],
                    crossovers["line"].to_numpy()[kind == "tie-tie"],
                    crossovers["tie"].to_numpy()[kind == "tie-tie"],
                ]
            )
        )
    ties = [str(t) for t in ties]
    index = {t: k for k, t in enumerate(ties)}
    nt = len(ties)
    a = np.zeros(nt)
    weights = np.full(len(crossovers), np.nan)
    method = np.array(["none"] * nt, dtype=object)
    determined = np.zeros(nt, dtype=bool)
    if nt == 0:
        return TieAdjustment(pd.Series(a, index=ties, dtype=float), pd.Series(method, index=ties), weights)

    i = np.array([index.get(str(s), -1) for s in crossovers["line"].to_numpy()[tt]], dtype=int)
    j = np.array([index.get(str(s), -1) for s in crossovers["tie"].to_numpy()[tt]], dtype=int)
    known = (i >= 0) & (j >= 0)
    tt, i, j = tt[known], i[known], j[known]
    if tt.size:
        design = np.zeros((tt.size, nt))
        design[np.arange(tt.size), i] = 1.0
        design[np.arange(tt.size), j] = -1.0
        d = crossovers["difference"].to_numpy(float)[tt]
        a, w = robust_lstsq(design, -d, huber_threshold)
        weights[tt] = w
        in_net = np.zeros(nt, dtype=bool)
        in_net[i] = in_net[j] = True
        method[in_net] = "network"
        determined |= in_net
    graph = coo_matrix((np.ones(tt.size), (i, j)), shape=(nt, nt))
    _, group = connected_components(graph, directed=False)

    # Shift each group to the traverse lines (robust mean misclosure, line minus adjusted tie).
    tie_of = np.array([index.get(str(s), -1) for s in crossovers["tie"].to_numpy()[lt]], dtype=int)
    lt, tie_of = lt[tie_of >= 0], tie_of[tie_of >= 0]
    e = crossovers["difference"].to_numpy(float)[lt] - a[tie_of]
    for g in np.unique(group):
        members = group == g
        rows = members[tie_of]
        if not rows.any():
            continue
        shift, w = robust_lstsq(np.ones((rows.sum(), 1)), e[rows], huber_threshold)
        a[members] += shift[0]
        weights[lt[rows]] = w
        seen = np.zeros(nt, dtype=bool)
        seen[tie_of[rows]] = True
        method[members & seen & ~determined] = "misclosure"
        determined |= members & seen
    a[~determined] = 0.0
    if determined.any():
        a[determined] -= a[determined].mean()
    return TieAdjustment(pd.Series(a, index=ties, dtype=float), pd.Series(method, index=ties), weights)


# ---------------------------------------------------------------------------------------------
# Traverse lines
# ---------------------------------------------------------------------------------------------
def _seconds(values, epoch):
    values = np.asarray(values)
    if np.issubdtype(values.dtype, np.datetime64):
        return (values.astype("datetime64[ns]").astype(np.int64) - epoch) / 1e9
    return values.astype(float) - epoch


@dataclass
class LineAdjustment:
    """Result of :func:`adjust_lines`: a correction polynomial in time per traverse line.

    The correction of line ``L`` at time ``t`` is ``sum_k c_k tau^k`` with
    ``tau = (clip(t, t_min, t_max) - t_center) / t_scale``, where ``[t_min, t_max]`` spans the
    line's used crossovers: the polynomial is held constant beyond the first and last crossover
    instead of being extrapolated (common practice).

    Attributes
    ----------
    model : str
        "constant", "linear" or "quadratic".
    coefficients : dict
        line -> coefficient array (lowest order first).
    t_center, t_scale, t_min, t_max : dict
        line -> seconds since ``epoch``.
    epoch : int or float
        Time origin (ns since 1970 for datetime input, else seconds).
    counts : pandas.Series
        Used crossovers per line.
    degree : pandas.Series
        Degree actually fitted per line (lowered when a line has too few crossovers; -1 = not
        levelled).
    unlevelled : list of str
        Lines with fewer than ``min_crossovers`` used crossovers (correction 0).
    weights : numpy.ndarray
        Final Huber weight per crossover row of the input (NaN where not used).
    """

    model: str
    coefficients: dict
    t_center: dict
    t_scale: dict
    t_min: dict
    t_max: dict
    epoch: float
    counts: pd.Series
    degree: pd.Series
    unlevelled: list = field(default_factory=list)
    weights: np.ndarray = field(default_factory=lambda: np.zeros(0))

    def evaluate(self, line_ids: ArrayLike, time: ArrayLike | None) -> np.ndarray:
        """Correction (value added) for readings on ``line_ids`` at ``time``; 0 on other lines."""
        codes, names = pd.factorize(pd.Series(np.asarray(line_ids)))
        codes = np.asarray(codes)
        n = codes.size
        sec = _seconds(time, self.epoch) if time is not None else np.zeros(n)
        # Per-line parameters as arrays indexed by line code (no loop over readings).
        m = len(names) + 1  # last slot: lines without a correction (and missing line names)
        coef = np.zeros((m, 3))
        lo, hi = np.zeros(m), np.zeros(m)
        center, scale = np.zeros(m), np.ones(m)
        for k, name in enumerate(names):
            key = str(name)
            c = self.coefficients.get(key)
            if c is None:
                continue
            coef[k, : len(c)] = c
            lo[k], hi[k] = self.t_min[key], self.t_max[key]
            center[k], scale[k] = self.t_center[key], self.t_scale[key]
        codes = np.where(codes < 0, m - 1, codes)
        tau = np.clip(np.nan_to_num(sec, nan=0.0), lo[codes], hi[codes]) - center[codes]
        tau = tau / scale[codes]
        return coef[codes, 0] + tau * (coef[codes, 1] + tau * coef[codes, 2])


def adjust_lines(
    crossovers: pd.DataFrame,
    tie_corrections: pd.Series | None = None,
    *,
    model: str = "constant",
    lines: Iterable[str] | None = None,
    huber_threshold: float | None = 1.5,
    min_crossovers: int = 2,
    max_height_difference: float | None = None,
    use: ArrayLike | None = None,
) -> LineAdjustment:
    """Level each traverse line to the (adjusted) tie lines.

    For traverse line ``i`` the correction ``f_i(t)`` (a constant, or a linear or quadratic
    polynomial in time) minimises ``sum_c w_c (d_c - a_j(c) + f_i(t_c))^2`` over its crossovers,
    where ``d_c`` is the misclosure (line minus tie) and ``a_j`` the tie's correction, with Huber
    weights by IRLS so a bad crossover does not bend the line. Ties are held fixed (two-step
    levelling). A line with fewer than ``min_crossovers`` usable crossovers keeps its level
    (correction 0) and is reported in ``unlevelled``; a line with enough crossovers for a
    constant but too few for the requested polynomial gets the highest degree they support.

    Parameters
    ----------
    crossovers : pandas.DataFrame
        Output of :func:`find_crossovers`; only ``kind == "traverse-tie"`` rows are used.
    tie_corrections : pandas.Series, optional
        Correction per tie line (from :func:`adjust_ties`); default none.
    model : {"constant", "linear", "quadratic"}
        Correction model in time.
    lines : sequence of str, optional
        All traverse lines to report (lines with no crossover are unlevelled).
    huber_threshold : float or None
        Huber threshold in robust sigmas; None for ordinary least squares.
    min_crossovers : int
        Fewer usable crossovers keeps the line's level.
    max_height_difference : float, optional
        Crossovers with ``|height_difference|`` above this (m) are not used (common practice).
    use : array_like of bool, optional
        Extra per-row mask of crossovers that may be used.

    Returns
    -------
    LineAdjustment

    References
    ----------
    Yarger, Robertson and Wentland (1978), Geophysics 43:1148 (polynomial in time per line,
    least squares); Luyendyk (1997), AGSO J. Aust. Geol. Geophys. 17(2):31.
    """
    if model not in MODEL_DEGREE:
        raise BadParameter(f"model must be one of {', '.join(MODEL_DEGREE)}, not {model!r}")
    degree_wanted = MODEL_DEGREE[model]
    ok = usable_crossovers(crossovers, use, max_height_difference)
    ok &= crossovers["kind"].to_numpy() == "traverse-tie"
    line_col = crossovers["line"].astype(str).to_numpy()
    tie_col = crossovers["tie"].astype(str).to_numpy()
    d = crossovers["difference"].to_numpy(float).copy()
    if tie_corrections is not None and len(tie_corrections):
        d -= pd.Series(tie_col).map(tie_corrections).fillna(0.0).to_numpy(float)
    tcol = crossovers["time_line"].to_numpy()
    if np.issubdtype(tcol.dtype, np.datetime64):
        known = ~np.isnat(tcol)
        tint = tcol.astype("datetime64[ns]").astype(np.int64)
        epoch = int(tint[ok & known].min()) if (ok & known).any() else 0
        sec = _seconds(tcol, epoch)
        sec[~known] = np.nan
    else:
        tcol = tcol.astype(float)
        finite = ok & np.isfinite(tcol)
        epoch = float(tcol[finite].min()) if finite.any() else 0.0
        sec = tcol - epoch
    if degree_wanted > 0:
        ok &= np.isfinite(sec)  # a time-dependent correction needs the crossing time
    sec = np.where(np.isfinite(sec), sec, 0.0)
    if lines is None:
        lines = pd.unique(line_col[crossovers["kind"].to_numpy() == "traverse-tie"])
    lines = [str(s) for s in lines]
    weights = np.full(len(crossovers), np.nan)
    coefficients, t_center, t_scale, t_min, t_max = {}, {}, {}, {}, {}
    counts, degrees, unlevelled = {}, {}, []
    rows_of = (
        pd.Series(np.flatnonzero(ok)).groupby(line_col[ok]).apply(np.asarray).to_dict() if ok.any() else {}
    )
    for name in lines:
        rows = rows_of.get(name, np.zeros(0, dtype=int))
        counts[name] = int(rows.size)
        if rows.size < max(int(min_crossovers), 1):
            unlevelled.append(name)
            degrees[name] = -1
            continue
        # Distinct crossover times bound the degree the data can fix.
        distinct = np.unique(sec[rows]).size
        deg = int(min(degree_wanted, rows.size - 1, distinct - 1))
        lo, hi = float(sec[rows].min()), float(sec[rows].max())
        center, scale = 0.5 * (lo + hi), max(0.5 * (hi - lo), 1.0)
        tau = (sec[rows] - center) / scale
        design = np.vander(tau, deg + 1, increasing=True)
        coef, w = robust_lstsq(design, -d[rows], huber_threshold)
        weights[rows] = w
        coefficients[name] = coef
        t_center[name], t_scale[name], t_min[name], t_max[name] = center, scale, lo, hi
        degrees[name] = deg
    return LineAdjustment(
        model,
        coefficients,
        t_center,
        t_scale,
        t_min,
        t_max,
        epoch,
        pd.Series(counts, dtype=int),
        pd.Series(degrees, dtype=int),
        unlevelled,
        weights,
    )


def _constrained_irls(design, target, constraints, threshold, max_iter=50, tol=1e-10):
    """Sparse weighted least squares with exact linear constraints ``C x = 0``, Huber IRLS.

    Each iteration solves the bordered normal equations ``[[A'WA, C'], [C, 0]] [x, l] =
    [A'Wb, 0]`` (Lagrange multipliers; e.g. Golub and Van Loan 2013, Matrix Computations,
    sec. 6.2) with a sparse LU factorisation.
    """
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    a = sparse.csr_matrix(design)
    c = sparse.csr_matrix(constraints)
    b = np.asarray(target, dtype=float)
    w = np.ones(b.size)
    p, q = a.shape[1], c.shape[0]

    def solve(weights):
        aw = a.T.multiply(weights[None, :]).tocsr()
        normal = aw @ a
        # A tiny ridge keeps degenerate networks (an unknown fixed by no crossover combination)
        # solvable; it changes well-posed solutions by ~1e-10 relative.
        ridge = 1e-10 * max(float(normal.diagonal().mean()), 1e-300)
        normal = normal + ridge * sparse.identity(p, format="csr")
        kkt = sparse.bmat([[normal, c.T], [c, None]], format="csc")
        rhs = np.concatenate([aw @ b, np.zeros(q)])
        return np.asarray(spsolve(kkt, rhs))[:p]

    x = solve(w)
    if threshold is None or not np.isfinite(threshold) or b.size <= p - q:
        return x, w
    for _ in range(max_iter):
        r = b - a @ x
        scale = MAD_TO_SIGMA * np.median(np.abs(r - np.median(r)))
        if scale <= 1e-12 * (1.0 + np.max(np.abs(b))):
            break
        w = huber_weights(r, threshold, scale)
        new = solve(w)
        done = np.max(np.abs(new - x)) < tol * (1.0 + np.max(np.abs(new)))
        x = new
        if done:
            break
    return x, w


def adjust_network(
    crossovers: pd.DataFrame,
    *,
    model: str = "constant",
    lines: Iterable[str] | None = None,
    ties: Iterable[str] | None = None,
    huber_threshold: float | None = 1.5,
    min_crossovers: int = 2,
    max_height_difference: float | None = None,
    use: ArrayLike | None = None,
) -> tuple[TieAdjustment, LineAdjustment]:
    """Level traverse and tie lines together in one least-squares network.

    All unknowns are solved at once: a constant per tie line and a polynomial in time per
    traverse line, minimising ``sum_c w_c (d_c + f_i(t_c) - f_j(t_c))^2`` over every usable
    traverse-tie and tie-tie crossover, with Huber weights by IRLS. The network is defined only
    up to one constant per connected group of lines; **datum**: in each group the mean tie
    correction is zero (exact constraint, Lagrange multipliers). Traverse lines with fewer than
    ``min_crossovers`` usable crossovers keep their level and their crossovers are left out.

    Parameters
    ----------
    crossovers : pandas.DataFrame
        Output of :func:`find_crossovers`.
    model : {"constant", "linear", "quadratic"}
        Traverse-line correction model in time (ties are always constant).
    lines, ties : sequence of str, optional
        All traverse / tie line names; default those in the table.
    huber_threshold, min_crossovers, max_height_difference, use
        As in :func:`adjust_lines`.

    Returns
    -------
    (TieAdjustment, LineAdjustment)

    References
    ----------
    Yarger, Robertson and Wentland (1978), Geophysics 43:1148 (simultaneous least-squares
    solution of the line network); Foster, Jines and van der Weg (1970), J. Geophys. Res.
    75:1507.
    """
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components

    if model not in MODEL_DEGREE:
        raise BadParameter(f"model must be one of {', '.join(MODEL_DEGREE)}, not {model!r}")
    kind = crossovers["kind"].to_numpy()
    ok = usable_crossovers(crossovers, use, max_height_difference)
    line_col = crossovers["line"].astype(str).to_numpy()
    tie_col = crossovers["tie"].astype(str).to_numpy()
    trav = kind == "traverse-tie"
    if lines is None:
        lines = pd.unique(line_col[trav])
    if ties is None:
        ties = pd.unique(np.concatenate([tie_col, line_col[~trav]]))
    lines, ties = [str(s) for s in lines], [str(s) for s in ties]
    # First pass (no solve) fixes degrees, time scaling and the unlevelled lines.
    shape = adjust_lines(
        crossovers,
        None,
        model=model,
        lines=lines,
        huber_threshold=None,
        min_crossovers=min_crossovers,
        max_height_difference=max_height_difference,
        use=use,
    )
    levelled = [n for n in lines if n not in shape.unlevelled]
    ok &= ~trav | np.isin(line_col, levelled)
    ok &= np.isin(tie_col, ties) & (trav | np.isin(line_col, ties))
    rows = np.flatnonzero(ok)
    nt = len(ties)
    tie_index = {t: k for k, t in enumerate(ties)}
    col0, ncol = {}, nt
    for name in levelled:
        col0[name] = ncol
        ncol += int(shape.degree[name]) + 1
    tcol = crossovers["time_line"].to_numpy()
    sec = _seconds(tcol, shape.epoch) if len(tcol) else np.zeros(0)
    sec = np.where(np.isfinite(sec), sec, 0.0)
    r_idx, c_idx, vals = [], [], []
    for name in levelled:  # loop over lines: their polynomial columns
        sel = rows[trav[rows] & (line_col[rows] == name)]
        tau = np.clip(sec[sel], shape.t_min[name], shape.t_max[name]) - shape.t_center[name]
        tau = tau / shape.t_scale[name]
        for k in range(int(shape.degree[name]) + 1):
            r_idx.append(np.searchsorted(rows, sel))
            c_idx.append(np.full(sel.size, col0[name] + k))
            vals.append(tau**k)
    tt = rows[~trav[rows]]
    pos = np.searchsorted(rows, tt)
    r_idx += [pos, pos]
    c_idx += [
        np.array([tie_index[s] for s in line_col[tt]], dtype=int),
        np.array([tie_index[s] for s in tie_col[tt]], dtype=int),
    ]
    vals += [np.ones(tt.size), -np.ones(tt.size)]
    tj = np.array([tie_index[s] for s in tie_col[rows[trav[rows]]]], dtype=int)
    r_idx.append(np.searchsorted(rows, rows[trav[rows]]))
    c_idx.append(tj)
    vals.append(-np.ones(tj.size))
    design = sparse.csr_matrix(
        (np.concatenate(vals), (np.concatenate(r_idx), np.concatenate(c_idx))), shape=(rows.size, ncol)
    )
    target = -crossovers["difference"].to_numpy(float)[rows]
    # Datum per connected group: sum of its tie constants = 0 (or of its line constants if it
    # has no tie with a crossover). Unknowns touched by no crossover are pinned to zero.
    touched = np.asarray(abs(design).sum(axis=0)).ravel() > 0
    link = design.T @ design
    _, group = connected_components(link, directed=False)
    constraint_rows = []
    for g in np.unique(group):
        members = group == g
        if not touched[members].any():
            for k in np.flatnonzero(members):
                row = np.zeros(ncol)
                row[k] = 1.0
                constraint_rows.append(row)
            continue
        tie_members = members.copy()
        tie_members[nt:] = False
        if not tie_members.any():
            tie_members = members & np.isin(np.arange(ncol), list(col0.values()))
        constraint_rows.append(tie_members.astype(float))
    constraints = np.array(constraint_rows).reshape(-1, ncol)
    x, w = _constrained_irls(design, target, constraints, huber_threshold)
    weights = np.full(len(crossovers), np.nan)
    weights[rows] = w
    a = pd.Series(x[:nt], index=ties, dtype=float)
    method = pd.Series(np.where(touched[:nt], "network", "none"), index=ties)
    coefficients = {n: x[col0[n] : col0[n] + int(shape.degree[n]) + 1] for n in levelled}
    counts = pd.Series({n: int(np.sum(trav[rows] & (line_col[rows] == n))) for n in lines}, dtype=int)
    line_adj = LineAdjustment(
        model,
        coefficients,
        dict(shape.t_center),
        dict(shape.t_scale),
        dict(shape.t_min),
        dict(shape.t_max),
        shape.epoch,
        counts,
        shape.degree.copy(),
        list(shape.unlevelled),
        weights,
    )
    return TieAdjustment(a, method, weights), line_adj


# ---------------------------------------------------------------------------------------------
# Adaptive levelling: height gate, vertical-gradient correction, neighbour corrections
# ---------------------------------------------------------------------------------------------
def height_gate(height_difference: ArrayLike, multiple: float = 3.0, floor: float = 10.0) -> float:
    """Largest ``|height difference|`` (m) a crossover may have, from the data's own spread.

    ``gate = max(median(|dh|) + multiple * 1.4826 * MAD(|dh|), floor)``: crossovers far out in
    the distribution of height differences (climbs over obstacles, a line flown at the wrong
    altitude) are dropped, while a survey whose lines differ by tens of metres everywhere keeps
    its crossovers (their height effect is then removed by :func:`height_corrected_differences`).
    The median and the MAD are robust (Huber 1981, Robust Statistics, Wiley, sec. 5.1).

    Parameters
    ----------
    height_difference : array_like
        Height differences (m) of the crossovers (NaN ignored).
    multiple : float
        Robust standard deviations above the median.
    floor : float
        Smallest gate (m): never reject crossovers closer in height than this.

    Returns
    -------
    float
        The gate (m); ``inf`` when no height difference is known.
    """
    dh = np.abs(np.asarray(height_difference, dtype=float))
    dh = dh[np.isfinite(dh)]
    if dh.size == 0:
        return float("inf")
    med = float(np.median(dh))
    mad = MAD_TO_SIGMA * float(np.median(np.abs(dh - med)))
    return float(max(med + multiple * mad, floor))


def vertical_gradient_at(
    easting: ArrayLike,
    northing: ArrayLike,
    values: ArrayLike,
    at_easting: ArrayLike,
    at_northing: ArrayLike,
    cell: float,
    smoothing: float | None = None,
) -> np.ndarray:
    """Upward vertical gradient ``dT/dh`` (units per metre) of line data at given points.

    The readings are averaged in square cells of side ``cell``, interpolated linearly between
    the cell means (Delaunay triangulation) onto a regular grid, empty cells filled by their
    nearest neighbour, continued upward by ``smoothing`` metres (default one cell, to damp what
    line-level residuals and interpolation leave in the grid) and differentiated in the
    wavenumber domain (``d/dz <-> |k|``, z down; Blakely 1995, Potential Theory in Gravity and
    Magnetic Applications, CUP, ch. 12) with :mod:`potfield.fields.harmonic.transforms`. The
    result is sampled bilinearly at the points and its sign turned to "up".

    Parameters
    ----------
    easting, northing, values : array_like, shape (n,)
        Readings (NaN values are skipped).
    at_easting, at_northing : array_like, shape (m,)
        Where the gradient is wanted (e.g. the crossovers).
    cell : float
        Cell size (m), about half the traverse-line spacing.
    smoothing : float, optional
        Upward continuation (m) before the derivative; default ``cell``.

    Returns
    -------
    numpy.ndarray, shape (m,)
        ``dT/dh`` (positive when the field grows upward); NaN outside the grid.
    """
    import xarray as xr
    from scipy.interpolate import griddata

    from .._numerics import single_thread_blas
    from ..harmonic import transforms as tf

    x = np.asarray(easting, dtype=float)
    y = np.asarray(northing, dtype=float)
    v = np.asarray(values, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(v)
    x, y, v = x[ok], y[ok], v[ok]
    out = np.full(np.size(at_easting), np.nan)
    if x.size < 16 or not cell > 0:
        return out
    x0, y0 = x.min(), y.min()
    ix = np.floor((x - x0) / cell).astype(np.int64)
    iy = np.floor((y - y0) / cell).astype(np.int64)
    nx, ny = int(ix.max()) + 1, int(iy.max()) + 1
    if nx < 4 or ny < 4:
        return out
    key = iy * nx + ix
    count = np.bincount(key, minlength=nx * ny)
    filled = count > 0
    mean_v = np.bincount(key, v, nx * ny)[filled] / count[filled]
    mean_x = np.bincount(key, x, nx * ny)[filled] / count[filled]
    mean_y = np.bincount(key, y, nx * ny)[filled] / count[filled]
    # grid nodes on the cell corners, so the grid spans every reading (no NaN at the edges)
    ge = x0 + cell * np.arange(nx + 1)
    gn = y0 + cell * np.arange(ny + 1)
    ee, nn = np.meshgrid(ge, gn)
    # one BLAS thread: locating the nodes computes a small LAPACK inverse per triangle, and
    # threaded BLAS made those calls take 19 s instead of 0.05 s on a busy 2-core machine;
    # coordinates relative to the first corner (large projected values cost precision)
    with single_thread_blas():
        grid = griddata((mean_x - x0, mean_y - y0), mean_v, (ee - x0, nn - y0), method="linear")
    grid = _fill_nearest(grid)
    da = xr.DataArray(
        grid,
        coords={"northing": gn, "easting": ge},
        dims=("northing", "easting"),
        name="levelling_field",
        attrs={"units": ""},
    )
    up = tf.upward_continuation(da, cell if smoothing is None else float(smoothing))
    dz = tf.vertical_derivative(up, 1)
    return -sample_grid(dz, at_easting, at_northing)


def height_corrected_differences(crossovers: pd.DataFrame, gradient: ArrayLike) -> np.ndarray:
    """Misclosures with the height effect removed: ``d - dT/dh * (h_line - h_tie)``.

    Two lines crossing at different heights see the field at different distances from the
    sources; to first order the difference is the vertical gradient times the height
    difference (a Taylor step; Blakely 1995 ch. 12 for the gradient). Where the gradient or
    a height is unknown the misclosure is left as it is.
    """
    d = crossovers["difference"].to_numpy(float)
    effect = np.asarray(gradient, dtype=float) * crossovers["height_difference"].to_numpy(float)
    return d - np.where(np.isfinite(effect), effect, 0.0)


def neighbour_corrections(
    line_ids: ArrayLike, time: ArrayLike | None, correction: ArrayLike, source: ArrayLike, target: ArrayLike
) -> np.ndarray:
    """Corrections of lines without enough crossovers, from the lines flown before and after.

    Each ``source`` line (levelled by its own crossovers) contributes its mean correction at its
    mean time; a reading of a ``target`` line gets the linear interpolation in time of those
    (held constant before the first and after the last). Level errors that are slow drifts of
    the system or residual diurnal variation are shared by lines flown close in time, so this
    chains the levelling through the network instead of leaving such lines unlevelled
    (Mauring et al. 2002 correct lines from their neighbours in the same spirit). Without
    times the mean correction of the source lines is used.

    Parameters
    ----------
    line_ids : array_like, shape (n,)
    time : array_like, shape (n,) or None
        ``datetime64`` or float seconds.
    correction : array_like, shape (n,)
        Current per-reading correction (used on ``source`` readings).
    source, target : array_like of bool, shape (n,)
        Readings of levelled lines / of lines to correct.

    Returns
    -------
    numpy.ndarray, shape (n,)
        Correction on ``target`` readings, NaN elsewhere (and where no source line exists).
    """
    lines = np.asarray(line_ids).astype(str)
    corr = np.asarray(correction, dtype=float)
    source = np.asarray(source, dtype=bool)
    target = np.asarray(target, dtype=bool)
    out = np.full(lines.size, np.nan)
    if not source.any() or not target.any():
        return out
    if time is None:
        sec = np.full(lines.size, np.nan)
    else:
        t = np.asarray(time)
        if np.issubdtype(t.dtype, np.datetime64):
            nat = np.isnat(t)
            raw = t.astype("datetime64[ns]").astype(np.int64)
            origin = raw[~nat].min() if (~nat).any() else 0
            sec = np.where(nat, np.nan, (raw - origin) / 1e9)
        else:
            sec = t.astype(float)
    frame = pd.DataFrame({"line": lines[source], "t": sec[source], "c": corr[source]})
    per_line = frame.groupby("line").mean().dropna(subset=["c"])
    if per_line.empty:
        return out
    known = per_line.dropna(subset=["t"]).sort_values("t")
    if known.empty:
        out[target] = float(per_line["c"].mean())
        return out
    st = np.where(np.isfinite(sec[target]), sec[target], float(known["t"].mean()))
    out[target] = np.interp(st, known["t"].to_numpy(), known["c"].to_numpy())
    return out


# ---------------------------------------------------------------------------------------------
# Micro-levelling
# ---------------------------------------------------------------------------------------------
def line_azimuth(easting: ArrayLike, northing: ArrayLike, line_ids: ArrayLike) -> float:
    """Mean direction of the lines, degrees clockwise from north in [0, 180).

    Each line contributes the direction from its first to its last reading, weighted by its
    length; directions are axial (a line flown north equals one flown south), so the mean is
    taken over doubled angles (Mardia and Jupp 2000, Directional Statistics, Wiley, sec. 9.3).
    """
    frame = pd.DataFrame(
        {"x": np.asarray(easting, float), "y": np.asarray(northing, float), "line": np.asarray(line_ids)}
    ).dropna()
    if frame.empty:
        raise NotEnoughData("line_azimuth: no finite coordinates")
    group = frame.groupby("line", sort=False)
    dx = (group["x"].last() - group["x"].first()).to_numpy()
    dy = (group["y"].last() - group["y"].first()).to_numpy()
    length = np.hypot(dx, dy)
    theta = np.arctan2(dx, dy)
    z = np.sum(length * np.exp(2j * theta))
    return float(np.degrees(np.angle(z) / 2.0) % 180.0)


def _fill_nearest(values):
    from scipy.ndimage import distance_transform_edt

    missing = ~np.isfinite(values)
    if not missing.any():
        return values
    if missing.all():
        return np.zeros_like(values)
    idx = distance_transform_edt(missing, return_distances=False, return_indices=True)
    return values[tuple(idx)]


def micro_level(
    grid: xr.DataArray,
    line_direction_deg: float,
    line_spacing: float,
    cutoff_spacings: float = 3.0,
    max_amplitude: float | None = None,
    *,
    along_wavelength: float | None = None,
    order: int = 4,
    pad_fraction: float = 0.5,
) -> xr.DataArray:
    """Corrugation (line-parallel level residuals) in a grid, by directional filtering.

    The grid is padded by mirror reflection (``pad_fraction`` of each side, empty cells filled by
    their nearest neighbour first), Fourier transformed, and multiplied by

    ``H = B_hp(|k_across|; 1 / (cutoff_spacings * line_spacing)) * B_lp(|k_along|; 1 / along_wavelength)``

    where ``k_across`` / ``k_along`` are the wavenumber components (cycles per metre)
    perpendicular and parallel to the lines and ``B`` are Butterworth responses of the given
    ``order`` (high-pass ``k^n / sqrt(k^2n + kc^2n)``, low-pass ``1 / sqrt(1 + (k/kc)^2n)``). The
    result keeps what changes quickly across the lines and slowly along them: corrugations. It is
    clipped to ``+-max_amplitude`` so that real anomalies, which are larger, are never turned into
    corrections, and masked where the input grid is empty.

    Parameters
    ----------
    grid : xarray.DataArray
        Grid with ``northing`` and ``easting`` dimensions (regular spacing).
    line_direction_deg : float
        Direction of the traverse lines, degrees clockwise from north (90 = east-west lines).
    line_spacing : float
        Traverse line spacing (m).
    cutoff_spacings : float
        Across-line cut-off wavelength in line spacings (2-4 is common practice; Minty 1991).
    max_amplitude : float, optional
        Clip the corrugation to this absolute value (field units); None = no clipping.
    along_wavelength : float, optional
        Along-line cut-off wavelength (m); default 20 line spacings.
    order : int
        Butterworth order of both filters.
    pad_fraction : float
        Padding on each side as a fraction of the grid size (at most 1).

    Returns
    -------
    xarray.DataArray
        The corrugation, same coordinates as ``grid``. Subtract it (add its negative) to
        micro-level.

    References
    ----------
    Minty, B. R. S. (1991). Simple micro-levelling for aeromagnetic data. Exploration Geophysics
    22:591-592. Butterworth, S. (1930). On the theory of filter amplifiers. Wireless Engineer
    7:536-541.
    """
    import xarray as xr

    from ...io.grids import ascending

    # Ascending coordinates: with a descending axis the oblique filter would be mirrored.
    grid = ascending(grid.transpose("northing", "easting"))
    values = grid.to_numpy().astype(float)
    if values.ndim != 2 or min(values.shape) < 2:
        raise NotEnoughData("micro_level: the grid needs at least 2 x 2 cells")
    east = grid["easting"].to_numpy()
    north = grid["northing"].to_numpy()
    dx, dy = abs(float(east[1] - east[0])), abs(float(north[1] - north[0]))
    missing = ~np.isfinite(values)
    filled = _fill_nearest(values)
    mean = float(filled.mean())
    ny, nx = filled.shape
    pad_y = int(min(max(round(pad_fraction * ny), 1), ny))
    pad_x = int(min(max(round(pad_fraction * nx), 1), nx))
    padded = np.pad(filled - mean, ((pad_y, pad_y), (pad_x, pad_x)), mode="symmetric")
    fy = np.fft.fftfreq(padded.shape[0], dy)[:, None]
    fx = np.fft.fftfreq(padded.shape[1], dx)[None, :]
    az = np.radians(line_direction_deg)
    # Along-line unit vector (east, north) = (sin az, cos az); across = (cos az, -sin az).
    f_along = np.abs(fx * np.sin(az) + fy * np.cos(az))
    f_across = np.abs(fx * np.cos(az) - fy * np.sin(az))
    kc_across = 1.0 / (cutoff_spacings * line_spacing)
    kc_along = 1.0 / (along_wavelength if along_wavelength is not None else 20.0 * line_spacing)
    n2 = 2 * int(order)
    high = f_across**order / np.sqrt(f_across**n2 + kc_across**n2)
    low = 1.0 / np.sqrt(1.0 + (f_along / kc_along) ** n2)
    spectrum = np.fft.fft2(padded) * (high * low)
    corrugation = np.fft.ifft2(spectrum).real[pad_y : pad_y + ny, pad_x : pad_x + nx]
    if max_amplitude is not None:
        corrugation = np.clip(corrugation, -max_amplitude, max_amplitude)
    corrugation[missing] = np.nan
    return xr.DataArray(
        corrugation,
        coords={"northing": north, "easting": east},
        dims=("northing", "easting"),
        name="corrugation",
        attrs={
            "units": grid.attrs.get("units", ""),
            "long_name": "line-parallel corrugation (directional filter)",
        },
    )


def sample_grid(grid: xr.DataArray, easting: ArrayLike, northing: ArrayLike) -> np.ndarray:
    """Bilinear interpolation of a grid at points; NaN outside the grid or in empty cells
    (:func:`potfield.fields._numerics.sample_grid`)."""
    from .._numerics import sample_grid as bilinear

    return bilinear(grid, easting, northing)


def lowpass_along_lines(
    values: ArrayLike, line_ids: ArrayLike, distance: ArrayLike, wavelength: float
) -> np.ndarray:
    """Gaussian low-pass of values along each line, as a function of distance along the line.

    Each line is resampled at its median reading interval, filtered with a Gaussian whose
    response is 1/2 at ``wavelength`` (``sigma = sqrt(ln 2 / 2) / pi * wavelength``), edges
    extended by their nearest value, and interpolated back to the readings. Non-finite input
    values are skipped (their outputs are interpolated from their neighbours).

    References
    ----------
    Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic Applications. Cambridge
    University Press (Fourier filtering of profiles, ch. 11).
    """
    from scipy.ndimage import gaussian_filter1d

    values = np.asarray(values, dtype=float)
    distance = np.asarray(distance, dtype=float)
    out = np.full(values.size, np.nan)
    codes, _ = pd.factorize(pd.Series(np.asarray(line_ids)))
    order = np.lexsort((distance, codes))
    bounds = np.flatnonzero(np.diff(codes[order])) + 1
    for idx in np.split(order, bounds):
        ok = np.isfinite(values[idx]) & np.isfinite(distance[idx])
        if ok.sum() < 2:
            out[idx[ok]] = values[idx[ok]]
            continue
        dist, val = distance[idx][ok], values[idx][ok]
        step = np.median(np.diff(dist))
        if not step > 0:
            out[idx] = np.mean(val)
            continue
        regular = np.arange(dist[0], dist[-1] + 0.5 * step, step)
        resampled = np.interp(regular, dist, val)
        sigma = np.sqrt(np.log(2.0) / 2.0) / np.pi * wavelength / step
        smooth = gaussian_filter1d(resampled, sigma, mode="nearest")
        out[idx] = np.interp(np.where(np.isfinite(distance[idx]), distance[idx], dist[0]), regular, smooth)
    return out
