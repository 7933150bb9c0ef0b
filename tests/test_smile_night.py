"""The night's vol parts and smile checks, through prepare_night on desks written from the data contract."""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import attribution.night as night_module
from attribution.config import ConfigError, JobConfig, SmileSettings, load_job
from attribution.engine import prepare_night
from attribution.pricing import bsm_greeks, bsm_price
from tests.contract_files import write_folder

PRIOR, RUN = dt.date(2026, 11, 26), dt.date(2026, 11, 27)
EXPIRIES = (dt.date(2027, 3, 19), dt.date(2027, 6, 18))
STRIKES = (80.0, 90.0, 95.0, 100.0, 105.0, 110.0, 120.0)
RATE = DIV = 0.02          # equal: the forward is the spot, so moneyness moves only with spot
PARTS = ("pnl_vol_level", "pnl_vol_skew", "pnl_vol_curvature", "pnl_vol_own")
VolFn = Callable[[str, float, float, float], float]   # (instrument, strike, prior date's tau, spot) -> vol


def _id(expiry: dt.date, strike: float) -> str:
    return f"VLX-{expiry:%y%m}-C{strike:g}"


def _prior_smile(strike: float, tau: float, spot: float) -> float:
    x = np.log(strike / spot) / (0.25 * np.sqrt(tau))
    return 0.25 - 0.02 * x + 0.004 * x * x


def _write(root: Path, spot: dict[dt.date, float], vol: dict[dt.date, VolFn]) -> Path:
    instruments = [{"instrument_id": _id(e, k), "underlying": "VLX", "option_type": "call", "exercise": "european",
                    "strike": k, "expiry": e, "multiplier": 100.0, "currency": "USD"}
                   for e in EXPIRIES for k in STRIKES]
    for as_of in (PRIOR, RUN):
        marks = []
        for e in EXPIRIES:
            tau = (e - as_of).days / 365.0
            for k in STRIKES:
                v = vol[as_of](_id(e, k), k, (e - PRIOR).days / 365.0, spot[as_of])
                marks.append({"instrument_id": _id(e, k), "implied_vol": v,
                              "price": float(np.ravel(bsm_price(spot[as_of], k, tau, v, RATE, DIV, True))[0])})
        write_folder(root, as_of, {
            "positions": [{"trade_id": f"T-{r['instrument_id']}", "book": "vol-desk", "instrument_id":
                           r["instrument_id"], "quantity": 10.0, "trade_date": PRIOR, "trade_price": None}
                          for r in instruments],
            "instruments": instruments,
            "option_marks": marks,
            "underlying_marks": [{"underlying": "VLX", "spot": spot[as_of], "dividend_yield": DIV}],
            "rate_curves": [{"currency": "USD", "tenor_years": 1.0, "zero_rate": RATE}],
        })
    return root


def _night(root: Path, dynamics: str = "sticky strike"):
    config = JobConfig(data_root=root, write_reports=False, smile=SmileSettings(dynamics=dynamics))
    return prepare_night(config, RUN)


def _vol_terms(p: pd.DataFrame) -> pd.Series:
    return p["pnl_vega"] + p["pnl_volga"]


def test_parallel_move_of_the_marks_is_all_level_in_the_archive(tmp_path):
    """Every mark 1.5 vol points up, spot unchanged: pnl_vol_level is the whole vega + volga P&L (1e-9 relative)."""
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 100.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, s) + 0.015})
    p = _night(root).positions
    np.testing.assert_allclose(p["pnl_vol_level"], _vol_terms(p), rtol=1e-9)
    for part in PARTS[1:]:
        np.testing.assert_allclose(p[part], 0.0, atol=1e-9 * _vol_terms(p).abs().max())
    assert (p["pnl_smile_delta"] == 0).all()


