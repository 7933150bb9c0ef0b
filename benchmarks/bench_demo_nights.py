"""Benchmark of the demo's nights as a backfill's worker computes them: CPU per night and per stage on one core.

A backfill's workers each keep to one core and compute consecutive nights with one date cache (each date read,
checked and priced once for its two nights); this script does the same in this process, pinned to one core where
the system allows it, over ``--nights`` consecutive nights from ``--start``, after one night to warm the cache. It
prints the wall and CPU seconds per night, each stage of ``prepare_night`` (read, validate, market, explain,
controls), the American exercise arithmetic inside them (boundary solves and values), and the load average before
and after: on a shared machine, compare two versions of the code by running them alternately.

Usage: ``python benchmarks/bench_demo_nights.py --data DIR/data [--start 150] [--nights 30]`` on the data folder an
``attribution demo --into DIR`` wrote (or ``--build DIR`` to write the demo's data there first, about 10 s).
"""

from __future__ import annotations

import argparse
import collections
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import attribution.american as american
import attribution.american_greeks as american_greeks
from attribution.date_cache import DateCache
from attribution.demo import build_demo
from attribution.demo.run import demo_config
from attribution.engine import prepare_night
from attribution.loading import available_dates


def _timed(seconds: collections.Counter[str], name: str, inner: Callable[..., Any]) -> Callable[..., Any]:
    """``inner`` adding its CPU seconds to ``seconds[name]`` (the bench's own instrumentation)."""
    def timed(*args: Any, **kwargs: Any) -> Any:
        start = time.process_time()
        try:
            return inner(*args, **kwargs)
        finally:
            seconds[name] += time.process_time() - start
    return timed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data", type=Path, help="the demo's data folder (DIR/data of `attribution demo --into DIR`)")
    parser.add_argument("--build", type=Path, help="write the demo's data into this folder first")
    parser.add_argument("--start", type=int, default=150, help="index of the first night among the data's dates")
    parser.add_argument("--nights", type=int, default=30, help="consecutive nights timed")
    args = parser.parse_args()
    if args.build is not None:
        build_demo(args.build / "data")
        args.data = args.build / "data"
    if args.data is None:
        parser.error("give --data DIR/data (or --build DIR)")
    if hasattr(os, "sched_setaffinity"):
        os.sched_setaffinity(0, {max(os.sched_getaffinity(0))})  # one core, as a backfill's worker
    config = demo_config(args.data.parent, ())
    dates = available_dates(config.data_root)
    nights = dates[args.start:args.start + args.nights + 1]
    if len(nights) < 2:
        parser.error(f"{config.data_root}: fewer than two dates from index {args.start}")
    american_seconds: collections.Counter[str] = collections.Counter()
    for name in ("solve_put_boundaries", "put_values"):
        timed = _timed(american_seconds, name, getattr(american, name))
        for module in (american, american_greeks):  # the greeks module holds its own reference
            if hasattr(module, name):
                setattr(module, name, timed)
    cache = DateCache()
    prepare_night(config, nights[0], cache=cache)  # warms the cache: the timed nights reuse their prior date
    american_seconds.clear()
    stages: collections.Counter[str] = collections.Counter()
    load_before = os.getloadavg()
    wall, cpu = time.perf_counter(), time.process_time()
    for night in nights[1:]:
        for name, seconds in prepare_night(config, night, cache=cache).stages:
            stages[name] += seconds
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    count = len(nights) - 1
    print(f"{count} nights {nights[1]} .. {nights[-1]} on one core: {1000 * wall / count:.0f} ms wall, "
          f"{1000 * cpu / count:.0f} ms CPU a night; load average {load_before[0]:.2f} before, "
          f"{os.getloadavg()[0]:.2f} after")
    for name, seconds in stages.items():
        print(f"  {name:<10} {1000 * seconds / count:7.1f} ms wall")
    american_total = sum(american_seconds.values())
    print(f"  of which American exercise {1000 * american_total / count:.1f} ms CPU (boundaries "
          f"{1000 * american_seconds['solve_put_boundaries'] / count:.1f}, values "
          f"{1000 * american_seconds['put_values'] / count:.1f})")


if __name__ == "__main__":
    main()
