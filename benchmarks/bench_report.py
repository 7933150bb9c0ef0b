"""Time the nightly report: render_night over an invented archive night of many books.

    python benchmarks/bench_report.py [--books 1000] [--positions 30] [--history 65] [--repeat 3]

Builds the archive with the report tests' fixture builder (invented books and tickers) in a
temporary folder, then renders the night ``--repeat`` times and prints the best and median
wall time, the split between loading, laying out and writing, and the size of a typical page.
A script with figures, not a timed test: nothing fails when the machine is slow.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from report_fixtures import AS_OF, build_archive  # noqa: E402

from attribution import report  # noqa: E402
from attribution.config import JobConfig  # noqa: E402


def main(argv: list[str] | None = None) -> int:
    """Build the archive, time render_night, print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--books", type=int, default=1000)
    parser.add_argument("--positions", type=int, default=30, help="positions per book")
    parser.add_argument("--history", type=int, default=65, help="archived nights before the run date")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    config = JobConfig()
    with tempfile.TemporaryDirectory(prefix="bench-report-") as tmp:
        root = Path(tmp)
        books = tuple(f"Desk {i // 50:02d} / book {i:04d}" for i in range(args.books))
        started = time.perf_counter()
        con = build_archive(root / "archive.duckdb", books, per_book=args.positions, history_nights=args.history)
        print(f"archive: {args.books} books x {args.positions} positions, {args.history + 1} nights of book rows, "
              f"built in {time.perf_counter() - started:.1f} s")

        load = os.getloadavg()
        started = time.perf_counter()
        frames = report.load_night(con, AS_OF, config.history_nights)
        loaded = time.perf_counter()
        pages = report.book_pages(frames, report.night_settings(frames.run, config))
        laid_out = time.perf_counter()
        print(f"split: load {loaded - started:.2f} s, lay out {laid_out - loaded:.2f} s ({len(pages)} pages)")

        times, cpu = [], []
        for _ in range(max(args.repeat, 1)):
            started, started_cpu = time.perf_counter(), time.process_time()
            index = report.render_night(con, AS_OF, root / "reports", config)
            times.append(time.perf_counter() - started)
            cpu.append(time.process_time() - started_cpu)
        folder = index.parent
        sizes = sorted(p.stat().st_size for p in folder.glob("book-*.html"))
        total = sum(p.stat().st_size for p in folder.iterdir())
        print(f"render_night: best {min(times):.2f} s, median {statistics.median(times):.2f} s wall "
              f"(CPU {min(cpu):.2f} s) over {len(times)} runs ({len(sizes)} book pages + index + exceptions); "
              f"load average before {load[0]:.2f} on {os.cpu_count()} cores")
        print(f"book page: median {sizes[len(sizes) // 2] / 1024:.1f} KiB, largest {sizes[-1] / 1024:.1f} KiB; "
              f"index {index.stat().st_size / 1024:.1f} KiB; night folder {total / 1024 / 1024:.1f} MiB")
        con.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
