"""A night's Arrow rows cross from a backfill's worker as IPC bytes (attribution/arrow_ipc.py) and arrive the same:
schema with its metadata, chunks and values bit for bit (README, "Commands": `attribution backfill`)."""

from __future__ import annotations

import datetime as dt
import pickle

import numpy as np
import pyarrow as pa

from attribution.arrow_ipc import from_ipc, to_ipc
from attribution.engine import ArchiveRows, _Counts


def _table() -> pa.Table:
    """Two chunks of the archive's kinds of columns: timestamps, text and large text with nulls, floats with NaN,
    negative zero and a denormal, integers; schema metadata as pandas writes it."""
    floats = np.array([1.5, np.nan, -0.0, 5e-324, np.inf, -1e300])
    first = pa.record_batch({
        "as_of": pa.array([dt.datetime(2026, 1, 2)] * 3, pa.timestamp("s")),
        "book": pa.array(["alpha", None, ""], pa.string()),
        "detail": pa.array(["x" * 40, "é", None], pa.large_string()),
        "pnl_total": pa.array(floats[:3]),
        "positions": pa.array([1, None, -3], pa.int64()),
    })
    second = pa.record_batch({
        "as_of": pa.array([dt.datetime(2026, 1, 5)] * 3, pa.timestamp("s")),
        "book": pa.array(["beta", "gamma", None], pa.string()),
        "detail": pa.array([None, "y", "z"], pa.large_string()),
        "pnl_total": pa.array(floats[3:]),
        "positions": pa.array([4, 5, 6], pa.int64()),
    })
    return pa.Table.from_batches([first, second]).replace_schema_metadata({b"pandas": b'{"columns": []}'})


def _same(a: pa.Table, b: pa.Table) -> None:
    """Equal schema (metadata included), chunk layout, and values: floats bit for bit (NaN, -0.0), the rest equal."""
    assert a.schema.equals(b.schema, check_metadata=True)
    for name in a.column_names:
        left, right = a.column(name), b.column(name)
        assert [len(c) for c in left.chunks] == [len(c) for c in right.chunks]
        if pa.types.is_floating(a.schema.field(name).type):
            assert np.array_equal(np.asarray(left.to_numpy()).view(np.uint64),
                                  np.asarray(right.to_numpy()).view(np.uint64))
        else:
            assert left.equals(right)


def test_a_table_comes_back_from_its_ipc_bytes_unchanged():
    """A table of two chunks written as IPC bytes reads back with the same schema, metadata, chunks and bits."""
    table = _table()
    data = to_ipc(table)
    assert isinstance(data, bytes)
    _same(table, from_ipc(data))


def test_archive_rows_pickle_as_ipc_and_arrive_the_same():
    """An ArchiveRows pickled (as a worker hands it back) carries its tables as IPC bytes, not as pickled Arrow
    columns, and unpickles to the same tables and figures."""
    tables = {"position_pnl": _table(), "book_pnl": _table().select(["as_of", "book"])}
    rows = ArchiveRows(
        as_of=dt.date(2026, 1, 5), prior_as_of=dt.date(2026, 1, 2), tables=tables, hashes={"a/positions.parquet": "0f"},
        positions_in=6, rejected_positions=1, unaccounted=(), stages=(("read", 0.25),),
        counts=_Counts(archived=5, warnings=2, book_breaches=0, position_breaches=1), books=3, total_pnl=-1.25,
        overnight_actual=2.5, explained=1e-17, residual=-0.0, unpriced_new=0, official_breaks=1,
        missing_days=("2026-01-01",))
    reduced = rows.__reduce__()[1]
    assert all(isinstance(v, bytes) for v in reduced[2].values())  # the tables travel as IPC bytes
    back = pickle.loads(pickle.dumps(rows))
    assert list(back.tables) == list(tables)
    for name, table in tables.items():
        _same(table, back.tables[name])
    for field in ("as_of", "prior_as_of", "hashes", "positions_in", "rejected_positions", "unaccounted", "stages",
                  "counts", "books", "total_pnl", "overnight_actual", "explained", "unpriced_new",
                  "official_breaks", "missing_days"):
        assert getattr(back, field) == getattr(rows, field), field
    assert str(back.residual) == "-0.0"
