"""Tests of attribution.vol_time: the variance clock, theta's decay and carry, and weighted nights."""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

from attribution.config import ConfigError, JobConfig, VolTimeSettings, load_job
from attribution.engine import prepare_night
from attribution.explain import MarketState, explain_overnight
from attribution.pricing import bsm_greeks
from attribution.timebasis import TimeBasis
from attribution.vol_time import clock_ratio, clock_terms, decay_per_year, variance_years
from tests.mini_desk import PRIOR, RUN, write_mini_desk

FRIDAY, MONDAY = dt.date(2026, 11, 27), dt.date(2026, 11, 30)
QUIET_WEEKENDS = VolTimeSettings(weekdays=(1.0, 1.0, 1.0, 1.0, 1.0, 0.2, 0.2))


def test_every_weight_one_is_the_basis_clock():
    """Weights of 1: variance years equal ACT/365F year fractions exactly, and BUS/252's between business days."""
    rng = np.random.default_rng(1)
    start = np.datetime64("2026-01-05") + rng.integers(0, 400, 500).astype("timedelta64[D]")
    end = start + rng.integers(0, 2000, 500).astype("timedelta64[D]")
    act = TimeBasis("ACT/365F")
    np.testing.assert_array_equal(variance_years(act, VolTimeSettings(), start, end), act.year_fraction(start, end))
    bus = TimeBasis("BUS/252", (dt.date(2026, 12, 25), dt.date(2027, 1, 1)))
    start_b = np.busday_offset(start, 0, roll="forward", holidays=list(bus.holidays))
    end_b = np.busday_offset(end, 0, roll="forward", holidays=list(bus.holidays))
    np.testing.assert_allclose(variance_years(bus, VolTimeSettings(), start_b, end_b),
                               bus.year_fraction(start_b, end_b), rtol=0, atol=1e-15)


def test_weekend_holiday_and_event_weights_count_the_days_after_the_start():
    """Friday to Monday with weekends at 0.2 is (0.2 + 0.2 + 1) / 365; a holiday and an event day take their weight."""
    act = TimeBasis("ACT/365F", (dt.date(2026, 12, 25),))
    assert variance_years(act, QUIET_WEEKENDS, FRIDAY, MONDAY)[0] == pytest.approx(1.4 / 365, rel=1e-15)
    holiday = dataclasses.replace(QUIET_WEEKENDS, holiday=0.1)
    assert variance_years(act, holiday, dt.date(2026, 12, 24), dt.date(2026, 12, 25))[0] == pytest.approx(0.1 / 365)
    event = dataclasses.replace(QUIET_WEEKENDS, events=((dt.date(2026, 12, 16), 3.0),))
    assert variance_years(act, event, dt.date(2026, 12, 15), dt.date(2026, 12, 17))[0] == pytest.approx(4.0 / 365)
    bus = TimeBasis("BUS/252")
    assert variance_years(bus, event, FRIDAY, MONDAY)[0] == pytest.approx(1.0 / 252)   # weekends are 0 on BUS/252


def test_decay_and_carry_are_the_two_parts_of_the_handbook_theta():
    """At weight 1 decay is -S e^(-qT) n(d1) vol / (2 sqrt T) and carry the rest of the handbook theta (1e-10)."""
    # Hull, Options, Futures and Other Derivatives: theta of a European call on a dividend-paying stock (from
    # memory); normal density and distribution from scipy.stats.norm.
    s, k, t, v, r, q = 100.0, 95.0, 0.75, 0.3, 0.04, 0.015
    g = bsm_greeks(s, k, t, v, r, q, True)
    state = MarketState(np.array([s]), np.array([v]), np.array([t]), np.array([r]), np.array([q]))
    d1 = (np.log(s / k) + (r - q + 0.5 * v * v) * t) / (v * np.sqrt(t))
    d2 = d1 - v * np.sqrt(t)
    decay = -s * np.exp(-q * t) * norm.pdf(d1) * v / (2 * np.sqrt(t))
    carry = q * s * np.exp(-q * t) * norm.cdf(d1) - r * k * np.exp(-r * t) * norm.cdf(d2)
    np.testing.assert_allclose(decay_per_year(g, state, np.ones(1)), decay, rtol=1e-10)
    np.testing.assert_allclose(g.theta_per_year - decay_per_year(g, state, np.ones(1)), carry, rtol=1e-10)


def test_the_restated_terms_on_a_unit_clock_are_the_explains():
    """ratio 1 and dt_var = dt: vega, volga, vanna and theta are the explain's own terms (1e-12 relative)."""
    rng = np.random.default_rng(5)
    n = 300
    s0 = MarketState(rng.uniform(80, 120, n), rng.uniform(0.1, 0.5, n), rng.uniform(0.05, 2, n),
                     np.full(n, 0.03), np.full(n, 0.01))
    s1 = MarketState(s0.spot * 1.01, s0.vol + 0.01, s0.tau_years - 1 / 365, s0.rate, s0.div_yield)
    strike, cp, units = rng.uniform(80, 120, n), np.where(rng.random(n) < 0.5, 1.0, -1.0), rng.uniform(-9, 9, n)
    ex = explain_overnight(strike, cp, units, s0, s1, np.zeros(n), np.zeros(n), np.full(n, 1 / 365))
    t = clock_terms(ex.greeks_prior, units, s0, s1, 1 / 365, 1 / 365, np.ones(n), np.ones(n))
    for name in ("vega", "volga", "vanna", "theta"):
        np.testing.assert_allclose(t[name], getattr(ex, name), rtol=1e-12, atol=1e-12)


