"""The explain of positions held overnight: second-order Taylor terms and the residual split.

Pure numpy: arrays in, a frozen result of arrays out; no dates, files or frames. With the prior
state (S0, vol0, tau0, r0, q0), the run-date state (S1, ...), the greeks at the prior state and
``units`` = quantity x multiplier (x FX), every formula is the data contract's::

    actual   = units (price1 - price0)              explained = sum of the eight terms
    delta    = units delta dS                        residual  = actual - explained
    gamma    = units gamma dS^2 / 2                  model     = units (model(state1) - model(state0))
    vega     = units vega dvol                       higher_order = model - explained
    volga    = units volga dvol^2 / 2                mark_gap  = actual - model
    vanna    = units vanna dS dvol
    theta    = units theta_per_year dt_years
    rates    = units rho dr
    dividend = units dividend_rho dq
"""

from __future__ import annotations

from dataclasses import dataclass

from attribution.pricing import FloatArray, Greeks, greeks_unchecked, price_unchecked
from attribution.schema import TAYLOR_TERMS


@dataclass(frozen=True, slots=True)
class MarketState:
    """The five risk factors of each position on one date (decimals, years)."""

    spot: FloatArray
    vol: FloatArray
    tau_years: FloatArray
    rate: FloatArray
    div_yield: FloatArray


@dataclass(frozen=True, slots=True)
class Explain:
    """Per-position P&L amounts (already scaled by ``units``) and the per-unit greeks used."""

    actual: FloatArray
    delta: FloatArray
    gamma: FloatArray
    vega: FloatArray
    volga: FloatArray
    vanna: FloatArray
    theta: FloatArray
    rates: FloatArray
    dividend: FloatArray
    explained: FloatArray
    residual: FloatArray
    model: FloatArray
    higher_order: FloatArray
    mark_gap: FloatArray
    greeks_prior: Greeks

    def terms(self) -> dict[str, FloatArray]:
        """The eight Taylor terms by name, in the contract's order."""
        return {name: getattr(self, name) for name in TAYLOR_TERMS}


def model_value(strike: FloatArray, cp: FloatArray, state: MarketState) -> FloatArray:
    """Model price per unit of underlying at ``state``."""
    return price_unchecked(state.spot, strike, state.tau_years, state.vol, state.rate, state.div_yield, cp)


def explain_overnight(strike: FloatArray, cp: FloatArray, units: FloatArray, state0: MarketState,
                      state1: MarketState, price0: FloatArray, price1: FloatArray, dt_years: FloatArray) -> Explain:
    """Taylor split and full-revaluation split of each position's overnight P&L."""
    g = greeks_unchecked(state0.spot, strike, state0.tau_years, state0.vol, state0.rate, state0.div_yield, cp)
    d_spot = state1.spot - state0.spot
    d_vol = state1.vol - state0.vol
    d_rate = state1.rate - state0.rate
    d_div = state1.div_yield - state0.div_yield
    delta = units * g.delta * d_spot
    gamma = units * 0.5 * g.gamma * d_spot * d_spot
    vega = units * g.vega * d_vol
    volga = units * 0.5 * g.volga * d_vol * d_vol
    vanna = units * g.vanna * d_spot * d_vol
    theta = units * g.theta_per_year * dt_years
    rates = units * g.rho * d_rate
    dividend = units * g.dividend_rho * d_div
    explained = delta + gamma + vega + volga + vanna + theta + rates + dividend
    actual = units * (price1 - price0)
    model = units * (model_value(strike, cp, state1) - g.price)
    return Explain(actual, delta, gamma, vega, volga, vanna, theta, rates, dividend, explained,
                   actual - explained, model, model - explained, actual - model, g)
