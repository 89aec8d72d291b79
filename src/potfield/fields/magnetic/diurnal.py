"""Magnetic diurnal correction: base-station records cleaned, interpolated to the readings'
times, referred to a datum and combined over several bases; spec measures of the base record.

All functions work on plain numpy arrays. Times may be ``datetime64`` arrays (UTC) or float
seconds; every function converts both to float seconds from a common epoch.

The diurnal correction removes the time-varying external field recorded at a fixed base
magnetometer from the moving survey's total-field readings: ``corrected = T - (B(t) - B0)``,
where ``B(t)`` is the base record at the reading's time and ``B0`` a datum (Reford 1980,
Geophysics 45(11):1640-1658, "Magnetic method"; Hinze, von Frese and Saad 2013, Gravity and
Magnetic Exploration, Cambridge University Press, ch. 12).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numba
import numpy as np
import pandas as pd

from .._numerics import trailing_median
from ..errors import BadParameter, NotEnoughData

if TYPE_CHECKING:
    from numpy.typing import ArrayLike

#: Factor taking the median absolute deviation to a standard deviation for normal errors
#: (Rousseeuw and Croux 1993, J. Am. Stat. Assoc. 88:1273).
MAD_TO_SIGMA = 1.482602218505602
#: Mean Earth radius R1 of GRS80 (m) (Moritz 1980, Bull. Geod. 54:395), for base distances.
EARTH_RADIUS_M = 6_371_008.8

METHODS = ("linear", "cubic", "nearest")


# --- time ---------------------------------------------------------------------------------------


def _as_time_array(time: ArrayLike) -> np.ndarray:
    arr = np.asarray(time)
    if np.issubdtype(arr.dtype, np.datetime64):
        return arr.astype("datetime64[ns]")
    return arr.astype(float)


def time_epoch(*times: ArrayLike) -> np.datetime64 | float:
    """A common epoch for several time arrays: the earliest datetime64, or 0.0 for seconds."""
    firsts = []
    for time in times:
        arr = _as_time_array(time)
        if arr.size and np.issubdtype(arr.dtype, np.datetime64):
            firsts.append(arr.min())
    return min(firsts) if firsts else 0.0


def to_seconds(time: ArrayLike, epoch: np.datetime64 | float | None = None) -> np.ndarray:
    """Times as float seconds from ``epoch`` (datetime64 in, or float seconds passed through)."""
    arr = _as_time_array(time)
    if np.issubdtype(arr.dtype, np.datetime64):
        if epoch is None:
            epoch = arr.min() if arr.size else np.datetime64(0, "ns")
        return (arr - np.datetime64(epoch, "ns")).astype("int64") / 1e9
    return arr - (0.0 if epoch is None or not isinstance(epoch, (int, float)) else float(epoch))


# --- cleaning -----------------------------------------------------------------------------------


@dataclass
class BaseCleaning:
    """Result of :func:`clean_base`.

    Attributes
    ----------
    good : numpy.ndarray of bool
        Samples fit to use (finite and not a spike).
    spike, missing : numpy.ndarray of bool
    median : numpy.ndarray
        The running median the spikes were measured from.
    gaps : numpy.ndarray, shape (k, 2)
        Start and end (float seconds from the record's first time) of the gaps between good
        samples longer than ``max_gap_s``.
    transient : numpy.ndarray of bool
        Set-up transients (:func:`setup_transients`), set by the caller; empty when not tested.
    """

    good: np.ndarray
    spike: np.ndarray
    missing: np.ndarray
    median: np.ndarray
    gaps: np.ndarray = field(default_factory=lambda: np.zeros((0, 2)))
    transient: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=bool))


def running_median(value: ArrayLike, window: int) -> np.ndarray:
    """Centred running median over ``window`` samples (shorter at the ends), NaN ignored
    (Tukey 1977, Exploratory Data Analysis, Addison-Wesley, ch. 7)."""
    series = pd.Series(np.asarray(value, dtype=float))
    return series.rolling(int(window), center=True, min_periods=1).median().to_numpy()


def clean_base(
    time: ArrayLike,
    value: ArrayLike,
    *,
    window: int = 11,
    threshold: float = 6.0,
    min_spike: float = 3.0,
    max_gap_s: float | None = None,
) -> BaseCleaning:
    """Flag spikes and missing samples of a base-station record.

    A sample is a spike when it departs from the running median of ``window`` samples by more
    than ``max(threshold x s, min_spike)``, with s = 1.4826 x the running median absolute
    deviation: the Hampel identifier (Hampel 1974, J. Am. Stat. Assoc. 69:383; Davies and
    Gather 1993, J. Am. Stat. Assoc. 88:782) with a floor. The running MAD is floored at its
    median over the record, so that brief lulls of an active record (where the local MAD nearly
    vanishes) do not flag ordinary samples; the floor ``min_spike`` (a few nT by default) keeps
    samples within a few nT of the local median, which are the diurnal signal itself on an
    active day, from ever being removed (common practice).

    Parameters
    ----------
    time : array of datetime64 or float seconds
    value : array
        Base total field (nT); NaN = missing.
    window : int
        Running window (samples, odd numbers centre it).
    threshold : float
        Robust sigmas.
    min_spike : float
        Smallest departure (nT) ever called a spike (the floor of the threshold).
    max_gap_s : float, optional
        When given, the gaps between good samples longer than this are listed.

    Returns
    -------
    BaseCleaning
    """
    value = np.asarray(value, dtype=float)
    missing = ~np.isfinite(value)
    finite = np.flatnonzero(~missing)
    spike = np.zeros(value.size, dtype=bool)
    median = np.full(value.size, np.nan)
    if finite.size:
        v = value[finite]
        med = running_median(v, window)
        dev = np.abs(v - med)
        mad = running_median(dev, window)
        # floor the local scale at its record median: in an active record the running MAD
        # drops to near zero where oscillations cross, which would flag ordinary samples
        mad = np.maximum(mad, np.median(mad))
        spike[finite] = dev > np.maximum(threshold * MAD_TO_SIGMA * mad, min_spike)
        median[finite] = med
    good = ~missing & ~spike
    gaps = np.zeros((0, 2))
    if max_gap_s is not None:
        gaps = find_gaps(to_seconds(time), good, max_gap_s)
    return BaseCleaning(good=good, spike=spike, missing=missing, median=median, gaps=gaps)


def find_gaps(seconds: ArrayLike, good: ArrayLike, max_gap_s: float) -> np.ndarray:
    """Intervals between consecutive good samples longer than ``max_gap_s``.

    Returns
    -------
    numpy.ndarray, shape (k, 2)
        Start and end times (the good samples bounding each gap), in the units of ``seconds``.
    """
    seconds = np.asarray(seconds, dtype=float)
    t = seconds[np.asarray(good, dtype=bool)]
    if t.size < 2:
        return np.zeros((0, 2))
    step = np.diff(t)
    where = np.flatnonzero(step > max_gap_s)
    return np.column_stack([t[where], t[where + 1]])


# --- sessions, datum jumps and set-up transients -------------------------------------------------


@dataclass
class BaseSessions:
    """Result of :func:`base_sessions`.

    Attributes
    ----------
    session : numpy.ndarray of int
        Session number of each sample (0, 1, ...; sessions are contiguous in time).
    jumps : list of dict
        Level changes larger than the limit: ``index`` (first sample after it), ``kind``
        (``"gap"``: across a recording gap, ``"step"``: inside a record), ``size_nT`` (after
        minus before) and ``seconds`` (time of the first sample after it).
    changes : list of dict
        Every session boundary (the same keys), jumps or not.
    """

    session: np.ndarray
    jumps: list
    changes: list


def _trailing_count(values: np.ndarray, groups: np.ndarray, width: int) -> np.ndarray:
    series = pd.Series(np.isfinite(values).astype(float))
    return (
        series.groupby(groups, sort=False)
        .rolling(int(width), min_periods=1)
        .sum()
        .reset_index(level=0, drop=True)
        .sort_index()
        .to_numpy()
    )


def base_sessions(
    time: ArrayLike,
    value: ArrayLike,
    good: ArrayLike | None = None,
    *,
    gap_s: float = 1800.0,
    jump_nT: float = 20.0,
    window: int = 60,
) -> BaseSessions:
    """Split a base record into sessions and find datum jumps (relocations, re-set-ups).

    A new session starts after a recording gap longer than ``gap_s`` and at a step inside a
    record. A step is found by a robust two-window test: at each sample i the median of the
    ``window`` good samples after it minus the median of the ``window`` before it, less the
    local trend (``window`` x the median first difference over both windows, so a steady diurnal
    slope gives no step); a run of samples where this exceeds ``jump_nT`` is one step, placed at
    its largest single first difference. Across a gap the level change is the median of the
    first ``window`` samples after it minus that of the last ``window`` before it, and is a jump
    when larger than ``jump_nT`` (common practice: a base moved or set up again sits on a
    different local field, so its level changes by the crustal field difference between the two
    sites; medians as robust levels, Tukey 1977).

    Parameters
    ----------
    time : array of datetime64 or float seconds, increasing
    value : array (nT)
    good : array of bool, optional
        Samples to use (default: finite ones); the others take the session of the sample before.
    gap_s : float
        Recording gaps longer than this (s) start a new session.
    jump_nT : float
        Smallest level change (nT) called a jump.
    window : int
        Samples on each side of the step test.

    Returns
    -------
    BaseSessions
    """
    t = to_seconds(time)
    v = np.asarray(value, dtype=float)
    ok = np.isfinite(v) if good is None else (np.asarray(good, dtype=bool) & np.isfinite(v))
    idx = np.flatnonzero(ok)
    session = np.zeros(v.size, dtype=np.int64)
    if idx.size < 2:
        return BaseSessions(session, [], [])
    tg, vg = t[idx], v[idx]
    k = max(int(window), 3)
    gap_cut = np.flatnonzero(np.diff(tg) > gap_s) + 1  # positions in idx starting a session
    part = np.zeros(idx.size, dtype=np.int64)
    part[gap_cut] = 1
    part = np.cumsum(part)
    changes = []
    # steps inside each gap-free part: medians of the k samples before and after each position
    before = trailing_median(vg, part, k)  # median of vg[i-k+1 .. i]
    n_before = _trailing_count(vg, part, k)
    after = trailing_median(vg[::-1], part[::-1], k)[::-1]  # median of vg[i .. i+k-1]
    n_after = _trailing_count(vg[::-1], part[::-1], k)[::-1]
    d1 = np.r_[np.nan, np.diff(vg)]
    d1[np.r_[True, part[1:] != part[:-1]]] = np.nan
    slope = (
        pd.Series(d1)
        .groupby(part, sort=False)
        .rolling(2 * k, center=True, min_periods=1)
        .median()
        .reset_index(level=0, drop=True)
        .sort_index()
        .to_numpy()
    )
    prev_before = np.r_[np.nan, before[:-1]]
    prev_count = np.r_[0.0, n_before[:-1]]
    same = np.r_[False, part[1:] == part[:-1]]
    estimate = after - prev_before - np.nan_to_num(slope) * k
    full = same & (prev_count >= k) & (n_after >= k)
    with np.errstate(invalid="ignore"):
        candidate = full & (np.abs(estimate) > jump_nT)
    steps = []
    if candidate.any():
        run_id = np.cumsum(np.r_[True, ~candidate[1:] | ~candidate[:-1]])
        frame = pd.DataFrame(
            {"run": run_id[candidate], "pos": np.flatnonzero(candidate), "d1": np.abs(d1[candidate])}
        )
        best = frame.loc[frame.groupby("run")["d1"].idxmax(), "pos"].to_numpy()
        for pos in best:  # loop over steps found (a few), not samples
            level_before = float(np.median(vg[max(pos - k, 0) : pos]))
            level_after = float(np.median(vg[pos : pos + k]))
            steps.append(int(pos))
            changes.append(
                {
                    "index": int(idx[pos]),
                    "kind": "step",
                    "seconds": float(tg[pos]),
                    "size_nT": level_after - level_before,
                    "jump": True,
                }
            )
    for pos in gap_cut:  # loop over gaps (a few)
        lo = vg[max(pos - k, 0) : pos][part[max(pos - k, 0) : pos] == part[pos - 1]]
        hi = vg[pos : pos + k][part[pos : pos + k] == part[pos]]
        size = float(np.median(hi) - np.median(lo))
        changes.append(
            {
                "index": int(idx[pos]),
                "kind": "gap",
                "seconds": float(tg[pos]),
                "size_nT": size,
                "jump": bool(abs(size) > jump_nT),
                "gap_s": float(tg[pos] - tg[pos - 1]),
            }
        )
    changes.sort(key=lambda c: c["index"])
    starts = np.array([c["index"] for c in changes], dtype=np.int64)
    if starts.size:
        session = np.searchsorted(starts, np.arange(v.size), side="right").astype(np.int64)
    jumps = [c for c in changes if c["jump"]]
    return BaseSessions(session, jumps, changes)


def setup_transients(
    time: ArrayLike,
    value: ArrayLike,
    session: ArrayLike,
    good: ArrayLike | None = None,
    *,
    settle_s: float = 300.0,
    min_nT: float = 3.0,
) -> np.ndarray:
    """Flag the settling transient at the start of each base session.

    A magnetometer just set up drifts for its first minutes (the sensor and its electronics
    settling, the operator walking away). The record from ``settle_s`` to ``2 settle_s`` after
    the session's first sample is fitted with a robust straight line (median levels of its two
    halves) and extended back to the start. With ``limit = max(min_nT, r)`` (r the largest
    departure from the line inside the fit window: the noise and the diurnal's own curvature),
    a session starts with a transient when the median departure of its first 30 s from the
    line exceeds ``2 limit``;
    the transient then runs until the running median (5 samples) first comes back within
    ``limit`` (common practice: discard the settling minutes of a new set-up). A transient
    smaller than the diurnal's own curvature over a few minutes cannot be told from it with one
    base and is not flagged.

    Parameters
    ----------
    time : array of datetime64 or float seconds, increasing
    value : array (nT)
    session : array of int
        Session of each sample (:func:`base_sessions`).
    good : array of bool, optional
        Samples to use (default: finite ones).

    Returns
    -------
    numpy.ndarray of bool
    """
    t = to_seconds(time)
    v = np.asarray(value, dtype=float)
    ok = np.isfinite(v) if good is None else (np.asarray(good, dtype=bool) & np.isfinite(v))
    session = np.asarray(session)
    out = np.zeros(v.size, dtype=bool)
    for s in np.unique(session[ok]):  # loop over sessions (a few)
        idx = np.flatnonzero(ok & (session == s))
        ts, vs = t[idx], v[idx]
        t0 = ts[0]
        ref = (ts >= t0 + settle_s) & (ts <= t0 + 2 * settle_s)
        early = ts < t0 + settle_s
        if ref.sum() < 10 or early.sum() < 5:
            continue
        tr, vr = ts[ref], vs[ref]
        half = tr < np.median(tr)
        if half.all() or not half.any():
            continue
        slope = (np.median(vr[~half]) - np.median(vr[half])) / (np.median(tr[~half]) - np.median(tr[half]))
        intercept = np.median(vr - slope * tr)
        resid = vr - (intercept + slope * tr)
        limit = max(min_nT, float(np.max(np.abs(resid))))
        dep = np.abs(running_median(vs[early], 5) - (intercept + slope * ts[early]))
        first = ts[early] < t0 + 30.0
        if np.median(dep[first]) <= 2 * limit:
            continue
        back = np.flatnonzero(dep <= limit)
        stop = int(back[0]) if back.size else int(early.sum())
        out[idx[:stop]] = True
    return out


def session_datums(
    time: ArrayLike,
    value: ArrayLike,
    session: ArrayLike,
    good: ArrayLike | None = None,
    span: tuple[np.datetime64 | float, np.datetime64 | float] | None = None,
) -> np.ndarray:
    """Median of each session's good samples inside ``span`` (the whole session when it does
    not overlap ``span``; NaN for a session without good samples), indexed by session number."""
    t = _as_time_array(time)
    v = np.asarray(value, dtype=float)
    ok = np.isfinite(v) if good is None else (np.asarray(good, dtype=bool) & np.isfinite(v))
    session = np.asarray(session)
    n = int(session.max()) + 1 if session.size else 0
    out = np.full(n, np.nan)
    inside = np.ones(v.size, dtype=bool)
    if span is not None:
        inside = (t >= span[0]) & (t <= span[1])
    for s in range(n):  # loop over sessions
        sel = ok & (session == s)
        pick = sel & inside
        if pick.any():
            out[s] = float(np.median(v[pick]))
        elif sel.any():
            out[s] = float(np.median(v[sel]))
    return out


# --- interpolation ------------------------------------------------------------------------------


def interpolate_base(
    base_time: ArrayLike,
    base_value: ArrayLike,
    reading_time: ArrayLike,
    method: str = "linear",
    max_gap_s: float = 10.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Base record at the readings' times, and a flag for readings it does not cover.

    Parameters
    ----------
    base_time, base_value : arrays
        The base record (NaN values are left out, as gaps).
    reading_time : array
        Times of the readings (same kind as ``base_time``: datetime64 or float seconds).
    method : {"linear", "cubic", "nearest"}
        Linear interpolation, a not-a-knot cubic spline (de Boor 1978, A Practical Guide to
        Splines, Springer) or the nearest base sample.
    max_gap_s : float
        Readings between two base samples more than this apart are flagged.

    Returns
    -------
    values : numpy.ndarray
        Interpolated base values. Outside the record they hold the end value.
    flag : numpy.ndarray of bool
        True for readings inside a base gap longer than ``max_gap_s`` or outside the record.
    """
    if method not in METHODS:
        raise BadParameter(f"method must be one of {METHODS}, not {method!r}")
    epoch = time_epoch(base_time, reading_time)
    tb = to_seconds(base_time, epoch)
    vb = np.asarray(base_value, dtype=float)
    tr = to_seconds(reading_time, epoch)
    keep = np.isfinite(vb) & np.isfinite(tb)
    tb, vb = tb[keep], vb[keep]
    if tb.size and np.any(np.diff(tb) < 0):
        order = np.argsort(tb, kind="stable")
        tb, vb = tb[order], vb[order]
    if tb.size and np.any(np.diff(tb) == 0):
        tb, first = np.unique(tb, return_index=True)
        vb = vb[first]
    if tb.size == 0:
        return np.full(tr.size, np.nan), np.ones(tr.size, dtype=bool)
    if tb.size == 1:
        return np.full(tr.size, vb[0]), tr != tb[0]
    if method == "linear":
        values = np.interp(tr, tb, vb)
    elif method == "nearest":
        right = np.clip(np.searchsorted(tb, tr), 1, tb.size - 1)
        left = right - 1
        choose_right = np.abs(tb[right] - tr) < np.abs(tr - tb[left])
        values = vb[np.where(choose_right, right, left)]
    else:
        from scipy.interpolate import CubicSpline

        spline = CubicSpline(tb, vb, bc_type="not-a-knot", extrapolate=False)
        values = spline(np.clip(tr, tb[0], tb[-1]))
    outside = (tr < tb[0]) | (tr > tb[-1])
    right = np.clip(np.searchsorted(tb, tr, side="right"), 1, tb.size - 1)
    span = tb[right] - tb[right - 1]
    on_sample = (tr == tb[right - 1]) | (tr == tb[right])
    flag = outside | ((span > max_gap_s) & ~on_sample)
    return values, flag


