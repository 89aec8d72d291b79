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
  ``drift_l * (t - t0_l) + sum tare_k [t > T_k]``; the ``offset`` is reported apart.

References
----------
Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration:
Principles, Practices, and Applications. Cambridge University Press (chapter on gravity data
acquisition and processing: calibration, instrument height, tide, drift, loops and network
adjustment).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.linalg
import scipy.sparse
import scipy.sparse.csgraph

from ..errors import BadParameter, IllPosed, OutOfModelRange

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
]

#: Normal free-air vertical gradient of gravity (mGal/m), common practice value (Hinze et al. 2013).
FREE_AIR_GRADIENT = 0.3086

#: Scaled (unit-diagonal) normal-matrix inverse diagonal above which an unknown is undetermined.
_SINGULAR_LIMIT = 1.0e8


class CalibrationTableError(BadParameter):
    """The calibration (interval) table is malformed. ``table_row`` is its 1-based data row or
    None."""

    def __init__(self, message: str, *, row: int | None = None, hint: str | None = None):
        super().__init__(message, hint=hint)
        self.table_row = row


class CalibrationRangeError(OutOfModelRange):
    """Readings fall outside the calibration table; ``positions`` holds their 0-based indices."""

    def __init__(self, message: str, positions, *, hint: str | None = None):
        super().__init__(message, hint=hint)
        self.positions = np.asarray(positions, dtype=int)


class NetworkError(IllPosed):
    """The network cannot be solved (an untied part, an undetermined drift or tare)."""


# ------------------------------------------------------------------------------------------------
# Calibration
# ------------------------------------------------------------------------------------------------
def calibration_arrays(table) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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
        cols = [np.asarray(pd.to_numeric(pd.Series(table[lower[c]]), errors="coerce"), dtype=float)
                for c in ("counter", "mgal", "factor")]
    else:
        arr = np.asarray(table, dtype=float)
        if arr.ndim != 2 or arr.shape[1] != 3:
            raise CalibrationTableError("calibration table must have three columns",
                                        hint="give the columns counter, mgal, factor")
        cols = [arr[:, 0], arr[:, 1], arr[:, 2]]
    counter, mgal, factor = cols
    if counter.size == 0:
        raise CalibrationTableError("calibration table is empty", hint="add its rows")
    bad = ~(np.isfinite(counter) & np.isfinite(mgal) & np.isfinite(factor))
    if bad.any():
        row = int(np.flatnonzero(bad)[0]) + 1
        raise CalibrationTableError("calibration table value is missing or not a number", row=row,
                                    hint="write numbers in counter, mgal and factor")
    steps = np.diff(counter)
    if (steps <= 0).any():
        row = int(np.flatnonzero(steps <= 0)[0]) + 2
        raise CalibrationTableError("calibration table counter readings must increase", row=row,
                                    hint="sort the table by counter reading and remove duplicates")
    return counter, mgal, factor


def apply_calibration(counter, table) -> np.ndarray:
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
    i = np.clip(np.searchsorted(c_tab, np.where(finite, counter, c_tab[0]), side="right") - 1,
                0, c_tab.size - 1)
    out = m_tab[i] + (counter - c_tab[i]) * f_tab[i]
    out[~finite] = np.nan
    return out


def instrument_height_correction(instrument_height, free_air_gradient: float = FREE_AIR_GRADIENT):
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


def hours_since(time, origin) -> np.ndarray:
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


def loop_drift(time, value, is_base, loop_id, method: str = "linear", base_value=None,
               use=None) -> LoopDriftResult:
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
        One row per loop: ``loop``, ``t0`` (drift origin: first used reading), ``start``, ``end``,
        ``hours``, ``readings``, ``offset_mgal``, ``offset_sigma_mgal``, ``drift_rate_mgal_per_h``,
        ``drift_rate_sigma_mgal_per_h``, ``drift_estimated``, ``closure_mgal`` (drift accumulated
        over the loop: rate x hours), ``max_abs_residual_mgal``.
    tares : pandas.DataFrame
        ``time``, ``step_mgal``, ``sigma_mgal``, ``estimated`` (False: not determinable, e.g. it
        falls between loops, where the loop offsets absorb it).
    residuals : numpy.ndarray
        Observed minus modelled reading (mGal) for every reading used; NaN for the others.
    drift : numpy.ndarray
        ``drift_l (t - t0_l) + sum tare_k [t > T_k]`` at every reading (mGal; NaN where the loop
        has no estimate).
    offset : numpy.ndarray
        ``offset_l`` at every reading (mGal).
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


