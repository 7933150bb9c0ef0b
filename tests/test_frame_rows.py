"""attribution.frame_rows: rows taken and appended a column at a time give pandas' own result, never holding the
frame twice."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pandas as pd

from attribution.frame_rows import moved_rows

ROWS = 200_000
FLOAT_COLUMNS = 16


def _night(rows: int = 8) -> pd.DataFrame:
    """A frame with the kinds of column a night's rows have: amounts (NaN among them), text (None among them), a
    date repeated from a scalar, expiries in seconds."""
    rng = np.random.default_rng(5)
    amounts = {f"pnl_{k}": rng.normal(size=rows) for k in range(3)}
    amounts["pnl_0"][1] = np.nan
    return pd.DataFrame({
        "as_of": pd.Timestamp("2026-11-27"), "trade_id": np.array([f"T{k}" for k in range(rows)], dtype=object),
        "flags": np.array(["", "stale_mark", None, ""] * (rows // 4), dtype=object),
        "expiry": np.full(rows, np.datetime64("2027-03-19", "D")).astype("datetime64[s]"), **amounts},
        index=pd.RangeIndex(rows))


def _cash_rows(night: pd.DataFrame) -> pd.DataFrame:
    """Two appended rows built as the book cash rows are: None text, NaT expiry, 0.0 amounts."""
    extra = pd.DataFrame({name: pd.Series([None] * 2, dtype=object) for name in night.columns})
    for name in night.columns:
        if name.startswith("pnl_"):
            extra[name] = 0.0
    extra["as_of"] = night["as_of"].iloc[0]
    extra["expiry"] = pd.NaT
    extra["trade_id"] = np.array(["CASH:A", "CASH:B"], dtype=object)
    return extra[night.columns]


def test_kept_rows_are_those_of_loc() -> None:
    keep = np.array([True, False, True, True, False, True, True, True])
    expected = _night().loc[keep].reset_index(drop=True)
    pd.testing.assert_frame_equal(moved_rows(_night(), keep), expected, check_exact=True)


def test_appended_rows_are_those_of_concat() -> None:
    night = _night()
    expected = pd.concat([night, _cash_rows(night)], ignore_index=True)
    pd.testing.assert_frame_equal(moved_rows(_night(), extra=_cash_rows(night)), expected, check_exact=True)


def test_kept_then_appended() -> None:
    keep = np.arange(8) % 3 != 0
    night = _night()
    expected = pd.concat([night.loc[keep], _cash_rows(night)], ignore_index=True)
    pd.testing.assert_frame_equal(moved_rows(_night(), keep, _cash_rows(night)), expected, check_exact=True)


def test_the_old_frame_is_emptied() -> None:
    night = _night()
    moved_rows(night, extra=_cash_rows(_night()))
    assert list(night.columns) == []


def _peak_above_start(step) -> float:
    """MB allocated at the highest point of ``step(frame)`` above what the frame itself holds (numpy's buffers are
    traced: numpy reports them to tracemalloc)."""
    tracemalloc.start()
    try:
        frame = pd.DataFrame({f"c{k}": np.ones(ROWS) for k in range(FLOAT_COLUMNS)}, copy=False)
        held, _ = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        result = step(frame)
        del frame
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert len(result) == ROWS + 1
    return (peak - held) / 2**20


def test_a_row_appended_holds_one_column_twice_not_the_frame() -> None:
    frame_mb = ROWS * 8 * FLOAT_COLUMNS / 2**20  # 24.4 MB
    extra = pd.DataFrame({f"c{k}": [0.0] for k in range(FLOAT_COLUMNS)})
    # the premise: pandas' concat holds a second copy of every column while the first is still held
    assert _peak_above_start(lambda f: pd.concat([f, extra], ignore_index=True)) > 0.9 * frame_mb
    assert _peak_above_start(lambda f: moved_rows(f, extra=extra)) < 0.25 * frame_mb
