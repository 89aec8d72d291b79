"""Relative gravity surveys: calibration, instrument height, loop drift and network adjustment.

A relative gravimeter measures gravity differences. Its reading (counter units for a spring
meter) is turned into milligals with the meter's calibration (interval) table, brought from the
sensor down to the station mark, freed of the Earth tide (``potfield.fields.gravity.tides``) and then of
the instrument drift, which is found from repeated occupations of bases and stations. The final
values are tied to absolute gravity at one or more bases.

Everything here works on plain numpy arrays (times as ``datetime64``); nothing reads files.

Conventions
-----------
* Times are ``numpy.datetime64`` (timezone-naive, meaning UTC). Drift rates are in mGal/h.
* The model of a reading (after calibration, instrument height and tide corrections) at station
  ``s`` in loop ``l`` at time ``t`` is::

      value = g_s + offset_l + drift_l * (t - t0_l) + sum_k tare_k * [t > T_k] + noise

  ``g_s`` is the gravity at the station mark, ``offset_l`` the reading level of the loop (the
  meter's arbitrary zero, mGal), ``drift_l`` its drift rate, ``t0_l`` the loop's first reading and
  ``tare_k`` a step (tare) at time ``T_k``. "Drift" below is the time-varying part
  ``drift_l * (t - t0_l) + sum tare_k [t > T_k]``; the ``offset`` is reported apart. In the
  network adjustment a tare cuts the meter's record: each piece of a loop between tares (a
  segment) has its own level, so ``offset_l + sum tare_k`` is one unknown per segment, tied to
  the others only through the stations they share.

References
----------
Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration:
Principles, Practices, and Applications. Cambridge University Press (chapter on gravity data
acquisition and processing: calibration, instrument height, tide, drift, loops and network
adjustment).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.sparse
import scipy.sparse.csgraph

from ..errors import BadParameter, IllPosed, OutOfModelRange

if TYPE_CHECKING:
    from collections.abc import Iterable, Mapping

    from numpy.typing import ArrayLike

__all__ = [
    "FREE_AIR_GRADIENT",
    "CalibrationRangeError",
    "CalibrationTableError",
    "NetworkError",
    "LoopDriftResult",
    "NetworkResult",
    "calibration_arrays",
    "apply_calibration",
    "instrument_height_correction",
    "hours_since",
    "loop_drift",
    "network_adjustment",
    "detect_steps",
    "STEP_LIMIT_MGAL",
    "STEP_RATE_ALLOWANCE",
]

#: Normal free-air vertical gradient of gravity (mGal/m), common practice value (Hinze et al. 2013).
FREE_AIR_GRADIENT = 0.3086

#: Scaled (unit-diagonal) normal-matrix inverse diagonal above which an unknown is undetermined.
_SINGULAR_LIMIT = 1.0e8


class CalibrationTableError(BadParameter):
    """The calibration (interval) table is malformed. ``table_row`` is its 1-based data row or
    None."""

    def __init__(self, message: str, *, row: int | None = None, hint: str | None = None) -> None:
        super().__init__(message, hint=hint)
        self.table_row = row


class CalibrationRangeError(OutOfModelRange):
    """Readings fall outside the calibration table; ``positions`` holds their 0-based indices."""

    def __init__(self, message: str, positions: ArrayLike, *, hint: str | None = None) -> None:
        super().__init__(message, hint=hint)
        self.positions = np.asarray(positions, dtype=int)


class NetworkError(IllPosed):
    """The network cannot be solved (an untied part, an undetermined drift or tare)."""


# ------------------------------------------------------------------------------------------------
# Calibration
# ------------------------------------------------------------------------------------------------
def calibration_arrays(
    table: pd.DataFrame | dict[str, ArrayLike] | ArrayLike,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counter readings, milligal values and interval factors of a calibration table.

    Parameters
    ----------
    table : pandas.DataFrame, mapping or array of shape (n, 3)
        Columns ``counter``, ``mgal`` and ``factor`` (case-insensitive), or three columns in that
        order. Counter readings must increase strictly.

    Returns
    -------
    counter, mgal, factor : numpy.ndarray
        One value per row of the table.

    Raises
    ------
    CalibrationTableError
        Missing columns, non-numeric values, fewer than one row, counters not increasing.
    """
    if isinstance(table, pd.DataFrame) or isinstance(table, dict):
        lower = {str(k).strip().lower(): k for k in table.keys()}
        missing = [c for c in ("counter", "mgal", "factor") if c not in lower]
        if missing:
            raise CalibrationTableError(
                f"calibration table has no column {', '.join(missing)}",
                hint="give the columns counter, mgal, factor (one row per interval)",
            )
        cols = [
            np.asarray(pd.to_numeric(pd.Series(table[lower[c]]), errors="coerce"), dtype=float)
            for c in ("counter", "mgal", "factor")
        ]
    else:
        arr = np.asarray(table, dtype=float)
        if arr.ndim != 2 or arr.shape[1] != 3:
            raise CalibrationTableError(
                "calibration table must have three columns", hint="give the columns counter, mgal, factor"
            )
        cols = [arr[:, 0], arr[:, 1], arr[:, 2]]
    counter, mgal, factor = cols
    if counter.size == 0:
        raise CalibrationTableError("calibration table is empty", hint="add its rows")
    bad = ~(np.isfinite(counter) & np.isfinite(mgal) & np.isfinite(factor))
    if bad.any():
        row = int(np.flatnonzero(bad)[0]) + 1
        raise CalibrationTableError(
            "calibration table value is missing or not a number",
            row=row,
            hint="write numbers in counter, mgal and factor",
        )
    steps = np.diff(counter)
    if (steps <= 0).any():
        row = int(np.flatnonzero(steps <= 0)[0]) + 2
        raise CalibrationTableError(
            "calibration table counter readings must increase",
            row=row,
            hint="sort the table by counter reading and remove duplicates",
        )
    return counter, mgal, factor


