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

American options (the ``american`` mask) use the American price and greeks. One whose state crosses
its exercise boundary overnight (in the exercise region on one date, not on the other) has no Taylor
expansion across the kink: its terms are the order-independent revaluation shares instead (spot in
delta, vol in vega, time in theta, rates, dividend; gamma, volga and vanna 0), so that its
explained P&L is the model P&L and its residual is the mark gap alone; ``crossed_boundary`` marks it.

With discrete dividends (:mod:`attribution.dividends`) the model prices on the escrowed spot
``x = S - D``; ``D`` (the dividends' present value) is part of the dividend factor. The first-order
move ``delta dx`` is split into ``delta dS`` (delta) and ``-delta dD`` (dividend), and the
second-order terms use ``dx``, the move of the spot the model prices on::

    gamma    = units gamma dx^2 / 2                  vanna = units vanna dx dvol
    dividend = units (dividend_rho dq - delta dD)

so an ex-date night, where S falls by about the dividend and D by the same, has a delta term
offset by the dividend term and no spurious gamma. Without dividends ``D = 0`` and every term is
the one above.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from attribution.american import STANDARD, Scheme
from attribution.arrays import FloatArray
from attribution.pricing import Greeks
from attribution.valuation import MarketState, revaluation_shares, value, value_and_exercised, value_and_greeks

# The eight Taylor terms, in the data contract's order; the archive's pnl_<term> columns derive from these.
TAYLOR_TERMS: tuple[str, ...] = ("delta", "gamma", "vega", "volga", "vanna", "theta", "rates", "dividend")

__all__ = ["Explain", "MarketState", "explain_overnight", "model_value"]


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
    crossed_boundary: NDArray[np.bool_]

    def terms(self) -> dict[str, FloatArray]:
        """The eight Taylor terms by name, in the contract's order."""
        return {name: getattr(self, name) for name in TAYLOR_TERMS}


def model_value(strike: FloatArray, cp: FloatArray, state: MarketState, american: NDArray[np.bool_] | None = None,
                scheme: Scheme = STANDARD, *, kind: NDArray[np.int8] | None = None) -> FloatArray:
    """Model price per unit of underlying at ``state`` (American rows by the American method, delta-one
    kinds by theirs: :mod:`attribution.valuation`)."""
    return value(strike, cp, state, american, kind=kind, scheme=scheme)


def explain_overnight(strike: FloatArray, cp: FloatArray, units: FloatArray, state0: MarketState,
                      state1: MarketState, price0: FloatArray, price1: FloatArray, dt_years: FloatArray,
                      american: NDArray[np.bool_] | None = None, *, scheme: Scheme = STANDARD,
                      group: NDArray[np.intp] | None = None,
                      prior: tuple[Greeks, NDArray[np.bool_]] | None = None,
                      kind: NDArray[np.int8] | None = None) -> Explain:
    """Taylor split and full-revaluation split of each position's overnight P&L.

    ``group``: rows with equal values share both states (e.g. one instrument), so American prices and
    greeks are computed once per group. ``prior``: the greeks and exercise flags at ``state0`` when the
    caller has them already (as :func:`attribution.valuation.value_and_greeks` returns them). ``kind``:
    instrument kind codes (None: every row an option); a delta-one kind's inapplicable terms are 0.
    """
    g, exercised0 = prior or value_and_greeks(strike, cp, state0, american, kind=kind, scheme=scheme, group=group)
    value1, exercised1 = value_and_exercised(strike, cp, state1, american, kind=kind, scheme=scheme, group=group)
    d_spot = state1.spot - state0.spot
    d_pv = state1.div_pv - state0.div_pv
    d_priced = state1.escrowed_spot - state0.escrowed_spot  # the move of the spot the model prices on
    d_vol = state1.vol - state0.vol
    d_rate = state1.rate - state0.rate
    d_div = state1.div_yield - state0.div_yield
    delta = units * g.delta * d_spot
    gamma = units * 0.5 * g.gamma * d_priced * d_priced
    vega = units * g.vega * d_vol
    volga = units * 0.5 * g.volga * d_vol * d_vol
    vanna = units * g.vanna * d_priced * d_vol
    theta = units * g.theta_per_year * dt_years
    rates = units * g.rho * d_rate
    dividend = units * g.dividend_rho * d_div
    if np.any(d_pv):  # without discrete dividends the term is exactly the contract's dividend_rho dq
        dividend = dividend - units * g.delta * d_pv
    model = units * (value1 - g.price)
    crossed = (exercised0 != exercised1) & (state1.tau_years > 0)
    if crossed.any():
        shares = revaluation_shares(strike, cp, state0, state1, crossed, kind=kind, scheme=scheme, group=group)
        for term, share in ((delta, shares.spot), (vega, shares.vol), (theta, shares.time), (rates, shares.rates),
                            (dividend, shares.dividend)):
            term[crossed] = units[crossed] * share[crossed]
        for term in (gamma, volga, vanna):
            term[crossed] = 0.0
    explained = delta + gamma + vega + volga + vanna + theta + rates + dividend
    actual = units * (price1 - price0)
    return Explain(actual, delta, gamma, vega, volga, vanna, theta, rates, dividend, explained,
                   actual - explained, model, model - explained, actual - model, g, crossed)
