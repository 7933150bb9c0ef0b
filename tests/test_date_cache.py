"""A backfill's shared work on each date (attribution.date_cache): every night it runs is exactly the night
a single ``attribution run`` computes (README, "Commands": a backfill reads, checks and prices each date once
for the two nights that use it, as long as the date's files are unchanged)."""

from __future__ import annotations

import dataclasses
import datetime as dt
from pathlib import Path

import duckdb
import pandas as pd
import pytest

import attribution.engine as engine_module
from attribution.backfill import backfill
from attribution.config import JobConfig
from attribution.date_cache import DateCache
from attribution.engine import PreparedNight, prepare_night
from attribution.runner import run_night
from tests.contract_files import put_rows, read_rows
from tests.demo_week import demo_week


@pytest.fixture(scope="module")
def desk(tmp_path_factory: pytest.TempPathFactory) -> tuple[JobConfig, list[dt.date]]:
    """The demo desk's first six business days (tests/demo_week.py)."""
    return demo_week(tmp_path_factory.mktemp("shared"))


def assert_same_night(shared: PreparedNight, fresh: PreparedNight) -> None:
    """Every table of the night identical, row order included, to the last bit."""
    for name in ("positions", "books", "exceptions", "dividend_schedule"):
        pd.testing.assert_frame_equal(getattr(shared, name), getattr(fresh, name), check_exact=True, obj=name)
    assert (shared.hashes, shared.positions_in, shared.rejected_positions, shared.unaccounted) == \
        (fresh.hashes, fresh.positions_in, fresh.rejected_positions, fresh.unaccounted)


def test_shared_nights_equal_fresh_nights(desk):
    """Each night of a range computed with the shared cache equals the same night computed alone, and the
    cache did serve the prior date's read, row rules and market on those nights."""
    config, dates = desk
    cache = DateCache()
    for day in dates[1:]:
        assert_same_night(prepare_night(config, day, cache=cache), prepare_night(config, day))
    nights = len(dates) - 1
    assert cache.reused["read"] == nights - 1
    assert cache.reused["validate"] == nights - 1
    assert 1 <= cache.reused["market"] <= nights - 1


def test_a_file_rewritten_between_nights_is_read_again(desk, tmp_path):
    """A date's file rewritten after its night (a corrected mark) is read, checked and priced again as the
    next night's prior: the next night equals a fresh one on the new file."""
    config, dates = desk
    data = tmp_path / "data"
    for day in dates[:4]:
        src = config.data_root / f"as_of={day.isoformat()}"
        (data / src.name).mkdir(parents=True)
        for f in src.iterdir():
            (data / src.name / f.name).write_bytes(f.read_bytes())
    config = dataclasses.replace(config, data_root=data)
    cache = DateCache()
    prepare_night(config, dates[1], cache=cache)
    prepare_night(config, dates[2], cache=cache)
    rows = read_rows(data, dates[2], "option_marks")
    rows[0]["price"] = float(rows[0]["price"]) * 1.5  # type: ignore[arg-type]
    rows[1]["implied_vol"] = None
    put_rows(data, dates[2], "option_marks", rows)
    before = dict(cache.reused)
    shared = prepare_night(config, dates[3], cache=cache)
    assert cache.reused == before  # nothing of the rewritten date was reused
    assert_same_night(shared, prepare_night(config, dates[3]))


def _tables(path: Path) -> dict[str, pd.DataFrame]:
    con = duckdb.connect(str(path), read_only=True)
    try:
        out = {}
        for name in ("position_pnl", "book_pnl", "input_exceptions", "dividend_schedule"):
            frame = con.execute(f"SELECT * FROM {name}").df()  # names from this list, not from input
            frame = frame.drop(columns=[c for c in frame.columns if c == "run_id"])
            out[name] = frame.sort_values(list(frame.columns), ignore_index=True, kind="stable")
        return out
    finally:
        con.close()


def test_backfill_archive_equals_single_runs(desk, tmp_path):
    """`attribution backfill` over three nights archives exactly what `attribution run` of each night does."""
    config, dates = desk
    filled = dataclasses.replace(config, archive_path=tmp_path / "filled.duckdb")
    backfill(filled, dates[1], dates[3], reports_last=0, echo=lambda _: None)
    single = dataclasses.replace(config, archive_path=tmp_path / "single.duckdb")
    for day in dates[1:4]:
        run_night(single, day)
    a, b = _tables(filled.archive_path), _tables(single.archive_path)
    for name in a:
        pd.testing.assert_frame_equal(a[name], b[name], check_exact=True, obj=name)