# --- datum --------------------------------------------------------------------------------------


def base_datum(
    base_time: ArrayLike,
    base_value: ArrayLike,
    mode: str = "median",
    *,
    value: float | None = None,
    at_time: ArrayLike | None = None,
    span: tuple[np.datetime64 | float, np.datetime64 | float] | None = None,
) -> float:
    """The datum B0 subtracted from the base record.

    Parameters
    ----------
    mode : {"median", "value", "time"}
        ``"median"``: median of the finite base values inside ``span`` (the survey's time range;
        the whole record when None); ``"value"``: the given ``value``; ``"time"``: the base
        record linearly interpolated at ``at_time``.
    span : (start, end), optional
        Same kind as ``base_time``.

    Returns
    -------
    float

    Notes
    -----
    Common practice (Reford 1980, Geophysics 45:1640): the datum only shifts the corrected field
    by a constant; the median over the survey keeps the corrected field near the observed level.
    """
    vb = np.asarray(base_value, dtype=float)
    if mode == "value":
        if value is None or not np.isfinite(value):
            raise BadParameter("datum mode 'value' needs a finite value")
        return float(value)
    epoch = time_epoch(
        base_time, [] if span is None else np.asarray(span), [] if at_time is None else np.atleast_1d(at_time)
    )
    tb = to_seconds(base_time, epoch)
    good = np.isfinite(vb)
    if mode == "median":
        inside = good.copy()
        if span is not None:
            start, end = to_seconds(np.asarray(span), epoch)
            inside &= (tb >= start) & (tb <= end)
            if not inside.any():
                inside = good
        if not inside.any():
            raise NotEnoughData("the base record has no finite value")
        return float(np.median(vb[inside]))
    if mode == "time":
        if at_time is None:
            raise BadParameter("datum mode 'time' needs at_time")
        t0 = float(to_seconds(np.atleast_1d(at_time), epoch)[0])
        tg, vg = tb[good], vb[good]
        if tg.size == 0 or t0 < tg[0] or t0 > tg[-1]:
            raise BadParameter("datum time is outside the base record")
        return float(np.interp(t0, tg, vg))
    raise BadParameter(f"datum mode must be 'median', 'value' or 'time', not {mode!r}")