def test_parts_add_up_to_vega_plus_volga_in_positions_and_books(tmp_path):
    """Any move: the four parts add up to pnl_vega + pnl_volga per position and per book (data contract, 1e-9)."""
    rng = np.random.default_rng(3)
    noise = {_id(e, k): rng.normal(0, 0.004) for e in EXPIRIES for k in STRIKES}
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 97.5},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, 100.0),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, 100.0) + 0.01 + noise[i]})
    night = _night(root)
    p, b = night.positions, night.books
    np.testing.assert_allclose(p[list(PARTS)].sum(axis=1), _vol_terms(p), rtol=0, atol=1e-9)
    np.testing.assert_allclose(b[list(PARTS)].sum(axis=1), b["pnl_vega"] + b["pnl_volga"], rtol=0, atol=1e-8)
    assert np.abs(p["pnl_vol_own"]).max() > 0 and np.abs(p["pnl_vol_level"]).max() > 0


def test_a_planted_mark_move_is_own_and_warned_off_smile(tmp_path):
    """One mark 4 vol points above its smile: its vol P&L is all own, and `off smile` warns about it alone."""
    bad = _id(EXPIRIES[1], 105.0)
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 100.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, s) + (0.04 if i == bad else 0.0)})
    night = _night(root)
    p = night.positions.set_index("instrument_id")
    assert p.loc[bad, "pnl_vol_own"] == pytest.approx(p.loc[bad, "pnl_vega"] + p.loc[bad, "pnl_volga"], rel=1e-9)
    np.testing.assert_allclose(p.drop(index=bad)["pnl_vol_own"], 0.0, atol=1e-6)
    off = night.exceptions[night.exceptions["rule"] == "off smile"]
    assert off["key"].tolist() == [bad]
    assert (off["severity"] == "warning").all() and off["file"].str.endswith("option_marks.parquet").all()
    assert night.books.loc[0, "warnings"] >= 1


def test_a_butterfly_in_the_marks_is_warned_as_smile_arbitrage(tmp_path):
    """The 100 strike marked 15 points above its neighbours: `smile arbitrage` (butterfly) on that mark."""
    bad = _id(EXPIRIES[0], 100.0)
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 100.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, s) + (0.15 if i == bad else 0.0)})
    ex = _night(root).exceptions
    arb = ex[ex["rule"] == "smile arbitrage"]
    assert bad in arb["key"].tolist()
    assert arb.loc[arb["key"] == bad, "detail"].str.startswith("butterfly").any()


def test_a_later_expiry_below_the_earlier_total_variance_is_calendar_arbitrage(tmp_path):
    """June marks at 10 % under March marks at 25 %+: total variance falls with expiry, `smile arbitrage` (calendar)."""
    def run_vol(i: str, k: float, t: float, s: float) -> float:
        return 0.10 if i.startswith(f"VLX-{EXPIRIES[1]:%y%m}") else _prior_smile(k, t, s)
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 100.0}, {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s), RUN: run_vol})
    ex = _night(root).exceptions
    cal = ex[(ex["rule"] == "smile arbitrage") & ex["detail"].str.startswith("calendar")]
    assert set(cal["key"]) <= {_id(EXPIRIES[1], k) for k in STRIKES} and len(cal) >= 3


def test_sticky_moneyness_moves_the_smile_roll_into_smile_delta_and_keeps_the_residual(tmp_path):
    """Marks following the smile in moneyness: vol P&L is smile delta, explained and residual as sticky strike's."""
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 97.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s), RUN: lambda i, k, t, s: _prior_smile(k, t, s)})
    strike_rows = _night(root).positions.set_index("trade_id")
    money_rows = _night(root, "sticky moneyness").positions.set_index("trade_id")
    for column in ("pnl_explained", "pnl_residual", "pnl_delta", "pnl_gamma", "pnl_vanna", "pnl_theta"):
        np.testing.assert_allclose(money_rows[column], strike_rows[column], rtol=0, atol=1e-9)
    np.testing.assert_allclose(_vol_terms(money_rows) + money_rows["pnl_smile_delta"], _vol_terms(strike_rows),
                               rtol=0, atol=1e-9)
    assert np.abs(money_rows["pnl_smile_delta"]).max() > 1.0
    scale = np.abs(_vol_terms(strike_rows)).max()
    np.testing.assert_allclose(money_rows[list(PARTS)].sum(axis=1), _vol_terms(money_rows), rtol=0, atol=1e-9)
    np.testing.assert_allclose(_vol_terms(money_rows), 0.0, atol=1e-9 * scale)
    assert (strike_rows["pnl_smile_delta"] == 0).all()


