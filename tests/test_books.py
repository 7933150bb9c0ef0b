"""Book aggregation and conservation (attribution.books) on small hand-made frames.

The expected figures are worked out by hand from the rows below: sums, counts and the limit rules
of README.md, "Residual limits" (the same rules as attribution.controls).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from attribution.books import (
    NO_BOOK,
    book_frame,
    conservation,
    position_books,
    position_limit_states,
    rejected_positions,
)
from attribution.config import JobConfig, LimitSettings
from attribution.contract import NULL_KEY
from attribution.exceptions_log import REJECTED, WARNING
from attribution.keys import NightTrades, encode
from attribution.loading import RawNight
from attribution.schema import BOOK_PNL, EXPOSURE_COLUMNS, PNL_COLUMNS, REVAL_COLUMNS, V2_AMOUNT_COLUMNS

PRIOR, RUN = dt.date(2026, 3, 5), dt.date(2026, 3, 6)


def raw(as_of: dt.date, trade_ids: list[str | None], books: list[str | None]) -> RawNight:
    """A date's positions file only (the functions here read no other file)."""
    positions = pd.DataFrame({"trade_id": pd.Series(trade_ids, dtype=object), "book": pd.Series(books, dtype=object)})
    return RawNight(as_of, Path(f"data/as_of={as_of}"), {"positions.parquet": positions}, {})


def ledger(rows: list[tuple[str, str, str]], keyless: list[bool] | None = None) -> pd.DataFrame:
    """Exception rows (file, key, severity) as the exception log frames them, with its keyless flag
    (by default: the keys written as a keyless row's key)."""
    flags = keyless if keyless is not None else [r[1].startswith(NULL_KEY) for r in rows]
    return pd.DataFrame({"as_of": RUN, "file": [r[0] for r in rows], "key": [r[1] for r in rows],
                         "rule": "a rule", "detail": "", "severity": [r[2] for r in rows], "keyless": flags})


def positions(rows: list[dict[str, object]]) -> pd.DataFrame:
    """Archived position rows: every amount zero and the revaluation shares NULL (method off) unless given."""
    amounts = (*PNL_COLUMNS, *EXPOSURE_COLUMNS, *V2_AMOUNT_COLUMNS)
    base = {"instrument_id": "X", "status": "carried", "limit_state": "within", **dict.fromkeys(amounts, 0.0),
            **dict.fromkeys(REVAL_COLUMNS, np.nan)}
    return pd.DataFrame([{**base, **r} for r in rows])


RAW0 = raw(PRIOR, ["T1", "T2", None], ["alpha", "alpha", "beta"])
RAW1 = raw(RUN, ["T1", "T3", None], ["alpha", "beta", "gamma"])
POS0, POS1 = "data/as_of=2026-03-05/positions.parquet", "data/as_of=2026-03-06/positions.parquet"


def test_position_books_names_the_book_of_each_row_about_a_position():
    """A keyed row takes its trade's book (run date first), a keyless row its own row's book, other files none."""
    out = position_books(RAW0, RAW1, ledger([
        (POS1, "T3", REJECTED), (POS0, "T2", REJECTED), (POS1, "T9", REJECTED),
        (POS0, f"{NULL_KEY}2", REJECTED), (POS1, f"{NULL_KEY}2", WARNING),
        ("data/as_of=2026-03-06/option_marks.parquet", "OPT1", WARNING)]))
    assert out["book"].tolist()[:5] == ["beta", "alpha", NO_BOOK, "beta", "gamma"]
    assert out["position"].tolist()[:5] == ["T3", "T2", "T9", f"{POS0}#{NULL_KEY}2", f"{POS1}#{NULL_KEY}2"]
    assert out[["book", "position"]].iloc[5].isna().all()


def test_a_trade_id_that_reads_like_a_keyless_key_is_a_trade():
    """The keyless flag, not the key text, makes a row keyless: a trade named "(null) row 7" keeps its name."""
    named = f"{NULL_KEY}7"
    raw1 = raw(RUN, ["T1", named], ["alpha", "beta"])
    out = position_books(RAW0, raw1, ledger([(POS1, named, REJECTED)], keyless=[False]))
    assert out[["book", "position"]].values.tolist() == [["beta", named]]
    assert "keyless" not in out.columns


