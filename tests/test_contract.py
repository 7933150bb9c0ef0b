"""Single-file row rules of the data contract (attribution.contract).

Each rule is checked by breaking one row of one file of the mini desk (tests/mini_desk.py, written from
README.md, "Input files"): exactly that row is rejected, with its file, its key and the rule, and
every other row of the file stays in the clean table.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from hypothesis import given
from hypothesis import strategies as st

from attribution.config import CheckSettings
from attribution.contract import CleanNight, _blank_text, clean_night
from attribution.exceptions_log import REJECTED, ExceptionLog
from attribution.loading import folder_for, read_night
from tests.contract_files import table
from tests.mini_desk import RUN, write_mini_desk

NAN, INF = math.nan, math.inf
KEY_COLUMN = {"positions": "trade_id", "instruments": "instrument_id", "option_marks": "instrument_id",
              "underlying_marks": "underlying", "fx_rates": "currency"}
CLEAN_ATTR = {"positions": "positions", "instruments": "instruments", "option_marks": "marks",
              "underlying_marks": "underlyings", "rate_curves": "curves", "fx_rates": "fx"}


def _rows(root: Path, kind: str) -> list[dict[str, object]]:
    return pq.read_table(folder_for(root, RUN) / f"{kind}.parquet").to_pylist()


def _put(root: Path, kind: str, rows: list[dict[str, object]]) -> None:
    pq.write_table(table(kind, rows), folder_for(root, RUN) / f"{kind}.parquet")


def _clean(root: Path, checks: CheckSettings | None = None) -> tuple[CleanNight, pd.DataFrame]:
    log = ExceptionLog(RUN)
    night = clean_night(read_night(root, RUN), log, checks or CheckSettings(), "USD")
    return night, log.frame()


def _size(night: CleanNight, kind: str) -> int:
    return len(getattr(night, CLEAN_ATTR[kind]))


@pytest.fixture()
def desk(tmp_path: Path) -> Path:
    """The mini desk's two nights under tmp_path/data."""
    return write_mini_desk(tmp_path / "data")


def test_mini_desk_passes_every_row_rule(desk: Path) -> None:
    """The contract-built desk has no exception row and keeps every row of every file."""
    night, ledger = _clean(desk)
    assert ledger.empty
    for kind in CLEAN_ATTR:
        assert _size(night, kind) == len(_rows(desk, kind))


