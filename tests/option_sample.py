"""Random European options over the ranges the kernel must cover, and QuantLib's reference process.

Shared by the tests (through ``tests/conftest.py``) and ``benchmarks/bench_pricing.py``, so that both
draw the same options and price them against the same QuantLib set-up.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from attribution.pricing import FloatArray

DAYS_PER_YEAR = 365.0  # ACT/365F: the sample's expiries are whole calendar days from the valuation date


@dataclass(frozen=True, slots=True)
class OptionSample:
    """Inputs of n options, one array element per option (units as in attribution.pricing)."""

    spot: FloatArray
    strike: FloatArray
    days_to_expiry: np.ndarray
    tau_years: FloatArray
    vol: FloatArray
    rate: FloatArray
    div_yield: FloatArray
    is_call: np.ndarray

    def args(self) -> tuple[np.ndarray, ...]:
        """Positional arguments for bsm_price / bsm_greeks."""
        return (self.spot, self.strike, self.tau_years, self.vol, self.rate, self.div_yield, self.is_call)


def random_options(n: int, seed: int) -> OptionSample:
    """Calls and puts: q 0-10 %, r -2 to 10 %, tau 1 day-5 years (whole days / 365), vol 5-150 %, S/K 0.3-3."""
    rng = np.random.default_rng(seed)
    days = rng.integers(1, 5 * 365 + 2, n)
    strike = np.exp(rng.uniform(np.log(10.0), np.log(1000.0), n))
    moneyness = np.exp(rng.uniform(np.log(0.3), np.log(3.0), n))
    return OptionSample(
        spot=strike * moneyness,
        strike=strike,
        days_to_expiry=days,
        tau_years=days / DAYS_PER_YEAR,
        vol=rng.uniform(0.05, 1.50, n),
        rate=rng.uniform(-0.02, 0.10, n),
        div_yield=rng.uniform(0.0, 0.10, n),
        is_call=rng.random(n) < 0.5,
    )


def quantlib_flat_process(ql: Any, today: Any) -> tuple[Any, tuple[Any, Any, Any, Any], Any]:
    """QuantLib's BlackScholesMertonProcess on flat curves (Actual365Fixed), driven by four quotes.

    Returns the process, the (spot, rate, dividend, vol) ``SimpleQuote`` handles to reset per option,
    and the day counter. ``ql`` is the QuantLib module (imported by the caller, a test reference only).
    """
    day_count = ql.Actual365Fixed()
    spot, rate, div, vol = (ql.SimpleQuote(0.0) for _ in range(4))
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(spot),
        ql.YieldTermStructureHandle(ql.FlatForward(today, ql.QuoteHandle(div), day_count)),
        ql.YieldTermStructureHandle(ql.FlatForward(today, ql.QuoteHandle(rate), day_count)),
        ql.BlackVolTermStructureHandle(ql.BlackConstantVol(today, ql.NullCalendar(), ql.QuoteHandle(vol), day_count)),
    )
    return process, (spot, rate, div, vol), day_count