def apply_calibration(
    counter: ArrayLike, table: pd.DataFrame | dict[str, ArrayLike] | ArrayLike
) -> np.ndarray:
    """Convert spring-gravimeter counter readings to milligals with an interval table.

    A calibration table lists counter readings ``C_i`` (usually every 100 counter units), the
    milligal value ``M_i`` at each, and the factor ``F_i`` (mGal per counter unit) of the interval
    starting at ``C_i``. A reading ``c`` with ``C_i <= c < C_(i+1)`` is worth::

        mGal = M_i + (c - C_i) * F_i

    (common practice for spring meters; Hinze et al. 2013). The table covers readings from its
    first to its last counter value; a reading equal to the last counter gets its tabulated value.

    Parameters
    ----------
    counter : array_like
        Counter readings. NaN stays NaN.
    table : pandas.DataFrame, mapping or array of shape (n, 3)
        The calibration table, see :func:`calibration_arrays`.

    Returns
    -------
    numpy.ndarray
        Readings in mGal (on the meter's own arbitrary level).

    Raises
    ------
    CalibrationRangeError
        When a finite reading lies outside the table (its ``positions`` attribute lists them).

    References
    ----------
    Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration.
    Cambridge University Press.
    """
    c_tab, m_tab, f_tab = calibration_arrays(table)
    counter = np.asarray(counter, dtype=float)
    finite = np.isfinite(counter)
    outside = finite & ((counter < c_tab[0]) | (counter > c_tab[-1]))
    if outside.any():
        pos = np.flatnonzero(outside)
        raise CalibrationRangeError(
            f"{pos.size} counter reading(s) outside the calibration table "
            f"[{c_tab[0]:g}, {c_tab[-1]:g}] (first: {counter[pos[0]]:g})",
            positions=pos,
            hint="extend the calibration table to cover every reading",
        )
    # Interval index: the last i with C_i <= c (a reading equal to the last counter uses the
    # last row, which gives M_last exactly).
    i = np.clip(
        np.searchsorted(c_tab, np.where(finite, counter, c_tab[0]), side="right") - 1, 0, c_tab.size - 1
    )
    out = m_tab[i] + (counter - c_tab[i]) * f_tab[i]
    out[~finite] = np.nan
    return out


def instrument_height_correction(
    instrument_height: ArrayLike, free_air_gradient: float = FREE_AIR_GRADIENT
) -> np.ndarray:
    """Correction (mGal) that brings a reading from the sensor down to the station mark.

    Gravity decreases upwards by the free-air gradient, so a sensor ``h`` metres above the mark
    reads ``gradient * h`` less than the mark would: the correction ``+gradient * h`` is ADDED to
    the reading. ``h`` is positive when the sensor is above the mark (negative below it, e.g. a
    reading on a tripod in a pit).

    Parameters
    ----------
    instrument_height : array_like
        Height of the gravimeter sensor above the station mark (m).
    free_air_gradient : float
        Vertical gradient magnitude (mGal/m); 0.3086 is the normal value (common practice;
        Hinze et al. 2013).

    Returns
    -------
    numpy.ndarray
        The correction in mGal, to be added.

    References
    ----------
    Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration.
    Cambridge University Press.
    """
    return float(free_air_gradient) * np.asarray(instrument_height, dtype=float)


def hours_since(time: ArrayLike, origin: ArrayLike) -> np.ndarray:
    """Hours from ``origin`` to ``time`` (both datetime64-like), as float."""
    time = np.asarray(time).astype("datetime64[ns]")
    origin = np.asarray(origin).astype("datetime64[ns]")
    return (time - origin).astype("timedelta64[ns]").astype(np.int64) / 3.6e12


# ------------------------------------------------------------------------------------------------
# Loop drift from base repeats
# ------------------------------------------------------------------------------------------------
@dataclass
class LoopDriftResult:
    """Result of :func:`loop_drift`.

    Attributes
    ----------
    drift : numpy.ndarray
        Drift (mGal) at every reading, zero at its loop's first base occupation (NaN for a loop
        without any base reading). Subtract it from the readings.
    offset : numpy.ndarray
        The loop's reading level (mGal) at every reading: value minus base value at the first
        base occupation. ``value - drift - offset`` is gravity on the level of the base values.
    loops : pandas.DataFrame
        One row per loop: ``loop``, ``start``, ``end``, ``hours``, ``base_readings``,
        ``base_start``, ``base_end``, ``drift_rate_mgal_per_h`` (closure over the time between
        first and last base occupation), ``max_segment_rate_mgal_per_h`` (piecewise: steepest
        segment), ``closure_mgal`` (base misclosure: last minus first base occupation, before
        drift correction), ``max_base_residual_mgal`` (largest base repeat left after the drift
        model: the loop's residual closure), ``base_differences_mgal`` (successive base repeat
        differences, text) and ``offset_mgal``.
    """

    drift: np.ndarray
    offset: np.ndarray
    loops: pd.DataFrame


def _unique_mean(x, y):
    """Sorted unique ``x`` with the mean of ``y`` over equal ``x``."""
    ux, inverse = np.unique(x, return_inverse=True)
    uy = np.bincount(inverse, weights=y) / np.bincount(inverse)
    return ux, uy


