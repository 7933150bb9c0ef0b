"""Benchmark of the attribution-quality test: 1,000 books over 250 nights (target <= 2 s on 2 cores).

Times three cases on invented data (seeded):

* ``quality_test`` on a full books x nights matrix (every book with 250 nights);
* ``quality_test`` with mixed history lengths (a quarter of the books provisional, 20..249 nights);
* ``quality_frame`` from a long table (one row per book and night), as the engine calls it.

Usage: ``python benchmarks/bench_quality.py [--books 1000] [--nights 250] [--repeats 5]``.
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np
import pandas as pd

from attribution.quality import quality_test
from attribution.quality_table import quality_frame

TARGET_SECONDS = 2.0


def _matrices(books: int, nights: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    hpl = rng.normal(0.0, 1e5, size=(books, nights))
    rtpl = hpl + rng.normal(0.0, 1e4, size=(books, nights))
    return hpl, rtpl


def _left_pad(hpl: np.ndarray, rtpl: np.ndarray, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    books, nights = hpl.shape
    lengths = np.where(rng.random(books) < 0.25, rng.integers(20, nights, books), nights)
    missing = np.arange(nights)[None, :] < (nights - lengths)[:, None]
    return np.where(missing, np.nan, hpl), np.where(missing, np.nan, rtpl)


def _long_table(hpl: np.ndarray, rtpl: np.ndarray) -> tuple[pd.DataFrame, object]:
    books, nights = hpl.shape
    dates = pd.bdate_range("2024-01-02", periods=nights).date
    table = pd.DataFrame({
        "as_of": np.tile(dates, books),
        "book": np.repeat([f"DESK-{i:04d}" for i in range(books)], nights),
        "hpl": hpl.ravel(),
        "rtpl": rtpl.ravel(),
    })
    return table, dates[-1]


def _time(label: str, run: Callable[[], object], repeats: int) -> float:
    run()  # warm-up
    seconds = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        seconds.append(time.perf_counter() - start)
    best, median = min(seconds), statistics.median(seconds)
    verdict = "within" if median <= TARGET_SECONDS else "ABOVE"
    print(f"{label:<48} best {best:7.3f} s   median {median:7.3f} s   ({verdict} the {TARGET_SECONDS:.0f} s target)")
    return median


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--books", type=int, default=1000)
    parser.add_argument("--nights", type=int, default=250)
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args()

    hpl, rtpl = _matrices(args.books, args.nights, seed=7)
    padded_h, padded_r = _left_pad(hpl, rtpl, seed=8)
    table, as_of = _long_table(hpl, rtpl)
    print(f"attribution-quality test: {args.books} books x {args.nights} nights, {args.repeats} timed repeats")
    _time("quality_test, full history", lambda: quality_test(hpl, rtpl), args.repeats)
    _time("quality_test, mixed lengths (25 % provisional)", lambda: quality_test(padded_h, padded_r), args.repeats)
    _time(f"quality_frame from {len(table):,} rows", lambda: quality_frame(table, as_of), args.repeats)
    zones = pd.Series(quality_test(hpl, rtpl).zone).value_counts().to_dict()
    print(f"zones of the full-history case (sanity): {zones}")


if __name__ == "__main__":
    main()
