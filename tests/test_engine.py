"""End-to-end nights through ``attribution run``, checked against QuantLib and the data contract."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest

from attribution.cli import main
from attribution.pricing import bsm_greeks
from tests.mini_desk import (
    DIV,
    FX,
    INSTRUMENTS,
    POSITIONS,
    PRIOR,
    RATE,
    RUN,
    SPOT,
    VOL,
    mark,
    ql_option,
    write_mini_desk,
)

BY_ID = {i.instrument_id: i for i in INSTRUMENTS}


def _run(tmp_path: Path, *extra: str, name: str = "archive.duckdb") -> tuple[int, pd.DataFrame]:
    code = main(["run", "--as-of", RUN.isoformat(), "--data", str(tmp_path / "data"),
                 "--archive", str(tmp_path / name), "--reports", str(tmp_path / "reports"), *extra])
    con = duckdb.connect(str(tmp_path / name), read_only=True)
    rows = con.execute("SELECT * FROM position_pnl WHERE as_of = ? ORDER BY trade_id", [RUN]).df()
    con.close()
    return code, rows.set_index("trade_id")


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> tuple[int, pd.DataFrame, Path]:
    root = tmp_path_factory.mktemp("mini")
    write_mini_desk(root / "data")
    code, rows = _run(root)
    return code, rows, root


def _qty(as_of: dt.date, trade: str) -> float:
    return next(q for t, _, _, q, _ in POSITIONS[as_of] if t == trade)


def test_every_lifecycle_case_gets_its_status(night):
    """carried, closed, new, new_unpriced and expired, matched by trade_id (README, Statuses)."""
    code, rows, _ = night
    assert code == 0
    assert rows["status"].to_dict() == {"T1": "carried", "T2": "carried", "T3": "carried", "T4": "expired",
                                        "T5": "closed", "T6": "carried", "T7": "new", "T8": "new_unpriced"}


@pytest.mark.parametrize("trade", ["T1", "T2", "T3", "T5", "T6"])
def test_taylor_terms_match_quantlib_greeks(night, trade):
    """Each term equals QuantLib's analytic European greeks at the prior state times the move (rel 1e-9;
    vanna and volga from QuantLib central differences in vol with h = 1e-4, rel 1e-5)."""
    _, rows, _ = night
    row = rows.loc[trade]
    inst = BY_ID[row["instrument_id"]]
    u, c = inst.underlying, inst.currency
    units = _qty(PRIOR, trade) * inst.multiplier * FX[RUN][c]
    o0 = ql_option(inst, PRIOR)
    d_spot, d_vol = SPOT[RUN][u] - SPOT[PRIOR][u], VOL[RUN][u] - VOL[PRIOR][u]
    expected = {
        "pnl_delta": units * o0.delta() * d_spot,
        "pnl_gamma": units * 0.5 * o0.gamma() * d_spot**2,
        "pnl_vega": units * o0.vega() * d_vol,
        "pnl_theta": units * o0.theta() * 3 / 365,
        "pnl_rates": units * o0.rho() * (RATE[RUN][c] - RATE[PRIOR][c]),
        "pnl_dividend": units * o0.dividendRho() * (DIV[RUN][u] - DIV[PRIOR][u]),
        "pnl_model": units * (ql_option(inst, RUN).NPV() - o0.NPV()),
        "pnl_actual": units * (mark(inst, RUN) - mark(inst, PRIOR)),
    }
    for column, value in expected.items():
        np.testing.assert_allclose(row[column], value, rtol=1e-9, atol=1e-9, err_msg=column)
    h = 1e-4
    up, down = ql_option(inst, PRIOR, VOL[PRIOR][u] + h), ql_option(inst, PRIOR, VOL[PRIOR][u] - h)
    vanna = (up.delta() - down.delta()) / (2 * h)
    volga = (up.vega() - down.vega()) / (2 * h)
    np.testing.assert_allclose(row["pnl_vanna"], units * vanna * d_spot * d_vol, rtol=1e-5)
    np.testing.assert_allclose(row["pnl_volga"], units * 0.5 * volga * d_vol**2, rtol=1e-5)
    # marks are QuantLib prices, so the model explains the marks: no mark gap (abs 1e-8)
    np.testing.assert_allclose(row["pnl_mark_gap"], 0.0, atol=1e-8)


def test_contract_identities_on_every_archived_row(night):
    """explained = sum of terms; residual = actual - explained; higher_order and mark_gap split it."""
    _, rows, _ = night
    terms = rows[["pnl_delta", "pnl_gamma", "pnl_vega", "pnl_volga", "pnl_vanna", "pnl_theta", "pnl_rates",
                  "pnl_dividend"]].sum(axis=1)
    np.testing.assert_allclose(terms, rows["pnl_explained"], atol=1e-9)
    np.testing.assert_allclose(rows["pnl_actual"] - rows["pnl_explained"], rows["pnl_residual"], atol=1e-9)
    np.testing.assert_allclose(rows["pnl_model"] - rows["pnl_explained"], rows["pnl_higher_order"], atol=1e-9)
    np.testing.assert_allclose(rows["pnl_actual"] - rows["pnl_model"], rows["pnl_mark_gap"], atol=1e-9)
    reval = rows[["reval_spot", "reval_vol", "reval_time", "reval_rates", "reval_dividend"]].sum(axis=1)
    held = rows["status"].isin(["carried", "closed"])
    np.testing.assert_allclose(reval[held], rows.loc[held, "pnl_model"], rtol=1e-12, atol=1e-9)


def test_lifecycle_lines(night):
    """New trades at trade price, unpriced kept null, expiry at intrinsic, amendment at its trade price."""
    _, rows, _ = night
    call95, put90, call100 = BY_ID["ZEN-C95-EXP"], BY_ID["ZEN-P90-D26"], BY_ID["ZEN-C100-J27"]
    np.testing.assert_allclose(rows.loc["T7", "pnl_new_trade"], 2 * 100 * (mark(put90, RUN) - 1.5), rtol=1e-12)
    assert np.isnan(rows.loc["T8", "pnl_new_trade"]) and "unpriced" in rows.loc["T8", "flags"]
    intrinsic = max(SPOT[RUN]["ZEN"] - 95.0, 0.0)
    np.testing.assert_allclose(rows.loc["T4", "pnl_actual"], 3 * 100 * (intrinsic - mark(call95, PRIOR)), rtol=1e-12)
    assert rows.loc["T4", "pnl_expiry"] == 0.0  # explained down to intrinsic, no lifecycle line left
    np.testing.assert_allclose(rows.loc["T6", "pnl_amendment"], 2 * 100 * (mark(call100, RUN) - 14.0), rtol=1e-12)
    assert "amended" in rows.loc["T6", "flags"]
    total = (rows["pnl_actual"] + rows["pnl_new_trade"].fillna(0) + rows["pnl_expiry"] + rows["pnl_amendment"]
             + rows["pnl_fx_translation"] + rows["pnl_cash"])
    np.testing.assert_allclose(rows["pnl_total"], total, atol=1e-9)


def test_foreign_currency_amounts_use_the_run_date_fx(night):
    """A EUR position's amounts are its EUR P&L times the run date's EUR rate (1.10)."""
    _, rows, _ = night
    inst = BY_ID["QRX-C50-F27"]
    eur_pnl = 20 * inst.multiplier * (mark(inst, RUN) - mark(inst, PRIOR))
    np.testing.assert_allclose(rows.loc["T3", "pnl_actual"], eur_pnl * 1.10, rtol=1e-12)
    assert rows.loc["T3", "fx_rate"] == 1.10


def test_fx_translation_of_the_prior_value_is_counted_in_the_total(night):
    """EURUSD 1.08 -> 1.10: the prior value's translation N price0 (fx1 - fx0) is its own column, and the
    total is the whole overnight P&L in USD, N (price1 fx1 - price0 fx0) (data contract v2; QuantLib marks)."""
    _, rows, root = night
    inst = BY_ID["QRX-C50-F27"]
    n = 20 * inst.multiplier
    p0, p1 = mark(inst, PRIOR), mark(inst, RUN)
    np.testing.assert_allclose(rows.loc["T3", "pnl_fx_translation"], n * p0 * (FX[RUN]["EUR"] - FX[PRIOR]["EUR"]),
                               rtol=1e-12)
    np.testing.assert_allclose(rows.loc["T3", "pnl_total"], n * (p1 * FX[RUN]["EUR"] - p0 * FX[PRIOR]["EUR"]),
                               rtol=1e-12)
    usd = rows["currency"] == "USD"
    assert (rows.loc[usd, "pnl_fx_translation"] == 0).all()
    with duckdb.connect(str(root / "archive.duckdb"), read_only=True) as con:
        book = con.execute("SELECT pnl_fx_translation, pnl_total FROM book_pnl WHERE book = 'Euro single names'"
                           ).fetchone()
    np.testing.assert_allclose(book, [rows.loc["T3", "pnl_fx_translation"], rows.loc["T3", "pnl_total"]],
                               rtol=1e-12)


def test_history_lists_the_fx_translation(night, capsys):
    """``attribution history`` shows the book's FX translation per night beside its terms."""
    _, rows, root = night
    capsys.readouterr()
    assert main(["history", "--book", "Euro single names", "--archive", str(root / "archive.duckdb")]) == 0
    header, line = capsys.readouterr().out.splitlines()[:2]
    column = header.split().index("pnl_fx_translation")
    assert float(line.split()[column].replace(",", "")) == round(rows.loc["T3", "pnl_fx_translation"])