def _normalise_bases(bases) -> dict[str, tuple[float, float | None]]:
    out = {}
    for name, spec in dict(bases).items():
        if isinstance(spec, (tuple, list)):
            g, sigma = float(spec[0]), (None if len(spec) < 2 or spec[1] is None else float(spec[1]))
        else:
            g, sigma = float(spec), None
        if sigma is not None and not sigma > 0:
            raise BadParameter(f"base '{name}': sigma must be positive, not {sigma}",
                               hint="give a sigma > 0, or none to hold the base fixed")
        out[str(name)] = (g, sigma)
    return out


def network_adjustment(station, time, value, loop, bases, *, tares=(), reading_sigma=0.01,
                       use=None, estimate_drift: bool = True) -> NetworkResult:
    """Least-squares adjustment of a relative gravity network with loop drift and tares.

    Every used reading gives one observation equation::

        value_i = g_s(i) + offset_l(i) + drift_l(i) * (t_i - t0_l(i)) + sum_k tare_k [t_i > T_k]

    with unknown station gravities ``g_s``, a reading level ``offset_l`` and a linear drift rate
    ``drift_l`` per loop, and a step ``tare_k`` at each given tare time. The datum (gravity is
    known only up to a constant otherwise) comes from the absolute bases: a base without sigma is
    held fixed (its unknown removed), a base with sigma adds the weighted pseudo-observation
    ``g_base = G_base``. The weighted normal equations are solved after eliminating the station
    unknowns, whose block is diagonal (each reading sees one station): a Cholesky factorisation
    of the reduced matrix over the loop levels, drifts and tares (scaled to unit diagonal), then
    back-substitution, so the cost grows only linearly with the number of stations.
    Standard deviations are ``sigma0 * sqrt(diag(N^-1))`` with the a posteriori ``sigma0``
    (the a priori 1 when there is no redundancy). Hinze, von Frese and Saad (2013).

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
        Times of allowed tares (steps); a reading exactly at a tare time is before the step.
    reading_sigma : float or array_like
        A priori standard deviation of a reading (mGal); sets the weights ``1 / sigma**2``.
    use : array_like of bool, optional
        Readings to use (default: every finite value). The others get drift and offset but no
        residual.
    estimate_drift : bool
        False: no drift unknowns (offsets and tares only).

    Returns
    -------
    NetworkResult

    Raises
    ------
    NetworkError
        A base never occupied by a used reading, loops not tied to any base, or unknowns that
        the readings do not determine (named in the message).

    References
    ----------
    Hinze, W. J., von Frese, R. R. B. and Saad, A. H. (2013). Gravity and Magnetic Exploration:
    Principles, Practices, and Applications. Cambridge University Press.
    """
    station = np.asarray(station, dtype=object).astype(str)
    time = np.asarray(time).astype("datetime64[ns]")
    value = np.asarray(value, dtype=float)
    n = value.size
    loop = np.asarray(loop, dtype=object)
    use = (np.ones(n, dtype=bool) if use is None else np.asarray(use, dtype=bool)) & np.isfinite(value)
    sig = np.broadcast_to(np.asarray(reading_sigma, dtype=float), (n,))
    use &= np.isfinite(sig) & (sig > 0)
    bases = _normalise_bases(bases)
    warnings: list[str] = []
    if not bases:
        raise NetworkError("no absolute base given",
                           hint="add at least one base with its absolute gravity")
    used = np.flatnonzero(use)
    if used.size == 0:
        raise NetworkError("no usable reading to adjust", hint="check the flags and readings")

    # --- indexing ---------------------------------------------------------------------------
    st_codes, st_names = pd.factorize(pd.Series(station), sort=True)
    lp_codes, lp_names = pd.factorize(pd.Series(loop), sort=False)
    st_names = np.asarray(st_names, dtype=object)
    n_st, n_lp = st_names.size, len(lp_names)
    occupations = np.bincount(st_codes[used], minlength=n_st)
    name_to_code = {name: i for i, name in enumerate(st_names)}
    for name in bases:
        if name not in name_to_code or occupations[name_to_code[name]] == 0:
            raise NetworkError(f"base '{name}' is never occupied by a usable reading",
                               hint="check the station id of the base, or its flagged readings")
    base_code = np.array([name_to_code[b] for b in bases], dtype=int)
    base_g = np.array([bases[b][0] for b in bases])
    base_sigma = np.array([np.nan if bases[b][1] is None else bases[b][1] for b in bases])
    fixed_mask = np.zeros(n_st, dtype=bool)
    fixed_mask[base_code[np.isnan(base_sigma)]] = True
    fixed_g = np.full(n_st, np.nan)
    fixed_g[base_code] = base_g

    # --- connectivity: every loop/station component needs a base ------------------------------
    lp_used = np.bincount(lp_codes[used], minlength=n_lp)
    graph = scipy.sparse.coo_matrix(
        (np.ones(used.size), (st_codes[used], n_st + lp_codes[used])), shape=(n_st + n_lp,) * 2)
    _, comp = scipy.sparse.csgraph.connected_components(graph, directed=False)
    tied = np.zeros(comp.max() + 1, dtype=bool)
    tied[comp[base_code]] = True
    untied = [str(lp_names[k]) for k in range(n_lp) if lp_used[k] and not tied[comp[n_st + k]]]
    if untied:
        shown = ", ".join(untied[:5]) + (f" (and {len(untied) - 5} more)" if len(untied) > 5 else "")
        raise NetworkError(
            f"loop(s) {shown} share no station with any base or tied loop",
            hint="occupy a base or an already tied station in each loop, or add a base",
        )

    # --- loop times ---------------------------------------------------------------------------
    t_origin = time[used].min()
    hours = hours_since(time, t_origin)
    t0 = np.full(n_lp, np.nan)
    t_end = np.full(n_lp, np.nan)
    start = np.full(n_lp, np.datetime64("NaT"), dtype="datetime64[ns]")
    end = start.copy()
    for k in range(n_lp):
        sel = used[lp_codes[used] == k]
        if sel.size:
            t0[k] = hours[sel].min()
            t_end[k] = hours[sel].max()
            start[k] = time[sel].min()
            end[k] = time[sel].max()
    drift_on = np.zeros(n_lp, dtype=bool)
    if estimate_drift:
        for k in range(n_lp):
            sel = used[lp_codes[used] == k]
            if np.unique(hours[sel]).size >= 2:
                drift_on[k] = True
            elif sel.size:
                warnings.append(f"loop {lp_names[k]}: readings at one time only, no drift estimated")

    # --- tares: a step is determinable only when some loop has readings on both sides -------
    tare_times = np.array([np.datetime64(t, "ns") for t in tares], dtype="datetime64[ns]")
    tare_hours = hours_since(tare_times, t_origin) if tare_times.size else np.zeros(0)
    tare_on = np.zeros(tare_hours.size, dtype=bool)
    for j, th in enumerate(tare_hours):
        after = hours[used] > th
        both = (np.bincount(lp_codes[used][after], minlength=n_lp) > 0) & (
            np.bincount(lp_codes[used][~after], minlength=n_lp) > 0)
        tare_on[j] = bool(both.any())
        if not tare_on[j]:
            warnings.append(f"tare at {tare_times[j]} falls between loops: the loop offsets "
                            "absorb it, no step estimated")

    # --- unknowns -----------------------------------------------------------------------------
    st_col = np.full(n_st, -1)
    free_st = np.flatnonzero(~fixed_mask & (occupations > 0))
    st_col[free_st] = np.arange(free_st.size)
    nxt = free_st.size
    off_col = np.full(n_lp, -1)
    lp_has = np.flatnonzero(lp_used > 0)
    off_col[lp_has] = nxt + np.arange(lp_has.size)
    nxt += lp_has.size
    dr_col = np.full(n_lp, -1)
    dr_on = np.flatnonzero(drift_on)
    dr_col[dr_on] = nxt + np.arange(dr_on.size)
    nxt += dr_on.size
    ta_col = np.full(tare_hours.size, -1)
    ta_on = np.flatnonzero(tare_on)
    ta_col[ta_on] = nxt + np.arange(ta_on.size)
    n_unk = nxt + ta_on.size
    names = ([f"station {st_names[s]}" for s in free_st] + [f"loop {lp_names[k]} offset" for k in lp_has]
             + [f"loop {lp_names[k]} drift" for k in dr_on]
             + [f"tare at {tare_times[j]}" for j in ta_on])

    # --- design matrix (sparse, by blocks; no loop over readings) -----------------------------
    m = used.size
    r_idx = np.arange(m)
    s_u, l_u, h_u = st_codes[used], lp_codes[used], hours[used]
    rows, cols, vals = [], [], []
    free_r = st_col[s_u] >= 0
    rows.append(r_idx[free_r]); cols.append(st_col[s_u][free_r]); vals.append(np.ones(free_r.sum()))
    rows.append(r_idx); cols.append(off_col[l_u]); vals.append(np.ones(m))
    dr_r = dr_col[l_u] >= 0
    rows.append(r_idx[dr_r]); cols.append(dr_col[l_u][dr_r]); vals.append((h_u - t0[l_u])[dr_r])
    for j in ta_on:
        after = np.flatnonzero(h_u > tare_hours[j])
        rows.append(after); cols.append(np.full(after.size, ta_col[j])); vals.append(np.ones(after.size))
    # Free stations are solved relative to the mean base gravity (better conditioned sums).
    g_ref = float(base_g.mean())
    y = value[used] - np.where(fixed_mask[s_u], fixed_g[s_u], g_ref)
    w = 1.0 / sig[used] ** 2
    weighted = np.flatnonzero(~np.isnan(base_sigma))
    if weighted.size:
        rows.append(m + np.arange(weighted.size)); cols.append(st_col[base_code[weighted]])
        vals.append(np.ones(weighted.size))
        y = np.concatenate([y, base_g[weighted] - g_ref])
        w = np.concatenate([w, 1.0 / base_sigma[weighted] ** 2])
    n_obs = y.size
    A = scipy.sparse.csr_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(n_obs, n_unk))

    x, qdiag = _solve_normal(A, w, y, names, free_st.size)
    v = y - A @ x  # residuals, observed minus modelled
    dof = int(n_obs - n_unk)
    sigma0 = float(np.sqrt(np.sum(w * v**2) / dof)) if dof > 0 else float("nan")
    scale = sigma0 if dof > 0 else 1.0
    sd = scale * np.sqrt(qdiag)

    # --- unpack -------------------------------------------------------------------------------
    g = np.full(n_st, np.nan)
    g_sd = np.full(n_st, np.nan)
    g[free_st], g_sd[free_st] = g_ref + x[st_col[free_st]], sd[st_col[free_st]]
    g[fixed_mask], g_sd[fixed_mask] = fixed_g[fixed_mask], 0.0
    is_base = np.zeros(n_st, dtype=bool)
    is_base[base_code] = True
    stations = pd.DataFrame({"gravity": g, "sigma_mgal": g_sd, "occupations": occupations,
                             "fixed": fixed_mask, "base": is_base},
                            index=pd.Index(st_names, name="station"))
    offset_l = np.full(n_lp, np.nan)
    offset_sd = np.full(n_lp, np.nan)
    offset_l[lp_has], offset_sd[lp_has] = x[off_col[lp_has]], sd[off_col[lp_has]]
    rate = np.where(lp_used > 0, 0.0, np.nan)
    rate_sd = np.full(n_lp, np.nan)
    rate[dr_on], rate_sd[dr_on] = x[dr_col[dr_on]], sd[dr_col[dr_on]]
    tare_step = np.full(tare_hours.size, np.nan)
    tare_sd = np.full(tare_hours.size, np.nan)
    tare_step[ta_on], tare_sd[ta_on] = x[ta_col[ta_on]], sd[ta_col[ta_on]]

    # Drift and offset at every reading (used or not).
    drift = rate[lp_codes] * (hours - t0[lp_codes])
    for j in ta_on:
        drift = drift + tare_step[j] * (hours > tare_hours[j])
    offset = offset_l[lp_codes]
    residuals = np.full(n, np.nan)
    residuals[used] = v[:m]
    max_res = np.full(n_lp, np.nan)
    absres = np.abs(v[:m])
    for k in lp_has:
        max_res[k] = absres[l_u == k].max()
    loops = pd.DataFrame({
        "loop": list(lp_names),
        "t0": start,
        "start": start,
        "end": end,
        "hours": t_end - t0,
        "readings": lp_used,
        "offset_mgal": offset_l,
        "offset_sigma_mgal": offset_sd,
        "drift_rate_mgal_per_h": rate,
        "drift_rate_sigma_mgal_per_h": rate_sd,
        "drift_estimated": drift_on,
        "closure_mgal": rate * (t_end - t0),
        "max_abs_residual_mgal": max_res,
    })
    tare_table = pd.DataFrame({"time": tare_times, "step_mgal": tare_step, "sigma_mgal": tare_sd,
                               "estimated": tare_on})
    return NetworkResult(stations=stations, loops=loops, tares=tare_table, residuals=residuals,
                         drift=drift, offset=offset, sigma0=sigma0, dof=dof, warnings=warnings)


