"""Where a night's memory goes: resident memory (RSS) and its peak after every stage of one night, and the
code that was running at the highest points.

    python benchmarks/bench_memory.py [--positions 1000000] [--books 1000] [--instruments 20000] [--underlyings 500]
    python benchmarks/bench_memory.py --data DIR [--as-of 2026-11-27]     # a night already written (bench --keep)

Writes ``attribution bench``'s synthetic night (unless ``--data``), then runs it through the whole job (archive and
every report page) in a child process, as the bench does, so that the figures are the night's alone. The child
prints RSS and its peak (``VmHWM``) at the end of each stage, and a thread samples RSS every 20 ms with the
package's innermost frames on the main thread: the top samples say which lines hold the peak. Memory figures
do not depend on the machine's load (times do: they are not printed here; ``attribution bench`` prints them).
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import multiprocessing as mp
import sys
import tempfile
import threading
import time
from pathlib import Path

SAMPLE_SECONDS = 0.02
TOP = 12


def _status() -> tuple[int, int]:
    """(RSS, peak RSS) of this process in MB."""
    found = {}
    with open("/proc/self/status", encoding="ascii") as f:
        for line in f:
            key, _, value = line.partition(":")
            if key in ("VmRSS", "VmHWM"):
                found[key] = int(value.split()[0]) // 1024
    return found["VmRSS"], found["VmHWM"]


def _where(frame: object) -> str:
    """The package's innermost frames of a stack, innermost first."""
    stack = []
    while frame is not None:
        code = frame.f_code  # type: ignore[attr-defined]
        if "/attribution/" in code.co_filename:
            stack.append(f"{Path(code.co_filename).name}:{frame.f_lineno}")  # type: ignore[attr-defined]
        frame = frame.f_back  # type: ignore[attr-defined]
    return " < ".join(stack[:4]) or "(outside the package)"


def _night(data: Path, as_of: dt.date, out: Path) -> None:
    from attribution.config import JobConfig
    from attribution.runner import run_night

    main = threading.get_ident()
    highest: dict[str, int] = {}
    done = threading.Event()

    def sample() -> None:
        while not done.is_set():
            frame = sys._current_frames().get(main)
            where = _where(frame)
            with open("/proc/self/statm", encoding="ascii") as f:
                rss = int(f.read().split()[1]) * 4096 // 2**20
            highest[where] = max(rss, highest.get(where, 0))
            time.sleep(SAMPLE_SECONDS)

    threading.Thread(target=sample, daemon=True).start()
    start = _status()
    print(f"{'stage':<10} {'RSS MB':>8} {'peak MB':>8}")
    print(f"{'start':<10} {start[0]:8,} {start[1]:8,}", flush=True)

    def stage(name: str) -> None:
        rss, peak = _status()
        print(f"{name:<10} {rss:8,} {peak:8,}", flush=True)

    config = dataclasses.replace(JobConfig(), data_root=data, archive_path=out / "archive.duckdb",
                                 reports_dir=out / "reports")
    run_night(config, as_of, progress=stage)
    done.set()
    print(f"peak RSS {_status()[1]:,} MB; the highest samples (MB, innermost frames of the package first):")
    for where, rss in sorted(highest.items(), key=lambda item: -item[1])[:TOP]:
        print(f"  {rss:6,}  {where}")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--positions", type=int, default=1_000_000)
    parser.add_argument("--books", type=int, default=1_000)
    parser.add_argument("--instruments", type=int, default=20_000)
    parser.add_argument("--underlyings", type=int, default=500)
    parser.add_argument("--data", type=Path, help="a data root already written (skips writing the synthetic night)")
    parser.add_argument("--as-of", type=dt.date.fromisoformat, help="the run date (default: the synthetic night's)")
    args = parser.parse_args()
    from attribution.synthetic import RUN, write_synthetic_night

    with tempfile.TemporaryDirectory(prefix="attribution-memory-") as scratch:
        root = Path(scratch)
        data = args.data
        if data is None:
            data = root / "data"
            write_synthetic_night(data, args.positions, args.books, args.instruments, args.underlyings)
        child = mp.get_context("spawn").Process(target=_night, args=(data.resolve(), args.as_of or RUN, root))
        child.start()
        child.join()
        return child.exitcode or 0


if __name__ == "__main__":
    sys.exit(main())
