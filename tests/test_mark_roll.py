"""Tests of attribution.mark_roll: a missing option mark rolled forward from the last good one, within a limit."""

from __future__ import annotations

import datetime as dt
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from attribution.cli import main
from tests.contract_files import put_rows, read_rows
from tests.mini_desk import INSTRUMENTS, PRIOR, RUN, mark, write_mini_desk

NEXT = RUN + dt.timedelta(days=1)  # Tuesday
PUT = "ZEN-P120-M27"               # held by T2 (short 5) on both dates


def _drop_mark(root: Path, day: dt.date, instrument: str) -> None:
    put_rows(root, day, "option_marks", [r for r in read_rows(root, day, "option_marks")
                                         if r["instrument_id"] != instrument])


def _night(root: Path, day: dt.date, *extra: str) -> tuple[int, pd.DataFrame, pd.DataFrame]:
    archive = root / f"{day}.duckdb"
    code = main(["run", "--as-of", day.isoformat(), "--data", str(root / "data"), "--archive", str(archive),
                 "--no-reports", *extra])
    with duckdb.connect(str(archive), read_only=True) as con:
        rows = con.execute("SELECT * FROM position_pnl ORDER BY trade_id").df().set_index("trade_id")
        ledger = con.execute("SELECT file, key, rule, severity FROM input_exceptions").df()
    return code, rows, ledger


@pytest.fixture
def desk(tmp_path: Path) -> Path:
    """The mini desk without the put's run-date mark, and a Tuesday on which the real mark returns."""
    write_mini_desk(tmp_path / "data")
    shutil.copytree(tmp_path / "data" / f"as_of={RUN}", tmp_path / "data" / f"as_of={NEXT}")
    _drop_mark(tmp_path / "data", RUN, PUT)
    return tmp_path


def test_a_missing_mark_is_rolled_forward_and_the_trade_stays_explained(desk):
    """Monday's put mark is missing: T2 is carried with flag mark_rolled, Friday's vol, no vol move, no mark gap,
    and a warning names the mark, its source date and the days rolled."""
    code, rows, ledger = _night(desk, RUN)
    assert code == 0
    t2 = rows.loc["T2"]
    assert t2["status"] == "carried" and "mark_rolled" in t2["flags"].split(",")
    assert t2["vol_run"] == t2["vol_prior"] and t2["pnl_vega"] == 0.0
    assert abs(t2["pnl_mark_gap"]) < 1e-9  # priced by the model at the rolled vol
    hit = ledger[ledger["rule"] == "mark rolled forward"]
    assert hit[["key", "severity"]].values.tolist() == [[PUT, "warning"]]
    assert hit["file"].iloc[0].endswith(f"as_of={RUN}/option_marks.parquet")
    assert "mark_rolled" not in rows.loc["T1", "flags"]


def test_the_next_night_explains_from_the_rolled_mark_and_shows_the_gap(desk):
    """Tuesday's real mark returns: T2's prior leg uses the rolled Monday mark, so the trade is explained both
    nights (not rejected twice) and the mark moving back to the market shows as mark gap."""
    code, rows, _ = _night(desk, NEXT)
    assert code == 0
    t2 = rows.loc["T2"]
    assert t2["status"] == "carried" and "mark_rolled" in t2["flags"]
    inst = next(i for i in INSTRUMENTS if i.instrument_id == PUT)
    np.testing.assert_allclose(t2["price_run"], mark(inst, RUN), rtol=1e-12)  # Tuesday holds Monday's marks
    assert abs(t2["pnl_mark_gap"]) > 1.0


def test_past_the_limit_the_trade_is_rejected_as_before(desk):
    """mark_roll_days = 0 in the job file: no roll, T2 rejected on the run date."""
    (desk / "job.toml").write_text("[checks]\nmark_roll_days = 0\n")
    code, rows, ledger = _night(desk, RUN, "--job", str(desk / "job.toml"))
    assert code == 3 and "T2" not in rows.index
    assert "T2" in set(ledger.loc[ledger["severity"] == "rejected", "key"])


def test_a_mark_missing_on_both_dates_has_nothing_to_roll(desk):
    """No earlier good mark within the limit: rejected as before."""
    _drop_mark(desk / "data", PRIOR, PUT)
    code, rows, _ = _night(desk, RUN)
    assert code == 3 and "T2" not in rows.index
