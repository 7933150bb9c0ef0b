"""Benchmark of the American pricer: prices and greeks against a per-option QuantLib loop, and a night's share.

Usage::

    python benchmarks/bench_american.py [--n 20000] [--quantlib-sample 1000] [--repeats 3]
    python benchmarks/bench_american.py --accuracy     # the README's accuracy table only

Random American options (calls and puts; S/K 0.5-2, tau 1 day-3 years, vol 5-100 %, r 0-8 %, q 0-10 %).

1. Prices: our FAST and STANDARD schemes over ``--n`` options against a per-option QuantLib loop of
   ``QdFpAmericanEngine``'s fastScheme over a sample (options built before the clock starts; the loop
   sets four quotes and asks the NPV), each with its errors against QuantLib's
   QdFpLegendreTanhSinhScheme(48, 10, 24, 1e-9) on the sample, per 100 of strike. Target >= 5x at equal
   or better accuracy.
2. Greeks + one revaluation: ``american_greeks`` plus one price at a moved state, against the same
   QuantLib loop bumping for the same greeks (base, spot +-, vol +-, r +-, q +-, one day, four spot-vol
   corners for vanna) plus one revaluation: 14 NPVs an option. Target >= 5x.
3. A night: 1,000,000 positions of which 30 % American on 20,000 instruments = 6,000 American instruments.
   What the night adds for them: the American greeks at the prior date, the run-date price (full
   revaluation), the run-date theta and the 32-state order-independent revaluation (16 boundaries),
   priced per instrument, never per position (marks carry their vols: no implied-vol solve). Target <= 5 s.

Prints the machine's load average: other work on the machine slows every figure. A script, not a test.
QuantLib is optional here (a test reference, never a dependency of the job).
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))  # the tests' samples
from american_sample import QuantLibAmerican, random_american  # noqa: E402
from option_sample import OptionSample  # noqa: E402

from attribution.american import BOUNDARY_MEMO, FAST, PRECISE, STANDARD, Scheme, american_price  # noqa: E402
from attribution.american_greeks import american_greeks  # noqa: E402
from attribution.valuation import MarketState, revaluation_shares, value_and_exercised, value_and_greeks  # noqa: E402

TARGET_RATIO = 5.0
NIGHT_BUDGET_SECONDS = 5.0


def best_of(repeats: int, work: Callable[[], object]) -> float:
    """Best wall time of ``repeats`` runs of ``work``, each solving its boundaries from nothing (memo cleared)."""
    times = []
    for _ in range(repeats):
        BOUNDARY_MEMO.clear()
        start = time.perf_counter()
        work()
        times.append(time.perf_counter() - start)
    return min(times)


def subset(o: OptionSample, index: np.ndarray) -> OptionSample:
    return OptionSample(*(getattr(o, f)[index] for f in OptionSample.__slots__))


def error_line(o: OptionSample, ours: np.ndarray, reference: np.ndarray) -> str:
    err = np.abs(ours - reference) * 100.0 / o.strike
    return f"max {err.max():.1e}  p99 {np.quantile(err, 0.99):.1e}  RMSE {np.sqrt(np.mean(err**2)):.1e}"


def moved(o: OptionSample) -> tuple[np.ndarray, ...]:
    """The run-date state of a night: spot +1 %, vol +0.5 point, one day less, rates +1 bp."""
    return (o.spot * 1.01, o.strike, np.maximum(o.tau_years - 1 / 365, 0.0), o.vol + 0.005, o.rate + 1e-4,
            o.div_yield, o.is_call)


def quantlib_loops(ql: object, sample: OptionSample, repeats: int) -> tuple[float, float, np.ndarray]:
    """Seconds per option (best of ``repeats``) of the fastScheme price loop and the bumping loop, and its prices."""
    reference = QuantLibAmerican(ql, "fast")
    n = sample.spot.size
    options = [reference.option(int(sample.days_to_expiry[i]), bool(sample.is_call[i]), sample.strike[i])
               for i in range(n)]
    later = [reference.option(max(int(sample.days_to_expiry[i]) - 1, 0), bool(sample.is_call[i]),
                              sample.strike[i]) for i in range(n)]
    prices = np.empty(n)

    def price_loop() -> None:
        for i in range(n):
            prices[i] = reference.price(options[i], sample.spot[i], sample.rate[i], sample.div_yield[i],
                                        sample.vol[i], 0.0)

    per_price = best_of(repeats, price_loop) / n
    bumps = [(0, 0, 0, 0), (1, 0, 0, 0), (-1, 0, 0, 0), (0, 1, 0, 0), (0, -1, 0, 0), (0, 0, 1, 0), (0, 0, -1, 0),
             (0, 0, 0, 1), (0, 0, 0, -1), (1, 1, 0, 0), (1, -1, 0, 0), (-1, 1, 0, 0), (-1, -1, 0, 0)]
    def greeks_loop() -> None:
        for i in range(n):
            s, r, q, v = sample.spot[i], sample.rate[i], sample.div_yield[i], sample.vol[i]
            for ds, dv, dr, dq in bumps:
                reference.price(options[i], s * (1 + 1e-3 * ds), r + 1e-4 * dr, q + 1e-4 * dq, v + 1e-3 * dv, 0.0)
            reference.price(later[i], s, r, q, v, 0.0)  # theta: one day later
            reference.price(later[i], s * 1.01, r + 1e-4, q, v + 0.005, 0.0)  # the revaluation

    per_greeks = best_of(repeats, greeks_loop) / n
    return per_price, per_greeks, prices


def night_share(repeats: int, scheme: Scheme, instruments: int = 6000) -> float:
    """Seconds the American instruments of a 1M-position night add (6,000 instruments, per instrument).

    The night's American work, through the same entry points: greeks at the prior state, the run-date
    price (full revaluation, with the exercise flags), price, delta, gamma and theta at the run date
    (next-day decay), and the 32-state order-independent revaluation.
    """
    o = random_american(instruments, seed=99)
    cp = np.where(o.is_call, 1.0, -1.0)
    american = np.ones(o.spot.size, dtype=bool)
    spot1, _, tau1, vol1, rate1, div1, _ = moved(o)
    s0 = MarketState(o.spot, o.vol, o.tau_years, o.rate, o.div_yield)
    s1 = MarketState(spot1, vol1, tau1, rate1, div1)

    def work() -> None:
        value_and_greeks(o.strike, cp, s0, american, scheme=scheme)
        value_and_exercised(o.strike, cp, s1, american, scheme=scheme)
        value_and_greeks(o.strike, cp, s1, american, scheme=scheme, full=False)
        revaluation_shares(o.strike, cp, s0, s1, american, scheme=scheme)

    return best_of(repeats, work)


def accuracy_table() -> int:
    """Price errors per 100 of strike of each scheme on the tests' 2,000 options (seed 20260) against QuantLib."""
    import QuantLib as ql

    o = random_american(2000, seed=20260)
    reference = QuantLibAmerican(ql, "legendre_tanh_sinh").prices(o)
    for name, scheme in (("FAST", FAST), ("STANDARD", STANDARD), ("PRECISE", PRECISE)):
        print(f"{name:9s} {error_line(o, american_price(*o.args(), scheme=scheme), reference)}")
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=int, default=20000, help="options priced by our kernel")
    parser.add_argument("--quantlib-sample", type=int, default=1000, help="options priced by the QuantLib loops")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--night-instruments", type=int, default=6000,
                        help="American instruments of the night part (6,000: 30 %% of a 1M-position night's 20,000)")
    parser.add_argument("--accuracy", action="store_true",
                        help="only print the README's accuracy table (the tests' 2,000 options against QuantLib)")
    args = parser.parse_args(argv)
    if args.accuracy:
        return accuracy_table()
    print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    o = random_american(args.n, seed=2024)
    try:
        import QuantLib as ql
    except ImportError:
        ql = None
        print("QuantLib not installed: no comparison")
    per_option = {}
    for name, scheme in (("FAST", FAST), ("STANDARD", STANDARD)):
        per_option[name] = best_of(args.repeats, lambda s=scheme: american_price(*o.args(), scheme=s)) / args.n
        greeks = best_of(args.repeats, lambda s=scheme: (american_greeks(*o.args(), scheme=s),
                                                         american_price(*moved(o), scheme=s))) / args.n
        per_option[name + " greeks"] = greeks
        print(f"{name:9s} price {per_option[name] * 1e6:8.1f} us/option   greeks + one revaluation "
              f"{greeks * 1e6:8.1f} us/option")
    if ql is not None:
        sample = subset(o, np.arange(min(args.quantlib_sample, args.n)))
        per_price, per_greeks, ql_prices = quantlib_loops(ql, sample, args.repeats)
        reference = QuantLibAmerican(ql, "legendre_tanh_sinh").prices(sample)
        cp = np.where(sample.is_call, 1.0, -1.0)
        floored = np.maximum(ql_prices, np.maximum(cp * (sample.spot - sample.strike), 0.0))
        print(f"QuantLib fastScheme loop: price {per_price * 1e6:.1f} us/option, 14 NPVs (greeks + revaluation) "
              f"{per_greeks * 1e6:.1f} us/option; errors {error_line(sample, floored, reference)}")
        for name, scheme in (("FAST", FAST), ("STANDARD", STANDARD)):
            err = error_line(sample, american_price(*sample.args(), scheme=scheme), reference)
            print(f"{name:9s} errors {err}; prices x{per_price / per_option[name]:.1f}, greeks + one "
                  f"revaluation x{per_greeks / per_option[name + ' greeks']:.1f} the QuantLib loop "
                  f"(target x{TARGET_RATIO:.0f} at equal or better accuracy)")
    cpu = time.process_time()
    seconds = night_share(args.repeats, STANDARD, args.night_instruments)
    cpu = (time.process_time() - cpu) / args.repeats
    print(f"night with {args.night_instruments:,} American instruments (30 % of a 1M-position night's 20,000 is "
          f"6,000): American work {seconds:.2f} s wall, "
          f"{cpu:.2f} s CPU over all threads (STANDARD; target <= {NIGHT_BUDGET_SECONDS:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
