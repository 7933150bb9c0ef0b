"""An end-to-end night of American options through ``attribution run``, marks priced by QuantLib.

Marks come from QuantLib's QdFpAmericanEngine (QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9), floored at
intrinsic; flat curves, Actual365Fixed), never from the package.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from attribution.american import TWO_BOUNDARY_RULE
from attribution.cli import main
from attribution.errors import EXIT_FINDINGS
from tests.contract_files import write_folder

ql = pytest.importorskip("QuantLib")

PRIOR, RUN = dt.date(2026, 11, 27), dt.date(2026, 11, 30)
EXPIRY = dt.date(2027, 11, 26)
SPOT = {PRIOR: 100.0, RUN: 96.0}
VOL = {PRIOR: 0.25, RUN: 0.26}
RATE = {PRIOR: 0.05, RUN: 0.051}
DIV = 0.02
# (instrument, type, strike, implied_vol given?) on the underlying ACM; DEEP sits just above its exercise
# boundary on the prior date and below it on the run date (spot 100 -> 96, boundary ~98 then ~97).
OPTIONS = (("ACM-P100", "put", 100.0, True), ("ACM-C90", "call", 90.0, False), ("ACM-P137", "put", 137.0, True),
           ("ACM-P200", "put", 200.0, False))
POSITIONS = (("A1", "ACM-P100", 10.0), ("A2", "ACM-C90", -4.0), ("A3", "ACM-P137", 5.0), ("A4", "ACM-P200", 1.0),
             ("A5", "NEG-P100", 2.0))


def ql_american(option_type: str, strike: float, as_of: dt.date, spot: float, vol: float, rate: float,
                div: float) -> float:
    """QuantLib's American price (floored at intrinsic) on ``as_of``."""
    today = ql.Date(as_of.day, as_of.month, as_of.year)
    ql.Settings.instance().evaluationDate = today
    dc = ql.Actual365Fixed()
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(spot)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, div, dc, ql.Continuous)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, rate, dc, ql.Continuous)),
        ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), vol, dc)))
    kind = ql.Option.Call if option_type == "call" else ql.Option.Put
    option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, strike),
                              ql.AmericanExercise(today, ql.Date(EXPIRY.day, EXPIRY.month, EXPIRY.year)))
    option.setPricingEngine(ql.QdFpAmericanEngine(process, ql.QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9)))
    intrinsic = max((spot - strike) * (1 if option_type == "call" else -1), 0.0)
    return max(option.NPV(), intrinsic)


def _write(root: Path) -> None:
    for as_of in (PRIOR, RUN):
        marks = [{"instrument_id": i, "price": ql_american(t, k, as_of, SPOT[as_of], VOL[as_of], RATE[as_of], DIV),
                  "implied_vol": VOL[as_of] if given else None} for i, t, k, given in OPTIONS]
        marks.append({"instrument_id": "NEG-P100", "price": 5.0, "implied_vol": 0.2})
        write_folder(root, as_of, {
            "positions": [{"trade_id": t, "book": "Single stocks", "instrument_id": i, "quantity": q,
                           "trade_date": PRIOR, "trade_price": None} for t, i, q in POSITIONS],
            "instruments": [{"instrument_id": i, "underlying": "ACM", "option_type": t, "exercise": "american",
                             "strike": k, "expiry": EXPIRY, "multiplier": 100.0, "currency": "USD"}
                            for i, t, k, _ in OPTIONS]
            + [{"instrument_id": "NEG-P100", "underlying": "NEG", "option_type": "put", "exercise": "american",
                "strike": 100.0, "expiry": EXPIRY, "multiplier": 100.0, "currency": "CHF"}],
            "option_marks": marks,
            "underlying_marks": [{"underlying": "ACM", "spot": SPOT[as_of], "dividend_yield": DIV},
                                 {"underlying": "NEG", "spot": 100.0, "dividend_yield": -0.02}],
            "rate_curves": [{"currency": "USD", "tenor_years": 1.0, "zero_rate": RATE[as_of]},
                            {"currency": "CHF", "tenor_years": 1.0, "zero_rate": -0.01}],
            "fx_rates": [{"currency": "USD", "rate": 1.0}, {"currency": "CHF", "rate": 1.1}],
        })


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, pd.DataFrame, pd.DataFrame]:
    """The night run with the order-independent revaluation; its position rows and exception rows."""
    root = tmp_path_factory.mktemp("american")
    _write(root / "data")
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(root / "data"), "--archive",
                 str(root / "a.duckdb"), "--no-reports"])
    con = duckdb.connect(str(root / "a.duckdb"), read_only=True)
    rows = con.execute("SELECT * FROM position_pnl WHERE as_of = ? ORDER BY trade_id", [RUN]).df()
    exceptions = con.execute("SELECT * FROM input_exceptions WHERE as_of = ?", [RUN]).df()
    con.close()
    return code, rows.set_index("trade_id"), exceptions


def test_american_positions_are_explained_and_archived_as_american(night) -> None:
    """exercise = american is accepted (data contract v2) and archived in the exercise column."""
    code, rows, _ = night
    assert code == EXIT_FINDINGS  # the two refused positions below
    assert set(rows.index) == {"A1", "A2", "A3"}  # A4: vol not identifiable; A5: two boundaries
    assert (rows["exercise"] == "american").all()
    assert (rows["status"] == "carried").all()


