"""Random American options over the issue's ranges, and QuantLib's QdFpAmericanEngine as the reference.

Shared by ``tests/test_american.py`` and ``benchmarks/bench_american.py`` so both draw the same options
and price them with the same QuantLib set-up (flat curves, Actual365Fixed, expiry = today + whole days).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from option_sample import DAYS_PER_YEAR, OptionSample, quantlib_flat_process


def random_american(n: int, seed: int) -> OptionSample:
    """Calls and puts: S/K 0.5-2, tau 1 day-3 years (whole days / 365), vol 5-100 %, r 0-8 %, q 0-10 %."""
    rng = np.random.default_rng(seed)
    days = rng.integers(1, 3 * 365 + 1, n)
    strike = np.exp(rng.uniform(np.log(20.0), np.log(500.0), n))
    return OptionSample(
        spot=strike * np.exp(rng.uniform(np.log(0.5), np.log(2.0), n)),
        strike=strike,
        days_to_expiry=days,
        tau_years=days / DAYS_PER_YEAR,
        vol=rng.uniform(0.05, 1.0, n),
        rate=rng.uniform(0.0, 0.08, n),
        div_yield=rng.uniform(0.0, 0.10, n),
        is_call=rng.random(n) < 0.5,
    )


def reference_scheme(ql: Any, name: str) -> Any:
    """QuantLib iteration schemes of QdFpAmericanEngine by name.

    ``high_precision``: QuantLib's own highPrecisionScheme (tanh-sinh everywhere; ~60 ms an option).
    ``legendre_tanh_sinh``: QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9), 48-point Gauss-Legendre
    fixed-point integrals, 10 iterations, 24 nodes, tanh-sinh premium to 1e-9 (~1 ms an option; within
    ~1.5e-5 per 100 of strike of the high-precision scheme). ``fast``: QuantLib's fastScheme.
    """
    schemes = {
        "high_precision": ql.QdFpAmericanEngine.highPrecisionScheme,
        "legendre_tanh_sinh": lambda: ql.QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9),
        "fast": ql.QdFpAmericanEngine.fastScheme,
        "accurate": ql.QdFpAmericanEngine.accurateScheme,
    }
    return schemes[name]()


class QuantLibAmerican:
    """Per-option QuantLib American prices (floored at intrinsic), with optional bumps of each input."""

    def __init__(self, ql: Any, scheme: str) -> None:
        self.ql = ql
        self.today = ql.Date(2, 1, 2025)
        ql.Settings.instance().evaluationDate = self.today
        process, self.quotes, _ = quantlib_flat_process(ql, self.today)
        self.engine = ql.QdFpAmericanEngine(process, reference_scheme(ql, scheme))

    def option(self, days: int, is_call: bool, strike: float) -> Any:
        """An American option struck at ``strike``, exercisable from today to today + ``days``."""
        ql = self.ql
        payoff = ql.PlainVanillaPayoff(ql.Option.Call if is_call else ql.Option.Put, float(strike))
        option = ql.VanillaOption(payoff, ql.AmericanExercise(self.today, self.today + int(days)))
        option.setPricingEngine(self.engine)
        return option

    def price(self, option: Any, spot: float, rate: float, div: float, vol: float, floor: float) -> float:
        """NPV at the given inputs, floored at ``floor`` (the intrinsic value)."""
        for quote, value in zip(self.quotes, (spot, rate, div, vol), strict=True):
            quote.setValue(float(value))
        return max(float(option.NPV()), floor)

    def prices(self, o: OptionSample, index: np.ndarray | None = None) -> np.ndarray:
        """Floored prices of the options of ``o`` (those at ``index`` when given)."""
        idx = np.arange(o.spot.size) if index is None else index
        out = np.empty(idx.size)
        for j, i in enumerate(idx):
            intrinsic = max((o.spot[i] - o.strike[i]) * (1 if o.is_call[i] else -1), 0.0)
            option = self.option(int(o.days_to_expiry[i]), bool(o.is_call[i]), o.strike[i])
            out[j] = self.price(option, o.spot[i], o.rate[i], o.div_yield[i], o.vol[i], intrinsic)
        return out

    def bumped_greeks(self, o: OptionSample, i: int, spot_bump: float) -> dict[str, float]:
        """Price and greeks of option ``i`` by central differences of QuantLib prices (13 prices).

        Bumps: spot +-``spot_bump``; vol +-1e-3; r and q +-1e-4; time +-1 and +-2 days (Richardson's
        fourth-order difference, so theta is NaN below 3 days); vanna from the four spot-vol corners.
        """
        s, r, q, v, k = o.spot[i], o.rate[i], o.div_yield[i], o.vol[i], o.strike[i]
        days, call = int(o.days_to_expiry[i]), bool(o.is_call[i])
        floor = max((s - k) * (1 if call else -1), 0.0)
        option = self.option(days, call, k)

        def p(ds: float = 0.0, dv: float = 0.0, dr: float = 0.0, dq: float = 0.0) -> float:
            return self.price(option, s + ds, r + dr, q + dq, v + dv, max((s + ds - k) * (1 if call else -1), 0.0))

        hs, hv, hr = spot_bump, 1e-3, 1e-4
        base, up, down = p(), p(ds=hs), p(ds=-hs)
        out = {"price": base, "delta": (up - down) / (2 * hs), "gamma": (up - 2 * base + down) / hs**2,
               "vega": (p(dv=hv) - p(dv=-hv)) / (2 * hv),
               "vanna": (p(hs, hv) - p(hs, -hv) - p(-hs, hv) + p(-hs, -hv)) / (4 * hs * hv),
               "rho": (p(dr=hr) - p(dr=-hr)) / (2 * hr), "dividend_rho": (p(dq=hr) - p(dq=-hr)) / (2 * hr)}
        theta = float("nan")
        if days >= 3:
            shifted = [self.price(self.option(days + d, call, k), s, r, q, v, floor) for d in (1, -1, 2, -2)]
            h = 1.0 / DAYS_PER_YEAR
            theta = -(8 * (shifted[0] - shifted[1]) - (shifted[2] - shifted[3])) / (12 * h)
        out["theta_per_year"] = theta
        return out