def _interp_extrapolate(x, xp, fp):
    """Piecewise-linear interpolation through (xp, fp), extended linearly by the end segments."""
    out = np.interp(x, xp, fp)
    if xp.size >= 2:
        lo = x < xp[0]
        hi = x > xp[-1]
        out[lo] = fp[0] + (x[lo] - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0])
        out[hi] = fp[-1] + (x[hi] - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
    return out


def loop_drift(
    time: ArrayLike,
    value: ArrayLike,
    is_base: ArrayLike,
    loop_id: ArrayLike,
    method: str = "linear",
    base_value: ArrayLike | None = None,
    use: ArrayLike | None = None,
) -> LoopDriftResult:
    """Instrument drift per loop from repeated base readings.

    In each loop the drift is zero at the first base occupation. With ``method="linear"`` it
    grows linearly to the base misclosure at the last base occupation (the classic loop drift
    correction); with ``"piecewise"`` it runs linearly between successive base occupations,
    through every base repeat. Readings before the first or after the last base occupation are
    extrapolated with the end segment. Remove the tide first (Hinze et al. 2013).

    Parameters
    ----------
    time : array_like of datetime64
        Reading times.
    value : array_like
        Readings in mGal (calibrated, instrument height and tide corrected).
    is_base : array_like of bool
        True for readings at a base. All base readings of one loop must be at the same station,
        or their known gravity must be given in ``base_value``.
    loop_id : array_like
        Loop of every reading (any hashable labels).
    method : {"linear", "piecewise"}
        Drift model.
    base_value : array_like, optional
        Known gravity (mGal) of the base at each base reading, subtracted before the drift fit
        (lets a loop open at one base and close at another). Default: zero.
    use : array_like of bool, optional
        Readings allowed in the fit (e.g. not flagged). Default: all finite values.

    Returns
    -------
    LoopDriftResult

    References
    ----------
    Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration.
    Cambridge University Press.
    """
    if method not in ("linear", "piecewise"):
        raise BadParameter(f"method must be 'linear' or 'piecewise', not {method!r}")
    time = np.asarray(time).astype("datetime64[ns]")
    value = np.asarray(value, dtype=float)
    n = value.size
    is_base = np.asarray(is_base, dtype=bool)
    base_value = np.zeros(n) if base_value is None else np.asarray(base_value, dtype=float)
    use = np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)
    use = use & np.isfinite(value)
    codes, labels = pd.factorize(pd.Series(np.asarray(loop_id, dtype=object)), sort=False)
    if n == 0:
        return LoopDriftResult(np.zeros(0), np.zeros(0), pd.DataFrame())
    origin = time.min()
    hours = hours_since(time, origin)

    drift = np.full(n, np.nan)
    offset = np.full(n, np.nan)
    rows = []
    for k, label in enumerate(labels):
        idx = np.flatnonzero(codes == k)
        bidx = idx[is_base[idx] & use[idx] & np.isfinite(base_value[idx])]
        bidx = bidx[np.argsort(hours[bidx], kind="stable")]
        row = {
            "loop": label,
            "start": time[idx].min(),
            "end": time[idx].max(),
            "hours": float(hours[idx].max() - hours[idx].min()),
            "base_readings": int(bidx.size),
            "base_start": time[bidx[0]] if bidx.size else np.datetime64("NaT"),
            "base_end": time[bidx[-1]] if bidx.size else np.datetime64("NaT"),
            "drift_rate_mgal_per_h": np.nan,
            "max_segment_rate_mgal_per_h": np.nan,
            "closure_mgal": np.nan,
            "max_base_residual_mgal": np.nan,
            "base_differences_mgal": "",
            "offset_mgal": np.nan,
        }
        if bidx.size == 0:
            rows.append(row)
            continue
        level = value[bidx] - base_value[bidx]
        tb = hours[bidx]
        db = level - level[0]
        offset[idx] = level[0]
        row["offset_mgal"] = float(level[0])
        row["base_differences_mgal"] = " ".join(f"{d:+.4f}" for d in np.diff(level))
        span = tb[-1] - tb[0]
        if bidx.size == 1 or span <= 0:
            drift[idx] = 0.0
            rows.append(row)
            continue
        rate = db[-1] / span
        row["closure_mgal"] = float(db[-1])
        row["drift_rate_mgal_per_h"] = float(rate)
        if method == "linear":
            drift[idx] = rate * (hours[idx] - tb[0])
            model_b = rate * (tb - tb[0])
            row["max_segment_rate_mgal_per_h"] = float(rate)
        else:
            ux, uy = _unique_mean(tb, db)
            drift[idx] = _interp_extrapolate(hours[idx], ux, uy)
            model_b = _interp_extrapolate(tb, ux, uy)
            row["max_segment_rate_mgal_per_h"] = float(np.max(np.abs(np.diff(uy) / np.diff(ux))))
        row["max_base_residual_mgal"] = float(np.max(np.abs(db - model_b)))
        rows.append(row)
    return LoopDriftResult(drift=drift, offset=offset, loops=pd.DataFrame(rows))


# ------------------------------------------------------------------------------------------------
# Least-squares network adjustment
# ------------------------------------------------------------------------------------------------
@dataclass
class NetworkResult:
    """Result of :func:`network_adjustment`.

    Attributes
    ----------
    stations : pandas.DataFrame
        Indexed by station: ``gravity`` (mGal, on the datum of the bases), ``sigma_mgal``
        (a posteriori standard deviation; 0 for a fixed base), ``occupations`` (readings used),
        ``fixed`` (base held fixed), ``base`` (station given as a base).
    loops : pandas.DataFrame
        One row per drift unit (a loop; with ``tare_drift="restart"`` a segment of a loop):
        ``loop``, ``t0`` (drift origin: first used reading), ``start``, ``end``, ``hours``,
        ``readings``, ``segments`` (pieces the tares cut it into), ``offset_mgal`` (level of its
        first segment), ``offset_sigma_mgal``, ``drift_rate_mgal_per_h``,
        ``drift_rate_sigma_mgal_per_h``, ``drift_estimated``, ``closure_mgal`` (drift
        accumulated over the loop: rate x hours), ``max_abs_residual_mgal``; ``meter`` when the
        readings name their meters.
    tares : pandas.DataFrame
        One row per tare and loop it cuts: ``time``, ``loop`` ("" when it cuts none),
        ``step_mgal`` (level after minus level before, at the tare time), ``sigma_mgal``,
        ``estimated`` (False: not determinable, e.g. it falls between loops, where the loop
        offsets absorb it).
    segments : pandas.DataFrame
        One row per segment of the meter's record (a loop, or the piece of a loop between
        tares): ``segment``, ``meter``, ``loop``, ``start``, ``end``, ``readings``,
        ``offset_mgal``, ``offset_sigma_mgal``.
    residuals : numpy.ndarray
        Observed minus modelled reading (mGal) for every reading used; NaN for the others.
    drift : numpy.ndarray
        The time-varying part at every reading: ``drift_u (t - t0_u)`` plus the tare steps of
        its loop before ``t`` (mGal; NaN where the segment has no estimate).
    offset : numpy.ndarray
        The level of the loop's first segment at every reading (mGal).
    sigma0 : float
        A posteriori standard deviation of unit weight (NaN without redundancy).
    dof : int
        Degrees of freedom (observations minus unknowns).
    warnings : list of str
    """

    stations: pd.DataFrame
    loops: pd.DataFrame
    tares: pd.DataFrame
    residuals: np.ndarray
    drift: np.ndarray
    offset: np.ndarray
    sigma0: float
    dof: int
    warnings: list[str] = field(default_factory=list)
    segments: pd.DataFrame = field(default_factory=pd.DataFrame)


#: Dial (range) change / unrecorded tare detection: two consecutive readings of one station in
#: one segment of the meter's record that differ by more than this (mGal) plus
#: :data:`STEP_RATE_ALLOWANCE` times the hours between them are not drift. A spring meter's
#: drift stays within a few tenths of a mGal per hour (common practice; Hinze, von Frese and
#: Saad 2013), while a dial or range change moves the reading by tens of mGal.
STEP_LIMIT_MGAL = 1.0
#: Drift allowance (mGal/h) of the step detection, see :data:`STEP_LIMIT_MGAL`.
STEP_RATE_ALLOWANCE = 0.5


