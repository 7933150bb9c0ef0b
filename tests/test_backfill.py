"""A backfill's nights computed by worker processes archive exactly what the backfill's own process does
(README, "Commands": `attribution backfill` and the job key `backfill_processes`)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import sys
from pathlib import Path

import duckdb
import pandas as pd
import pytest

import attribution.archive as archive_module
import attribution.backfill as backfill_module
from attribution.archive import BookHistory, quality_series
from attribution.backfill import backfill, night_blocks, started_workers, worker_plan
from attribution.config import ConfigError, JobConfig, validate
from attribution.engine import ArchiveRows, open_archive, run_night
from attribution.loading import InputFileError
from attribution.schema import TABLES
from tests.demo_week import demo_week


@pytest.fixture(scope="module")
def desk(tmp_path_factory: pytest.TempPathFactory) -> tuple[JobConfig, list[dt.date]]:
    """The demo desk's first six business days (tests/demo_week.py)."""
    return demo_week(tmp_path_factory.mktemp("backfill"))


def _tables(path: Path) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        out = {}
        for name in ("position_pnl", "book_pnl", "book_quality", "input_exceptions", "dividend_schedule"):
            frame = con.execute(f"SELECT * FROM {name}").df()  # names from this list, not from input
            out[name] = frame.drop(columns=[c for c in frame.columns if c == "run_id"])
        out["runs"] = con.execute("SELECT as_of, prior_as_of, positions_in, positions_archived, positions_rejected, "
                                  "warnings, book_breaches, position_breaches, exit_code FROM runs").df()
        return out
    finally:
        con.close()


def test_worker_processes_archive_what_one_process_does(desk, tmp_path, monkeypatch):
    """Five nights in blocks of two over two worker processes: every archived table equal, row order included,
    to the last bit, and the same closing lines, as the backfill computing every night itself."""
    config, dates = desk
    monkeypatch.setattr(backfill_module, "BLOCK_NIGHTS", 2)
    from_workers = []
    computed_elsewhere = backfill_module._prepared_elsewhere

    def counted(*args, **kwargs):
        for night in computed_elsewhere(*args, **kwargs):
            assert isinstance(night, ArchiveRows)  # Arrow rows and figures, no pandas frame to unpickle
            from_workers.append(night.as_of)
            yield night

    monkeypatch.setattr(backfill_module, "_prepared_elsewhere", counted)
    lines: dict[int, list[str]] = {1: [], 2: []}
    for processes in (1, 2):
        run = dataclasses.replace(config, archive_path=tmp_path / f"p{processes}.duckdb", backfill_processes=processes)
        assert worker_plan(run, dates[1:]) == (processes, 2)
        backfill(run, dates[1], dates[-1], reports_last=0, echo=lines[processes].append)
    assert from_workers == dates[1:]  # every night of the second backfill came from a worker, in date order
    one, two = _tables(tmp_path / "p1.duckdb"), _tables(tmp_path / "p2.duckdb")
    assert len(one["runs"]) == len(dates) - 1
    for name in one:
        pd.testing.assert_frame_equal(one[name], two[name], check_exact=True, obj=name)
    assert [line.split("  seconds")[0] for line in lines[1]] == [line.split("  seconds")[0] for line in lines[2]]


def test_workers_started_ahead_archive_the_same(desk, tmp_path, monkeypatch):
    """Workers started before the backfill (the demo starts them while it writes its data) compute every night,
    and the archive is the one a backfill starting its own workers writes, to the last bit."""
    config, dates = desk
    monkeypatch.setattr(backfill_module, "BLOCK_NIGHTS", 2)
    own = dataclasses.replace(config, archive_path=tmp_path / "own.duckdb", backfill_processes=2)
    backfill(own, dates[1], dates[-1], reports_last=0, echo=lambda _: None)
    ahead = dataclasses.replace(own, archive_path=tmp_path / "ahead.duckdb")
    calls = []
    monkeypatch.setattr(backfill_module, "run_night", lambda *a, **k: calls.append(a))  # no night computed here
    with started_workers(2) as workers:
        assert workers is not None
        backfill(ahead, dates[1], dates[-1], reports_last=0, echo=lambda _: None, workers=workers)
    assert calls == []
    one, two = _tables(own.archive_path), _tables(ahead.archive_path)
    for name in one:
        pd.testing.assert_frame_equal(one[name], two[name], check_exact=True, obj=name)
    with started_workers(1) as none:
        assert none is None  # one process: nothing started


def test_night_blocks_end_small():
    """Blocks are consecutive and cover every night once; the last processes x block nights come in blocks of a
    quarter the size, so that the workers finish together and little is left to archive after them."""
    nights = [dt.date(2026, 1, 1) + dt.timedelta(days=k) for k in range(260)]
    blocks = night_blocks(nights, 16, 2)
    assert [d for b in blocks for d in b] == nights
    assert [len(b) for b in blocks] == [16] * 14 + [4] + [4] * 8
    assert [len(b) for b in night_blocks(nights[:20], 16, 2)] == [4] * 5  # all of a short range is tail
    assert [len(b) for b in night_blocks(nights[:40], 16, 1)] == [16, 16, 8]  # one process: no tail
    assert [len(b) for b in night_blocks(nights[:5], 2, 2)] == [1] * 5
    assert [len(b) for b in night_blocks(nights[:50], 16, 2)] == [16, 2, 4, 4, 4, 4, 4, 4, 4, 4]


