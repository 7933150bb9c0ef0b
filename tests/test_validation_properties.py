"""Property tests of input validation: random damage to the tables never crashes the job and never loses a row.

Starting from the mini desk (tests/mini_desk.py, written from README.md, "Input files"), hypothesis
removes random rows, duplicates rows (and so keys), and replaces random values by NaN, infinities,
negatives, zero, None, huge or tiny numbers, blank and wrong strings and odd dates, in any of the sixteen
files of the two dates; sometimes a whole file is deleted or cut short. Then ``engine.prepare_night``:

* returns, or raises only ``InputFileError`` and only for a file-level problem (a required file missing
  or unreadable);
* loses nothing: every trade_id of both positions files is in the night's rows once or has a rejected row
  keyed by it in a positions file (never both), a row without trade_id has its own rejected row, and the
  counts add up (in = explained + rejected; book rows sum to the night);
* and archives no NaN or infinite amount.
"""

from __future__ import annotations

import datetime as dt
import math
import tempfile
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from attribution.config import JobConfig
from attribution.engine import PreparedNight, prepare_night
from attribution.lifecycle import STATUSES
from attribution.loading import OPTIONAL_FILES, InputFileError, folder_for
from tests.conservation import assert_conserved
from tests.contract_files import COLUMNS, table
from tests.mini_desk import PRIOR, RUN, write_mini_desk

KINDS = tuple(k for k in COLUMNS if k not in ("future_marks", "trade_activity", "cash_flows", "official_pnl"))
# (the whole-book files have their own catalogue cases, tests/test_catalogue.py)
FLOATS = (math.nan, math.inf, -math.inf, -1.0, 0.0, 1e300, -1e300, 1e-300, 5e12, 25.0, None)
DATES = (None, dt.date(1900, 1, 1), dt.date(2200, 1, 1), PRIOR, RUN, dt.date(2026, 11, 28))
WORDS = (None, "", "  ", "Call", "put ", "american", "usd", "EURO", "ZEN", "QRX", "T1", "T7", "USD", "EUR",
         "ZEN-C100-J27", "ZEN-P90-D26", "NO-SUCH-ID")


@pytest.fixture(scope="module")
def base_tables(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[dt.date, str], list[dict[str, object]]]:
    """The mini desk's files and the optional ones it does not write (books, dividends, splits) as row lists."""
    root = write_mini_desk(tmp_path_factory.mktemp("base") / "data")
    tables = {(day, kind): pq.read_table(folder_for(root, day) / f"{kind}.parquet").to_pylist()
              for day in (PRIOR, RUN) for kind in KINDS if (folder_for(root, day) / f"{kind}.parquet").exists()}
    for day in (PRIOR, RUN):  # a desk per book, a dividend ahead, a (neutral) split tonight
        tables[day, "books"] = [{"book": "Index vol", "desk": "Equity"},
                                {"book": "Euro single names", "desk": "Equity"}]
        tables[day, "dividends"] = [{"underlying": "ZEN", "ex_date": dt.date(2027, 2, 5), "amount": 0.5}]
        tables[day, "corporate_actions"] = [{"underlying": "QRX", "ex_date": RUN, "ratio": 1.0}]
    return tables


def _value(draw: st.DrawFn, kind: str) -> object:
    if kind == "float64":
        return draw(st.sampled_from(FLOATS) | st.floats(allow_nan=True, allow_infinity=True))
    if kind == "date32":
        return draw(st.sampled_from(DATES))
    return draw(st.sampled_from(WORDS) | st.text(max_size=4))


@st.composite
def damaged_file(draw: st.DrawFn, rows: list[dict[str, object]], kind: str) -> list[dict[str, object]]:
    """The rows of one file with random rows removed or duplicated and random values replaced."""
    kept = [dict(r) for r in rows if draw(st.booleans()) or draw(st.booleans())]  # each row kept with p = 3/4
    if kept and draw(st.booleans()):
        kept.append(dict(draw(st.sampled_from(kept))))
    columns = dict(COLUMNS[kind])
    for row in kept:
        for _ in range(draw(st.integers(0, 2))):
            name = draw(st.sampled_from(sorted(columns)))
            row[name] = _value(draw, columns[name])
    return kept


