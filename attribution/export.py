"""One archived night's rows as files for machines: ``position_pnl``, ``book_pnl``, ``input_exceptions``.

Each file holds exactly the archive's rows of that night, every column, in the archive's types
(Parquet) or as text (CSV: ISO dates, shortest round-trip decimals, empty for NULL, RFC 4180 quoting).
Files are named after their table and written under a temporary name, then moved into place, so a
reader never sees half a file.
"""

from __future__ import annotations

import datetime as dt
import os
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq

from attribution.errors import JobFailure

FORMATS = ("csv", "parquet")
# table -> SQL giving its rows of one night in a stable order (no value is formatted in)
EXPORTED: dict[str, str] = {
    "position_pnl": "SELECT * FROM position_pnl WHERE as_of = ? ORDER BY book, trade_id",
    "book_pnl": "SELECT * FROM book_pnl WHERE as_of = ? ORDER BY book",
    "input_exceptions": "SELECT * FROM input_exceptions WHERE as_of = ? ORDER BY severity, file, rule, key, detail",
}


class ExportError(JobFailure):
    """The night asked for is not in the archive."""


def _write(table: pa.Table, path: Path, fmt: str) -> None:
    partial = path.with_name(f".{path.name}.partial-{os.getpid()}")
    try:
        if fmt == "parquet":
            pq.write_table(table, partial)
        else:
            pa_csv.write_csv(table, partial)
        os.replace(partial, path)
    finally:
        partial.unlink(missing_ok=True)


def export_night(con: duckdb.DuckDBPyConnection, as_of: dt.date, fmt: str, out: Path) -> dict[str, int]:
    """Write ``<out>/<table>.<fmt>`` for each exported table; returns the rows written per table."""
    if fmt not in FORMATS:
        raise ValueError(f"format must be one of {', '.join(FORMATS)}, not {fmt!r}")
    ((archived,),) = con.execute("SELECT count(*) FROM runs WHERE as_of = ?", [as_of]).fetchall()
    if not archived:
        raise ExportError(f"no archived night for {as_of} (run it first, or see `attribution history`)")
    out.mkdir(parents=True, exist_ok=True)
    written = {}
    for name, sql in EXPORTED.items():
        table = con.sql(sql, params=[as_of]).to_arrow_table()
        _write(table, out / f"{name}.{fmt}", fmt)
        written[name] = table.num_rows
    return written