def test_a_night_a_worker_cannot_compute_fails_as_in_one_process(desk, tmp_path, monkeypatch):
    """A damaged file on the fourth date: the nights before it are archived and the backfill stops with the
    same message as without workers (the backfill's own process runs that night again)."""
    config, dates = desk
    data = tmp_path / "data"
    for folder in config.data_root.iterdir():
        (data / folder.name).mkdir(parents=True)
        for f in folder.iterdir():
            (data / folder.name / f.name).write_bytes(f.read_bytes())
    (data / f"as_of={dates[3].isoformat()}" / "positions.parquet").write_bytes(b"not a parquet file")
    monkeypatch.setattr(backfill_module, "BLOCK_NIGHTS", 2)
    messages = {}
    for processes in (1, 2):
        run = dataclasses.replace(config, data_root=data, archive_path=tmp_path / f"p{processes}.duckdb",
                                  backfill_processes=processes)
        with pytest.raises(InputFileError) as failure:
            backfill(run, dates[1], dates[-1], reports_last=0, echo=lambda _: None)
        messages[processes] = str(failure.value)
        assert list(_tables(run.archive_path)["runs"]["as_of"].dt.date) == dates[1:3]
    assert messages[1] == messages[2] and "positions.parquet" in messages[1]


def test_how_many_workers(desk, tmp_path, monkeypatch):
    """One per available core by default, never more than the blocks of nights; none for a short range, with
    backfill_processes = 1, or on the Dask engine; blocks hold at most BLOCK_POSITIONS positions, and nights above
    LARGEST_NIGHT positions are computed in the backfill's own process; a negative count is refused naming the key."""
    config, dates = desk
    blocks = backfill_module.BLOCK_NIGHTS
    last = dates[-1]
    assert worker_plan(config, [last] * (blocks - 1))[0] == 1
    assert worker_plan(dataclasses.replace(config, backfill_processes=1), [last] * 100 * blocks)[0] == 1
    assert worker_plan(dataclasses.replace(config, backfill_processes=3), [last] * 2 * blocks) == (2, blocks)
    assert worker_plan(dataclasses.replace(config, engine="dask"), [last] * 100 * blocks)[0] == 1
    rows = len(pd.read_parquet(config.data_root / f"as_of={last.isoformat()}" / "positions.parquet"))
    monkeypatch.setattr(backfill_module, "BLOCK_POSITIONS", 3 * rows)
    assert worker_plan(dataclasses.replace(config, backfill_processes=2), [last] * 100) == (2, 3)
    monkeypatch.setattr(backfill_module, "LARGEST_NIGHT", rows - 1)
    assert worker_plan(dataclasses.replace(config, backfill_processes=2), [last] * 100)[0] == 1
    unreadable = dataclasses.replace(config, data_root=tmp_path, backfill_processes=2)
    assert worker_plan(unreadable, [last] * 100)[0] == 1  # the night itself reports the missing folder
    with pytest.raises(ConfigError, match="backfill_processes"):
        validate(dataclasses.replace(config, backfill_processes=-1))


def test_workers_do_not_run_the_callers_main_script_again():
    """While workers start, the caller's main module has no file or spec to re-run; both come back after."""
    main = sys.modules["__main__"]
    before = (main.__dict__.get("__file__"), main.__dict__.get("__spec__"))
    with backfill_module._main_not_inherited():
        assert getattr(main, "__file__", None) is None and main.__spec__ is None
    assert (main.__dict__.get("__file__"), main.__dict__.get("__spec__")) == before


def test_the_sessions_book_history_is_what_the_quality_query_reads(desk, tmp_path):
    """Each night's quality test reads the book rows held in memory by the backfill's session: for every archived
    date, those rows (with the date's own rows as tonight's) equal the query's, to the bit and in its order."""
    config, dates = desk
    run = dataclasses.replace(config, archive_path=tmp_path / "a.duckdb", backfill_processes=1)
    backfill(run, dates[1], dates[-1], reports_last=0, echo=lambda _: None)
    columns = ", ".join(f'"{name}"' for name, _ in TABLES["book_pnl"])
    with duckdb.connect(str(run.archive_path), read_only=True) as con:
        history = BookHistory(con)
        for day in dates[1:]:
            tonight = con.sql(f"SELECT {columns} FROM book_pnl WHERE as_of = ?", params=[day]).to_arrow_table()
            held = history.series(day, tonight).frame()
            pd.testing.assert_frame_equal(held, quality_series(con, day), check_exact=True,
                                          check_dtype=False)  # the same values; books as objects or as text
        assert len(quality_series(con, dates[-1])) > len(dates)  # several books, several nights


def test_a_night_that_fails_to_archive_leaves_the_sessions_book_history_as_the_archive(desk, tmp_path, monkeypatch):
    """A night whose write fails (rolled back) adds nothing to the book history the session keeps for the quality
    test: the later nights' quality rows are those of runs that never tried that night."""
    config, dates = desk
    failing, night = dates[3], archive_module._insert

    def insert(con, table, rows):
        if table == "runs" and pd.Timestamp(rows.column("as_of")[0].as_py()).date() == failing:
            raise RuntimeError("injected failure inserting the run record")
        night(con, table, rows)

    kept = dataclasses.replace(config, archive_path=tmp_path / "session.duckdb")
    with open_archive(kept) as session:
        for day in dates[1:]:
            if day == failing:
                monkeypatch.setattr(archive_module, "_insert", insert)
                with pytest.raises(RuntimeError, match="injected failure"):
                    run_night(kept, day, session=session)
                monkeypatch.setattr(archive_module, "_insert", night)
            else:
                run_night(kept, day, session=session)
    fresh = dataclasses.replace(config, archive_path=tmp_path / "fresh.duckdb")
    for day in dates[1:]:
        if day != failing:
            run_night(fresh, day)  # a session of its own each night: the history read from the archive
    one, two = _tables(kept.archive_path), _tables(fresh.archive_path)
    assert failing not in set(one["runs"]["as_of"].dt.date)
    pd.testing.assert_frame_equal(one["book_quality"], two["book_quality"], check_exact=True)