def _normalise_bases(
    bases: Mapping[str, float | tuple[float, float | None]],
) -> dict[str, tuple[float, float | None]]:
    out = {}
    for name, spec in dict(bases).items():
        if isinstance(spec, (tuple, list)):
            g, sigma = float(spec[0]), (None if len(spec) < 2 or spec[1] is None else float(spec[1]))
        else:
            g, sigma = float(spec), None
        if sigma is not None and not sigma > 0:
            raise BadParameter(
                f"base '{name}': sigma must be positive, not {sigma}",
                hint="give a sigma > 0, or none to hold the base fixed",
            )
        out[str(name)] = (g, sigma)
    return out


def _stamp(t: np.datetime64 | pd.Timestamp) -> str:
    """ISO text of a datetime64 to the second (no fraction)."""
    return str(np.datetime64(t, "s"))


def detect_steps(
    station: ArrayLike,
    time: ArrayLike,
    value: ArrayLike,
    segment: ArrayLike | None = None,
    use: ArrayLike | None = None,
    *,
    limit_mgal: float = STEP_LIMIT_MGAL,
    rate_allowance: float = STEP_RATE_ALLOWANCE,
) -> pd.DataFrame:
    """Steps in a meter's record that drift cannot explain (dial/range changes, lost tares).

    Consecutive readings of the same station within one segment of the meter's record (one
    loop between tares) should differ by the drift only, after the tide is removed. A change
    larger than ``limit_mgal + rate_allowance * hours`` is a step: a dial (range) change or a
    tare that the field notes missed (Hinze, von Frese and Saad 2013). The step happened
    somewhere between the two readings; the proposed tare time is the middle of the longest
    gap between consecutive readings of the segment in that interval (a heuristic: the meter
    is most often jolted in transport; the field notes should give the true time), after
    narrowing the interval to the overlap of all the steps found in the segment.

    Parameters
    ----------
    station, time, value : array_like
        Station ids, reading times (datetime64) and tide-corrected readings (mGal).
    segment : array_like, optional
        Segment label of each reading (default: one segment).
    use : array_like of bool, optional
        Readings to examine (default: every finite value).
    limit_mgal, rate_allowance : float
        Step threshold (mGal) and drift allowance (mGal/h).

    Returns
    -------
    pandas.DataFrame
        One row per step: ``segment``, ``station``, ``before``, ``after`` (times of the two
        readings), ``hours``, ``step_mgal`` (after minus before) and ``proposed_tare`` (time).
    """
    station = np.asarray(station, dtype=object).astype(str)
    time = np.asarray(time).astype("datetime64[ns]")
    value = np.asarray(value, dtype=float)
    n = value.size
    seg = (
        np.zeros(n, dtype=np.int64)
        if segment is None
        else pd.factorize(pd.Series(np.asarray(segment, dtype=object)), sort=False)[0]
    )
    use = (np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)) & np.isfinite(value)
    columns = ["segment", "station", "before", "after", "hours", "step_mgal", "proposed_tare"]
    idx = np.flatnonzero(use)
    if idx.size < 2:
        return pd.DataFrame(columns=columns)
    st = pd.factorize(pd.Series(station))[0]
    order = idx[np.lexsort((time[idx], st[idx], seg[idx]))]
    same = (seg[order][1:] == seg[order][:-1]) & (st[order][1:] == st[order][:-1])
    a, b = order[:-1][same], order[1:][same]
    hours = hours_since(time[b], time[a])
    step = value[b] - value[a]
    bad = np.abs(step) > limit_mgal + rate_allowance * np.abs(hours)
    rows = []
    seg_values = np.asarray(segment, dtype=object) if segment is not None else np.zeros(n, dtype=object)
    t_order = idx[np.lexsort((time[idx], seg[idx]))]
    a, b = a[bad], b[bad]
    # One step per segment explains all its flagged pairs when their intervals overlap: the
    # step lies in the intersection (latest "before", earliest "after").
    lo = pd.Series(time[a]).groupby(seg[a]).transform("max").to_numpy()
    hi = pd.Series(time[b]).groupby(seg[a]).transform("min").to_numpy()
    for i, j, t_lo, t_hi in zip(a, b, lo, hi):  # loop over the few steps found, not over readings
        if not t_lo < t_hi:
            t_lo, t_hi = time[i], time[j]
        inside = t_order[(seg[t_order] == seg[i]) & (time[t_order] >= t_lo) & (time[t_order] <= t_hi)]
        times = np.unique(time[inside])
        gaps = np.diff(times)
        k = int(np.argmax(gaps)) if gaps.size else 0
        proposed = times[k] + gaps[k] // 2 if gaps.size else time[i]
        rows.append(
            {
                "segment": seg_values[i],
                "station": station[i],
                "before": time[i],
                "after": time[j],
                "hours": float(hours_since(time[j], time[i])),
                "step_mgal": float(value[j] - value[i]),
                "proposed_tare": np.datetime64(proposed, "s"),
            }
        )
    return pd.DataFrame(rows, columns=columns)


class _Undetermined(Exception):
    """Internal: the normal matrix is singular; ``index`` lists the unknowns involved."""

    def __init__(self, index: Iterable[int]) -> None:
        super().__init__("undetermined")
        self.index = list(index)


