"""Reading one business date's Parquet files (the edge of the job: files -> Arrow -> pandas).

A file that is missing, unreadable, lacks a required column or has a column of the wrong type
stops the run with an :class:`InputFileError` naming the file and the column. Row rules are
checked later, in :mod:`attribution.contract`, where a bad row becomes an exception row.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from attribution.errors import JobFailure
from attribution.keys import KeyCodes, encode
from attribution.memory import hand_back_arrow_memory

FOLDER_PATTERN = re.compile(r"^as_of=(\d{4}-\d{2}-\d{2})$")

STRING, FLOAT, DATE = "string", "float64", "date32"

# file -> ((column, kind), ...); the order is the data contract's.
FILE_COLUMNS: dict[str, tuple[tuple[str, str], ...]] = {
    "positions.parquet": (("trade_id", STRING), ("book", STRING), ("instrument_id", STRING),
                          ("quantity", FLOAT), ("trade_date", DATE), ("trade_price", FLOAT)),
    "instruments.parquet": (("instrument_id", STRING), ("underlying", STRING), ("option_type", STRING),
                            ("exercise", STRING), ("strike", FLOAT), ("expiry", DATE),
                            ("multiplier", FLOAT), ("currency", STRING)),
    "option_marks.parquet": (("instrument_id", STRING), ("price", FLOAT), ("implied_vol", FLOAT)),
    "underlying_marks.parquet": (("underlying", STRING), ("spot", FLOAT), ("dividend_yield", FLOAT)),
    "rate_curves.parquet": (("currency", STRING), ("tenor_years", FLOAT), ("zero_rate", FLOAT)),
    "fx_rates.parquet": (("currency", STRING), ("rate", FLOAT)),
    "books.parquet": (("book", STRING), ("desk", STRING)),
    "dividends.parquet": (("underlying", STRING), ("ex_date", DATE), ("amount", FLOAT)),
    "corporate_actions.parquet": (("underlying", STRING), ("ex_date", DATE), ("ratio", FLOAT)),
    "future_marks.parquet": (("instrument_id", STRING), ("price", FLOAT)),
    "trade_activity.parquet": (("activity_id", STRING), ("trade_id", STRING), ("kind", STRING),
                               ("quantity", FLOAT), ("price", FLOAT)),
    "cash_flows.parquet": (("flow_id", STRING), ("book", STRING), ("trade_id", STRING), ("currency", STRING),
                           ("amount", FLOAT), ("kind", STRING)),
    "official_pnl.parquet": (("book", STRING), ("pnl", FLOAT)),
}
OPTIONAL_FILES = frozenset({"fx_rates.parquet", "books.parquet", "dividends.parquet", "corporate_actions.parquet",
                            "future_marks.parquet", "trade_activity.parquet", "cash_flows.parquet",
                            "official_pnl.parquet"})
# Columns a file may carry or leave out (version 2 of the contract): read and type-checked when
# present, all null when absent, so later steps always see them.
OPTIONAL_COLUMNS: dict[str, tuple[tuple[str, str], ...]] = {
    "positions.parquet": (("strategy", STRING),),
    "instruments.parquet": (("kind", STRING),),
}

# The contract's Arrow schema of each file, keyed by kind ("positions", ...), for writers of input data.
_ARROW_TYPES = {STRING: pa.string(), FLOAT: pa.float64(), DATE: pa.date32()}
CONTRACT_SCHEMAS: dict[str, pa.Schema] = {
    file.removesuffix(".parquet"): pa.schema([(name, _ARROW_TYPES[kind]) for name, kind in columns])
    for file, columns in FILE_COLUMNS.items()
}
# The same with the optional columns of version 2 at the end (for writers of whole-book data).
CONTRACT_SCHEMAS_V2: dict[str, pa.Schema] = {
    file.removesuffix(".parquet"): pa.schema([(name, _ARROW_TYPES[kind])
                                              for name, kind in columns + OPTIONAL_COLUMNS.get(file, ())])
    for file, columns in FILE_COLUMNS.items()
}


class InputFileError(JobFailure):
    """A whole input file cannot be used: the run stops and the archive is left untouched."""


@dataclass(frozen=True, slots=True)
class RawNight:
    """One date's files as pandas frames with the contract's columns and dtypes."""

    as_of: dt.date
    folder: Path
    tables: dict[str, pd.DataFrame]
    hashes: dict[str, str]
    # per file, the codes of its text columns over the rows of its frame (:mod:`attribution.keys`); a file
    # left out (a frame built by hand) is factorised by the row rules themselves
    keys: dict[str, dict[str, KeyCodes]] = field(default_factory=dict)

    def path(self, file: str) -> str:
        """The file's path as shown in messages and exception rows."""
        return str(self.folder / file)


def folder_for(data_root: Path, as_of: dt.date) -> Path:
    """``<data_root>/as_of=YYYY-MM-DD``."""
    return data_root / f"as_of={as_of.isoformat()}"


