"""Benchmark of the BSM pricing kernel: greeks, price and implied-vol throughput, against a QuantLib loop.

Usage::

    python benchmarks/bench_pricing.py [--n 1000000] [--repeats 5] [--quantlib-sample 20000]

Random European options (calls and puts; S/K 0.3-3, tau 1 day-5 years, vol 5-150 %, r -2 to 10 %,
q 0-10 %). Prints the best of ``--repeats`` wall times, as options per second, for the validated public
functions (``bsm_greeks``, ``bsm_price``, ``implied_vol``; all cores and one thread) and the unchecked
kernels, with the machine's load average (other work on the machine slows every figure), then a per-option
QuantLib loop (AnalyticEuropeanEngine, price and six greeks) over a sample, extrapolated per option, and
the ratio. Targets on a 2-core machine: >= 8M options/s for the full greek set, >= 50x the QuantLib loop.
A script, not a test: a slow machine prints figures below target and still exits 0. QuantLib is
optional here (a test reference, never a dependency of the job).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))  # the tests' option sample
from option_sample import OptionSample, quantlib_flat_process, random_options  # noqa: E402

from attribution.implied_vol import implied_vol
from attribution.pricing import bsm_greeks, bsm_price, greeks_unchecked, price_unchecked

FloatArray = np.ndarray
TARGET_GREEKS_PER_SECOND = 8e6
TARGET_RATIO_TO_QUANTLIB = 50.0


@dataclass(frozen=True, slots=True)
class Throughput:
    """Best wall time of one method over the repeats, and the options per second it implies."""

    method: str
    n_options: int
    best_seconds: float

    @property
    def options_per_second(self) -> float:
        """Options processed per second of wall time."""
        return self.n_options / self.best_seconds


def time_best(method: str, n_options: int, run: Callable[[], object], repeats: int) -> Throughput:
    """Best wall time of ``run()`` over ``repeats`` calls."""
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    return Throughput(method, n_options, best)


def quantlib_loop(o: OptionSample) -> Throughput | None:
    """One QuantLib VanillaOption per option (price and six greeks), one shared process; None without QuantLib."""
    try:
        import QuantLib as ql  # optional reference: imported only when present
    except ImportError:
        return None
    today = ql.Date(15, ql.June, 2023)
    ql.Settings.instance().evaluationDate = today
    process, (spot, rate, div, vol), _ = quantlib_flat_process(ql, today)
    engine = ql.AnalyticEuropeanEngine(process)
    start = time.perf_counter()
    for j in range(o.spot.size):
        spot.setValue(float(o.spot[j]))
        rate.setValue(float(o.rate[j]))
        div.setValue(float(o.div_yield[j]))
        vol.setValue(float(o.vol[j]))
        kind = ql.Option.Call if o.is_call[j] else ql.Option.Put
        option = ql.VanillaOption(ql.PlainVanillaPayoff(kind, float(o.strike[j])),
                                  ql.EuropeanExercise(today + int(o.days_to_expiry[j])))
        option.setPricingEngine(engine)
        (option.NPV(), option.delta(), option.gamma(), option.vega(), option.theta(), option.rho(),
         option.dividendRho())
    return Throughput("QuantLib loop (price + 6 greeks, per option)", o.spot.size, time.perf_counter() - start)


def _print(t: Throughput) -> None:
    print(f"{t.method:<52} {t.best_seconds:8.3f} s  {t.options_per_second / 1e6:8.3f} M options/s")


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print one line per method, the targets and the ratio; returns 0."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=1_000_000, help="options per call (default 1,000,000)")
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--quantlib-sample", type=int, default=20_000, help="options in the QuantLib loop")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)

    o = random_options(args.n, args.seed)
    cp = np.where(o.is_call, 1.0, -1.0)
    checked = (o.spot, o.strike, o.tau_years, o.vol, o.rate, o.div_yield)
    price = bsm_price(*o.args())
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(f"options: {args.n:,}; best of {args.repeats} runs; {os.cpu_count()} cores, load average {load}")
    greeks = time_best("bsm_greeks (validated, full greek set)", args.n, lambda: bsm_greeks(*o.args()), args.repeats)
    timings = [
        greeks,
        time_best("bsm_greeks, threads=1", args.n, lambda: bsm_greeks(*o.args(), threads=1), args.repeats),
        time_best("greeks_unchecked (kernel only)", args.n, lambda: greeks_unchecked(*checked, cp), args.repeats),
        time_best("bsm_price (validated, price alone)", args.n, lambda: bsm_price(*o.args()), args.repeats),
        time_best("bsm_price, threads=1", args.n, lambda: bsm_price(*o.args(), threads=1), args.repeats),
        time_best("price_unchecked (kernel only)", args.n, lambda: price_unchecked(*checked, cp), args.repeats),
        time_best("implied_vol (from the prices above)", args.n,
                  lambda: implied_vol(price, o.spot, o.strike, o.tau_years, o.rate, o.div_yield, o.is_call),
                  max(1, args.repeats // 2)),
    ]
    for t in timings:
        _print(t)

    verdict = "meets" if greeks.options_per_second >= TARGET_GREEKS_PER_SECOND else "BELOW"
    print(f"full greek set: {greeks.options_per_second / 1e6:.2f} M options/s, {verdict} the target of "
          f"{TARGET_GREEKS_PER_SECOND / 1e6:.0f} M options/s")
    reference = quantlib_loop(random_options(args.quantlib_sample, args.seed + 1))
    if reference is None:
        print("QuantLib is not installed: comparison skipped")
        return 0
    _print(reference)
    ratio = greeks.options_per_second / reference.options_per_second
    verdict = "meets" if ratio >= TARGET_RATIO_TO_QUANTLIB else "BELOW"
    print(f"bsm_greeks / QuantLib loop: {ratio:,.0f}x ({reference.best_seconds / reference.n_options * 1e6:.1f} us "
          f"per QuantLib option), {verdict} the target of {TARGET_RATIO_TO_QUANTLIB:.0f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