ROW_CASES = [
    # kind, row, column, bad value, rule
    ("positions", 1, "trade_id", None, "trade_id is null"),
    ("positions", 1, "trade_id", "   ", "trade_id is null"),
    ("positions", 1, "book", None, "book is null"),
    ("positions", 1, "book", "", "book is null"),
    ("positions", 1, "instrument_id", None, "instrument_id is null"),
    ("positions", 1, "quantity", NAN, "quantity is not a finite number"),
    ("positions", 1, "quantity", INF, "quantity is not a finite number"),
    ("positions", 1, "quantity", -INF, "quantity is not a finite number"),
    ("positions", 1, "quantity", 2e9, "quantity is absurdly large"),
    ("positions", 1, "quantity", -2e9, "quantity is absurdly large"),
    ("positions", 1, "trade_price", INF, "trade_price must be a finite number >= 0 when given"),
    ("positions", 1, "trade_price", -0.01, "trade_price must be a finite number >= 0 when given"),
    ("instruments", 2, "instrument_id", None, "instrument_id is null"),
    ("instruments", 2, "underlying", None, "underlying is null"),
    ("instruments", 2, "option_type", "Call", "option_type must be call or put"),
    ("instruments", 2, "option_type", "straddle", "option_type must be call or put"),
    ("instruments", 2, "option_type", None, "option_type is null"),
    ("instruments", 2, "exercise", "bermudan", "exercise must be european or american"),
    ("instruments", 2, "exercise", None, "exercise is null"),
    ("instruments", 2, "strike", 0.0, "strike must be > 0"),
    ("instruments", 2, "strike", -50.0, "strike must be > 0"),
    ("instruments", 2, "strike", NAN, "strike is not a finite number"),
    ("instruments", 2, "multiplier", 0.0, "multiplier must be > 0"),
    ("instruments", 2, "multiplier", INF, "multiplier is not a finite number"),
    ("instruments", 2, "expiry", None, "expiry is null"),
    ("instruments", 2, "currency", "eur", "currency must be an ISO 4217 code"),
    ("instruments", 2, "currency", "EURO", "currency must be an ISO 4217 code"),
    ("instruments", 2, "currency", None, "currency is null"),
    ("option_marks", 0, "instrument_id", None, "instrument_id is null"),
    ("option_marks", 0, "price", NAN, "price is not a finite number"),
    ("option_marks", 0, "price", INF, "price is not a finite number"),
    ("option_marks", 0, "price", -0.5, "price must be >= 0"),
    ("option_marks", 0, "implied_vol", -0.2, "implied_vol must be > 0"),
    ("option_marks", 0, "implied_vol", 0.0, "implied_vol must be > 0"),
    ("option_marks", 0, "implied_vol", 27.0, "implied_vol is absurd"),
    ("option_marks", 0, "implied_vol", INF, "implied_vol is not a finite number"),
    ("underlying_marks", 1, "underlying", None, "underlying is null"),
    ("underlying_marks", 1, "spot", 0.0, "spot must be > 0"),
    ("underlying_marks", 1, "spot", -49.0, "spot must be > 0"),
    ("underlying_marks", 1, "spot", NAN, "spot is not a finite number"),
    ("underlying_marks", 1, "spot", INF, "spot is not a finite number"),
    ("underlying_marks", 1, "dividend_yield", NAN, "dividend_yield is not a finite number"),
    ("underlying_marks", 1, "dividend_yield", -INF, "dividend_yield is not a finite number"),
    ("underlying_marks", 1, "dividend_yield", 3.0, "dividend_yield is absurd"),
    ("fx_rates", 1, "currency", None, "currency is null"),
    ("fx_rates", 1, "rate", 0.0, "rate must be > 0"),
    ("fx_rates", 1, "rate", -1.1, "rate must be > 0"),
    ("fx_rates", 1, "rate", NAN, "rate is not a finite number"),
    ("fx_rates", 0, "rate", 1.05, "the reporting currency's rate must be 1"),
]


@pytest.mark.parametrize(("kind", "row", "column", "value", "rule"), ROW_CASES,
                         ids=[f"{k}-{c}-{v}" for k, _, c, v, _ in ROW_CASES])
def test_each_rule_rejects_exactly_the_bad_row(desk: Path, kind: str, row: int, column: str, value: object,
                                               rule: str) -> None:
    """One broken row gives one rejected ledger row (file, key, rule, value in the detail); the rest stay."""
    rows = _rows(desk, kind)
    rows[row][column] = value
    _put(desk, kind, rows)
    night, ledger = _clean(desk)
    assert len(ledger) == 1, ledger.to_string()
    found = ledger.iloc[0]
    assert found["file"] == str(folder_for(desk, RUN) / f"{kind}.parquet")
    key = rows[row][KEY_COLUMN[kind]]
    assert found["key"] == (f"(null) row {row}" if key is None else key)
    assert (found["rule"], found["severity"]) == (rule, REJECTED)
    assert column in found["detail"]
    expected = len(rows) - 1 + (1 if kind == "fx_rates" and row == 0 else 0)  # USD is 1 by definition
    assert _size(night, kind) == expected


def test_rejected_position_is_listed_with_its_book_and_rule(desk: Path) -> None:
    """A position rejected by a row rule is handed on (trade_id, book, rule) for the other date's leg."""
    rows = _rows(desk, "positions")
    rows[2]["quantity"] = NAN
    _put(desk, "positions", rows)
    night, _ = _clean(desk)
    assert night.rejected_trades.to_dict("records") == [
        {"trade_id": "T3", "book": "Euro single names", "rule": "quantity is not a finite number"}]
    assert "T3" not in set(night.positions["trade_id"])


def test_null_trade_id_is_not_handed_on_as_a_trade(desk: Path) -> None:
    """A row without a trade_id is rejected under a row key, and is no trade for the other date to match."""
    rows = _rows(desk, "positions")
    rows[4]["trade_id"] = None
    _put(desk, "positions", rows)
    night, ledger = _clean(desk)
    assert ledger["key"].tolist() == ["(null) row 4"]
    assert night.rejected_trades.empty


