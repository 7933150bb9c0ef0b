"""Writes input folders exactly as the data contract fixes them (tests build their nights here).

Every column gets the contract's Arrow type: string, float64, date32; ``trade_price`` and
``implied_vol`` may be None.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping, Sequence
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

ARROW = {"string": pa.string(), "float64": pa.float64(), "date32": pa.date32()}

COLUMNS: dict[str, tuple[tuple[str, str], ...]] = {
    "positions": (("trade_id", "string"), ("book", "string"), ("instrument_id", "string"),
                  ("quantity", "float64"), ("trade_date", "date32"), ("trade_price", "float64")),
    "instruments": (("instrument_id", "string"), ("underlying", "string"), ("option_type", "string"),
                    ("exercise", "string"), ("strike", "float64"), ("expiry", "date32"),
                    ("multiplier", "float64"), ("currency", "string")),
    "option_marks": (("instrument_id", "string"), ("price", "float64"), ("implied_vol", "float64")),
    "underlying_marks": (("underlying", "string"), ("spot", "float64"), ("dividend_yield", "float64")),
    "rate_curves": (("currency", "string"), ("tenor_years", "float64"), ("zero_rate", "float64")),
    "fx_rates": (("currency", "string"), ("rate", "float64")),
    "books": (("book", "string"), ("desk", "string")),
    "dividends": (("underlying", "string"), ("ex_date", "date32"), ("amount", "float64")),
    "corporate_actions": (("underlying", "string"), ("ex_date", "date32"), ("ratio", "float64")),
    "future_marks": (("instrument_id", "string"), ("price", "float64")),
    "trade_activity": (("activity_id", "string"), ("trade_id", "string"), ("kind", "string"),
                       ("quantity", "float64"), ("price", "float64")),
    "cash_flows": (("flow_id", "string"), ("book", "string"), ("trade_id", "string"), ("currency", "string"),
                   ("amount", "float64"), ("kind", "string")),
    "official_pnl": (("book", "string"), ("pnl", "float64")),
}
VERSION_1_FILES = ("positions", "instruments", "option_marks", "underlying_marks", "rate_curves", "fx_rates")
# Optional columns of version 2: written only when a row gives them (a version-1 file leaves them out).
OPTIONAL_COLUMNS: dict[str, tuple[tuple[str, str], ...]] = {
    "instruments": (("kind", "string"),),
}


def table(kind: str, rows: Sequence[Mapping[str, object]]) -> pa.Table:
    """Rows as an Arrow table with the contract's schema for ``kind`` (e.g. "positions")."""
    optional = [(name, t) for name, t in OPTIONAL_COLUMNS.get(kind, ()) if any(name in r for r in rows)]
    schema = pa.schema([(name, ARROW[t]) for name, t in (*COLUMNS[kind], *optional)])
    return pa.Table.from_pylist([dict(r) for r in rows], schema=schema)


def write_folder(root: Path, as_of: dt.date, files: Mapping[str, Sequence[Mapping[str, object]] | pa.Table]) -> Path:
    """Write ``<root>/as_of=YYYY-MM-DD/<kind>.parquet`` for each kind given; returns the folder."""
    folder = root / f"as_of={as_of.isoformat()}"
    folder.mkdir(parents=True, exist_ok=True)
    for kind, rows in files.items():
        t = rows if isinstance(rows, pa.Table) else table(kind, rows)
        pq.write_table(t, folder / f"{kind}.parquet")
    return folder


def read_rows(root: Path, as_of: dt.date, kind: str) -> list[dict[str, object]]:
    """The rows of ``<root>/as_of=D/<kind>.parquet`` as dictionaries."""
    return pq.read_table(root / f"as_of={as_of.isoformat()}" / f"{kind}.parquet").to_pylist()


def put_rows(root: Path, as_of: dt.date, kind: str, rows: Sequence[Mapping[str, object]]) -> None:
    """Replace ``<root>/as_of=D/<kind>.parquet`` with ``rows`` (the contract's schema)."""
    pq.write_table(table(kind, rows), root / f"as_of={as_of.isoformat()}" / f"{kind}.parquet")


def edit_row(root: Path, as_of: dt.date, kind: str, key: str, /, **values: object) -> None:
    """Set ``values`` on the one row of ``kind`` whose first column is ``key``."""
    rows = read_rows(root, as_of, kind)
    first = next(iter(rows[0]))
    hits = [r for r in rows if r[first] == key]
    assert len(hits) == 1, f"{kind} of {as_of}: {len(hits)} rows keyed {key!r}"
    hits[0].update(values)
    put_rows(root, as_of, kind, rows)
