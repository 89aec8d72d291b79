"""ASEG-GDF2 point-located data: a ``.dat`` file of fixed-width records described by a ``.des`` file.

The layout follows the published ASEG-GDF2 standard (Australian Society of Exploration
Geophysicists, "ASEG-GDF2 - A standard for point located data exchange", Revision 4, 2004; from
memory of the standard's text):

* the ``.des`` file holds one ``DEFN`` record per field, in record order::

      DEFN 3 ST=RECD,RT=;MAG:F10.2:UNITS=nT,NULL=-99999.99,NAME=total magnetic intensity

  ``ST=RECD`` marks a record definition, ``RT=`` the record type (blank for plain data records;
  ``COMM`` for comment records), then ``;`` the field label, ``:`` the Fortran format
  (``An`` text, ``In`` integer, ``Fw.d`` / ``Ew.d`` / ``Dw.d`` real; a repeat count in front,
  ``3F10.2``, makes an array of that many columns, read here as ``LABEL_1`` ...), and ``:``
  comma-separated attributes (``NAME=``, ``UNITS=`` or ``UNIT=``, ``NULL=``). ``END DEFN`` ends
  the definitions;
* the ``.dat`` file holds the records, each field in its width, records of type ``COMM`` (and
  any other type than the data records') are skipped.

Null values become NaN. Units from the ``.des`` are converted through potfield's unit table
(:data:`potfield.config.UNIT_FACTORS`); ``[input.units]`` overrides them. Fortran's implied
decimal point (digits without a ``.`` read with ``Fw.d``) is not applied: ASEG-GDF2 files write
the point.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputDataError, format_rows
from ..units import COLUMN_QUANTITY, UNIT_FACTORS
from .delimited import is_text_column

#: Unit spellings met in descriptor files -> potfield's unit names (lower-cased keys).
UNIT_ALIASES = {
    "nt": "nT",
    "nanotesla": "nT",
    "nanoteslas": "nT",
    "gamma": "gamma",
    "gammas": "gamma",
    "ut": "uT",
    "pt": "pT",
    "mgal": "mGal",
    "milligal": "mGal",
    "milligals": "mGal",
    "um/s^2": "um/s^2",
    "um/s2": "um/s^2",
    "gu": "gu",
    "m/s^2": "m/s^2",
    "m/s2": "m/s^2",
    "cu": "cu",
    "m": "m",
    "metre": "m",
    "metres": "m",
    "meter": "m",
    "meters": "m",
    "ft": "ft",
    "feet": "ft",
    "km": "km",
}
_FORMAT = re.compile(r"^\s*(\d*)\s*([AIFEDaifed])\s*(\d+)(?:\.(\d+))?\s*$")
_ATTRIBUTE = re.compile(r"(?:^|,)\s*([A-Za-z_]+)\s*=\s*(.*?)\s*(?=,\s*[A-Za-z_]+\s*=|$)")


@dataclass
class Field_:
    """One column of the data records."""

    label: str
    kind: str  #: A, I, F, E or D
    start: int  #: 0-based character position in the record
    width: int
    decimals: int = 0
    units: str | None = None
    null: str | None = None
    description: str | None = None

    @property
    def numeric(self) -> bool:
        return self.kind != "A"


@dataclass
class Descriptor:
    """The data-record layout of a ``.des`` file."""

    path: Path
    record_type: str
    fields: list[Field_] = field(default_factory=list)

    def get(self, label: str) -> Field_ | None:
        for f in self.fields:
            if f.label == label:
                return f
        folded = [f for f in self.fields if f.label.casefold() == label.casefold()]
        return folded[0] if len(folded) == 1 else None


def descriptor_path(dat: Path) -> Path | None:
    """The ``.des`` beside a ``.dat`` (same stem, either case), or None."""
    dat = Path(dat)
    for suffix in (".des", ".DES", ".Des"):
        candidate = dat.with_suffix(suffix)
        if candidate.is_file():
            return candidate
    return None


def read_descriptor(path: Path) -> Descriptor:
    """Parse the ``DEFN`` records of a ``.des`` file into the data-record layout."""
    path = Path(path)
    types: dict[str, list[Field_]] = {}
    positions: dict[str, int] = {}
    text = path.read_text(encoding="latin-1").splitlines()
    for number, raw in enumerate(text, start=1):
        line = raw.strip()
        if not line.upper().startswith("DEFN"):
            continue
        head, _, rest = line.partition(";")
        found = re.search(r"RT\s*=\s*([^,;\s]*)", head, flags=re.IGNORECASE)
        if "ST=RECD" not in head.upper().replace(" ", "") or found is None:
            continue
        rtype = found.group(1).strip().upper()
        if rtype == "COMM":
            continue
        if rest.strip().upper().startswith("END DEFN"):
            continue
        parts = rest.split(":", 2)
        if len(parts) < 2:
            raise InputDataError(
                f"DEFN record at line {number} has no field format ('LABEL:F10.2')",
                file=path,
                fix="write LABEL:FORMAT[:ATTRIBUTES] after the ';'",
            )
        label, fmt = parts[0].strip(), parts[1].strip()
        match = _FORMAT.match(fmt)
        if not label or match is None:
            raise InputDataError(
                f"cannot read the field format '{fmt}' of '{label}' at line {number}",
                file=path,
                fix="use A4, I8, F10.2, E12.4 or D12.4 (with a repeat count, 3F10.2)",
            )
        attrs = (
            {k.upper(): v.strip().strip('"') for k, v in _ATTRIBUTE.findall(parts[2])}
            if len(parts) > 2
            else {}
        )
        count = int(match.group(1) or 1)
        kind, width, decimals = match.group(2).upper(), int(match.group(3)), int(match.group(4) or 0)
        start = positions.get(rtype, 0)
        for k in range(count):
            name = label if count == 1 else f"{label}_{k + 1}"
            types.setdefault(rtype, []).append(
                Field_(
                    label=name,
                    kind=kind,
                    start=start,
                    width=width,
                    decimals=decimals,
                    units=attrs.get("UNITS", attrs.get("UNIT")),
                    null=attrs.get("NULL"),
                    description=attrs.get("NAME"),
                )
            )
            start += width
        positions[rtype] = start
    if not types:
        raise InputDataError(
            "no DEFN field definitions found",
            file=path,
            fix="check that this is the ASEG-GDF2 descriptor (.des) of the data file",
        )
    rtype = max(types, key=lambda t: len(types[t]))
    return Descriptor(path=path, record_type=rtype, fields=types[rtype])


def _unit(f: Field_, canon: str, des: Path) -> str | None:
    """potfield's unit name for a field's UNITS attribute (None = no conversion)."""
    quantity = COLUMN_QUANTITY.get(canon)
    if quantity is None or not f.units:
        return None
    name = UNIT_ALIASES.get(f.units.strip().casefold().replace(" ", ""), f.units.strip())
    if name not in UNIT_FACTORS[quantity]:
        raise InputDataError(
            f"field {f.label} (mapped to {canon}) has units '{f.units}', not one potfield knows",
            file=des,
            key=f"input.units.{canon}",
            fix=f"declare its unit under [input.units] ({', '.join(UNIT_FACTORS[quantity])})",
        )
    return name


def read_gdf2(
    path: Path, *, columns: dict[str, str], missing_values=(), units=None, descriptor: Path | None = None
) -> tuple[pd.DataFrame, dict[str, str]]:
    """Read the mapped fields of an ASEG-GDF2 ``.dat`` file.

    Parameters
    ----------
    path : Path
        The ``.dat`` file.
    columns : dict
        Canonical name -> field label of the ``.des`` (``raw_*`` names for pass-through columns).
    missing_values : iterable of str
        Text meaning missing besides each field's ``NULL``.
    units : dict, optional
        ``[input.units]``: canonical name -> unit; these win over the ``.des`` UNITS.
    descriptor : Path, optional
        The ``.des`` file; default the one beside ``path``.

    Returns
    -------
    (pandas.DataFrame, dict)
        Canonical columns (text columns as stripped text, numeric ones as float with nulls as
        NaN), ``source_file`` and ``source_row`` (1-based line in the ``.dat``); and the unit of
        each mapped column with a unit, from the ``.des``, to pass to
        :func:`potfield.io.delimited.convert_units`.
    """
    path = Path(path)
    if not path.is_file():
        raise InputDataError("file not found", file=path, fix="check the file name in survey.toml")
    des = Path(descriptor) if descriptor else descriptor_path(path)
    if des is None or not des.is_file():
        raise InputDataError(
            "ASEG-GDF2 data file without its descriptor",
            file=path,
            fix=f"put {path.with_suffix('.des').name} beside it",
        )
    layout = read_descriptor(des)
    fields: dict[str, Field_] = {}
    for canon, label in columns.items():
        f = layout.get(label)
        if f is None:
            where = "input.keep_columns" if canon.startswith("raw_") else f"input.columns.{canon}"
            raise InputDataError(
                f"field '{label}' (mapped to {canon}) is not defined; its fields are: "
                f"{', '.join(x.label for x in layout.fields[:30])}",
                file=des,
                key=where,
                fix="use a field label of the .des file",
            )
        fields[canon] = f
    used = list(dict.fromkeys(f.label for f in fields.values()))
    by_label = {f.label: f for f in fields.values()}
    rt_width = max(len(layout.record_type), 4)
    colspecs = [(0, rt_width)] + [(by_label[u].start, by_label[u].start + by_label[u].width) for u in used]
    names = ["__rt"] + [f"f{i}" for i in range(len(used))]
    try:
        frame = pd.read_fwf(
            path,
            colspecs=colspecs,
            names=names,
            header=None,
            dtype=str,
            na_filter=False,
            skip_blank_lines=False,
            encoding="latin-1",
        )
    except (pd.errors.ParserError, UnicodeDecodeError) as err:
        raise InputDataError(
            f"cannot read the fixed-width records ({str(err).splitlines()[0]})",
            file=path,
            fix="check that the .dat matches its .des",
        ) from None
    rows = np.arange(len(frame), dtype=np.int64) + 1
    rt = frame["__rt"].str.strip().str.upper()
    values = frame[names[1:]]
    blank = (values.apply(lambda c: c.str.strip()) == "").all(axis=1).to_numpy() & (rt == "").to_numpy()
    if layout.record_type:
        keep = (rt == layout.record_type).to_numpy()
    else:
        keep = ~rt.str.startswith("COMM").to_numpy() & ~blank
    frame, rows = frame[keep].reset_index(drop=True), rows[keep]
    if frame.empty:
        raise InputDataError("no data records", file=path, fix="check that the right file is named")
    missing = {str(m).strip() for m in missing_values}
    out = pd.DataFrame(index=pd.RangeIndex(len(frame)))
    for canon, f in fields.items():
        text = frame[f"f{used.index(f.label)}"].str.strip()
        null = text.isin(missing) | (text == "")
        if f.null is not None:
            null |= text == f.null.strip()
        if f.numeric or not is_text_column(canon):
            number = pd.to_numeric(text.str.replace(r"[dD]", "E", regex=True), errors="coerce")
            bad = number.isna() & ~null
            if bad.any():
                raise InputDataError(
                    f"non-numeric value '{text[bad].iloc[0]}' in field {f.label} ({canon}) at line "
                    f"{format_rows(rows[bad.to_numpy()])}",
                    file=path,
                    fix="check that the .dat matches its .des (field widths)",
                )
            if f.null is not None:
                try:
                    null_value = float(f.null.replace("D", "E").replace("d", "e"))
                except ValueError:
                    null_value = None
                if null_value is not None:
                    tolerance = 0.5 * 10.0 ** -max(f.decimals, 0)
                    null |= (number - null_value).abs() <= tolerance
            if is_text_column(canon):
                out[canon] = text.where(~null).to_numpy()
            else:
                out[canon] = number.where(~null).to_numpy(dtype=float)
        else:
            out[canon] = text.where(~null).to_numpy()
    declared = {}
    for canon, f in fields.items():
        if units and canon in units:
            continue
        unit = _unit(f, canon, des)
        if unit is not None:
            declared[canon] = unit
    out["source_file"] = path.name
    out["source_row"] = rows
    return out, declared
