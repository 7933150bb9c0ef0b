"""The bench command on a tiny size: the whole job runs on a synthetic contract night and reports figures."""

from __future__ import annotations

import datetime as dt
import re

import duckdb
import numpy as np
import pytest

import attribution.bench as bench_module
from attribution.bench import QuantLibPeer, peer_sample, run_bench
from attribution.errors import EXIT_OK
from attribution.loading import read_night
from attribution.synthetic import AMERICAN_SHARE, HEDGE_SHARE, PRIOR, RUN, write_synthetic_night
from attribution.valuation import OPTION


def test_bench_runs_every_stage_on_a_tiny_night(tmp_path):
    """A 3,000-position night goes through read .. report; stages, peak RSS, the QuantLib loop and the ratio print."""
    lines: list[str] = []
    assert run_bench(positions=3_000, books=6, instruments=150, underlyings=8, keep=tmp_path,
                     echo=lines.append, peer_size=200) == EXIT_OK
    text = "\n".join(lines)
    for stage in ("read", "validate", "market", "explain", "controls", "archive", "report", "total"):
        assert any(line.startswith(stage) for line in lines), stage
    assert "positions/s" in text and "peak RSS" in text
    # QuantLib is in the test extra: the loop is timed before and after the night, and the ratio printed
    loop = next(line for line in lines if line.startswith("per-position QuantLib loop"))
    assert "before the night" in loop and "after" in loop and "mean" in loop
    ratio = next(line for line in lines if "ratio" in line)
    assert float(re.search(r"ratio ([\d,.]+)x", ratio).group(1).replace(",", "")) > 0
    con = duckdb.connect(str(tmp_path / "archive.duckdb"), read_only=True)
    archived, rejected = con.execute("SELECT positions_archived, positions_rejected FROM runs").fetchone()
    kinds = dict(con.execute("SELECT coalesce(exercise, kind), count(*) FROM position_pnl GROUP BY ALL").fetchall())
    con.close()
    assert archived > 2_800 and rejected == 0
    assert {"american", "european", "underlying", "future", "forward"} <= set(kinds)


def test_synthetic_night_follows_the_contract(tmp_path):
    """Both dates read back through the job's own loader, with every lifecycle case and the desk's mix present."""
    night = write_synthetic_night(tmp_path, positions=20_000, books=4, instruments=400, underlyings=10)
    prior, run = read_night(tmp_path, PRIOR), read_night(tmp_path, RUN)
    ids0 = set(prior.tables["positions.parquet"]["trade_id"])
    ids1 = set(run.tables["positions.parquet"]["trade_id"])
    assert ids1 - ids0 and ids0 - ids1 and ids0 & ids1  # new, gone (closed or expired), carried
    assert night.run - night.prior == dt.timedelta(days=1)
    positions = prior.tables["positions.parquet"].merge(prior.tables["instruments.parquet"], on="instrument_id")
    kind = positions["kind"].fillna("option")
    assert set(kind) == {"option", "underlying", "future", "forward"}
    # the shares are drawn at random per position: within 1.5 points of the target on 20,000 positions
    assert (kind != "option").mean() == pytest.approx(HEDGE_SHARE, abs=0.015)
    assert (positions["exercise"] == "american").mean() == pytest.approx(AMERICAN_SHARE, abs=0.015)
    assert set(prior.tables["future_marks.parquet"]["instrument_id"]) == set(
        positions.loc[kind == "future", "instrument_id"])


def test_peer_sample_holds_the_nights_mix(tmp_path):
    """The QuantLib loop's sample is drawn from positions held over the night, in every kind, and times > 0."""
    pytest.importorskip("QuantLib")
    import QuantLib as ql

    night = write_synthetic_night(tmp_path, positions=5_000, books=4, instruments=200, underlyings=10)
    sample = peer_sample(night.data_root, night.prior, night.run, size=300)
    assert len(sample) == 300
    european = ~sample.american & (sample.kind == OPTION)
    assert sample.american.any() and european.any() and (sample.kind != OPTION).any()
    assert np.all(sample.expiry_days[sample.kind == OPTION] > 1)  # still live on the run date
    assert QuantLibPeer(ql, night.prior, night.run).time_loop(sample) > 0


def test_the_memory_goal_printed_is_the_one_of_the_nights_size() -> None:
    """The README's speed goals: 1 GB at a million positions, 2.5 GB at three million; none for other sizes."""
    assert bench_module._rss_goal(1_000_000) == " (goal <= 1,000 MB)"
    assert bench_module._rss_goal(3_000_000) == " (goal <= 2,500 MB)"
    assert bench_module._rss_goal(100_000) == ""