@st.composite
def damaged_desk(draw: st.DrawFn, base: dict[tuple[dt.date, str], list[dict[str, object]]]
                 ) -> tuple[dict[tuple[dt.date, str], list[dict[str, object]] | str], bool]:
    """Every file's rows (damaged or not), or "missing"/"truncated"; and whether a file-level failure is due."""
    files: dict[tuple[dt.date, str], list[dict[str, object]] | str] = {}
    fatal = False
    for key, rows in base.items():
        roll = draw(st.integers(0, 59))
        if roll == 0:
            files[key] = "missing"
            fatal |= f"{key[1]}.parquet" not in OPTIONAL_FILES
        elif roll == 1:
            files[key] = "truncated"
            fatal = True
        elif roll < 30:
            files[key] = draw(damaged_file(rows, key[1]))
        else:
            files[key] = rows
    return files, fatal


def _write(root: Path, files: dict[tuple[dt.date, str], list[dict[str, object]] | str]) -> None:
    for (day, kind), rows in files.items():
        path = folder_for(root, day) / f"{kind}.parquet"
        path.parent.mkdir(parents=True, exist_ok=True)
        if rows == "missing":
            continue
        pq.write_table(table(kind, [] if isinstance(rows, str) else rows), path)
        if rows == "truncated":
            data = path.read_bytes()
            path.write_bytes(data[: len(data) // 2])


def _check_night(root: Path, night: PreparedNight) -> None:
    raw = {str(folder_for(root, day) / "positions.parquet"):
           pq.read_table(folder_for(root, day) / "positions.parquet", columns=["trade_id"]).to_pandas()
           for day in (PRIOR, RUN)}
    assert_conserved(root, night.positions, night.exceptions, raw)
    assert night.unaccounted == ()
    assert night.positions_in == len(night.positions) + night.rejected_positions
    books = night.books
    assert int(books["positions"].sum()) == len(night.positions)
    assert (books[list(STATUSES)].sum(axis=1) == books["positions"]).all()
    null_keys = night.exceptions.loc[night.exceptions["key"].str.startswith("(null) row"), "key"]
    if null_keys.is_unique:  # the same "(null) row i" in both files is counted once by book (see test_catalogue)
        assert int(books["rejected"].sum()) == night.rejected_positions
    assert set(night.positions["status"]) <= set(STATUSES)
    amounts = [c for c in night.positions.columns if c.startswith("pnl_") and c != "pnl_new_trade"]
    assert np.isfinite(night.positions[amounts].to_numpy(float)).all(), "a non-finite amount was archived"
    new = night.positions["status"] == "new"
    assert np.isfinite(night.positions.loc[new, "pnl_new_trade"].to_numpy(float)).all()
    assert set(night.exceptions["severity"]) <= {"rejected", "warning", "info"}
    assert (night.exceptions["file"].str.len() > 0).all() and (night.exceptions["rule"].str.len() > 0).all()


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                 HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_damaged_tables_never_crash_and_never_lose_a_row(base_tables, data: st.DataObject) -> None:
    """Random row removal, duplicates and bad values: prepare_night returns (or InputFileError) and conserves rows."""
    files, fatal = data.draw(damaged_desk(base_tables))
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "data"
        _write(root, files)
        try:
            night = prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
        except InputFileError as exc:
            assert fatal, f"file-level error without a file-level problem: {exc}"
            assert ".parquet" in str(exc)
            return
        assert not fatal, "a missing or truncated required file was not reported"
        _check_night(root, night)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_random_positions_books_are_conserved(base_tables, data: st.DataObject) -> None:
    """Positions of both dates drawn at random over the desk's instruments (ids reused, flat, huge) conserve rows."""
    ids = ["T1", "T2", "T3", "T4", "T5", "T6", "T7", "T8", "T9", None, ""]
    instruments = [r["instrument_id"] for r in base_tables[(PRIOR, "instruments")]] + ["NO-SUCH-ID"]
    position = st.fixed_dictionaries({
        "trade_id": st.sampled_from(ids), "book": st.sampled_from(["Index vol", "Euro single names", None]),
        "instrument_id": st.sampled_from(instruments),
        "quantity": st.sampled_from([0.0, 1.0, -3.0, 2e9, math.nan]) | st.floats(-1e6, 1e6),
        "trade_date": st.sampled_from([PRIOR, RUN, None]),
        "trade_price": st.sampled_from([None, 0.0, 1.5, -1.0, math.inf])})
    files = dict(base_tables)
    for day in (PRIOR, RUN):
        files[(day, "positions")] = data.draw(st.lists(position, max_size=12))
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "data"
        _write(root, files)
        night = prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
        _check_night(root, night)