def test_default_job_keeps_the_explains_vol_terms(tmp_path):
    """Sticky strike (the default) keeps the contract's pnl_vega and pnl_volga (greeks at the prior state; 1e-12)."""
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 101.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, 100.0),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, 100.0) + 0.01})
    p = _night(root).positions
    g = bsm_greeks(p["spot_prior"].to_numpy(), p["strike"].to_numpy(), p["tau_prior_years"].to_numpy(),
                   p["vol_prior"].to_numpy(), p["rate_prior"].to_numpy(), p["div_yield_prior"].to_numpy(), True)
    units = p["quantity"].to_numpy() * p["multiplier"].to_numpy()
    dvol = (p["vol_run"] - p["vol_prior"]).to_numpy()
    np.testing.assert_allclose(p["pnl_vega"], units * g.vega * dvol, rtol=1e-12)
    np.testing.assert_allclose(p["pnl_volga"], units * 0.5 * g.volga * dvol * dvol, rtol=1e-12)


@pytest.mark.parametrize(("text", "message"), [
    ('[smile]\ndynamics = "sticky delta"\n', "dynamics must be one of"),
    ("[smile]\noff_smile_vol = 0\n", "off_smile_vol must be"),
    ('[smile]\noff_smile_vol = "2%"\n', "off_smile_vol must be"),
    ("[smile]\ndistance = 0.02\n", "unknown key(s) distance"),
])
def test_smile_settings_are_validated_naming_the_key(tmp_path, text, message):
    """A bad [smile] key is refused with the file, the table and the rule in the message."""
    job = tmp_path / "job.toml"
    job.write_text(text)
    with pytest.raises(ConfigError, match="smile") as err:
        load_job(job)
    assert message in str(err.value) and str(job) in str(err.value)


def test_smile_settings_are_read_from_the_job_file(tmp_path):
    """[smile] dynamics and off_smile_vol reach the JobConfig; absent, the defaults are sticky strike and 0.02."""
    job = tmp_path / "job.toml"
    job.write_text('[smile]\ndynamics = "sticky moneyness"\noff_smile_vol = 0.03\n')
    assert load_job(job).smile == SmileSettings("sticky moneyness", 0.03)
    job.write_text("")
    assert dataclasses.asdict(load_job(job).smile) == {"dynamics": "sticky strike", "off_smile_vol": 0.02}


@pytest.mark.parametrize("dynamics", ["sticky strike", "sticky moneyness"])
def test_vol_parts_in_blocks_of_rows_are_those_of_every_row_at_once(tmp_path, monkeypatch, dynamics):
    """The smile parts are computed a block of rows at a time (memory): each row's values are its own, so a night
    split into blocks of 3 rows archives every vol column bit for bit as one block."""
    root = _write(tmp_path, {PRIOR: 100.0, RUN: 97.0},
                  {PRIOR: lambda i, k, t, s: _prior_smile(k, t, s),
                   RUN: lambda i, k, t, s: _prior_smile(k, t, s) + 0.01 + 0.002 * (k - 100.0) / 10.0})
    whole = _night(root, dynamics).positions
    monkeypatch.setattr(night_module, "VOL_PARTS_ROWS", 3)
    blocks = _night(root, dynamics).positions
    assert len(whole) > 3 * 3
    for column in (*PARTS, "pnl_vega", "pnl_volga", "pnl_smile_delta", "pnl_explained", "pnl_residual"):
        np.testing.assert_array_equal(blocks[column].to_numpy(), whole[column].to_numpy(), err_msg=column)
    assert np.abs(whole["pnl_vol_skew"]).max() > 0.0