def test_clock_ratio_keeps_total_variance_and_is_one_at_unit_weights():
    """tau_var / tau: 1 at unit weights, below 1 with quiet weekends; vol sqrt(tau / tau_var) keeps vol^2 tau."""
    act = TimeBasis("ACT/365F")
    expiry = np.array(["2027-03-19", "2027-06-18"], dtype="datetime64[D]")
    tau = act.year_fraction(MONDAY, expiry)
    assert (clock_ratio(act, VolTimeSettings(), MONDAY, expiry, tau) == 1.0).all()
    ratio = clock_ratio(act, QUIET_WEEKENDS, MONDAY, expiry, tau)
    assert ((ratio > 0.7) & (ratio < 0.8)).all()
    vol_var = 0.2 / np.sqrt(ratio)
    np.testing.assert_allclose(vol_var ** 2 * ratio * tau, 0.2 ** 2 * tau, rtol=1e-14)


def _night(root, vol_time: VolTimeSettings) -> pd.DataFrame:
    config = JobConfig(data_root=root, write_reports=False, vol_time=vol_time)
    return prepare_night(config, RUN, PRIOR).positions.set_index("trade_id")


def test_default_weights_reproduce_the_night_exactly(tmp_path):
    """Weights all given as 1 (and an event at 1) archive exactly the rows of a job without [vol_time]."""
    root = write_mini_desk(tmp_path / "data")
    plain = _night(root, VolTimeSettings())
    ones = _night(root, VolTimeSettings((1.0,) * 7, 1.0, ((dt.date(2026, 11, 30), 1.0),)))
    pd.testing.assert_frame_equal(plain, ones, check_exact=True)


def test_a_quiet_weekend_shrinks_decay_keeps_carry_and_conserves(tmp_path):
    """Weekends at 0.2: decay (1.4 / 3) / r of the unit clock's, carry and model P&L unchanged, identities kept."""
    root = write_mini_desk(tmp_path / "data")
    base, quiet = _night(root, VolTimeSettings()), _night(root, QUIET_WEEKENDS)
    held = base.index[base["status"] == "carried"]
    b, q = base.loc[held], quiet.loc[held]
    np.testing.assert_allclose(q["pnl_theta_decay"] + q["pnl_theta_carry"], q["pnl_theta"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(b["pnl_theta_decay"] + b["pnl_theta_carry"], b["pnl_theta"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(q["pnl_theta_carry"], b["pnl_theta_carry"], rtol=1e-12)
    # decay per variance year is 1 / r of the unit clock's (a larger vol over less time), over 1.4 days out of 3
    expiry = q["expiry"].to_numpy(dtype="datetime64[D]")
    r = variance_years(TimeBasis(), QUIET_WEEKENDS, PRIOR, expiry) / q["tau_prior_years"].to_numpy()
    np.testing.assert_allclose(q["pnl_theta_decay"] / b["pnl_theta_decay"], (1.4 / 3) / r, rtol=1e-12)
    terms = ["pnl_delta", "pnl_gamma", "pnl_vega", "pnl_volga", "pnl_vanna", "pnl_theta", "pnl_rates", "pnl_dividend"]
    np.testing.assert_allclose(q[terms].sum(axis=1), q["pnl_explained"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(q["pnl_explained"] + q["pnl_residual"], q["pnl_actual"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(q["pnl_model"], b["pnl_model"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(q[["pnl_vol_level", "pnl_vol_skew", "pnl_vol_curvature", "pnl_vol_own"]].sum(axis=1),
                               q["pnl_vega"] + q["pnl_volga"], rtol=0, atol=1e-9)


@pytest.mark.parametrize(("text", "message"), [
    ("[vol_time]\nweekdays = [1, 1, 1, 1, 1]\n", "list of 7 weights"),
    ("[vol_time]\nweekdays = [1, 1, 1, 1, 0, 0, 0]\n", "Monday to Friday must weigh more than 0"),
    ("[vol_time]\nweekdays = [1, 1, 1, 1, 1, -1, 0]\n", "weekdays[5] must be a number in [0, 100]"),
    ("[vol_time]\nholiday = true\n", "holiday must be a number"),
    ("[vol_time.events]\nsoon = 2.0\n", "events key 'soon' is not a date"),
    ("[vol_time.events]\n2026-12-16 = \"high\"\n", "events.2026-12-16 must be a number"),
    ("[vol_time]\nweekend = 0.2\n", "unknown key(s) weekend"),
])
def test_vol_time_settings_are_validated_naming_the_key(tmp_path, text, message):
    """A bad [vol_time] key is refused with the file, the table and the rule in the message."""
    job = tmp_path / "job.toml"
    job.write_text(text)
    with pytest.raises(ConfigError, match=r"\[vol_time\]") as err:
        load_job(job)
    assert message in str(err.value) and str(job) in str(err.value)


def test_vol_time_settings_are_read_from_the_job_file(tmp_path):
    """weekdays, holiday and dated events reach the JobConfig, events sorted by date."""
    job = tmp_path / "job.toml"
    job.write_text("[vol_time]\nweekdays = [1, 1, 1, 1, 1, 0.2, 0.2]\nholiday = 0.1\n"
                   "[vol_time.events]\n2026-12-16 = 2.5\n2026-11-05 = 3\n")
    settings = load_job(job).vol_time
    assert settings == VolTimeSettings((1.0, 1.0, 1.0, 1.0, 1.0, 0.2, 0.2), 0.1,
                                       ((dt.date(2026, 11, 5), 3.0), (dt.date(2026, 12, 16), 2.5)))
    assert not settings.is_default() and VolTimeSettings().is_default()