def test_business_basis_gives_one_day_of_theta_over_the_weekend(tmp_path):
    """Under BUS/252 the Friday-Monday night carries 1/252 of theta; under ACT/365F 3/365."""
    write_mini_desk(tmp_path / "data")
    _, act = _run(tmp_path, "--no-reports")
    _, bus = _run(tmp_path, "--no-reports", "--basis", "BUS/252", name="bus.duckdb")
    inst = BY_ID["ZEN-C100-J27"]
    tau_bus = np.busday_count(PRIOR, inst.expiry) / 252
    np.testing.assert_allclose(bus.loc["T1", "tau_prior_years"], tau_bus, rtol=1e-15)
    g = bsm_greeks(SPOT[PRIOR]["ZEN"], 100.0, tau_bus, VOL[PRIOR]["ZEN"], RATE[PRIOR]["USD"], DIV[PRIOR]["ZEN"], True)
    np.testing.assert_allclose(bus.loc["T1", "pnl_theta"], 10 * 100 * g.theta_per_year[0] / 252, rtol=1e-12)
    g_act = bsm_greeks(SPOT[PRIOR]["ZEN"], 100.0, (inst.expiry - PRIOR).days / 365, VOL[PRIOR]["ZEN"],
                       RATE[PRIOR]["USD"], DIV[PRIOR]["ZEN"], True)
    np.testing.assert_allclose(act.loc["T1", "pnl_theta"], 10 * 100 * g_act.theta_per_year[0] * 3 / 365, rtol=1e-12)