def _assert_model_pnl_is_quantlibs(rows: pd.DataFrame, error_per_100: float) -> None:
    """pnl_model of the three priced trades = N (QuantLib(state1) - QuantLib(state0)) within ``error_per_100`` of
    strike on each of the two prices."""
    for trade, inst, qty in POSITIONS[:3]:
        _, kind, strike, _ = next(o for o in OPTIONS if o[0] == inst)
        p0 = ql_american(kind, strike, PRIOR, SPOT[PRIOR], VOL[PRIOR], RATE[PRIOR], DIV)
        p1 = ql_american(kind, strike, RUN, SPOT[RUN], VOL[RUN], RATE[RUN], DIV)
        units = qty * 100.0
        tolerance = abs(units) * 2 * error_per_100 / 100.0 * strike
        assert rows.loc[trade, "pnl_model"] == pytest.approx(units * (p1 - p0), abs=tolerance)


def test_model_pnl_is_the_american_revaluation(night) -> None:
    """pnl_model = N (American(state1) - American(state0)), QuantLib's prices at 1.5e-3 per 100 of strike."""
    _, rows, _ = night
    _assert_model_pnl_is_quantlibs(rows, 1.5e-3)


def test_null_american_vol_is_solved_with_the_american_model(night) -> None:
    """The call's mark has no vol: the American implied vol is QuantLib's input vol (abs 1e-4)."""
    _, rows, _ = night
    assert rows.loc["A2", "vol_prior"] == pytest.approx(VOL[PRIOR], abs=1e-4)
    assert rows.loc["A2", "vol_run"] == pytest.approx(VOL[RUN], abs=1e-4)
    assert "vol_solved" in rows.loc["A2", "flags"]


def test_position_crossing_the_boundary_is_flagged_and_revalued(night) -> None:
    """Continuation -> exercise region overnight: flagged; terms are the revaluation shares; residual = mark gap."""
    _, rows, _ = night
    row = rows.loc["A3"]
    assert "crossed_exercise_boundary" in row["flags"]
    assert row["pnl_explained"] == pytest.approx(row["pnl_model"], abs=1e-6)
    assert row["pnl_residual"] == pytest.approx(row["pnl_mark_gap"], abs=1e-6)
    assert row["pnl_gamma"] == row["pnl_vanna"] == row["pnl_volga"] == 0.0
    assert row["pnl_delta"] == pytest.approx(row["reval_spot"], abs=1e-9)
    for trade in ("A1", "A2"):
        assert "crossed_exercise_boundary" not in rows.loc[trade, "flags"]


def test_revaluation_columns_add_up_to_the_model_pnl(night) -> None:
    """reval_spot + reval_vol + reval_time + reval_rates + reval_dividend = pnl_model (data contract)."""
    _, rows, _ = night
    total = rows[["reval_spot", "reval_vol", "reval_time", "reval_rates", "reval_dividend"]].sum(axis=1)
    np.testing.assert_allclose(total, rows["pnl_model"], rtol=1e-10, atol=1e-8)


def test_deep_put_without_vol_is_not_identifiable(night) -> None:
    """A put marked at intrinsic in its exercise region, no vol given: rejected by the named rule."""
    _, rows, exceptions = night
    hit = exceptions[(exceptions["key"] == "ACM-P200") & (exceptions["rule"] == "american vol not identifiable")]
    assert len(hit) >= 1
    assert "A4" not in rows.index
    assert (exceptions["key"] == "A4").any()


def test_two_boundary_case_is_rejected_by_name(night) -> None:
    """A put with q < r < 0 has two exercise boundaries: its instrument is refused with the named rule."""
    _, rows, exceptions = night
    assert "A5" not in rows.index
    assert (exceptions["rule"] == TWO_BOUNDARY_RULE).any()
    assert (exceptions["key"] == "A5").any()


def test_fast_mode_prices_the_night_within_its_published_error(tmp_path, night) -> None:
    """[job] american_precision = "fast" (README, American exercise): the same night's model P&L is QuantLib's
    within the fast mode's max error (2.8e-3 per 100 of strike on each of the two prices, with margin: 3e-3)."""
    _write(tmp_path / "data")
    job = tmp_path / "job.toml"
    job.write_text('[job]\namerican_precision = "fast"\nwrite_reports = false\n')
    main(["run", "--as-of", RUN.isoformat(), "--job", str(job), "--data", str(tmp_path / "data"), "--archive",
          str(tmp_path / "a.duckdb")])
    con = duckdb.connect(str(tmp_path / "a.duckdb"), read_only=True)
    rows = con.execute("SELECT * FROM position_pnl WHERE as_of = ? ORDER BY trade_id", [RUN]).df().set_index("trade_id")
    settings = con.execute("SELECT job_settings FROM runs").fetchone()[0]
    con.close()
    assert '"american_precision": "fast"' in settings
    standard = night[1]
    assert (rows.loc[["A1", "A3"], "pnl_model"] - standard.loc[["A1", "A3"], "pnl_model"]).abs().max() > 1e-6
    _assert_model_pnl_is_quantlibs(rows, 3e-3)