def network_adjustment(
    station: ArrayLike,
    time: ArrayLike,
    value: ArrayLike,
    loop: ArrayLike,
    bases: Mapping[str, float | tuple[float, float | None]],
    *,
    tares: Iterable[np.datetime64 | str] = (),
    reading_sigma: ArrayLike = 0.01,
    use: ArrayLike | None = None,
    estimate_drift: bool = True,
    meter: ArrayLike | None = None,
    tare_drift: str = "continue",
) -> NetworkResult:
    """Least-squares adjustment of a relative gravity network with loop drift and tares.

    A tare (an abrupt step of the meter's reading level) splits the meter's record: every loop
    that has readings on both sides of a tare time is cut there into segments, and each
    segment gets its own reading level (offset). Every used reading gives one observation
    equation::

        value_i = g_s(i) + offset_seg(i) + drift_u(i) * (t_i - t0_u(i))

    with unknown station gravities ``g_s``, a level ``offset_seg`` per segment and a linear
    drift rate ``drift_u`` per loop (``tare_drift="continue"``: the drift runs on through a
    tare, which is a pure step) or per segment (``"restart"``: each segment also has its own
    drift). Segments are tied to each other and to the bases only through the stations they
    share, so a tare needs a station (or base) read on both sides of it; the tare's step is
    reported as the change of level at the tare time. The datum (gravity is known only up to a
    constant otherwise) comes from the absolute bases: a base without sigma is held fixed (its
    unknown removed), a base with sigma adds the weighted pseudo-observation ``g_base =
    G_base``. The weighted normal equations are solved after eliminating the station unknowns,
    whose block is diagonal (each reading sees one station): a Cholesky factorisation of the
    reduced matrix over the segment levels and drifts (scaled to unit diagonal), then
    back-substitution, so the cost grows only linearly with the number of stations. Standard
    deviations are ``sigma0 * sqrt(diag(N^-1))`` with the a posteriori ``sigma0`` (the a priori
    1 when there is no redundancy). Before the solution, consecutive readings of a station
    within a segment are compared (:func:`detect_steps`): a jump no drift explains (a dial or
    range change, a tare missing from ``tares``) stops the adjustment with the proposed tare
    time. Hinze, von Frese and Saad (2013).

    Parameters
    ----------
    station : array_like of str
        Station id of each reading.
    time : array_like of datetime64
        Reading times (UTC).
    value : array_like
        Readings in mGal (calibrated, instrument height and tide corrected).
    loop : array_like
        Loop label of each reading.
    bases : mapping
        ``station -> gravity`` (fixed) or ``station -> (gravity, sigma_mgal or None)``.
    tares : sequence of datetime64, optional
        Times of tares (steps); a reading exactly at a tare time is before the step. A tare
        cuts the record of every meter.
    reading_sigma : float or array_like
        A priori standard deviation of a reading (mGal); sets the weights ``1 / sigma**2``.
    use : array_like of bool, optional
        Readings to use (default: every finite value). The others get drift and offset but no
        residual.
    estimate_drift : bool
        False: no drift unknowns (segment levels only).
    meter : array_like of str, optional
        Meter (gravimeter) of each reading, when several meters share a survey: loops and
        segments are then per meter, and messages name the meter.
    tare_drift : {"continue", "restart"}
        Whether a loop's drift rate runs on through its tares or each segment has its own.

    Returns
    -------
    NetworkResult

    Raises
    ------
    NetworkError
        A base never occupied by a used reading, a loop or segment sharing no station with a
        base or a tied segment (named with its meter and time range), a jump in the readings
        that no drift explains (with the tare to add), or unknowns that the readings do not
        determine (named in the message).

    References
    ----------
    Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration:
    Principles, Practices, and Applications. Cambridge University Press.
    """
    if tare_drift not in ("continue", "restart"):
        raise ValueError(f"tare_drift must be 'continue' or 'restart', not {tare_drift!r}")
    station = np.asarray(station, dtype=object).astype(str)
    time = np.asarray(time).astype("datetime64[ns]")
    value = np.asarray(value, dtype=float)
    n = value.size
    loop = np.asarray(loop, dtype=object)
    named_meters = meter is not None
    meter = np.full(n, "", dtype=object) if meter is None else np.asarray(meter, dtype=object).astype(str)
    use = (np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)) & np.isfinite(value)
    sig = np.broadcast_to(np.asarray(reading_sigma, dtype=float), (n,))
    use &= np.isfinite(sig) & (sig > 0)
    bases = _normalise_bases(bases)
    warnings: list[str] = []
    if not bases:
        raise NetworkError("no absolute base given", hint="add at least one base with its absolute gravity")
    used = np.flatnonzero(use)
    if used.size == 0:
        raise NetworkError("no usable reading to adjust", hint="check the flags and readings")

    # --- indexing: stations, loops per meter ("units"), segments between tares -----------------
    st_codes, st_names = pd.factorize(pd.Series(station), sort=True)
    st_names = np.asarray(st_names, dtype=object)
    n_st = st_names.size
    lp_codes, lp_names = pd.factorize(pd.Series(loop), sort=False)
    mt_codes, mt_names = pd.factorize(pd.Series(meter), sort=False)
    unit_codes, unit_keys = pd.factorize(mt_codes.astype(np.int64) * len(lp_names) + lp_codes, sort=False)
    unit_keys = np.asarray(unit_keys, dtype=np.int64)
    unit_loop = [lp_names[k % len(lp_names)] for k in unit_keys]
    unit_meter = [str(mt_names[k // len(lp_names)]) for k in unit_keys]
    n_unit = len(unit_keys)

    occupations = np.bincount(st_codes[used], minlength=n_st)
    name_to_code = {name: i for i, name in enumerate(st_names)}
    for name in bases:
        if name not in name_to_code or occupations[name_to_code[name]] == 0:
            raise NetworkError(
                f"base '{name}' is never occupied by a usable reading",
                hint="check the station id of the base, or its flagged readings",
            )
    base_code = np.array([name_to_code[b] for b in bases], dtype=int)
    base_g = np.array([bases[b][0] for b in bases])
    base_sigma = np.array([np.nan if bases[b][1] is None else bases[b][1] for b in bases])
    fixed_mask = np.zeros(n_st, dtype=bool)
    fixed_mask[base_code[np.isnan(base_sigma)]] = True
    fixed_g = np.full(n_st, np.nan)
    fixed_g[base_code] = base_g

    t_origin = time[used].min()
    hours = hours_since(time, t_origin)
    tare_times = np.array([np.datetime64(t, "ns") for t in tares], dtype="datetime64[ns]")
    tare_hours = hours_since(tare_times, t_origin) if tare_times.size else np.zeros(0)
    tare_sort = np.argsort(tare_hours, kind="stable")
    tare_rank = np.empty(tare_sort.size, dtype=int)
    tare_rank[tare_sort] = np.arange(tare_sort.size)
    piece = np.searchsorted(tare_hours[tare_sort], hours, side="left")  # tares strictly before t
    seg_codes, seg_keys = pd.factorize(unit_codes.astype(np.int64) * (tare_hours.size + 1) + piece, sort=True)
    seg_keys = np.asarray(seg_keys, dtype=np.int64)
    seg_unit = seg_keys // (tare_hours.size + 1)
    seg_piece = seg_keys % (tare_hours.size + 1)
    n_seg = seg_keys.size
    seg_used = np.bincount(seg_codes[used], minlength=n_seg)
    per_seg = pd.DataFrame({"seg": seg_codes[used], "t": time[used]}).groupby("seg")["t"]
    seg_start = np.full(n_seg, np.datetime64("NaT"), dtype="datetime64[ns]")
    seg_end = seg_start.copy()
    first, last = per_seg.min(), per_seg.max()
    seg_start[first.index.to_numpy()] = first.to_numpy().astype("datetime64[ns]")
    seg_end[last.index.to_numpy()] = last.to_numpy().astype("datetime64[ns]")
    # Segments with used readings, numbered in time order within their loop.
    live = seg_used > 0
    unit_nseg = np.bincount(seg_unit[live], minlength=n_unit)
    seg_number = np.zeros(n_seg, dtype=int)
    for u in np.flatnonzero(unit_nseg > 1):  # loop over the loops cut by tares
        members = np.flatnonzero(live & (seg_unit == u))
        seg_number[members] = np.arange(1, members.size + 1)
    meter_text = (lambda u: f"meter {unit_meter[u]}: ") if named_meters else (lambda u: "")

    def seg_label(k):
        base = str(unit_loop[seg_unit[k]])
        return base if seg_number[k] == 0 else f"{base}#{seg_number[k]}"

    def seg_where(k):
        u = seg_unit[k]
        text = f"loop {unit_loop[u]}"
        if seg_number[k]:
            p = seg_piece[k]
            around = []
            if p > 0:
                around.append(f"after the tare at {_stamp(tare_hours_sorted_times[p - 1])}")
            if p < tare_hours.size and seg_number[k] < unit_nseg[u]:
                around.append(f"before the tare at {_stamp(tare_hours_sorted_times[p])}")
            text += f" segment {seg_number[k]} of {unit_nseg[u]} ({', '.join(around)})"
        return f"{meter_text(u)}{text}, readings {_stamp(seg_start[k])} to {_stamp(seg_end[k])}"

    tare_hours_sorted_times = tare_times[tare_sort]

    # --- a jump no drift explains: a dial (range) change or a tare not given ------------------
    steps = detect_steps(station, time, value, segment=seg_codes, use=use)
    if len(steps):
        s = steps.iloc[0]
        k = int(s["segment"])
        more = f" (and {len(steps) - 1} more)" if len(steps) > 1 else ""
        raise NetworkError(
            f"{seg_where(k)}: station {s['station']} changes by {s['step_mgal']:+.3f} mGal "
            f"between its readings at {_stamp(s['before'])} and {_stamp(s['after'])} "
            f"({s['hours']:.2f} h){more}, more than tide and drift explain: a dial (range) "
            "change or a tare",
            hint=f"add the tare to [drift] tares at the time it happened (proposed: "
            f"'{_stamp(s['proposed_tare'])}Z', {s['step_mgal']:+.2f} mGal), or flag the "
            "readings after the jump",
        )

    # --- connectivity: every segment/station component needs a base ---------------------------
    graph = scipy.sparse.coo_matrix(
        (np.ones(used.size), (st_codes[used], n_st + seg_codes[used])), shape=(n_st + n_seg,) * 2
    )
    _, comp = scipy.sparse.csgraph.connected_components(graph, directed=False)
    tied = np.zeros(comp.max() + 1, dtype=bool)
    tied[comp[base_code]] = True
    untied = [k for k in range(n_seg) if seg_used[k] and not tied[comp[n_st + k]]]
    if untied:
        whole = [k for k in untied if seg_number[k] == 0]
        if whole:
            shown = ", ".join(f"{meter_text(seg_unit[k])}{unit_loop[seg_unit[k]]}" for k in whole[:5])
            shown += f" (and {len(whole) - 5} more)" if len(whole) > 5 else ""
            raise NetworkError(
                f"loop(s) {shown} share no station with any base or tied loop "
                f"(first: readings {_stamp(seg_start[whole[0]])} to {_stamp(seg_end[whole[0]])})",
                hint="occupy a base or an already tied station in each loop, or add a base",
            )
        k = untied[0]
        more = f" (and {len(untied) - 1} more segment(s))" if len(untied) > 1 else ""
        raise NetworkError(
            f"{seg_where(k)} shares no station with a base or with another tied segment{more}: "
            "the tare leaves its level unknown",
            hint="after a tare reoccupy a station read before it (or a base), or remove the tare "
            "from [drift] tares if the meter did not jump",
        )

    # --- drift units --------------------------------------------------------------------------
    grp_of_seg = seg_unit.copy() if tare_drift == "continue" else np.arange(n_seg)
    n_grp = n_unit if tare_drift == "continue" else n_seg
    grp_codes = grp_of_seg[seg_codes]
    grp_used = np.bincount(grp_codes[used], minlength=n_grp)
    per_grp = pd.DataFrame({"g": grp_codes[used], "h": hours[used], "t": time[used]}).groupby("g")
    t0 = np.full(n_grp, np.nan)
    t_end = np.full(n_grp, np.nan)
    distinct = np.zeros(n_grp, dtype=int)
    agg = per_grp["h"].agg(["min", "max", "nunique"])
    t0[agg.index.to_numpy()] = agg["min"].to_numpy()
    t_end[agg.index.to_numpy()] = agg["max"].to_numpy()
    distinct[agg.index.to_numpy()] = agg["nunique"].to_numpy()
    grp_start = np.full(n_grp, np.datetime64("NaT"), dtype="datetime64[ns]")
    grp_end = grp_start.copy()
    tt = per_grp["t"].agg(["min", "max"])
    grp_start[tt.index.to_numpy()] = tt["min"].to_numpy().astype("datetime64[ns]")
    grp_end[tt.index.to_numpy()] = tt["max"].to_numpy().astype("datetime64[ns]")
    grp_label = (
        [str(unit_loop[u]) for u in range(n_unit)]
        if tare_drift == "continue"
        else [seg_label(k) for k in range(n_seg)]
    )
    grp_unit = np.arange(n_unit) if tare_drift == "continue" else seg_unit
    drift_on = np.zeros(n_grp, dtype=bool)
    if estimate_drift:
        drift_on = distinct >= 2
        for g in np.flatnonzero((grp_used > 0) & ~drift_on):
            warnings.append(f"loop {grp_label[g]}: readings at one time only, no drift estimated")
    # First live segment of each drift unit: its level is the unit's offset.
    live_idx = np.flatnonzero(live)
    grp_first = np.full(n_grp, n_seg)
    np.minimum.at(grp_first, grp_of_seg[live_idx], live_idx)  # segments are in time order per unit
    grp_first[grp_first == n_seg] = -1

    # --- tare steps: a tare cutting a loop is the change of level between its segments ---------
    tare_rows = []  # (tare index, unit, before segment, after segment)
    for j in range(tare_hours.size):  # loop over the tares
        rank = tare_rank[j]
        spanned = False
        for u in np.flatnonzero(unit_nseg > 1):  # loop over the loops cut by tares
            members = live_idx[seg_unit[live_idx] == u]
            before = members[seg_piece[members] <= rank]
            after = members[seg_piece[members] >= rank + 1]
            if not before.size or not after.size:
                continue
            spanned = True
            a, b = before[-1], after[0]
            if seg_piece[a] != rank:
                continue  # an earlier tare in the same gap between readings carries the step
            if seg_piece[b] != rank + 1:
                warnings.append(
                    f"loop {unit_loop[u]}: several tares fall between the same two "
                    f"readings; their sum is reported at {_stamp(tare_times[j])}"
                )
            tare_rows.append((j, u, a, b))
        if not spanned:
            tare_rows.append((j, -1, -1, -1))
            warnings.append(
                f"tare at {tare_times[j]} falls between loops: the loop offsets absorb it, no step estimated"
            )

    # --- unknowns -----------------------------------------------------------------------------
    st_col = np.full(n_st, -1)
    free_st = np.flatnonzero(~fixed_mask & (occupations > 0))
    st_col[free_st] = np.arange(free_st.size)
    nxt = free_st.size
    off_col = np.full(n_seg, -1)
    off_col[live_idx] = nxt + np.arange(live_idx.size)
    nxt += live_idx.size
    dr_col = np.full(n_grp, -1)
    dr_on = np.flatnonzero(drift_on)
    dr_col[dr_on] = nxt + np.arange(dr_on.size)
    n_unk = nxt + dr_on.size
    names = (
        [f"station {st_names[s]}" for s in free_st]
        + [f"loop {seg_label(k)} offset" for k in live_idx]
        + [f"loop {grp_label[g]} drift" for g in dr_on]
    )
    owner = np.r_[np.full(free_st.size, -1), seg_unit[live_idx], grp_unit[dr_on]].astype(int)

    # --- design matrix (sparse, by blocks; no loop over readings) -----------------------------
    m = used.size
    r_idx = np.arange(m)
    s_u, k_u, g_u, h_u = st_codes[used], seg_codes[used], grp_codes[used], hours[used]
    rows, cols, vals = [], [], []
    free_r = st_col[s_u] >= 0
    rows.append(r_idx[free_r])
    cols.append(st_col[s_u][free_r])
    vals.append(np.ones(free_r.sum()))
    rows.append(r_idx)
    cols.append(off_col[k_u])
    vals.append(np.ones(m))
    dr_r = dr_col[g_u] >= 0
    rows.append(r_idx[dr_r])
    cols.append(dr_col[g_u][dr_r])
    vals.append((h_u - t0[g_u])[dr_r])
    # Free stations are solved relative to the mean base gravity (better conditioned sums).
    g_ref = float(base_g.mean())
    y = value[used] - np.where(fixed_mask[s_u], fixed_g[s_u], g_ref)
    w = 1.0 / sig[used] ** 2
    weighted = np.flatnonzero(~np.isnan(base_sigma))
    if weighted.size:
        rows.append(m + np.arange(weighted.size))
        cols.append(st_col[base_code[weighted]])
        vals.append(np.ones(weighted.size))
        y = np.concatenate([y, base_g[weighted] - g_ref])
        w = np.concatenate([w, 1.0 / base_sigma[weighted] ** 2])
    n_obs = y.size
    A = scipy.sparse.csr_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n_obs, n_unk)
    )

    try:
        x, qdiag, q_p = _solve_normal(A, w, y, free_st.size)
    except _Undetermined as err:
        bad = [names[i] for i in err.index]
        cut = sorted({int(owner[i]) for i in err.index if owner[i] >= 0 and unit_nseg[owner[i]] > 1})
        if cut:
            u = cut[0]
            cuts = [_stamp(tare_times[j]) for j, uu, _, _ in tare_rows if uu == u]
            raise NetworkError(
                f"{meter_text(u)}loop {unit_loop[u]}: its drift and the tare(s) at "
                f"{', '.join(cuts)} cannot be told apart: no station read on both sides of the "
                f"tare ties its segments (undetermined: {', '.join(bad[:6])})",
                hint="after a tare reoccupy a station read before it (or a base), or remove the "
                "tare from [drift] tares if the meter did not jump",
            ) from None
        raise NetworkError(*_undetermined(bad)) from None
    v = y - A @ x  # residuals, observed minus modelled
    dof = int(n_obs - n_unk)
    sigma0 = float(np.sqrt(np.sum(w * v**2) / dof)) if dof > 0 else float("nan")
    scale = sigma0 if dof > 0 else 1.0
    sd = scale * np.sqrt(qdiag)
    ns = free_st.size

    # --- unpack -------------------------------------------------------------------------------
    g = np.full(n_st, np.nan)
    g_sd = np.full(n_st, np.nan)
    g[free_st], g_sd[free_st] = g_ref + x[st_col[free_st]], sd[st_col[free_st]]
    g[fixed_mask], g_sd[fixed_mask] = fixed_g[fixed_mask], 0.0
    is_base = np.zeros(n_st, dtype=bool)
    is_base[base_code] = True
    stations = pd.DataFrame(
        {"gravity": g, "sigma_mgal": g_sd, "occupations": occupations, "fixed": fixed_mask, "base": is_base},
        index=pd.Index(st_names, name="station"),
    )
    seg_off = np.full(n_seg, np.nan)
    seg_off_sd = np.full(n_seg, np.nan)
    seg_off[live_idx], seg_off_sd[live_idx] = x[off_col[live_idx]], sd[off_col[live_idx]]
    rate = np.where(grp_used > 0, 0.0, np.nan)
    rate_sd = np.full(n_grp, np.nan)
    rate[dr_on], rate_sd[dr_on] = x[dr_col[dr_on]], sd[dr_col[dr_on]]

    # Tare steps and their standard deviations (from the covariance of the reduced unknowns).
    tare_table = []
    for j, u, a, b in tare_rows:  # loop over the tares
        row = {
            "time": tare_times[j],
            "loop": "" if u < 0 else unit_loop[u],
            "step_mgal": np.nan,
            "sigma_mgal": np.nan,
            "estimated": u >= 0,
        }
        if named_meters:
            row["meter"] = "" if u < 0 else unit_meter[u]
        if u >= 0:
            c = np.zeros(n_unk)
            c[off_col[b]] += 1.0
            c[off_col[a]] -= 1.0
            for k, sign in ((b, 1.0), (a, -1.0)):
                gk = grp_of_seg[k]
                if drift_on[gk]:
                    c[dr_col[gk]] += sign * (tare_hours[j] - t0[gk])
            row["step_mgal"] = float(c @ x)
            cp = c[ns:]
            row["sigma_mgal"] = float(scale * np.sqrt(max(cp @ q_p @ cp, 0.0)))
        tare_table.append(row)
    tare_table = pd.DataFrame(
        tare_table,
        columns=["time", "loop", "step_mgal", "sigma_mgal", "estimated"]
        + (["meter"] if named_meters else []),
    )

    # Drift and offset at every reading (used or not): the unit's first segment is its level,
    # later segments differ by the tare steps.
    grp_level = np.where(grp_first >= 0, seg_off[np.maximum(grp_first, 0)], np.nan)
    offset = grp_level[grp_codes]
    drift = rate[grp_codes] * (hours - t0[grp_codes]) + (seg_off[seg_codes] - offset)
    residuals = np.full(n, np.nan)
    residuals[used] = v[:m]
    max_res = np.full(n_grp, np.nan)
    res_frame = pd.Series(np.abs(v[:m])).groupby(g_u).max()
    max_res[res_frame.index.to_numpy()] = res_frame.to_numpy()
    loops = pd.DataFrame(
        {
            "loop": grp_label,
            "t0": grp_start,
            "start": grp_start,
            "end": grp_end,
            "hours": t_end - t0,
            "readings": grp_used,
            "segments": np.bincount(grp_of_seg[live_idx], minlength=n_grp),
            "offset_mgal": grp_level,
            "offset_sigma_mgal": np.where(grp_first >= 0, seg_off_sd[np.maximum(grp_first, 0)], np.nan),
            "drift_rate_mgal_per_h": rate,
            "drift_rate_sigma_mgal_per_h": rate_sd,
            "drift_estimated": drift_on,
            "closure_mgal": rate * (t_end - t0),
            "max_abs_residual_mgal": max_res,
        }
    )
    if named_meters:
        loops.insert(1, "meter", [unit_meter[u] for u in grp_unit])
    segments = pd.DataFrame(
        {
            "segment": [seg_label(k) for k in live_idx],
            "meter": [unit_meter[seg_unit[k]] for k in live_idx],
            "loop": [unit_loop[seg_unit[k]] for k in live_idx],
            "start": seg_start[live_idx],
            "end": seg_end[live_idx],
            "readings": seg_used[live_idx],
            "offset_mgal": seg_off[live_idx],
            "offset_sigma_mgal": seg_off_sd[live_idx],
        }
    )
    return NetworkResult(
        stations=stations,
        loops=loops,
        tares=tare_table,
        residuals=residuals,
        drift=drift,
        offset=offset,
        sigma0=sigma0,
        dof=dof,
        warnings=warnings,
        segments=segments,
    )


def _solve_normal(A, w, y, n_station):
    """Solve the weighted normal equations by eliminating the station unknowns.

    Every observation involves exactly one station, so the station block of the normal matrix
    ``N = A^T W A`` is diagonal (``D``). The stations are eliminated (Schur complement
    ``S = C - B^T D^-1 B`` over the segment levels and drifts), ``S`` is scaled to unit
    diagonal and Cholesky-factorised, and the stations are recovered by back-substitution. The
    diagonal of ``N^-1`` follows from the block inverse:
    ``Q_ss = D^-1 + D^-1 B S^-1 B^T D^-1``, ``Q_pp = S^-1``. Cost grows with the number of loop
    parameters cubed and only linearly with the number of stations. An unknown whose scaled
    inverse diagonal exceeds ``_SINGULAR_LIMIT`` is not determined by the data: raises
    :class:`_Undetermined` with the unknowns involved.

    Returns
    -------
    x, qdiag, q_p
        The solution, the diagonal of ``N^-1`` and ``S^-1`` (covariance of the non-station
        unknowns, a priori scale).
    """
    ns = int(n_station)
    N = (A.T @ A.multiply(w[:, None]).tocsr()).tocsr()
    b = np.asarray(A.T @ (w * y)).ravel()
    d = np.asarray(N.diagonal())
    if (d <= 0).any():
        raise _Undetermined(np.flatnonzero(d <= 0))
    dinv = 1.0 / d[:ns]
    B = N[:ns, ns:].tocsc()
    M = scipy.sparse.diags(dinv) @ B  # D^-1 B, sparse (stations x loop parameters)
    S = N[ns:, ns:].toarray() - (B.T @ M).toarray()
    rhs = b[ns:] - M.T @ b[:ns]
    p = S.shape[0]
    sdiag = np.diag(S).copy()
    ok = bool((sdiag > 1e-14 * np.abs(d[ns:]).max()).all()) if p else True
    if ok and p:
        sc = 1.0 / np.sqrt(sdiag)
        Ss = S * sc[:, None] * sc[None, :]
        try:
            factor = scipy.linalg.cho_factor(Ss, lower=True, check_finite=False)
            inv_s = scipy.linalg.cho_solve(factor, np.eye(p), check_finite=False)
            qs = np.diag(inv_s)
            ok = bool(np.all(np.isfinite(qs)) and qs.max() < _SINGULAR_LIMIT and qs.min() > 0)
        except scipy.linalg.LinAlgError:
            ok = False
    if not ok:
        raise _Undetermined(_null_index(S, M, ns))
    if p:
        s_inv = inv_s * sc[:, None] * sc[None, :]
    else:
        s_inv = np.zeros((0, 0))
    x_p = s_inv @ rhs
    x_s = dinv * b[:ns] - M @ x_p
    q_p = np.diag(s_inv)
    q_s = dinv + np.asarray(M.multiply(M @ s_inv).sum(axis=1)).ravel()
    return np.concatenate([x_s, x_p]), np.concatenate([q_s, q_p]), s_inv


def _null_index(S: np.ndarray, M: scipy.sparse.spmatrix, ns: int) -> list[int]:
    """Indices of the unknowns in the null space of the reduced normal matrix."""
    scale = np.sqrt(np.maximum(np.abs(np.diag(S)), 1e-300))
    evals, evecs = np.linalg.eigh(S / scale[:, None] / scale[None, :])
    null = evecs[:, evals < 1.0e-10 * max(evals.max(), 1.0)]
    if null.size == 0:
        null = evecs[:, :1]
    null_p = null / scale[:, None]
    full = np.vstack([-(M @ null_p), null_p])
    weight = np.abs(full).max(axis=1)
    return [int(i) for i in np.flatnonzero(weight > 0.1 * weight.max())]


def _undetermined(bad):
    """Message (positional) of a :class:`NetworkError` for undetermined unknowns."""
    shown = ", ".join(bad[:6]) + (f" (and {len(bad) - 6} more)" if len(bad) > 6 else "")
    what = f": {shown}" if shown else ""
    return (
        f"the readings do not determine every unknown of the network adjustment{what} "
        "(fix: reoccupy stations within each loop, since a drift needs a repeat; tie each loop "
        "to a base; after a tare reoccupy a station read before it)",
    )
