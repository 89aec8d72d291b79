"""Readings-table files: the per-stage cache tables (parquet) and the residual table put together
from them.

The cache is columnar: ``out/cache/STAGE.parquet`` holds only the columns that stage added
(ingest: all of its columns). A table is put together by reading the columns wanted from the
files of the stages that added them and joining them by row position (stages never drop or
reorder readings). The column -> file map, the *layout*, comes from the manifest's
``columns_added`` (:func:`manifest_layout`). Everything is written atomically
(:mod:`potfield.io.atomic`). Used by the runner (:mod:`potfield.pipeline`) and by
``potfield report`` (:mod:`potfield.qc.report`).
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from pathlib import Path

import pandas as pd

from .atomic import CHUNK_ROWS, write_parquet, write_parquet_pieces

#: Text columns of the readings table held dictionary-encoded (pandas categorical, categories
#: sorted) from ingest on, in memory and in the cache: one small integer per reading instead of
#: a string (a few distinct values: file names, line names, traverse/tie).
CACHE_TEXT = ("line", "line_type", "source_file", "station", "loop")

#: Layout of the cache files, part of every stage's cache key: 2 = a stage's file holds only the
#: columns it added (1, before: the whole table), so files of the old layout are recomputed.
CACHE_LAYOUT = 2

#: Manifest statuses of stages whose results are current (their cache files reusable when the
#: stage key is unchanged).
CURRENT = ("done", "skipped")


class RowCountMismatch(ValueError):
    """Cache files of one table that do not hold the same number of rows."""


def dictionary_encode(table: pd.DataFrame) -> pd.DataFrame:
    """``table`` with its :data:`CACHE_TEXT` columns categorical (in place; returned)."""
    for name in CACHE_TEXT:
        if name in table and not isinstance(table[name].dtype, pd.CategoricalDtype):
            table[name] = table[name].astype("category")
    return table


def write_cache_table(path: Path, table: pd.DataFrame) -> Path:
    """A stage's columns as parquet (row groups written piece by piece), text columns
    dictionary-encoded."""
    return write_parquet(path, dictionary_encode(table.copy(deep=False)))


def manifest_layout(cache: Path, stages: dict, order: Iterable[str]) -> dict[str, Path]:
    """Column -> cache file of every column of the current stages in ``order``.

    ``stages`` is the manifest's ``stages`` mapping: a stage counts when its status is current
    (:data:`CURRENT`) and it recorded ``columns_added``; its file is ``cache/NAME.parquet``.
    The order of the result is the order of the table's columns (stage order, then the order
    each stage added them).
    """
    layout: dict[str, Path] = {}
    for name in order:
        entry = stages.get(name) or {}
        if entry.get("status") in CURRENT:
            for column in entry.get("columns_added") or ():
                layout[column] = Path(cache) / f"{name}.parquet"
    return layout


def cache_rows(layout: dict[str, Path]) -> int:
    """The number of rows of the table of ``layout``; :class:`RowCountMismatch` when its files
    differ (a stage dropped or added readings)."""
    import pyarrow.parquet as pq

    counts = {path: pq.ParquetFile(path).metadata.num_rows for path in dict.fromkeys(layout.values())}
    if len(set(counts.values())) > 1:
        listing = ", ".join(f"{p.name}: {n}" for p, n in counts.items())
        raise RowCountMismatch(f"cache files with different numbers of rows ({listing})")
    return next(iter(counts.values()), 0)


def _by_file(layout: dict[str, Path], columns: Sequence[str]) -> dict[Path, list[str]]:
    files: dict[Path, list[str]] = {}
    for name in columns:
        files.setdefault(layout[name], []).append(name)
    return files


def _sorted_categories(table: pd.DataFrame, categories: dict[str, list] | None = None) -> pd.DataFrame:
    """:data:`CACHE_TEXT` columns categorical with sorted categories (``categories``: the
    categories of the whole column, for a piece of it)."""
    dictionary_encode(table)
    for name in CACHE_TEXT:
        if name in table:
            column = table[name]
            wanted = (
                categories[name]
                if categories
                else sorted(column.cat.remove_unused_categories().cat.categories)
            )
            if list(column.cat.categories) != list(wanted):
                table[name] = column.cat.set_categories(wanted)
    return table


def read_cache_columns(layout: dict[str, Path], columns: Sequence[str] | None = None) -> pd.DataFrame:
    """The columns ``columns`` (default all, in layout order) of the table of ``layout``, read
    from the cache files (pyarrow, only those columns) and joined by row position.

    A table without columns still has its rows (a RangeIndex). :class:`RowCountMismatch` when
    the files differ in length.
    """
    import pyarrow.parquet as pq

    columns = list(layout) if columns is None else list(columns)
    rows = cache_rows(layout)
    parts = []
    for path, names in _by_file(layout, columns).items():
        parts.append(pq.read_table(path, columns=names).to_pandas(split_blocks=True))
    release_memory()
    table = pd.concat(parts, axis=1) if parts else pd.DataFrame(index=pd.RangeIndex(rows))
    return _sorted_categories(table[columns] if parts else table)


class _Rows:
    """Consecutive rows of some columns of one parquet file, ``n`` at a time."""

    def __init__(self, path: Path, columns: list[str], batch: int):
        import pyarrow.parquet as pq

        self._batches = pq.ParquetFile(path).iter_batches(batch_size=batch, columns=columns)
        self._held = None

    def take(self, n: int):
        import pyarrow as pa

        pieces, have = [], 0
        if self._held is not None:
            pieces, have, self._held = [self._held], self._held.num_rows, None
        while have < n:
            batch = next(self._batches, None)
            if batch is None:
                break
            pieces.append(pa.Table.from_batches([batch]))
            have += batch.num_rows
        table = pa.concat_tables(pieces) if len(pieces) > 1 else pieces[0]
        if table.num_rows > n:
            self._held = table.slice(n)
            table = table.slice(0, n)
        return table


def iter_cache_pieces(layout: dict[str, Path], chunk_rows: int = CHUNK_ROWS) -> Iterator[pd.DataFrame]:
    """The whole table of ``layout`` in pieces of ``chunk_rows`` rows, every column in layout
    order; text columns categorical with the categories of the whole column. Only one piece is
    in memory at a time."""
    import pyarrow.parquet as pq

    columns = list(layout)
    rows = cache_rows(layout)
    categories = {}
    for name in CACHE_TEXT:
        if name in layout:
            whole = pq.read_table(layout[name], columns=[name]).to_pandas()[name]
            categories[name] = sorted(whole.astype("category").cat.remove_unused_categories().cat.categories)
    if rows == 0:  # the header still goes out
        yield read_cache_columns(layout)
        return
    readers = {path: _Rows(path, names, chunk_rows) for path, names in _by_file(layout, columns).items()}
    for start in range(0, rows, chunk_rows):
        n = min(chunk_rows, rows - start)
        parts = []
        for reader in readers.values():
            part = reader.take(n)
            if part.num_rows != n:
                raise RowCountMismatch(f"a cache file ended before row {start + n}")
            parts.append(part.to_pandas(split_blocks=True))
        piece = pd.concat(parts, axis=1)[columns]
        piece.index = pd.RangeIndex(start, start + n)
        yield _sorted_categories(piece, categories)


def cache_float_places(layout: dict[str, Path], kind: str = "magnetic") -> dict[str, int | None]:
    """Decimals of every float column of the table of ``layout``, as
    :func:`potfield.io.columns.float_places` gives them for the whole table; a column whose
    decimals follow its values is read alone (one column in memory at a time)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from .columns import column_places, decimals_for

    places: dict[str, int | None] = {}
    schemas = {path: pq.read_schema(path) for path in dict.fromkeys(layout.values())}
    for name, path in layout.items():
        if not pa.types.is_floating(schemas[path].field(name).type):
            continue
        fixed = decimals_for(name, kind)
        if fixed is not None:
            places[name] = fixed
        else:
            values = pq.read_table(path, columns=[name]).column(0).to_numpy()
            places[name] = column_places(name, values, kind)
    return places


