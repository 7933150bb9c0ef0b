"""What the smiles add to a night: fits on both dates, checks on the run date's marks, split of 1M positions.

    python benchmarks/bench_smile.py                      # 50,000 smiles x 12 strikes, 1,000,000 positions
    python benchmarks/bench_smile.py --smiles 5000 --positions 100000

Synthetic markets in the shape the job builds (attribution.market.InstrumentMarket): ten expiries per
underlying, each smile a quadratic in standardised moneyness with 0.1 vol point of marking noise, a
night's spot and vol moves per underlying, and 50 marks planted 5 vol points off their smile. Greeks
are given (the explain computes them anyway), so the figures are the smiles' own cost.
Prints seconds per step and the best of ``--repeat`` runs; a script, never a timed test.
"""

from __future__ import annotations

import argparse
import datetime as dt
import time

import numpy as np
import pandas as pd

from attribution.exceptions_log import ExceptionLog
from attribution.market import InstrumentMarket
from attribution.smile_night import check_smiles, night_smiles, vol_columns

PRIOR, RUN = dt.date(2026, 11, 26), dt.date(2026, 11, 27)


def _market(as_of: dt.date, und: np.ndarray, expiry: np.ndarray, strike: np.ndarray, spot: np.ndarray,
            vol: np.ndarray) -> InstrumentMarket:
    n = strike.size
    ids = pd.Index([f"I{i}" for i in range(n)])
    tau = (expiry - np.datetime64(as_of, "D")).astype(float) / 365.0
    return InstrumentMarket(
        as_of=as_of, ids=ids, underlying=und, currency=np.full(n, "USD", dtype=object),
        option_type=np.full(n, "call", dtype=object), cp=np.ones(n), strike=strike, multiplier=np.full(n, 100.0),
        expiry=expiry, tau_years=tau, spot=spot, div_yield=np.full(n, 0.01), rate=np.full(n, 0.03),
        price=np.ones(n), vol=vol, marked_vol=vol, vol_solved=np.zeros(n, bool), vol_mismatch=np.zeros(n, bool),
        spot_known=np.ones(n, bool), usable=np.ones(n, bool), reason=np.full(n, "", dtype=object),
        listed=np.ones(n, bool), terms_rejected=np.zeros(n, bool), american=np.zeros(n, bool),
        kind=np.zeros(n, np.int8))


def build(n_smiles: int, strikes: int, seed: int = 1) -> tuple[InstrumentMarket, InstrumentMarket]:
    """Both dates' markets: n_smiles smiles (underlying x expiry) of ``strikes`` strikes each."""
    rng = np.random.default_rng(seed)
    expiries_per_und = 10
    n_und = max(n_smiles // expiries_per_und, 1)
    smile = np.repeat(np.arange(n_smiles), strikes)
    und_of_smile = smile // expiries_per_und
    und = np.array([f"U{u:05d}" for u in range(n_und)], dtype=object)[und_of_smile]
    expiry = (np.datetime64(RUN, "D") + 30 * (1 + smile % expiries_per_und)).astype("datetime64[D]")
    tau = (expiry - np.datetime64(PRIOR, "D")).astype(float) / 365.0
    spot0 = rng.uniform(20, 500, n_und)[und_of_smile]
    spot1 = spot0 * np.exp(rng.normal(0, 0.01, n_und))[und_of_smile]
    # one vol level per underlying, a gentle term slope: total variance grows with expiry (no calendar arbitrage)
    atm = (rng.uniform(0.15, 0.6, n_und)[np.arange(n_smiles) // expiries_per_und]
           * (1.0 - 0.01 * (np.arange(n_smiles) % expiries_per_und)))[smile]
    x = np.tile(np.linspace(-2.0, 2.0, strikes), n_smiles)
    strike = spot0 * np.exp(x * atm * np.sqrt(tau))
    skew, curv = rng.uniform(-0.04, 0.0, n_und)[und_of_smile], rng.uniform(0.0, 0.01, n_und)[und_of_smile]
    vol0 = atm + skew * x + curv * x * x + rng.normal(0, 0.001, x.size)
    vol1 = vol0 + rng.normal(0, 0.01, n_und)[und_of_smile] + rng.normal(0, 0.001, x.size)
    vol1[rng.choice(x.size, 50, replace=False)] += 0.05
    return _market(PRIOR, und, expiry, strike, spot0, vol0), _market(RUN, und, expiry, strike, spot1, vol1)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--smiles", type=int, default=50_000)
    parser.add_argument("--strikes", type=int, default=12)
    parser.add_argument("--positions", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    m0, m1 = build(args.smiles, args.strikes)
    rng = np.random.default_rng(2)
    inst = rng.integers(0, len(m0.ids), args.positions)
    units = rng.normal(0, 500, args.positions)
    vega, volga = rng.uniform(0, 40, args.positions), rng.normal(0, 20, args.positions)
    dvol = m1.vol[inst] - m0.vol[inst]
    pnl_vega, pnl_volga = units * vega * dvol, units * 0.5 * volga * dvol * dvol
    best: dict[str, tuple[float, float]] = {}

    def clock() -> tuple[float, float]:
        return time.perf_counter(), time.process_time()

    for _ in range(args.repeat):
        t0 = clock()
        smiles = night_smiles(m0, m1, m0.vol, m1.vol)
        t1 = clock()
        log = ExceptionLog(RUN)
        check_smiles(smiles, m1, m1.vol, 0.02, "option_marks.parquet", log)
        t2 = clock()
        cols = vol_columns(smiles, inst, inst, units, vega, volga, pnl_vega, pnl_volga, "sticky strike")
        t3 = clock()
        for name, (a, b) in (("fit both dates", (t0, t1)), ("checks", (t1, t2)), ("split positions", (t2, t3)),
                             ("total", (t0, t3))):
            old = best.get(name, (np.inf, np.inf))
            best[name] = (min(old[0], b[0] - a[0]), min(old[1], b[1] - a[1]))
    parts = sum(cols[c] for c in ("pnl_vol_level", "pnl_vol_skew", "pnl_vol_curvature", "pnl_vol_own"))
    print(f"smiles {args.smiles:,} x {args.strikes} strikes = {len(m0.ids):,} marks a date; "
          f"positions {args.positions:,}; best of {args.repeat}")
    print(f"  {'step':<16} {'wall s':>7} {'cpu s':>7}   (cpu: this process, all threads; a busy machine inflates wall)")
    for name, (wall, cpu) in best.items():
        print(f"  {name:<16} {wall:7.3f} {cpu:7.3f}")
    print(f"  quadratic smiles {int(smiles.run.fit.quadratic.sum()):,}; warnings {log.count('warning'):,}; "
          f"max |parts - (vega + volga)| {np.abs(parts - pnl_vega - pnl_volga).max():.2e}")


if __name__ == "__main__":
    main()