def diurnal_correction(
    base_time: ArrayLike,
    base_value: ArrayLike,
    reading_time: ArrayLike,
    *,
    method: str = "linear",
    max_gap_s: float = 10.0,
    datum: float | None = None,
) -> tuple[np.ndarray, np.ndarray, float]:
    """Diurnal variation at the readings: interpolated base minus the datum.

    ``corrected = total_field - correction`` (Reford 1980, Geophysics 45:1640).

    Parameters
    ----------
    datum : float, optional
        B0; default the median of the base over the readings' time range.

    Returns
    -------
    correction : numpy.ndarray (nT)
    flag : numpy.ndarray of bool (see :func:`interpolate_base`)
    datum : float
    """
    values, flag = interpolate_base(base_time, base_value, reading_time, method, max_gap_s)
    if datum is None:
        rt = _as_time_array(reading_time)
        datum = base_datum(base_time, base_value, "median", span=(rt.min(), rt.max()))
    return values - datum, flag, float(datum)


# --- several bases ------------------------------------------------------------------------------


def great_circle_distance(lon1: ArrayLike, lat1: ArrayLike, lon2: ArrayLike, lat2: ArrayLike) -> np.ndarray:
    """Haversine distance (m) on the sphere of GRS80's mean radius (Sinnott 1984, Sky and
    Telescope 68(2):159)."""
    lon1, lat1, lon2, lat2 = (np.radians(np.asarray(a, dtype=float)) for a in (lon1, lat1, lon2, lat2))
    h = np.sin((lat2 - lat1) / 2) ** 2 + np.cos(lat1) * np.cos(lat2) * np.sin((lon2 - lon1) / 2) ** 2
    return 2 * EARTH_RADIUS_M * np.arcsin(np.sqrt(np.clip(h, 0.0, 1.0)))