def test_rejected_positions_counts_each_rejected_position_once():
    """Two rejections of one trade are one rejected position; warnings and other files are not positions."""
    out = rejected_positions(position_books(RAW0, RAW1, ledger([
        (POS1, "T3", REJECTED), (POS1, "T3", REJECTED), (POS1, "T1", WARNING),
        ("data/as_of=2026-03-06/option_marks.parquet", "OPT1", REJECTED)])))
    assert out.to_dict("records") == [{"book": "beta", "position": "T3"}]


def test_conservation_counts_distinct_trades_and_keyless_rows_and_names_the_missing():
    """Positions in = distinct trades over both dates + keyless rows; any neither archived nor rejected is named."""
    rejected = pd.DataFrame({"book": ["beta"], "position": ["T3"]})
    count, missing = conservation(RAW0, RAW1, pd.Series(["T1"]), rejected)
    assert count == 3 + 2  # T1, T2, T3 and one keyless row on each date
    assert missing == ("T2",)
    assert conservation(RAW0, RAW1, pd.Series(["T1", "T2"]), rejected)[1] == ()


def test_conservation_on_the_trade_ids_coded_where_read_counts_the_same():
    """With the two files' trade ids coded and matched once (attribution.keys.NightTrades), the count and the
    trades named are the same as from the Python strings: distinct ids over both dates, keyless rows, the
    missing ones sorted (and a cash row's id, in no file, changes nothing)."""
    ids = [raw.tables["positions.parquet"]["trade_id"].tolist() for raw in (RAW0, RAW1)]
    trades = NightTrades.of(encode(pa.array(ids[0], pa.string())), encode(pa.array(ids[1], pa.string())))
    assert trades is not None
    rejected = pd.DataFrame({"book": ["beta"], "position": ["T3"]})
    for archived in (["T1"], [], ["T2", "(cash) alpha"], ["T1", "T2"]):
        assert conservation(RAW0, RAW1, pd.Series(archived, dtype=object), rejected, trades) == \
            conservation(RAW0, RAW1, pd.Series(archived, dtype=object), rejected)
    assert conservation(RAW0, RAW1, pd.Series([], dtype=object), rejected.iloc[:0], trades) == (5, ("T1", "T2", "T3"))


def test_conservation_on_the_distinct_ids_alone_needs_no_position_rows():
    """With only the two files' distinct ids (NightTrades.count), the count and the missing trades are those of the
    rows as read, also when an archived id is not text (compared as pandas compares it); the position rows may be
    gone by then."""
    ids = [raw.tables["positions.parquet"]["trade_id"].tolist() for raw in (RAW0, RAW1)]
    trades = NightTrades.of(encode(pa.array(ids[0], pa.string())), encode(pa.array(ids[1], pa.string())))
    assert trades is not None
    count = trades.count()
    gone = [dataclasses.replace(raw, tables={}) for raw in (RAW0, RAW1)]
    rejected = pd.DataFrame({"book": ["beta"], "position": ["T3"]})
    for archived in (["T1"], ["T2", 7], ["T1", "T2"], [None, "T1"]):
        assert conservation(gone[0], gone[1], pd.Series(archived, dtype=object), rejected, count) == \
            conservation(RAW0, RAW1, pd.Series(archived, dtype=object), rejected)


def test_position_limit_states_use_each_books_own_limit():
    """A per-book override changes the position limit of that book only (breach above, watch from the fraction)."""
    config = JobConfig(limits=LimitSettings(position_abs=100.0, watch_fraction=0.8),
                       book_limits=(("wide", LimitSettings(position_abs=1_000.0, watch_fraction=0.8)),))
    frame = pd.DataFrame({"book": ["narrow", "narrow", "narrow", "wide"],
                          "pnl_residual": [-50.0, 85.0, -101.0, 850.0]})
    assert position_limit_states(frame, config).tolist() == ["within", "watch", "breach", "watch"]


