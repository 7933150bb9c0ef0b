"""The bench command on a tiny size: the whole job runs on a synthetic contract night and reports figures."""

from __future__ import annotations

import datetime as dt

import duckdb

from attribution.bench import run_bench
from attribution.errors import EXIT_OK
from attribution.loading import read_night
from attribution.synthetic import PRIOR, RUN, write_synthetic_night


def test_bench_runs_every_stage_on_a_tiny_night(tmp_path):
    """A 3,000-position night goes through read .. report; the figures and the kernel ratio are printed."""
    lines: list[str] = []
    assert run_bench(positions=3_000, books=6, instruments=150, underlyings=8, keep=tmp_path,
                     echo=lines.append) == EXIT_OK
    text = "\n".join(lines)
    for stage in ("read", "validate", "market", "explain", "controls", "archive", "report", "total"):
        assert any(line.startswith(stage) for line in lines), stage
    assert "positions/s" in text and "peak RSS" in text
    assert any("QuantLib loop" in line and line.endswith("x") for line in lines)  # QuantLib is in the test extra
    con = duckdb.connect(str(tmp_path / "archive.duckdb"), read_only=True)
    archived, rejected = con.execute("SELECT positions_archived, positions_rejected FROM runs").fetchone()
    con.close()
    assert archived > 2_800 and rejected == 0


def test_synthetic_night_follows_the_contract(tmp_path):
    """Both dates read back through the job's own loader, with every lifecycle case present."""
    night = write_synthetic_night(tmp_path, positions=2_000, books=4, instruments=100, underlyings=5)
    prior, run = read_night(tmp_path, PRIOR), read_night(tmp_path, RUN)
    ids0 = set(prior.tables["positions.parquet"]["trade_id"])
    ids1 = set(run.tables["positions.parquet"]["trade_id"])
    assert ids1 - ids0 and ids0 - ids1 and ids0 & ids1  # new, gone (closed or expired), carried
    assert night.run - night.prior == dt.timedelta(days=1)