def combine_bases(
    corrections: ArrayLike,
    flags: ArrayLike,
    distances: ArrayLike,
    method: str = "nearest",
    power: float = 2.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Combine the corrections of several bases at each reading.

    Parameters
    ----------
    corrections, flags, distances : arrays, shape (n_bases, n_readings)
        Each base's correction, its gap flag and its distance (m) to each reading.
    method : {"nearest", "distance"}
        ``"nearest"``: the nearest base not flagged at that reading; ``"distance"``:
        inverse-distance weights ``d**-power`` over the bases not flagged (Shepard 1968, Proc.
        23rd ACM National Conference, 517-524); a reading on a base takes that base.
    power : float

    Returns
    -------
    correction : numpy.ndarray
    flag : numpy.ndarray of bool
        True where every base is flagged (the value then uses all bases).
    weights : numpy.ndarray, shape (n_bases, n_readings)
    """
    c = np.atleast_2d(np.asarray(corrections, dtype=float))
    f = np.atleast_2d(np.asarray(flags, dtype=bool))
    d = np.atleast_2d(np.asarray(distances, dtype=float))
    all_flagged = f.all(axis=0)
    usable = ~f | all_flagged[None, :]
    if method == "nearest":
        masked = np.where(usable, d, np.inf)
        pick = np.argmin(masked, axis=0)
        weights = np.zeros_like(c)
        weights[pick, np.arange(c.shape[1])] = 1.0
    elif method == "distance":
        with np.errstate(divide="ignore"):
            w = np.where(usable, 1.0 / np.maximum(d, 1e-9) ** power, 0.0)
        on_base = usable & (d < 1e-3)
        w = np.where(on_base.any(axis=0)[None, :], on_base.astype(float), w)
        weights = w / w.sum(axis=0, keepdims=True)
    else:
        raise BadParameter(f"method must be 'nearest' or 'distance', not {method!r}")
    return (weights * c).sum(axis=0), all_flagged, weights


def station_difference(
    time_a: ArrayLike, value_a: ArrayLike, time_b: ArrayLike, value_b: ArrayLike, max_gap_s: float = 10.0
) -> dict[str, float]:
    """Statistics of the difference between two base records over their common span.

    Record b is interpolated linearly to a's good samples; the median difference (the level
    difference of the two sites) is removed and the rest measures how differently the external
    field varies at the two bases (common practice).

    Returns
    -------
    dict
        ``n``, ``level_difference`` (median a - b, nT), ``std``, ``max_abs`` (largest departure
        from the median difference), ``peak_to_peak``; NaN statistics when they do not overlap.
    """
    epoch = time_epoch(time_a, time_b)
    va = np.asarray(value_a, dtype=float)
    good = np.isfinite(va)
    ta = to_seconds(time_a, epoch)[good]
    va = va[good]
    vb_at_a, flag = interpolate_base(to_seconds(time_b, epoch), value_b, ta, "linear", max_gap_s)
    diff = (va - vb_at_a)[~flag]
    if diff.size == 0:
        nan = float("nan")
        return {"n": 0, "level_difference": nan, "std": nan, "max_abs": nan, "peak_to_peak": nan}
    level = float(np.median(diff))
    rest = diff - level
    return {
        "n": int(diff.size),
        "level_difference": level,
        "std": float(np.std(rest)),
        "max_abs": float(np.max(np.abs(rest))),
        "peak_to_peak": float(np.ptp(rest)),
    }


# --- spec measures ------------------------------------------------------------------------------


@numba.njit(parallel=True, cache=True)
def _chord_kernel(t, v, end, out):  # pragma: no cover - compiled
    n = t.size
    for i in numba.prange(n):
        j = end[i]
        if j < 0:
            out[i] = np.nan
            continue
        if j <= i + 1:
            out[i] = 0.0
            continue
        slope = (v[j] - v[i]) / (t[j] - t[i])
        worst = 0.0
        for k in range(i + 1, j):
            d = abs(v[k] - (v[i] + slope * (t[k] - t[i])))
            if d > worst:
                worst = d
        out[i] = worst


@dataclass
class ChordDeviation:
    """Result of :func:`chord_deviation`.

    Attributes
    ----------
    max : float
        Largest deviation (nT) over all windows (NaN when the record is shorter than a window).
    start : float
        Start of the worst window (seconds from the record's first time).
    deviation : numpy.ndarray
        Deviation of the window starting at each sample (NaN where the window runs past the end).
    """

    max: float
    start: float
    deviation: np.ndarray


def chord_deviation(time: ArrayLike, value: ArrayLike, window_s: float) -> ChordDeviation:
    """Maximum deviation of a record from the straight chord over every window of a length.

    For each sample i the window runs from t_i to the last sample at or before t_i + window_s;
    the deviation is the largest |v_k - chord(t_k)| of the samples inside, where the chord joins
    the window's end samples. Windows that run past the record's end are skipped. Specifications
    of the base record are stated this way, e.g. at most 0.5 nT over 15 s and 3 nT over 60 s
    (common practice; regional survey specifications).

    Parameters
    ----------
    time : array of datetime64 or float seconds, increasing
    value : array (NaN samples are left out)
    window_s : float

    Returns
    -------
    ChordDeviation
    """
    t = to_seconds(time)
    v = np.asarray(value, dtype=float)
    keep = np.isfinite(v)
    t, v = t[keep], v[keep]
    out = np.full(t.size, np.nan)
    if t.size < 2 or t[-1] - t[0] < window_s - 1e-6:
        return ChordDeviation(float("nan"), float("nan"), out)
    end = np.searchsorted(t, t + window_s + 1e-6, side="right") - 1
    end[t + window_s > t[-1] + 1e-6] = -1
    _chord_kernel(t, v, end.astype(np.int64), out)
    full = np.full(keep.size, np.nan)
    full[keep] = out
    i = int(np.nanargmax(out))
    return ChordDeviation(float(out[i]), float(t[i]), full)


def highpass(time: ArrayLike, value: ArrayLike, window_s: float) -> np.ndarray:
    """Record minus its centred running mean over ``window_s`` seconds (time-based window, so
    gaps and irregular sampling are handled), computed with cumulative sums."""
    t = to_seconds(time)
    v = np.asarray(value, dtype=float)
    cs = np.concatenate([[0.0], np.cumsum(v)])
    lo = np.searchsorted(t, t - window_s / 2, side="left")
    hi = np.searchsorted(t, t + window_s / 2, side="right")
    return v - (cs[hi] - cs[lo]) / (hi - lo)


@dataclass
class TimeOffset:
    """Result of :func:`estimate_time_offset`.

    ``lag_s > 0`` means the survey's clock is ahead of the base's: the survey record at stamp
    ``t`` matches the base record at ``t - lag_s``. ``lags`` and ``correlation`` are the curve.
    """

    lag_s: float
    correlation: float
    n: int
    lags: np.ndarray
    curve: np.ndarray


def estimate_time_offset(
    base_time: ArrayLike,
    base_value: ArrayLike,
    survey_time: ArrayLike,
    survey_value: ArrayLike,
    *,
    highpass_s: float = 60.0,
    max_lag_s: float = 30.0,
    step_s: float | None = None,
) -> TimeOffset:
    """Clock offset between a survey and a base record from their short-period variations.

    Both records are high-passed (minus a running mean over ``highpass_s``), the base's high-pass
    is interpolated to the survey times shifted by each trial lag, and the lag of the largest
    Pearson correlation is refined with a parabola through the peak and its neighbours. Use
    survey readings close to the base, where both sense the same external variations and the
    survey's own anomalies are small (common practice; cross-correlation delay estimation,
    Knapp and Carter 1976, IEEE Trans. Acoust. Speech Signal Process. 24:320).

    Parameters
    ----------
    base_time, base_value : arrays
    survey_time, survey_value : arrays
        Readings near the base (times increasing). They are split into contiguous segments
        (breaks longer than 5 sampling intervals); segments shorter than ``highpass_s`` are
        left out.
    highpass_s : float
    max_lag_s : float
    step_s : float, optional
        Lag step; default the base's median sampling interval.

    Returns
    -------
    TimeOffset
        NaN lag when fewer than 10 samples overlap.
    """
    epoch = time_epoch(base_time, survey_time)
    tb = to_seconds(base_time, epoch)
    vb = np.asarray(base_value, dtype=float)
    ts = to_seconds(survey_time, epoch)
    vs = np.asarray(survey_value, dtype=float)
    kb = np.isfinite(vb)
    ks = np.isfinite(vs)
    tb, vb, ts, vs = tb[kb], vb[kb], ts[ks], vs[ks]
    nan = TimeOffset(float("nan"), float("nan"), 0, np.zeros(0), np.zeros(0))
    if tb.size < 10 or ts.size < 10:
        return nan
    hb = highpass(tb, vb, highpass_s)
    # the survey record near a base comes in separate passes: high-pass each contiguous segment
    # on its own and keep only those at least highpass_s long (shorter passes carry more of
    # the survey's own anomalies than of the short-period external field)
    dt = np.diff(ts)
    cut = np.flatnonzero(dt > max(5.0 * float(np.median(dt)), 1.0)) + 1
    starts = np.concatenate([[0], cut])
    ends = np.concatenate([cut, [ts.size]])
    keep = np.zeros(ts.size, dtype=bool)
    hs = np.zeros(ts.size)
    for a, b in zip(starts, ends):  # loop over segments
        if ts[b - 1] - ts[a] >= highpass_s:
            keep[a:b] = True
            hs[a:b] = highpass(ts[a:b], vs[a:b], highpass_s)
    ts, hs = ts[keep], hs[keep]
    if ts.size < 10:
        return nan
    step = float(step_s) if step_s else float(np.median(np.diff(tb)))
    count = int(np.floor(max_lag_s / step))
    lags = np.arange(-count, count + 1) * step
    curve = np.full(lags.size, np.nan)
    used = 0
    for k, lag in enumerate(lags):  # loop over trial lags, vectorised over readings
        shifted = ts - lag
        inside = (shifted >= tb[0]) & (shifted <= tb[-1])
        if inside.sum() < 10:
            continue
        a = hs[inside] - hs[inside].mean()
        b = np.interp(shifted[inside], tb, hb)
        b = b - b.mean()
        denom = np.sqrt((a * a).sum() * (b * b).sum())
        if denom > 0:
            curve[k] = (a * b).sum() / denom
            used = max(used, int(inside.sum()))
    if not np.isfinite(curve).any():
        return nan
    k = int(np.nanargmax(curve))
    lag = float(lags[k])
    if 0 < k < lags.size - 1 and np.isfinite(curve[k - 1]) and np.isfinite(curve[k + 1]):
        y0, y1, y2 = curve[k - 1], curve[k], curve[k + 1]
        denom = y0 - 2 * y1 + y2
        if denom < 0:
            lag += 0.5 * (y0 - y2) / denom * step
    return TimeOffset(lag, float(curve[k]), used, lags, curve)