def available_dates(data_root: Path) -> list[dt.date]:
    """Every ``as_of=`` folder below ``data_root``, oldest first."""
    if not data_root.is_dir():
        raise InputFileError(f"{data_root}: data folder not found")
    dates = []
    for child in data_root.iterdir():
        match = FOLDER_PATTERN.match(child.name)
        if match and child.is_dir():
            try:
                dates.append(dt.date.fromisoformat(match.group(1)))
            except ValueError:
                continue
    return sorted(dates)


def prior_date(data_root: Path, as_of: dt.date, listed: list[dt.date] | None = None) -> dt.date:
    """The latest ``as_of`` folder strictly before ``as_of`` (``listed``: the folder's dates when known)."""
    earlier = [d for d in (available_dates(data_root) if listed is None else listed) if d < as_of]
    if not earlier:
        raise InputFileError(f"{data_root}: no as_of folder before {as_of} to serve as the prior date")
    return earlier[-1]


def _kind_ok(kind: str, arrow_type: pa.DataType) -> bool:
    if kind == STRING:
        if pa.types.is_dictionary(arrow_type):
            arrow_type = arrow_type.value_type
        return pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type) or \
            pa.types.is_string_view(arrow_type) or pa.types.is_null(arrow_type)
    if kind == FLOAT:  # integers widen losslessly enough for prices and quantities; nulls are allowed
        return pa.types.is_floating(arrow_type) or pa.types.is_integer(arrow_type) or pa.types.is_null(arrow_type)
    return pa.types.is_date(arrow_type) or pa.types.is_null(arrow_type)


def _cast(column: pa.ChunkedArray, kind: str) -> pa.ChunkedArray:
    """The column in the contract's type; integers beyond 2**53 round to the nearest float64.

    Such a value is far above any quantity or price the row rules accept, so the row is still
    rejected on its value instead of the whole file failing on the conversion.
    """
    target = {STRING: pa.string(), FLOAT: pa.float64(), DATE: pa.date32()}[kind]
    if kind == FLOAT and pa.types.is_integer(column.type):
        return column.cast(target, safe=False)
    return column.cast(target)


# Text columns whose values are (nearly) all distinct: read plain and hashed once by :func:`encode` (a dictionary
# read would hash them a second time).
DISTINCT_COLUMNS = frozenset({"trade_id", "activity_id", "flow_id"})


def _dictionary_columns(schema: pa.Schema, columns: tuple[tuple[str, str], ...]) -> list[str]:
    """The text columns read as dictionaries: each distinct value becomes one Python string, shared by
    every row that holds it (a book or instrument id repeats over many positions)."""
    return [name for name, kind in columns if kind == STRING and name not in DISTINCT_COLUMNS
            and name in schema.names and (pa.types.is_string(schema.field(name).type)
                                          or pa.types.is_large_string(schema.field(name).type))]


def _to_frame(path: Path, table: pa.Table, columns: tuple[tuple[str, str], ...],
              index: pd.Index | None = None) -> tuple[pd.DataFrame, dict[str, KeyCodes]]:
    """The table as a frame of the contract's columns, and each text column's codes (:mod:`attribution.keys`):
    a text column is hashed once here, and its values are one Python string per distinct value."""
    data: dict[str, pd.Series] = {}
    keys: dict[str, KeyCodes] = {}
    rows = pd.RangeIndex(table.num_rows) if index is None else index
    for name, kind in columns:
        if name not in table.column_names:  # an optional column the file leaves out
            data[name] = pd.Series(None if kind == STRING else np.nan, index=rows,
                                   dtype=object if kind == STRING else float)
            continue
        try:
            column = table.column(name)
            if kind == STRING:
                keys[name] = encode(column)
                values = keys[name].per_row()
                if name in DISTINCT_COLUMNS:  # the frame holds the strings: no second array of them
                    keys[name] = keys[name].without_texts()
            else:
                values = _cast(column, kind).to_numpy(zero_copy_only=False)
        except pa.ArrowException as exc:
            raise InputFileError(f"{path}: column '{name}' cannot be read as {kind} ({exc})") from exc
        data[name] = pd.Series(values, index=rows, dtype=object if kind == STRING else None, copy=False)
    return pd.DataFrame(data, index=rows, copy=False), keys