def test_null_implied_vol_is_solved_from_price_and_flagged(tmp_path):
    """A mark without implied vol is explained with the vol solved from its price (QuantLib's vol, abs 1e-10)."""
    write_mini_desk(tmp_path / "data", omit_vol_for=("ZEN-C100-J27",))
    code, rows = _run(tmp_path, "--no-reports")
    assert code == 0
    np.testing.assert_allclose(rows.loc["T1", "vol_prior"], VOL[PRIOR]["ZEN"], atol=1e-10)
    assert "vol_solved" in rows.loc["T1", "flags"]


def test_rerun_replaces_the_night(night, tmp_path):
    """Running the same date twice leaves one set of rows, identical to the first."""
    write_mini_desk(tmp_path / "data")
    _, first = _run(tmp_path, "--no-reports")
    _, second = _run(tmp_path, "--no-reports")
    con = duckdb.connect(str(tmp_path / "archive.duckdb"), read_only=True)
    counts = {t: con.execute(f"SELECT count(*) FROM {t} WHERE as_of = ?", [RUN]).fetchone()[0]
              for t in ("position_pnl", "book_pnl", "runs")}
    con.close()
    assert counts == {"position_pnl": 8, "book_pnl": 2, "runs": 1}
    pd.testing.assert_frame_equal(first, second)


def test_summary_accounts_for_every_position(night, capsys, tmp_path):
    """The closing summary prints positions in = archived + rejected."""
    write_mini_desk(tmp_path / "data")
    _run(tmp_path, "--no-reports")
    out = capsys.readouterr().out
    assert "8 in = 8 archived + 0 rejected" in out


def test_a_missing_business_day_is_warned_and_exits_3(tmp_path, capsys):
    """Prior folder Thursday, run Monday: Friday has no folder, so a ledger warning, a summary line and exit 3;
    --prior makes the span deliberate (exit 0), and a Friday holiday of the job's calendar is no gap."""
    write_mini_desk(tmp_path / "data")
    thursday = PRIOR - dt.timedelta(days=1)
    (tmp_path / "data" / f"as_of={PRIOR}").rename(tmp_path / "data" / f"as_of={thursday}")
    capsys.readouterr()
    code, rows = _run(tmp_path, "--no-reports")
    assert code == 3
    out = capsys.readouterr().out
    assert f"the prior date {thursday} is not the previous business day: no folder for {PRIOR}" in out
    with duckdb.connect(str(tmp_path / "archive.duckdb"), read_only=True) as con:
        ledger = con.execute("SELECT file, key, rule, severity FROM input_exceptions "
                             "WHERE file NOT LIKE '%.parquet'").fetchall()  # the marks are Friday's: vol warnings
    assert ledger == [(str(tmp_path / "data" / f"as_of={PRIOR}"), PRIOR.isoformat(), "missing business day",
                       "warning")]
    assert (rows["prior_as_of"].dt.date == thursday).all()  # still explained, over the whole span
    code, _ = _run(tmp_path, "--no-reports", "--prior", thursday.isoformat(), name="deliberate.duckdb")
    assert code == 0
    (tmp_path / "job.toml").write_text(f"[time]\nholidays = [{PRIOR}]\n")
    code, _ = _run(tmp_path, "--no-reports", "--job", str(tmp_path / "job.toml"), name="holiday.duckdb")
    assert code == 0