@pytest.mark.parametrize(("kind", "row"), [("positions", 0), ("instruments", 1), ("option_marks", 3),
                                            ("underlying_marks", 0), ("fx_rates", 1)])
def test_duplicate_key_rejects_every_copy(desk: Path, kind: str, row: int) -> None:
    """A key twice in a file rejects both copies (even when one copy also breaks another rule)."""
    rows = _rows(desk, kind)
    copy = dict(rows[row])
    rows.append(copy)
    _put(desk, kind, rows)
    night, ledger = _clean(desk)
    key = rows[row][KEY_COLUMN[kind]]
    assert ledger["key"].tolist() == [key, key]
    assert set(ledger["rule"]) == {f"duplicate {KEY_COLUMN[kind]}"}
    assert _size(night, kind) == len(rows) - 2 + (1 if kind == "fx_rates" and key == "USD" else 0)


def test_duplicate_with_one_bad_copy_still_rejects_both(desk: Path) -> None:
    """Of two copies of a trade, the one breaking a rule is rejected for it and the other as a duplicate."""
    rows = _rows(desk, "positions")
    bad = dict(rows[0], book=None)
    rows.append(bad)
    _put(desk, "positions", rows)
    night, ledger = _clean(desk)
    assert sorted(ledger["rule"]) == ["book is null", "duplicate trade_id"]
    assert set(ledger["key"]) == {"T1"}
    assert "T1" not in set(night.positions["trade_id"])


def test_values_the_contract_allows_are_kept(desk: Path) -> None:
    """Quantity 0 (flat), null trade_price, null implied_vol, price 0, negative rates and yields pass."""
    pos = _rows(desk, "positions")
    pos[0]["quantity"], pos[0]["trade_price"] = 0.0, None
    _put(desk, "positions", pos)
    marks = _rows(desk, "option_marks")
    marks[0]["implied_vol"], marks[1]["price"] = None, 0.0
    _put(desk, "option_marks", marks)
    und = _rows(desk, "underlying_marks")
    und[0]["dividend_yield"] = -0.01
    _put(desk, "underlying_marks", und)
    _put(desk, "rate_curves", [{"currency": "USD", "tenor_years": 0.0, "zero_rate": -0.005},
                               {"currency": "EUR", "tenor_years": 1.0, "zero_rate": 0.02}])
    night, ledger = _clean(desk)
    assert ledger.empty
    assert len(night.positions) == len(pos) and len(night.marks) == len(marks) and len(night.curves) == 2


def test_curve_with_a_bad_point_is_left_out_whole(desk: Path) -> None:
    """A curve point breaking a rule rejects it and every other point of that currency's curve, by name."""
    _put(desk, "rate_curves", [
        {"currency": "USD", "tenor_years": 0.5, "zero_rate": 0.039},
        {"currency": "USD", "tenor_years": 1.0, "zero_rate": NAN},
        {"currency": "USD", "tenor_years": 2.0, "zero_rate": 0.043},
        {"currency": "EUR", "tenor_years": 1.0, "zero_rate": 0.021},
        {"currency": "EUR", "tenor_years": -1.0, "zero_rate": 0.021},
        {"currency": "GBP", "tenor_years": 1.0, "zero_rate": 0.03},
    ])
    night, ledger = _clean(desk)
    assert night.curves["currency"].tolist() == ["GBP"]
    got = dict(zip(ledger["key"], ledger["rule"], strict=True))
    assert got == {"USD @ 1.0y": "zero_rate is not a finite number", "EUR @ -1.0y": "tenor_years must be >= 0",
                   "USD @ 0.5y": "curve has a rejected point", "USD @ 2.0y": "curve has a rejected point",
                   "EUR @ 1.0y": "curve has a rejected point"}