def release_memory() -> None:
    """Hand memory that pyarrow's pool keeps for reuse back to the system (after a table was
    read or written: otherwise the next stage starts from a larger resident size)."""
    import pyarrow as pa

    pa.default_memory_pool().release_unused()
    _malloc_trim()


def _malloc_trim() -> None:
    """glibc's ``malloc_trim(0)``: freed heap pages (numpy and pandas buffers) back to the
    system; nothing elsewhere."""
    import ctypes
    import ctypes.util

    global _LIBC
    if _LIBC is None:
        name = ctypes.util.find_library("c")
        try:
            _LIBC = ctypes.CDLL(name) if name else False
        except OSError:
            _LIBC = False
    if _LIBC and hasattr(_LIBC, "malloc_trim"):
        _LIBC.malloc_trim(0)


_LIBC = None


def write_readings(
    csv_path: Path, parquet_path: Path, layout: dict[str, Path], kind: str = "magnetic", chunk_rows: int = 0
) -> None:
    """readings.csv and readings.parquet of the table of ``layout``, streamed from the cache files
    piece by piece (:func:`iter_cache_pieces`): the same files as :func:`potfield.io.columns.write_table` and
    :func:`potfield.io.atomic.write_parquet` of the whole table, without the whole table in
    memory."""
    from .columns import write_table_pieces

    chunk_rows = chunk_rows or CHUNK_ROWS
    places = cache_float_places(layout, kind)
    write_table_pieces(csv_path, iter_cache_pieces(layout, chunk_rows), kind, places)
    release_memory()
    write_parquet_pieces(parquet_path, iter_cache_pieces(layout, chunk_rows))
    release_memory()