def test_an_expiring_position_is_explained_down_to_intrinsic(night):
    """T4 (call 95 expiring on the run date): actual = N (intrinsic at S1 - prior mark), delta, gamma and theta
    from QuantLib's greeks at the prior state with the time left to expiry, no vol terms, and the revaluation
    shares add up to the model move (tau1 = 0)."""
    _, rows, _ = night
    t4, inst = rows.loc["T4"], BY_ID["ZEN-C95-EXP"]
    n = 3 * inst.multiplier
    option = ql_option(inst, PRIOR)
    ds = SPOT[RUN]["ZEN"] - SPOT[PRIOR]["ZEN"]
    tau0 = (inst.expiry - PRIOR).days / 365
    np.testing.assert_allclose(t4["pnl_delta"], n * option.delta() * ds, rtol=1e-9)
    np.testing.assert_allclose(t4["pnl_gamma"], n * 0.5 * option.gamma() * ds * ds, rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(t4["pnl_theta"], n * option.theta() * tau0, rtol=1e-6, atol=1e-6)  # QL theta per year
    assert t4["pnl_vega"] == t4["pnl_volga"] == t4["pnl_vanna"] == 0.0
    assert t4["tau_prior_years"] == pytest.approx(tau0)
    reval = sum(t4[f"reval_{f}"] for f in ("spot", "vol", "time", "rates", "dividend"))
    np.testing.assert_allclose(reval, t4["pnl_model"], rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(t4["pnl_model"], n * (SPOT[RUN]["ZEN"] - 95.0 - option.NPV()), rtol=1e-9)


def test_a_night_of_only_expiries_is_in_the_quality_series(tmp_path):
    """A book whose only position expires tonight still gives the quality test its HPL and RTPL (MAR32: HPL
    revalues the prior close's positions at the run date's market data, and an expiring option was held)."""
    from attribution.archive import quality_series
    from tests.contract_files import put_rows, read_rows

    write_mini_desk(tmp_path / "data")
    put_rows(tmp_path / "data", PRIOR, "positions",
             [r for r in read_rows(tmp_path / "data", PRIOR, "positions") if r["trade_id"] == "T4"])
    put_rows(tmp_path / "data", RUN, "positions", [])
    _, rows = _run(tmp_path, "--no-reports")
    with duckdb.connect(str(tmp_path / "archive.duckdb"), read_only=True) as con:
        series = quality_series(con, RUN)
    assert series["book"].tolist() == ["Index vol"]
    np.testing.assert_allclose(series[["hpl", "rtpl"]].iloc[0], rows.loc["T4", ["pnl_actual", "pnl_explained"]])


def test_theta_per_business_day_is_one_business_day_under_the_run_basis(night, tmp_path):
    """From a Friday under ACT/365F one business day is three calendar days (3/365 of a year, not 1/252); under
    BUS/252 it is 1/252 (common practice, no source)."""
    _, rows, _ = night
    held = rows["status"] == "carried"
    np.testing.assert_allclose(rows.loc[held, "theta_per_business_day"],
                               3.0 * rows.loc[held, "theta_per_calendar_day"], rtol=1e-12)
    write_mini_desk(tmp_path / "data")
    _, bus = _run(tmp_path, "--no-reports", "--basis", "BUS/252")
    t1, inst = bus.loc["T1"], BY_ID["ZEN-C100-J27"]
    theta_per_year = bsm_greeks(SPOT[PRIOR]["ZEN"], inst.strike, t1["tau_prior_years"], VOL[PRIOR]["ZEN"],
                                RATE[PRIOR]["USD"], DIV[PRIOR]["ZEN"], True).theta_per_year
    np.testing.assert_allclose(t1["theta_per_business_day"], 10 * 100 * theta_per_year / 252, rtol=1e-9)


def test_net_delta_in_units_is_per_underlying_only(night):
    """book_pnl keeps no sum of delta units (units of different underlyings do not add); positions keep theirs."""
    _, rows, root = night
    with duckdb.connect(str(root / "archive.duckdb"), read_only=True) as con:
        units = con.execute("SELECT delta_units FROM book_pnl").fetchall()
    assert units and all(u is None for (u,) in units)
    assert rows.loc["T1", "delta_units"] != 0.0