def test_folder_listing_is_read_again_when_a_folder_is_added(tmp_path):
    """The data folder's dates (README, "Input files": one `as_of=` folder per date) are listed again when a
    folder is added or removed during a backfill, so a later night finds its new prior."""
    cache = DateCache()
    (tmp_path / "as_of=2026-11-02").mkdir()
    assert cache.available_dates(tmp_path) == [dt.date(2026, 11, 2)]
    (tmp_path / "as_of=2026-11-03").mkdir()
    assert cache.available_dates(tmp_path) == [dt.date(2026, 11, 2), dt.date(2026, 11, 3)]
    (tmp_path / "as_of=2026-11-02").rmdir()
    assert cache.available_dates(tmp_path) == [dt.date(2026, 11, 3)]


def _copied(config: JobConfig, dates: list[dt.date], root: Path, days: int = 4) -> JobConfig:
    """The first ``days`` dates' folders copied under ``root`` (to be edited), and the job on them."""
    for day in dates[:days]:
        src = config.data_root / f"as_of={day.isoformat()}"
        (root / src.name).mkdir(parents=True)
        for f in src.iterdir():
            (root / src.name / f.name).write_bytes(f.read_bytes())
    return dataclasses.replace(config, data_root=root)


def _list_new(root: Path, day: dt.date, kind: str, new_id: str) -> None:
    """``day``'s instruments file lists one more instrument, a copy of its first of ``kind`` under ``new_id``."""
    rows = read_rows(root, day, "instruments")
    rows.append({**next(r for r in rows if (r.get("kind") or "option") == kind), "instrument_id": new_id})
    put_rows(root, day, "instruments", rows)


def _market_builds(monkeypatch: pytest.MonkeyPatch) -> list[tuple[dt.date, int]]:
    """(date, instruments) of every market build of the night's engine from now on."""
    builds: list[tuple[dt.date, int]] = []
    build = engine_module.build_market

    def counted(night, terms, *args, **kwargs):
        builds.append((night.raw.as_of, len(terms)))
        return build(night, terms, *args, **kwargs)

    monkeypatch.setattr(engine_module, "build_market", counted)
    return builds


def test_an_instrument_listed_the_next_day_is_priced_alone(desk, tmp_path, monkeypatch):
    """An option listed on the run date only joins the prior date's market (to settle a trade in it) without
    that market being built again: the date's own instruments are priced once, the new one alone, and the night
    equals the night computed alone, ledger included."""
    config, dates = desk
    config = _copied(config, dates, tmp_path / "data")
    _list_new(config.data_root, dates[2], "option", "NEWLY-LISTED-C1")
    cache = DateCache()
    prepare_night(config, dates[1], cache=cache)
    own = len(read_rows(config.data_root, dates[1], "instruments"))
    builds = _market_builds(monkeypatch)
    shared = prepare_night(config, dates[2], cache=cache)
    assert (dates[1], own + 1) not in builds  # the prior date's whole market was not built again
    assert (dates[1], 1) in builds
    assert cache.reused["market"] == 1
    assert_same_night(shared, prepare_night(config, dates[2]))


def test_an_instrument_that_matches_a_file_row_of_the_prior_date_builds_its_market_whole(desk, tmp_path,
                                                                                         monkeypatch):
    """A future listed on the run date only, whose settlement price the prior date's file already gives (there a
    mark of no future, in its ledger): in the night's prior market the mark finds its future, so that ledger row
    is not written. The prior market is then built whole, and the night equals the night computed alone."""
    config, dates = desk
    config = _copied(config, dates, tmp_path / "data")
    _list_new(config.data_root, dates[2], "future", "NEWLY-LISTED-FUT")
    marks = read_rows(config.data_root, dates[1], "future_marks")
    put_rows(config.data_root, dates[1], "future_marks", [*marks, {**marks[0], "instrument_id": "NEWLY-LISTED-FUT"}])
    cache = DateCache()
    first = prepare_night(config, dates[1], cache=cache)
    assert "NEWLY-LISTED-FUT" in set(first.exceptions["key"])  # a mark of no future on its own date
    own = len(read_rows(config.data_root, dates[1], "instruments"))
    builds = _market_builds(monkeypatch)
    shared = prepare_night(config, dates[2], cache=cache)
    assert (dates[1], own + 1) in builds
    assert "NEWLY-LISTED-FUT" not in set(shared.exceptions["key"])
    assert_same_night(shared, prepare_night(config, dates[2]))