def _solve_normal(A, w, y, names, n_station):
    """Solve the weighted normal equations by eliminating the station unknowns.

    Every observation involves exactly one station, so the station block of the normal matrix
    ``N = A^T W A`` is diagonal (``D``). The stations are eliminated (Schur complement
    ``S = C - B^T D^-1 B`` over the loop levels, drifts and tares), ``S`` is scaled to unit
    diagonal and Cholesky-factorised, and the stations are recovered by back-substitution. The
    diagonal of ``N^-1`` follows from the block inverse:
    ``Q_ss = D^-1 + D^-1 B S^-1 B^T D^-1``, ``Q_pp = S^-1``. Cost grows with the number of loop
    parameters cubed and only linearly with the number of stations. An unknown whose scaled
    inverse diagonal exceeds ``_SINGULAR_LIMIT`` is not determined by the data; the error names it.
    """
    ns = int(n_station)
    N = (A.T @ A.multiply(w[:, None]).tocsr()).tocsr()
    b = np.asarray(A.T @ (w * y)).ravel()
    d = np.asarray(N.diagonal())
    if (d <= 0).any():
        bad = [names[i] for i in np.flatnonzero(d <= 0)]
        raise NetworkError(*_undetermined(bad))
    dinv = 1.0 / d[:ns]
    B = N[:ns, ns:].tocsc()
    M = scipy.sparse.diags(dinv) @ B  # D^-1 B, sparse (stations x loop parameters)
    S = N[ns:, ns:].toarray() - (B.T @ M).toarray()
    rhs = b[ns:] - M.T @ b[:ns]
    p = S.shape[0]
    sdiag = np.diag(S).copy()
    ok = bool((sdiag > 1e-14 * np.abs(d[ns:]).max()).all())
    if ok:
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
        raise NetworkError(*_undetermined(_null_names(S, M, names, ns)))
    s_inv = inv_s * sc[:, None] * sc[None, :]
    x_p = s_inv @ rhs
    x_s = dinv * b[:ns] - M @ x_p
    q_p = np.diag(s_inv)
    q_s = dinv + np.asarray(M.multiply(M @ s_inv).sum(axis=1)).ravel()
    return np.concatenate([x_s, x_p]), np.concatenate([q_s, q_p])


def _null_names(S, M, names, ns) -> list[str]:
    """Names of the unknowns in the null space of the reduced normal matrix."""
    scale = np.sqrt(np.maximum(np.abs(np.diag(S)), 1e-300))
    evals, evecs = np.linalg.eigh(S / scale[:, None] / scale[None, :])
    null = evecs[:, evals < 1.0e-10 * max(evals.max(), 1.0)]
    if null.size == 0:
        null = evecs[:, :1]
    null_p = null / scale[:, None]
    full = np.vstack([-(M @ null_p), null_p])
    weight = np.abs(full).max(axis=1)
    return [names[i] for i in np.flatnonzero(weight > 0.1 * weight.max())]


def _undetermined(bad):
    """Message (positional) of a :class:`NetworkError` for undetermined unknowns."""
    shown = ", ".join(bad[:6]) + (f" (and {len(bad) - 6} more)" if len(bad) > 6 else "")
    what = f": {shown}" if shown else ""
    return (f"the readings do not determine every unknown of the network adjustment{what} "
            "(fix: reoccupy stations within each loop, since a drift needs a repeat; tie each loop "
            "to a base; or remove tares that no loop spans)",)
