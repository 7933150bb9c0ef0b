"""Desks and strategies (data contract v2, "Desks and strategies"): books.parquet and positions' `strategy`."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from attribution.cli import main
from attribution.loading import folder_for
from tests.contract_files import put_rows
from tests.mini_desk import PRIOR, RUN, write_mini_desk


def _label(root: Path, day: dt.date, labels: dict[str, str]) -> None:
    """Add a `strategy` column to the positions of ``day``: ``labels`` by trade_id, null elsewhere."""
    path = folder_for(root, day) / "positions.parquet"
    t = pq.read_table(path)
    column = pa.array([labels.get(tid) for tid in t.column("trade_id").to_pylist()], type=pa.string())
    pq.write_table(t.append_column("strategy", column), path)


def _night(root: Path) -> tuple[int, duckdb.DuckDBPyConnection]:
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"), "--archive",
                 str(root / "a.duckdb"), "--no-reports"])
    return code, duckdb.connect(str(root / "a.duckdb"), read_only=True)


@pytest.fixture(scope="module")
def labelled(tmp_path_factory: pytest.TempPathFactory) -> duckdb.DuckDBPyConnection:
    """The mini desk with a books file (one good row, one duplicate pair, one blank desk) and strategies."""
    root = tmp_path_factory.mktemp("desks")
    write_mini_desk(root / "data")
    put_rows(root / "data", RUN, "books", [
        {"book": "Index vol", "desk": "Equity derivatives"},
        {"book": "Rates vol", "desk": "Rates"}, {"book": "Rates vol", "desk": "Rates"},
        {"book": "FX vol", "desk": "  "},
    ])
    _label(root / "data", PRIOR, {"T5": "put spread", "T1": "old label"})
    _label(root / "data", RUN, {"T1": "straddle", "T7": "put spread"})
    _, con = _night(root)
    yield con
    con.close()


def test_book_pnl_carries_the_desk_of_books_parquet(labelled):
    """A listed book gets its desk; a book books.parquet does not list is on `(unassigned)` (contract v2)."""
    desks = dict(labelled.execute("SELECT book, desk FROM book_pnl").fetchall())
    assert desks == {"Index vol": "Equity derivatives", "Euro single names": "(unassigned)"}


def test_bad_books_rows_are_rejected_naming_file_key_and_rule(labelled):
    """A duplicate book (every copy) and a blank desk are rejected rows of books.parquet, keyed by book."""
    rows = labelled.execute("SELECT file, key, rule, severity FROM input_exceptions "
                            "WHERE file LIKE '%books.parquet' ORDER BY key, rule").fetchall()
    assert [(k, r, s) for f, k, r, s in rows] == [
        ("FX vol", "desk is null", "rejected"),
        ("Rates vol", "duplicate book", "rejected"), ("Rates vol", "duplicate book", "rejected")]
    assert all(f.endswith(f"as_of={RUN.isoformat()}/books.parquet") for f, *_ in rows)


def test_position_pnl_carries_the_run_dates_strategy_else_the_prior_dates(labelled):
    """Held and new trades take tonight's label; a closed trade keeps its prior label; unlabelled is NULL."""
    got = dict(labelled.execute("SELECT trade_id, strategy FROM position_pnl").fetchall())
    assert got["T1"] == "straddle" and got["T7"] == "put spread" and got["T5"] == "put spread"
    assert got["T2"] is None and got["T3"] is None


def test_a_version_1_folder_has_unassigned_desks_and_no_strategy(tmp_path):
    """Without books.parquet or `strategy` every book is `(unassigned)` and every strategy NULL."""
    write_mini_desk(tmp_path / "data")
    code, con = _night(tmp_path)
    try:
        assert code == 0
        assert {r[0] for r in con.execute("SELECT desk FROM book_pnl").fetchall()} == {"(unassigned)"}
        assert con.execute("SELECT count(*) FROM position_pnl WHERE strategy IS NOT NULL").fetchone() == (0,)
    finally:
        con.close()


def test_rejected_positions_are_sized_at_the_prior_state(tmp_path):
    """A held position rejected tonight counts its prior value (quantity x multiplier x prior mark x FX) and its
    vega at the prior state (QuantLib's analytic European vega, per vol point); a new trade rejected tonight has
    no prior value and is counted as not valued."""
    from tests.contract_files import edit_row
    from tests.mini_desk import INSTRUMENTS, mark, ql_option
    write_mini_desk(tmp_path / "data")
    edit_row(tmp_path / "data", RUN, "positions", "T3", quantity=1e12)   # held: EUR call, 20 contracts x 10
    edit_row(tmp_path / "data", RUN, "positions", "T7", quantity=1e12)   # new tonight: nothing to value
    code, con = _night(tmp_path)
    try:
        rows = {r[0]: r[1:] for r in con.execute(
            "SELECT book, rejected, rejected_prior_value, rejected_vega_per_vol_point, rejected_unvalued "
            "FROM book_pnl").fetchall()}
    finally:
        con.close()
    assert code == 3
    inst = next(i for i in INSTRUMENTS if i.instrument_id == "QRX-C50-F27")
    units = 20.0 * inst.multiplier * 1.08   # prior FX of EUR
    rejected, value, vega, unvalued = rows["Euro single names"]
    assert (rejected, unvalued) == (1, 0)
    assert value == pytest.approx(units * mark(inst, PRIOR), rel=1e-12)
    assert vega == pytest.approx(units * ql_option(inst, PRIOR).vega() / 100.0, rel=1e-9)  # QuantLib reference
    assert rows["Index vol"][0] == 1 and rows["Index vol"][1:] == (0.0, 0.0, 1)


def test_rejected_positions_are_counted_unvalued_when_no_instrument_is_priced(tmp_path):
    """With no instrument row on either date nothing is priced: every position is rejected and counted as not
    valued (no prior value, no vega), and the night ends with its findings, not a traceback."""
    write_mini_desk(tmp_path / "data")
    for day in (PRIOR, RUN):
        path = folder_for(tmp_path / "data", day) / "instruments.parquet"
        pq.write_table(pq.read_table(path).slice(0, 0), path)   # the columns kept, every row gone
    code, con = _night(tmp_path)
    try:
        rejected, value, vega, unvalued = con.execute(
            "SELECT sum(rejected), sum(rejected_prior_value), sum(rejected_vega_per_vol_point), "
            "sum(rejected_unvalued) FROM book_pnl").fetchone()
    finally:
        con.close()
    assert code == 3
    assert rejected > 0 and unvalued == rejected and (value, vega) == (0.0, 0.0)
