"""Benchmark of the order-independent (Shapley) revaluation split: wall time for a synthetic book.

Usage::

    python benchmarks/bench_revaluation.py [--positions 1000000] [--repeats 3] [--no-baselines]

Prints the best of ``--repeats`` wall times of :func:`attribution.revaluation.shapley_shares`, and,
unless ``--no-baselines``, of two plain alternatives built on ``price_unchecked``: 32 calls on the
full arrays, and one call on the 32 states stacked into one array (needs about 32 x 15 x 8 bytes of
memory per position). Target: 1M positions in <= 3 s on a 2-core machine. A script, not a test.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from attribution.pricing import price_unchecked
from attribution.revaluation import N_FACTORS, N_STATES, shapley_allocate, shapley_shares

FloatArray = np.ndarray
TARGET_SECONDS_PER_MILLION = 3.0
_FACTORS = ("spot", "vol", "tau", "rate", "div")


@dataclass(frozen=True, slots=True)
class Timing:
    """Best wall time of one method over the repeats."""

    method: str
    best_seconds: float


def synthetic_book(n_positions: int, seed: int = 1) -> dict[str, FloatArray]:
    """Invented positions with one night of moves; 0.1 % of them expire on the run date."""
    rng = np.random.default_rng(seed)
    tau0 = rng.uniform(1 / 365, 3.0, n_positions)
    tau0[: n_positions // 1000] = 1 / 365
    spot0 = rng.uniform(20.0, 500.0, n_positions)
    vol0 = rng.uniform(0.08, 0.8, n_positions)
    rate0 = rng.uniform(0.0, 0.06, n_positions)
    div0 = rng.uniform(0.0, 0.05, n_positions)
    return {
        "strike": spot0 * rng.uniform(0.6, 1.4, n_positions),
        "cp": np.where(rng.random(n_positions) < 0.5, 1.0, -1.0),
        "spot0": spot0, "vol0": vol0, "tau0": tau0, "rate0": rate0, "div0": div0,
        "spot1": spot0 * np.exp(rng.normal(0.0, 0.02, n_positions)),
        "vol1": np.maximum(vol0 + rng.normal(0.0, 0.01, n_positions), 0.01),
        "tau1": np.maximum(tau0 - 1 / 365, 0.0),
        "rate1": rate0 + rng.normal(0.0, 3e-4, n_positions),
        "div1": div0 + rng.normal(0.0, 3e-4, n_positions),
    }


def _state_inputs(book: dict[str, FloatArray], state: int) -> list[FloatArray]:
    """Spot, vol, tau, rate, div of one state (bit i = factor i at its run-date value)."""
    return [book[f"{name}{(state >> i) & 1}"] for i, name in enumerate(_FACTORS)]


def plain_32_calls(book: dict[str, FloatArray]) -> FloatArray:
    """Baseline: one price_unchecked call per state on the full arrays, then the generic allocation."""
    values = np.empty((N_STATES, book["strike"].size))
    for state in range(N_STATES):
        s, v, t, r, q = _state_inputs(book, state)
        values[state] = price_unchecked(s, book["strike"], t, v, r, q, book["cp"])
    return shapley_allocate(values)


def plain_stacked_call(book: dict[str, FloatArray]) -> FloatArray:
    """Baseline: the 32 states concatenated into one price_unchecked call, then the generic allocation."""
    stacked = [np.concatenate([_state_inputs(book, m)[i] for m in range(N_STATES)]) for i in range(N_FACTORS)]
    s, v, t, r, q = stacked
    k, cp = np.tile(book["strike"], N_STATES), np.tile(book["cp"], N_STATES)
    values = price_unchecked(s, k, t, v, r, q, cp).reshape(N_STATES, -1)
    return shapley_allocate(values)


def time_best(method: str, run: Callable[[], object], repeats: int) -> Timing:
    """Best wall time of ``run()`` over ``repeats`` calls."""
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    return Timing(method, best)


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print one line per method; returns 0 (a slow machine is not an error)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--positions", type=int, default=1_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--no-baselines", action="store_true", help="time only shapley_shares")
    args = parser.parse_args(argv)

    book = synthetic_book(args.positions)
    timings = [time_best("shapley_shares (specialised 32-state kernel)", lambda: shapley_shares(**book), args.repeats)]
    if not args.no_baselines:
        timings.append(time_best("32 x price_unchecked + shapley_allocate", lambda: plain_32_calls(book), 1))
        timings.append(time_best("1 stacked price_unchecked + shapley_allocate", lambda: plain_stacked_call(book), 1))
        fast = shapley_shares(**book)
        gap = np.abs(np.stack([fast.spot, fast.vol, fast.time, fast.rates, fast.dividend]) - plain_32_calls(book))
        print(f"max |specialised - plain 32 calls| = {gap.max():.3e} per unit of underlying")

    target = TARGET_SECONDS_PER_MILLION * args.positions / 1e6
    print(f"positions: {args.positions:,}; target for shapley_shares: <= {target:.2f} s")
    for timing in timings:
        rate = args.positions / timing.best_seconds
        print(f"{timing.method:<48} {timing.best_seconds:8.3f} s  ({rate / 1e6:5.2f} M positions/s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
