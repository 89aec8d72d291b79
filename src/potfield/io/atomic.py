"""Atomic output: write to a temporary name in the same folder, then rename over the target."""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np


def _file_mode() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


#: Permissions of a normally created file (mkstemp makes 0600 files).
FILE_MODE = _file_mode()


@contextmanager
def atomic_path(path: Path | str):
    """Yield a temporary path beside ``path``; on success it is renamed to ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, FILE_MODE)
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def write_text(path: Path | str, text: str) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(path)


def write_bytes(path: Path | str, data: bytes) -> Path:
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return Path(path)


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    return str(value)


def write_json(path: Path | str, data) -> Path:
    return write_text(path, json.dumps(data, indent=2, sort_keys=True, default=_json_default) + "\n")


def write_csv(path: Path | str, table, **kwargs) -> Path:
    """CSV with ISO 8601 UTC times and full float precision (round-trip exact)."""
    kwargs.setdefault("index", False)
    kwargs.setdefault("float_format", "%.10g")
    with atomic_path(path) as tmp:
        table.to_csv(tmp, date_format="%Y-%m-%dT%H:%M:%S.%fZ", **kwargs)
    return Path(path)


#: Rows per piece when a large table is written (parquet row groups, CSV pieces): the writer
#: then holds one piece's Arrow copy, never a copy of the whole table. Streaming readings.csv
#: from the cache at 1e6 readings took about 540 MB above the process's base with pieces of
#: 2**19 rows, 310 MB with 2**17 (the reader also holds a row group of every cache file).
CHUNK_ROWS = 1 << 17


def write_parquet(path: Path | str, table, chunk_rows: int = CHUNK_ROWS) -> Path:
    """A pandas table as parquet, written ``chunk_rows`` rows at a time (one row group each)."""
    import pyarrow as pa

    pieces = (table.iloc[start : start + chunk_rows] for start in range(0, max(len(table), 1), chunk_rows))
    return write_parquet_pieces(path, pieces, pa.Schema.from_pandas(table, preserve_index=False))


def write_parquet_pieces(path: Path | str, pieces, schema=None) -> Path:
    """Pandas tables (an iterable of pieces of one table, same columns and types) as one parquet
    file, one row group per piece, holding one piece at a time; ``schema`` (default: the first
    piece's) is the whole table's Arrow schema. A single piece is written by pandas as it is."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    pieces = iter(pieces)
    first = next(pieces)
    second = next(pieces, None)
    with atomic_path(path) as tmp:
        if second is None:
            first.to_parquet(tmp, index=False)
            return Path(path)
        schema = schema or pa.Schema.from_pandas(first, preserve_index=False)
        with pq.ParquetWriter(tmp, schema) as writer:
            writer.write_table(pa.Table.from_pandas(first, schema=schema, preserve_index=False))
            del first
            piece = second
            while piece is not None:
                writer.write_table(pa.Table.from_pandas(piece, schema=schema, preserve_index=False))
                piece = next(pieces, None)
    return Path(path)
