"""Archive checks shared by the archive-level tests (test_archive, test_crash_safety, test_concurrency).

Checksums of every table, one night's rows in a fixed order, and an exact comparison of two nights' rows.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import pandas as pd

from attribution.schema import TABLES

VOLATILE_RUN_COLUMNS = ["run_id", "started_at", "finished_at", "seconds"]
ORDER = {"position_pnl": ["trade_id"], "book_pnl": ["book"], "input_exceptions": ["file", "key", "rule", "detail"],
         "book_quality": ["book"], "runs": ["as_of"], "dividend_schedule": ["underlying", "currency", "ex_date"]}


def checksums(con: duckdb.DuckDBPyConnection, before: dt.date | None = None) -> dict[str, tuple[int, int]]:
    """Row count and sum of row hashes of every table (only rows dated before ``before`` when given)."""
    out = {}
    for table in TABLES:
        count, total = con.execute(
            f"SELECT count(*), coalesce(sum(hash(t)), 0) FROM {table} t WHERE as_of < coalesce(?, DATE '9999-12-31')",
            [before]).fetchone()
        out[table] = (int(count), int(total))
    return out


def night_rows(con: duckdb.DuckDBPyConnection, as_of: dt.date) -> dict[str, pd.DataFrame]:
    """Every table's rows of one date, in a fixed order, without the run's clock readings."""
    out = {}
    for table in TABLES:
        frame = con.execute(f"SELECT * FROM {table} WHERE as_of = ?", [as_of]).df()
        if table == "runs":
            frame = frame.drop(columns=VOLATILE_RUN_COLUMNS)
        out[table] = frame.sort_values(ORDER[table]).reset_index(drop=True)
    return out


def assert_same_rows(got: dict[str, pd.DataFrame], want: dict[str, pd.DataFrame]) -> None:
    """Identical rows, table by table (exact: same code, same inputs, same machine)."""
    for table in TABLES:
        pd.testing.assert_frame_equal(got[table], want[table], check_exact=True, obj=table)
