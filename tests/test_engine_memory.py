"""attribution.engine: what a night holds at once. The run date's trade ids share the prior date's string objects,
and the two dates' position rows are let go before the book sums; the figures are those of the files (the values
compared with the files as read, pyarrow.parquet being the reference reader)."""

from __future__ import annotations

import gc
import weakref
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

import attribution.engine as engine_module
from attribution.config import JobConfig
from attribution.engine import prepare_night
from attribution.loading import folder_for
from attribution.synthetic import write_synthetic_night


@pytest.fixture()
def synthetic(tmp_path: Path):  # type: ignore[no-untyped-def]
    return write_synthetic_night(tmp_path / "data", positions=3_000, books=5, instruments=200, underlyings=8)


def _file_ids(data_root: Path, as_of: object) -> list[str]:
    table = pq.read_table(folder_for(data_root, as_of) / "positions.parquet", columns=["trade_id"])  # type: ignore[arg-type]
    return table.column("trade_id").to_pylist()


def test_run_date_trade_ids_are_the_prior_dates_strings(synthetic, monkeypatch: pytest.MonkeyPatch) -> None:
    """When the explain starts, a trade held over the night is one string object on both dates; every id still
    reads as its file's, and the archived rows carry the files' ids."""
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    seen = []
    rows = engine_module.position_rows

    def watched(legs, prior, run, *args, **kwargs):  # type: ignore[no-untyped-def]
        seen.append((prior.positions["trade_id"].to_numpy(dtype=object).copy(),
                     run.positions["trade_id"].to_numpy(dtype=object).copy(),
                     run.raw.tables["positions.parquet"]["trade_id"].to_numpy(dtype=object).copy()))
        return rows(legs, prior, run, *args, **kwargs)

    monkeypatch.setattr(engine_module, "position_rows", watched)
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


def test_book_sums_run_without_the_position_rows(synthetic, monkeypatch: pytest.MonkeyPatch) -> None:
    """By the time the book rows are summed, both dates' position frames (as read) are freed; the book rows are
    the sums of the archived rows (pandas' groupby, a reference library, on the night's own position rows)."""
    config = JobConfig(data_root=synthetic.data_root, write_reports=False)
    frames: list[weakref.ref] = []
    read = engine_module.read_night
    book_frame = engine_module.book_frame
    alive: list[int] = []

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
    night = prepare_night(config, synthetic.run)
    assert len(frames) == 2 and alive == [0]
    sums = night.positions.groupby("book")["pnl_actual"].sum()
    got = night.books.set_index("book")["pnl_actual"].reindex(sums.index)
    np.testing.assert_allclose(got.to_numpy(float), sums.to_numpy(float), rtol=1e-12, atol=1e-9)