def blank_books(book: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """Per row: the book is null, empty or only white space (such rows go with ``keep_null_books``)."""
    text = book.cast(pa.string())
    blank = pc.equal(pc.utf8_length(pc.utf8_trim_whitespace(text)), 0)
    return np.asarray(pc.fill_null(blank, True).to_numpy(zero_copy_only=False), dtype=bool)


def _book_rows(table: pa.Table, books: frozenset[str], keep_null_books: bool) -> np.ndarray:
    """Row numbers (in the file) of the positions of ``books``, and of blank books if asked."""
    book = table.column("book").cast(pa.string())
    wanted = pc.fill_null(pc.is_in(book, value_set=pa.array(sorted(books), type=pa.string())), False)
    keep = np.asarray(wanted.to_numpy(zero_copy_only=False), dtype=bool)
    if keep_null_books:
        keep |= blank_books(book)
    return np.flatnonzero(keep)


def read_file(folder: Path, file: str, books: frozenset[str] | None = None,
              keep_null_books: bool = True) -> tuple[pd.DataFrame | None, str]:
    """One file as a frame (None when an optional file is absent) and its SHA-256 (of the whole file).

    See :func:`read_keyed_file` (which also gives the codes of its text columns).
    """
    frame, _, digest = read_keyed_file(folder, file, books, keep_null_books)
    return frame, digest


def read_keyed_file(folder: Path, file: str, books: frozenset[str] | None = None, keep_null_books: bool = True,
                    ) -> tuple[pd.DataFrame | None, dict[str, KeyCodes], str]:
    """One file as a frame (None when an optional file is absent), the codes of its text columns
    (:mod:`attribution.keys`) and its SHA-256 (of the whole file).

    ``books`` (positions.parquet only): keep only the rows of these books, plus those with a null
    or blank book when ``keep_null_books``; the frame's index is then each row's number in the
    file, so messages name the same row as a whole read would. None reads every row.
    """
    path = folder / file
    columns = FILE_COLUMNS[file]
    if not path.exists():
        if file in OPTIONAL_FILES:
            return None, {}, ""
        raise InputFileError(f"{path}: required file is missing")
    try:
        raw = path.read_bytes()
        schema = pq.read_schema(pa.BufferReader(raw))
        wanted = columns + OPTIONAL_COLUMNS.get(file, ())
        # one file's reader, not the dataset machinery of pq.read_table (several times its cost on a small file)
        table = pq.ParquetFile(pa.BufferReader(raw), read_dictionary=_dictionary_columns(schema, wanted)).read()
    except (OSError, pa.ArrowException) as exc:
        raise InputFileError(f"{path}: cannot be read as Parquet ({exc})") from exc
    for name, kind in columns:
        if name not in table.column_names:
            raise InputFileError(f"{path}: required column '{name}' is missing")
        arrow_type = table.schema.field(name).type
        if not _kind_ok(kind, arrow_type):
            raise InputFileError(f"{path}: column '{name}' has type {arrow_type}, the contract wants {kind}")
    for name, kind in OPTIONAL_COLUMNS.get(file, ()):
        if name in table.column_names and not _kind_ok(kind, table.schema.field(name).type):
            raise InputFileError(f"{path}: column '{name}' has type {table.schema.field(name).type}, "
                                 f"the contract wants {kind}")
    columns = columns + OPTIONAL_COLUMNS.get(file, ())
    digest = hashlib.sha256(raw).hexdigest()
    if books is None or file != "positions.parquet":
        return (*_to_frame(path, table, columns), digest)
    try:
        rows = _book_rows(table, books, keep_null_books)
    except pa.ArrowException:
        _to_frame(path, table, columns)  # raises the error a whole read gives, naming the column
        raise
    return (*_to_frame(path, table.take(pa.array(rows, type=pa.int64())), columns, pd.Index(rows)), digest)


def folder_stamp(data_root: Path, as_of: dt.date) -> tuple[tuple[str, int, int, int], ...]:
    """Identity of one date's files as the file system sees them: (file, size, modification time in
    nanoseconds, inode) of each contract file present. A file rewritten, replaced, added or removed
    changes it (a backfill reuses a date's work only while it holds, see :mod:`attribution.date_cache`)."""
    folder = folder_for(data_root, as_of)
    stamp = []
    for file in FILE_COLUMNS:
        try:
            st = (folder / file).stat()
        except OSError:
            continue
        stamp.append((file, st.st_size, st.st_mtime_ns, st.st_ino))
    return tuple(stamp)


def read_night(data_root: Path, as_of: dt.date, books: frozenset[str] | None = None,
               keep_null_books: bool = True) -> RawNight:
    """Every file of one date; raises :class:`InputFileError` on the first unusable file.

    ``books`` and ``keep_null_books`` select positions by book (see :func:`read_file`); every
    other file is read whole.
    """
    folder = folder_for(data_root, as_of)
    if not folder.is_dir():
        raise InputFileError(f"{folder}: folder for {as_of} not found")
    tables: dict[str, pd.DataFrame] = {}
    hashes: dict[str, str] = {}
    keys: dict[str, dict[str, KeyCodes]] = {}
    for file in FILE_COLUMNS:
        frame, codes, digest = read_keyed_file(folder, file, books, keep_null_books)
        if frame is not None:
            tables[file] = frame
            hashes[file] = digest
            keys[file] = codes
    # Arrow's allocator keeps what it freed (the hash tables of the key columns' encoding, the files' buffers) for
    # its own later use; handed back here, so the night's numpy arrays can have it
    hand_back_arrow_memory()
    return RawNight(as_of, folder, tables, hashes, keys)
