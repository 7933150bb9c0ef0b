"""attribution.engine: what a night holds at once. The run date's trade ids share the prior date's string objects,
the two dates' position rows are let go before the explain and the book sums, and the matched legs before the rows'
last columns; the figures are those of the files (the values compared with the files as read, pyarrow.parquet being
the reference reader)."""

from __future__ import annotations

import gc
import sys
import tracemalloc
import weakref
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

import attribution.engine as engine_module
import attribution.night as night_module
from attribution.config import JobConfig
from attribution.contract import clean_night
from attribution.engine import prepare_night
from attribution.exceptions_log import ExceptionLog
from attribution.loading import folder_for, read_night
from attribution.synthetic import write_synthetic_night


@pytest.fixture()
def synthetic(tmp_path: Path):  # type: ignore[no-untyped-def]
    return write_synthetic_night(tmp_path / "data", positions=3_000, books=5, instruments=200, underlyings=8)


def _file_ids(data_root: Path, as_of: object) -> list[str]:
    table = pq.read_table(folder_for(data_root, as_of) / "positions.parquet", columns=["trade_id"])  # type: ignore[arg-type]
    return table.column("trade_id").to_pylist()


def test_run_date_trade_ids_are_the_prior_dates_strings(synthetic, monkeypatch: pytest.MonkeyPatch) -> None:
    """When the rows' columns are gathered from the files, a trade held over the night is one string object on both
    dates; every id still reads as its file's, and the archived rows carry the files' ids."""
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    seen = []
    gather = engine_module.file_columns

    def watched(legs, prior, run):  # type: ignore[no-untyped-def]
        seen.append((prior.positions["trade_id"].to_numpy(dtype=object).copy(),
                     run.positions["trade_id"].to_numpy(dtype=object).copy(),
                     run.raw.tables["positions.parquet"]["trade_id"].to_numpy(dtype=object).copy()))
        return gather(legs, prior, run)

    monkeypatch.setattr(engine_module, "file_columns", watched)
    night = prepare_night(config, synthetic.run)
    [(prior_ids, run_ids, run_file_ids)] = seen
    assert run_file_ids.tolist() == _file_ids(synthetic.data_root, synthetic.run)
    assert run_ids.tolist() == run_file_ids.tolist()  # no row of the synthetic night is rejected
    prior_object = {v: v for v in prior_ids}
    held = [v for v in run_ids if v in prior_object]
    assert len(held) > 2_000
    assert all(v is prior_object[v] for v in held)
    assert all(v is prior_object[v] for v in run_file_ids if v in prior_object)
    archived = set(night.positions["trade_id"])
    assert archived == set(_file_ids(synthetic.data_root, synthetic.prior)) | set(run_file_ids.tolist())


def test_explain_and_book_sums_run_without_the_position_rows(synthetic, monkeypatch: pytest.MonkeyPatch) -> None:
    """By the time the explain makes the rows, both dates' position frames (as read) are freed and no clean row is
    held; the book rows are the sums of the archived rows (pandas' groupby, a reference library, on the night's own
    position rows)."""
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    frames: list[weakref.ref] = []
    read = engine_module.read_night
    book_frame = engine_module.book_frame
    rows = engine_module.position_values
    alive: list[int] = []
    clean_rows: list[int] = []

    def explaining(legs, files, prior, run, *args, **kwargs):  # type: ignore[no-untyped-def]
        gc.collect()
        alive.append(sum(ref() is not None for ref in frames))
        clean_rows.append(len(prior.positions) + len(run.positions))
        return rows(legs, files, prior, run, *args, **kwargs)

    def reading(*args, **kwargs):  # type: ignore[no-untyped-def]
        raw = read(*args, **kwargs)
        frames.append(weakref.ref(raw.tables["positions.parquet"]))
        return raw

    def summing(*args, **kwargs):  # type: ignore[no-untyped-def]
        gc.collect()
        alive.append(sum(ref() is not None for ref in frames))
        return book_frame(*args, **kwargs)

    monkeypatch.setattr(engine_module, "read_night", reading)
    monkeypatch.setattr(engine_module, "book_frame", summing)
    monkeypatch.setattr(engine_module, "position_values", explaining)
    night = prepare_night(config, synthetic.run)
    assert len(frames) == 2 and alive == [0, 0] and clean_rows == [0]
    assert len(night.positions) > 2_900
    sums = night.positions.groupby("book")["pnl_actual"].sum()
    got = night.books.set_index("book")["pnl_actual"].reindex(sums.index)
    np.testing.assert_allclose(got.to_numpy(float), sums.to_numpy(float), rtol=1e-12, atol=1e-9)


def test_the_rows_kept_for_the_controls_let_the_others_go(tmp_path: Path) -> None:
    """What stays of a date's position rows for the controls is a copy of a few columns: the whole columns read
    (traced by tracemalloc, Python's own allocation tracer) are freed, the kept ones equal the file's."""
    synthetic = write_synthetic_night(tmp_path / "data", positions=40_000, books=5, instruments=300, underlyings=8)
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    tracemalloc.start()
    try:
        raw = read_night(synthetic.data_root, synthetic.run)
        clean = clean_night(raw, ExceptionLog(synthetic.run), config.checks, config.reporting_currency)
        gc.collect()
        held, _ = tracemalloc.get_traced_memory()
        rows = raw.tables["positions.parquet"]
        # the text columns left out: arrays of pointers numpy allocated (traced; numbers may be Arrow's memory)
        dropped = sum(rows[c].to_numpy().nbytes for c in rows.columns
                      if c not in engine_module.RUN_CONTROL_COLUMNS and rows[c].dtype == object)
        cut, cut_clean = engine_module._rows_for_controls(raw, clean, engine_module.RUN_CONTROL_COLUMNS)
        del raw, clean, rows
        gc.collect()
        left, _ = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert dropped > 500_000  # instrument_id and strategy (the synthetic date holds a few rows fewer than asked)
    assert held - left > dropped  # those, the codes and the clean rows: all gone (a view kept them whole)
    assert len(cut_clean.positions) == 0 and not cut_clean.position_keys and "positions.parquet" not in cut.keys
    kept = cut.tables["positions.parquet"]
    assert list(kept.columns) == list(engine_module.RUN_CONTROL_COLUMNS)
    assert kept["trade_id"].tolist() == _file_ids(synthetic.data_root, synthetic.run)


def test_the_legs_places_are_freed_before_the_rows_last_columns(synthetic, monkeypatch: pytest.MonkeyPatch) -> None:
    """The engine hands the matched legs and the files' columns over to the explain: when the rows' last columns are
    made, no one holds the legs' row places or the files' trade prices any more (only this test's own references)."""
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    kept: list[np.ndarray] = []
    counts: list[list[int]] = []
    gather = engine_module.file_columns
    within = night_module._within

    def gathering(legs, prior, run):  # type: ignore[no-untyped-def]
        files = gather(legs, prior, run)
        kept.extend([legs.row0, legs.row1, legs.inst0, files.trade_price1])
        return files

    def placeholder(n: int) -> np.ndarray:
        gc.collect()
        counts.append([sys.getrefcount(array) for array in kept])
        return within(n)

    monkeypatch.setattr(engine_module, "file_columns", gathering)
    monkeypatch.setattr(night_module, "_within", placeholder)
    night = prepare_night(config, synthetic.run)
    assert len(night.positions) > 2_900
    # each array: held by the list above, the loop's name and getrefcount's own argument, nothing else
    assert counts == [[3, 3, 3, 3]]
