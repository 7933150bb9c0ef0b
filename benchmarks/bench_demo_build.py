"""Benchmark of the demo's data build (``build_demo``: 261 business days, about 2,000 positions a night; target
<= 9 s wall on a quiet 2-core machine), with the CPU of each thread and the load average beside the figures.

The build shares its work between the main thread and one helper thread (``attribution/demo/helpers.py``); the
figures say how the CPU split between them, so that a run on a busy machine still tells what a quiet one would
take (about the larger of the two threads' CPU). ``--check DIR`` compares every written file with a previous
build's folder byte for byte (a speed change must leave the data identical).

Usage: ``python benchmarks/bench_demo_build.py [--into DIR] [--check DIR]`` (``taskset -c 1`` in front times one
core: no helper thread then).
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from attribution.demo import build_demo, helpers

TARGET_SECONDS = 9.0


def _count_helper_cpu(seconds: dict[str, float]) -> None:
    """Wrap the helper's two loops to add up their thread CPU (the bench's own instrumentation)."""
    for cls, method in ((helpers.FromBothEnds, "_from_back"), (helpers.ParquetFiles, "_drain")):
        inner = getattr(cls, method)

        def timed(self: object, _inner: Callable[[object], None] = inner, _name: str = method) -> None:
            start = time.thread_time()
            try:
                _inner(self)
            finally:
                seconds[_name] = seconds.get(_name, 0.0) + time.thread_time() - start

        setattr(cls, method, timed)


def _differences(a: Path, b: Path) -> list[str]:
    names = sorted({p.relative_to(a) for p in a.rglob("*.parquet")} | {p.relative_to(b) for p in b.rglob("*.parquet")})
    return [str(n) for n in names if not ((a / n).is_file() and (b / n).is_file()
                                          and (a / n).read_bytes() == (b / n).read_bytes())]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--into", type=Path, help="keep the data here (default: a temporary folder)")
    parser.add_argument("--check", type=Path, help="a previous build's folder to compare byte for byte")
    args = parser.parse_args()
    helper: dict[str, float] = {}
    _count_helper_cpu(helper)
    scratch = None if args.into else Path(tempfile.mkdtemp(prefix="demo-build-"))
    root = args.into if scratch is None else scratch / "data"
    shutil.rmtree(root, ignore_errors=True)  # a fresh build: every file written
    load_before = os.getloadavg()
    wall0, main0, usage0 = time.perf_counter(), time.thread_time(), resource.getrusage(resource.RUSAGE_SELF)
    build_demo(root)
    wall = time.perf_counter() - wall0
    main_cpu = time.thread_time() - main0
    usage = resource.getrusage(resource.RUSAGE_SELF)
    user, system = usage.ru_utime - usage0.ru_utime, usage.ru_stime - usage0.ru_stime
    print(f"build_demo: {wall:.2f} s wall (target {TARGET_SECONDS:g} s on a quiet 2-core machine), "
          f"{user + system:.2f} s CPU ({user:.2f} user + {system:.2f} system); load average "
          f"{load_before[0]:.2f} before, {os.getloadavg()[0]:.2f} after; cores {len(os.sched_getaffinity(0))}")
    print(f"  main thread {main_cpu:.2f} s CPU; helper: clean closes {helper.get('_from_back', 0.0):.2f} s, "
          f"files {helper.get('_drain', 0.0):.2f} s")
    if args.check:
        different = _differences(args.check, root)
        print(f"  files byte-identical to {args.check}: {'yes' if not different else 'no'}"
              + ("" if not different else f" ({len(different)} differ, first {different[0]})"))
    if scratch is not None:
        shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()