def test_percent_scaled_zero_rate_rejects_its_curve(desk: Path) -> None:
    """A zero rate of 4 (meant 0.04) is beyond the +-100 % check: that curve is left out, named by point."""
    _put(desk, "rate_curves", [
        {"currency": "USD", "tenor_years": 1.0, "zero_rate": 4.0},
        {"currency": "USD", "tenor_years": 2.0, "zero_rate": 0.041},
        {"currency": "EUR", "tenor_years": 1.0, "zero_rate": 0.021},
    ])
    night, ledger = _clean(desk)
    assert night.curves["currency"].tolist() == ["EUR"]
    got = dict(zip(ledger["key"], ledger["rule"], strict=True))
    assert got == {"USD @ 1.0y": "zero_rate is absurd", "USD @ 2.0y": "curve has a rejected point"}
    assert "rates are decimals" in ledger.set_index("key").loc["USD @ 1.0y", "detail"]


def test_duplicate_curve_point_and_null_currency(desk: Path) -> None:
    """Two points at one tenor reject that curve; a point without currency is rejected on its own."""
    _put(desk, "rate_curves", [
        {"currency": "USD", "tenor_years": 1.0, "zero_rate": 0.04},
        {"currency": "USD", "tenor_years": 1.0, "zero_rate": 0.05},
        {"currency": None, "tenor_years": 1.0, "zero_rate": 0.05},
        {"currency": "EUR", "tenor_years": 1.0, "zero_rate": 0.021},
    ])
    night, ledger = _clean(desk)
    assert night.curves["currency"].tolist() == ["EUR"]
    assert sorted(ledger["rule"]) == ["currency is null", "duplicate point", "duplicate point"]


def test_absent_fx_file_means_only_the_reporting_currency(desk: Path) -> None:
    """Without fx_rates.parquet the only rate is the reporting currency's own, 1."""
    (folder_for(desk, RUN) / "fx_rates.parquet").unlink()
    night, ledger = _clean(desk)
    assert ledger.empty
    assert night.fx.to_dict() == {"USD": 1.0}


def test_quantity_limit_follows_the_job_setting(desk: Path) -> None:
    """The absurd-quantity threshold is the job's max_abs_quantity, not a constant."""
    night, ledger = _clean(desk, CheckSettings(max_abs_quantity=15.0))
    assert sorted(ledger["key"]) == ["T3"]  # quantity 20 > 15; the others are at most 10
    assert "above 15" in ledger["detail"].iloc[0]
    assert len(night.positions) == 5


def test_a_row_breaking_two_rules_gets_one_row(desk: Path) -> None:
    """The first rule a row breaks is its reason; it is not listed twice."""
    rows = _rows(desk, "instruments")
    rows[0]["strike"], rows[0]["option_type"] = -1.0, "Call"
    _put(desk, "instruments", rows)
    _, ledger = _clean(desk)
    assert ledger[["key", "rule"]].values.tolist() == [["ZEN-C100-J27", "option_type must be call or put"]]


@given(st.lists(st.text(alphabet=st.sampled_from(" \t\n\r\x0b\x0c\x1c\x1f\x85\xa0\u2028\u3000\u200b\x00aZ9-"),
                        max_size=4), max_size=30))
def test_blank_keys_read_as_numpy_text_reads_them(values):
    """A key is blank (README, "Input files": null or blank keys are rejected) exactly when its fixed-width
    numpy text is empty or all white space, trailing NUL characters included (the rule's first form)."""
    text = np.array(values, dtype=object)
    as_str = text.astype(str) if len(values) else np.zeros(0, dtype=str)
    expected = (np.strings.str_len(as_str) == 0) | np.strings.isspace(as_str)
    assert (_blank_text(text) == expected).all()


def test_keys_repeated_by_a_dictionary_read_are_checked_per_row(tmp_path):
    """Blank and duplicate keys are found per row when the file stores its text as a dictionary
    (every row holding one of the distinct values)."""
    root = write_mini_desk(tmp_path)
    rows = _rows(root, "positions")
    rows[1]["book"] = "   "
    rows[2]["trade_id"] = rows[3]["trade_id"]
    pq.write_table(table("positions", rows), folder_for(root, RUN) / "positions.parquet", use_dictionary=True)
    _, ledger = _clean(root)
    rejected = ledger[ledger["file"].str.endswith("positions.parquet")]
    assert sorted(rejected["rule"]) == ["book is null", "duplicate trade_id", "duplicate trade_id"]
    assert set(rejected["key"]) == {rows[1]["trade_id"], rows[3]["trade_id"]}