def test_book_frame_sums_counts_and_applies_the_book_limits():
    """Sums and status counts per book; a book with only rejected rows gets a row; limits and warnings by book."""
    config = JobConfig(limits=LimitSettings(residual_abs=1_000.0, residual_rel=0.10, relative_floor=1e12,
                                            position_abs=500.0, watch_fraction=0.8))
    pos = positions([
        {"book": "alpha", "trade_id": "T1", "instrument_id": "OPT1", "pnl_actual": 100.0, "pnl_residual": 900.0},
        {"book": "alpha", "trade_id": "T2", "status": "new", "pnl_actual": 50.0, "pnl_residual": 300.0},
        {"book": "beta", "trade_id": "T4", "pnl_actual": -20.0, "pnl_residual": 10.0, "limit_state": "breach"},
    ])
    exceptions = ledger([("data/as_of=2026-03-06/option_marks.parquet", "OPT1", WARNING)])
    rejected = pd.DataFrame({"book": ["gamma", "gamma"], "position": ["T7", "T8"]})
    whole = book_frame(pos, exceptions, rejected, config, RUN, PRIOR)
    assert list(whole.columns) == [name for name, _ in BOOK_PNL]
    assert whole["book"].tolist() == ["alpha", "beta", "gamma"]
    frame = whole.set_index("book")
    assert frame.loc["alpha", "pnl_actual"] == pytest.approx(150.0)
    assert frame.loc["alpha", "pnl_residual"] == pytest.approx(1_200.0)
    assert (frame.loc["alpha", "positions"], frame.loc["alpha", "carried"], frame.loc["alpha", "new"]) == (2, 1, 1)
    assert frame.loc["alpha", "limit_state"] == "breach"  # |1,200| above the 1,000 absolute limit
    assert frame.loc["alpha", "warnings"] == 1 and frame.loc["beta", "warnings"] == 0
    assert frame.loc["beta", "limit_state"] == "watch"  # within its limit, but one position breaches
    assert frame.loc["beta", "position_breaches"] == 1
    assert (frame.loc["gamma", "positions"], frame.loc["gamma", "rejected"]) == (0, 2)
    assert frame.loc["gamma", "limit_state"] == "within"
    assert frame["residual_limit"].tolist() == [1_000.0] * 3
    assert np.isnan(frame["reval_spot"]).all()  # no revaluation share given: NULL, not zero
    assert (frame["as_of"] == pd.Timestamp(RUN)).all() and (frame["prior_as_of"] == pd.Timestamp(PRIOR)).all()


def test_book_sums_are_each_books_own_a_few_columns_at_a_time():
    """Each book's sums, taken a block of a few columns at a time (not one copy of every amount at once), are bit
    for bit those of the book's rows alone (a night split by book archives the same bits: README, "Running on a
    Dask cluster"), and agree with math.fsum (Python's correctly rounded sum, the reference) to 1e-12 of the sum
    of magnitudes; a book without revaluation shares stays NULL."""
    import math

    from attribution.group_sums import SUM_BLOCK_COLUMNS

    rng = np.random.default_rng(5)
    n = 20_000
    amounts = [*PNL_COLUMNS, *REVAL_COLUMNS, *EXPOSURE_COLUMNS, *V2_AMOUNT_COLUMNS]
    assert len(amounts) > 3 * SUM_BLOCK_COLUMNS  # several blocks
    book = rng.choice(["alpha", "beta", "gamma", "delta"], n).astype(object)
    values = rng.standard_normal((n, len(amounts))) * 10.0 ** rng.integers(-3, 9, (n, 1))  # rounding-sensitive sums
    pos = pd.DataFrame({"book": book, "trade_id": [f"T{k}" for k in range(n)], "instrument_id": "X",
                        "status": "carried", "limit_state": "within"})
    pos = pd.concat([pos, pd.DataFrame(values, columns=amounts)], axis=1)
    pos.loc[pos["book"] == "delta", list(REVAL_COLUMNS)] = np.nan
    no_rejects = pd.DataFrame({"book": [], "position": []})
    frame = book_frame(pos, ledger([]), no_rejects, JobConfig(), RUN, PRIOR)
    assert frame["book"].tolist() == ["alpha", "beta", "delta", "gamma"]
    for name in frame["book"]:
        mine = pos[pos["book"] == name].reset_index(drop=True)
        alone = book_frame(mine, ledger([]), no_rejects, JobConfig(), RUN, PRIOR)
        row = frame[frame["book"] == name].reset_index(drop=True)
        for column in amounts:
            if column == "delta_units":  # units of different underlyings: not summed per book (NULL)
                continue
            np.testing.assert_array_equal(row[column].to_numpy(), alone[column].to_numpy(), err_msg=column)
            if name != "delta" or column not in REVAL_COLUMNS:
                part = mine[column].to_numpy()
                assert abs(row[column].iloc[0] - math.fsum(part)) <= 1e-12 * np.abs(part).sum(), column
    assert np.isnan(frame.loc[frame["book"] == "delta", "reval_spot"]).all()
