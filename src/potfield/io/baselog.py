"""Delimited base-station logs: times and total field of one ``[[diurnal.bases]]`` file.

The same reader (:mod:`potfield.io.delimited`), time layouts (:mod:`potfield.io.timefmt`) and
units as the survey files, plus what scalar base loggers write: decimal commas
(``decimal = ","``), a comment block above the header (``comment``) and a quality code per
sample (``[diurnal] base_quality_column`` / ``base_quality_accepted``): samples whose code is
not accepted are kept as missing (NaN), so the base cleaning treats them as gaps.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import ConfigError, InputDataError
from .delimited import convert_units, read_delimited, to_numeric
from .timefmt import DATE_DIRECTIVES, directives, parse_times


def read_delimited_base(
    path: Path,
    base,
    key: str,
    quality_column: str | None = None,
    accepted=(),
    encoding: str = "utf-8",
    factor: float = 1.0,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Read one delimited base file.

    Parameters
    ----------
    path : Path
    base : potfield.config.BaseStation
        Its ``columns`` (``time``, ``total_field``, optional ``date``), ``units``, ``delimiter``,
        ``skip_rows``, ``missing_values``, ``comment``, ``decimal`` and ``time``.
    key : str
        ``diurnal.bases[i]``, for messages.
    quality_column : str, optional
        Column of the quality code; None = no quality filtering.
    accepted : iterable of str
        Codes kept (compared as stripped text; ``1`` and ``1.0`` are different codes).

    Returns
    -------
    (times, values, rejected)
        datetime64[ns] UTC times, total field (nT; NaN where missing or rejected) and the number
        of samples rejected by their quality code.
    encoding : str
        Text encoding of the file (``[input] encoding``).
    factor : float
        Factor taking the file's total-field unit to nT (:func:`potfield.config.unit_factor`).
    """
    for name in ("time", "total_field"):
        if name not in base.columns:
            raise ConfigError(
                f"no base file column is mapped to '{name}'",
                key=f"{key}.columns.{name}",
                fix=f'add {name} = "<column>" under [diurnal.bases.columns]',
            )
    fmt = base.time.format
    day_given = bool(directives(fmt) & DATE_DIRECTIVES) if "%" in fmt else fmt == "iso"
    if not day_given and "date" not in base.columns and not base.time.date:
        raise ConfigError(
            f"time format '{fmt}' needs a date",
            key=f"{key}.time.date",
            fix='map a date column or set date = "YYYY-MM-DD" under [diurnal.bases.time]',
        )
    columns = dict(base.columns)
    if quality_column:
        if not accepted:
            raise ConfigError(
                "base_quality_column is set but no code is accepted",
                key="diurnal.base_quality_accepted",
                fix='list the accepted codes, e.g. base_quality_accepted = ["0", "1"]',
            )
        columns["quality"] = quality_column
    frame = read_delimited(
        path,
        columns=columns,
        delimiter=base.delimiter,
        skip_rows=base.skip_rows,
        missing_values=base.missing_values,
        comment=base.comment,
        decimal=base.decimal,
        encoding=encoding,
        encoding_key="input.encoding",
        columns_key=f"{key}.columns",
    )
    times = parse_times(frame, base.time, path, names=dict(base.columns), key=f"{key}.time")
    value = convert_units(to_numeric(frame, "total_field", path), factor)
    rejected = 0
    if quality_column:
        code = frame["quality"].astype("string").str.strip()
        good = code.isin([str(a).strip() for a in accepted]).fillna(False).to_numpy(dtype=bool)
        rejected = int((~good).sum())
        if not good.any():
            raise InputDataError(
                f"no sample has an accepted quality code in column '{quality_column}' "
                f"(accepted: {', '.join(map(str, accepted))}; found e.g. '{code.iloc[0]}')",
                file=path,
                key="diurnal.base_quality_accepted",
                fix="list the codes your logger writes for good samples",
            )
        value = np.where(good, value, np.nan)
    return times, np.asarray(value, dtype=float), rejected
