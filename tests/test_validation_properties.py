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

The four files of version 2 that carry a night's events (``future_marks``, ``trade_activity``, ``cash_flows``,
``official_pnl``; README.md, "Input files" and "Rules of the run date's event files") get the same damage on top
of the whole-book desk (tests/hedged_desk.py), plus unknown keys (trades, books, instruments and kinds that no
other file names). Every row that breaks a rule the README states for its file has a ``rejected`` ledger row
naming that file and the row's key (``(null) row N`` without one); an unknown trade or book is at least warned;
a column of the wrong type stops the night with ``InputFileError`` naming the file and the column.
"""

from __future__ import annotations

import datetime as dt
import math
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
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
from tests.hedged_desk import write_whole_book
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
    cash = night.positions["status"] == "cash"  # a book's cash row is not a position (README.md, "Statuses")
    positions = night.positions[~cash]
    assert_conserved(root, positions, night.exceptions, raw)
    assert night.unaccounted == ()
    assert night.positions_in == len(positions) + night.rejected_positions
    books = night.books
    assert int(books["positions"].sum()) == len(positions)
    assert (books[list(STATUSES)].sum(axis=1) == books["positions"]).all()
    null_keys = night.exceptions.loc[night.exceptions["key"].str.startswith("(null) row"), "key"]
    if null_keys.is_unique:  # the same "(null) row i" in both files is counted once by book (see test_catalogue)
        assert int(books["rejected"].sum()) == night.rejected_positions
    assert set(positions["status"]) <= set(STATUSES)
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


# ---- the version-2 event files -------------------------------------------------------------------------------

EVENT_FILES = ("future_marks", "trade_activity", "cash_flows", "official_pnl")
EVENT_KEY = {"future_marks": "instrument_id", "trade_activity": "activity_id", "cash_flows": "flow_id",
             "official_pnl": "book"}
# Words that name something real in the whole-book desk, something unknown, or a kind of the wrong file.
EVENT_WORDS = (None, "", " ", "T1", "T5", "H1", "H2", "NO-SUCH-TRADE", "Index vol", "Ghost book", "USD", "EUR", "usd",
               "EURO", "ZEN-FUT-M27", "ZEN-SHR", "ZEN-C100-J27", "new", "close", "exercise", "cancel", "correction",
               "sell", "NEW", "fee", "commission", "rebate", "A1", "C1")
# What README.md, "Rules of the run date's event files" (and future_marks under "Rules of the instrument kinds")
# rejects in each file: the key columns that must not be null or blank, the numbers that must be finite, the
# closed vocabularies; a price of future_marks must be > 0 too.
REQUIRED = {"future_marks": ("instrument_id",), "trade_activity": ("activity_id", "trade_id", "kind"),
            "cash_flows": ("flow_id", "book", "currency", "kind"), "official_pnl": ("book",)}
FINITE = {"future_marks": ("price",), "trade_activity": ("quantity",), "cash_flows": ("amount",),
          "official_pnl": ("pnl",)}
VOCABULARY = {"trade_activity": ("kind", ("new", "increase", "decrease", "close", "exercise", "assignment",
                                          "correction", "cancel")),
              "cash_flows": ("kind", ("fee", "commission", "dividend", "financing", "settlement", "other"))}


@pytest.fixture(scope="module")
def whole_book_tables(tmp_path_factory: pytest.TempPathFactory) -> dict[tuple[dt.date, str], list[dict[str, object]]]:
    """The whole-book desk's files (both dates; the event files of the run date, future marks on both)."""
    root = write_whole_book(tmp_path_factory.mktemp("whole") / "data")
    return {(day, p.stem): pq.read_table(p).to_pylist() for day in (PRIOR, RUN)
            for p in sorted(folder_for(root, day).glob("*.parquet"))}


def _event_value(draw: st.DrawFn, kind: str) -> object:
    if kind == "float64":
        return draw(st.sampled_from(FLOATS) | st.floats(allow_nan=True, allow_infinity=True))
    return draw(st.sampled_from(EVENT_WORDS) | st.text(max_size=3))


@st.composite
def damaged_events(draw: st.DrawFn, rows: list[dict[str, object]], kind: str) -> list[dict[str, object]]:
    """One event file's rows, some removed or duplicated, with random values replaced (at least one row)."""
    kept = [dict(r) for r in rows if draw(st.booleans()) or draw(st.booleans())] or [dict(rows[0])]
    for _ in range(draw(st.integers(0, 2))):
        kept.append(dict(draw(st.sampled_from(kept))))
    columns = dict(COLUMNS[kind])
    for row in kept:
        for _ in range(draw(st.integers(0, 3))):
            name = draw(st.sampled_from(sorted(columns)))
            row[name] = _event_value(draw, columns[name])
    return kept


def _blank(value: object) -> bool:
    return value is None or (isinstance(value, str) and not value.strip())


def _bad_rows(kind: str, rows: list[dict[str, object]]) -> dict[int, str]:
    """Row number -> its ledger key, for every row that breaks a row rule of its file (README.md)."""
    key = EVENT_KEY[kind]
    keys = [r[key] for r in rows]
    bad: dict[int, str] = {}
    for i, row in enumerate(rows):
        broken = any(_blank(row[c]) for c in REQUIRED[kind])
        broken |= not _blank(row[key]) and keys.count(row[key]) > 1
        broken |= any(row[c] is None or not math.isfinite(float(row[c])) for c in FINITE[kind])  # type: ignore[arg-type]
        if kind == "future_marks" and row["price"] is not None:
            broken |= float(row["price"]) <= 0  # type: ignore[arg-type]
        if kind in VOCABULARY:
            column, words = VOCABULARY[kind]
            broken |= row[column] not in words
        if kind == "trade_activity" and row["price"] is not None:
            price = float(row["price"])  # type: ignore[arg-type]
            broken |= math.isinf(price) or (row["kind"] in ("correction", "cancel") and not math.isnan(price))
        if kind == "cash_flows" and isinstance(row["currency"], str) and row["currency"].strip():
            broken |= not (len(row["currency"]) == 3 and row["currency"].isascii() and row["currency"].isupper()
                           and row["currency"].isalpha())
        if broken:
            bad[i] = f"(null) row {i}" if row[key] is None else str(row[key])
    return bad


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                 HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_damaged_event_files_are_ruled_on_row_by_row(whole_book_tables, data: st.DataObject) -> None:
    """Damaged future marks, trade activity, cash flows and official P&L: no traceback, rows conserved, and every
    row breaking a rule of its file has a rejected ledger row naming the file and the row's key."""
    files: dict[tuple[dt.date, str], list[dict[str, object]] | str] = dict(whole_book_tables)
    damaged = {}
    for kind in EVENT_FILES:
        days = (PRIOR, RUN) if kind == "future_marks" else (RUN,)
        for day in days:
            if data.draw(st.booleans()):
                files[day, kind] = damaged[day, kind] = data.draw(damaged_events(whole_book_tables[day, kind], kind))
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "data"
        _write(root, files)
        night = prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
        _check_night(root, night)
        ledger = night.exceptions
        for (day, kind), rows in damaged.items():
            path = str(folder_for(root, day) / f"{kind}.parquet")
            mine = ledger[ledger["file"] == path]
            assert (mine["rule"].str.len() > 0).all()
            if day == PRIOR:  # the prior date's events were its own night's: only its future marks are read
                continue
            rejected = set(mine.loc[mine["severity"] == "rejected", "key"])
            for i, key in _bad_rows(kind, rows).items():
                assert key in rejected, (kind, i, rows[i], mine.to_dict("records"))


def test_unknown_keys_in_event_files_are_warned_or_rejected_by_name(whole_book_tables, tmp_path: Path) -> None:
    """An activity of a trade in neither positions file, a cash flow naming no trade of its book, an official P&L
    of a book without positions, and a settlement price of an instrument that is no future: each has a ledger row
    naming its file, its key and the rule of README.md."""
    files: dict[tuple[dt.date, str], list[dict[str, object]] | str] = dict(whole_book_tables)
    files[RUN, "trade_activity"] = [*whole_book_tables[RUN, "trade_activity"],
                                    {"activity_id": "A99", "trade_id": "NO-SUCH-TRADE", "kind": "new",
                                     "quantity": 1.0, "price": 2.0}]
    files[RUN, "cash_flows"] = [*whole_book_tables[RUN, "cash_flows"],
                                {"flow_id": "C99", "book": "Index vol", "trade_id": "NO-SUCH-TRADE",
                                 "currency": "USD", "amount": -3.0, "kind": "fee"}]
    files[RUN, "official_pnl"] = [*whole_book_tables[RUN, "official_pnl"], {"book": "No such book", "pnl": 1.0}]
    files[RUN, "future_marks"] = [*whole_book_tables[RUN, "future_marks"], {"instrument_id": "ZEN-SHR", "price": 1.0},
                                  {"instrument_id": "NO-SUCH-FUTURE", "price": 1.0}]
    root = tmp_path / "data"
    _write(root, files)
    night = prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
    _check_night(root, night)
    ledger = night.exceptions.set_index(["file", "key"])
    folder = folder_for(root, RUN)
    expected = {("trade_activity", "A99"): "activity of an unknown trade",
                ("cash_flows", "C99"): "cash flow of no trade of its book",
                ("official_pnl", "No such book"): "official P&L of a book without positions",
                ("future_marks", "ZEN-SHR"): "mark of no future",
                ("future_marks", "NO-SUCH-FUTURE"): "mark of no future"}
    for (kind, key), rule in expected.items():
        rows = ledger.loc[[(str(folder / f"{kind}.parquet"), key)]]
        assert rule in set(rows["rule"]), (kind, key, rows.to_dict("records"))


WRONG_TYPE = {"float64": pa.string(), "string": pa.float64()}


@pytest.mark.parametrize(("kind", "column"), [(k, c) for k in EVENT_FILES for c, _ in COLUMNS[k]])
def test_event_file_column_of_the_wrong_type_stops_naming_file_and_column(whole_book_tables, tmp_path: Path,
                                                                           kind: str, column: str) -> None:
    """A column of an event file written in another Arrow type (text for a number, a number for text) stops the night
    with InputFileError naming the file and the column (README.md, "Input files"), never a traceback."""
    root = tmp_path / "data"
    _write(root, dict(whole_book_tables))
    path = folder_for(root, RUN) / f"{kind}.parquet"
    original = pq.read_table(path)
    wanted = WRONG_TYPE[dict(COLUMNS[kind])[column]]
    values = [None if v is None else (str(v) if wanted == pa.string() else float(len(str(v))))
              for v in original.column(column).to_pylist()]
    at = original.schema.get_field_index(column)
    pq.write_table(original.set_column(at, pa.field(column, wanted), pa.array(values, wanted)), path)
    with pytest.raises(InputFileError) as caught:
        prepare_night(JobConfig(data_root=root, write_reports=False), RUN)
    assert str(path) in str(caught.value) and f"'{column}'" in str(caught.value)
