"""Time the nightly report: render_night over an archived night of many books, stage by stage.

    python benchmarks/bench_report.py [--books 1000] [--positions 30] [--history 65] [--repeat 3]
    python benchmarks/bench_report.py --archive DIR/archive.duckdb --as-of YYYY-MM-DD [--repeat 3]

Without ``--archive`` it builds an invented archive with the report tests' fixture builder (invented
books and tickers) in a temporary folder. With it, it reads a kept night (``attribution bench --keep DIR``
keeps a synthetic million-position night; the demo's archive holds a year), opened read-only, and writes
the pages into a temporary folder. Each repeat renders the night once and prints wall and CPU seconds of
the four steps (archive reads, page views, HTML, files written), then the best and median totals, the
load average and the peak memory. A script with figures, not a timed test: nothing fails when the
machine is slow. The first repeat includes compiling the templates unless Jinja2's bytecode cache has
them already.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

import duckdb

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from report_fixtures import AS_OF, build_archive  # noqa: E402

from attribution.config import JobConfig  # noqa: E402
from attribution.report import html, publish, queries, settings, view  # noqa: E402

STEPS = ("read", "views", "html", "write")


def render_timed(con: duckdb.DuckDBPyConnection, as_of: dt.date, out: Path, config: JobConfig
                 ) -> tuple[dict[str, tuple[float, float]], int]:
    """render_night's steps one by one: (wall, CPU) seconds per step, and the pages written."""
    marks = [(time.perf_counter(), time.process_time())]
    frames = queries.load_night(con, as_of, config.history_nights, config.expiry_buckets)
    marks.append((time.perf_counter(), time.process_time()))
    night_settings = settings.night_settings(frames.run, config)
    pages = view.book_pages(frames, night_settings)
    night = view.night_view(frames, pages, as_of, view.conventions(frames, as_of, night_settings))
    marks.append((time.perf_counter(), time.process_time()))
    files = html.render_files(night, pages)
    marks.append((time.perf_counter(), time.process_time()))
    publish.write_atomically(out / as_of.isoformat(), files)
    marks.append((time.perf_counter(), time.process_time()))
    steps = {s: (b[0] - a[0], b[1] - a[1]) for s, a, b in zip(STEPS, marks[:-1], marks[1:], strict=True)}
    return steps, len(files)


def main(argv: list[str] | None = None) -> int:
    """Build or open the archive, time the report's steps, print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--archive", type=Path, help="a kept archive (read-only) instead of the invented one")
    parser.add_argument("--as-of", type=dt.date.fromisoformat, help="the night to render (with --archive)")
    parser.add_argument("--books", type=int, default=1000)
    parser.add_argument("--positions", type=int, default=30, help="positions per book")
    parser.add_argument("--history", type=int, default=65, help="archived nights before the run date")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args(argv)
    if args.archive and not args.as_of:
        parser.error("--archive needs --as-of")
    config = JobConfig()
    with tempfile.TemporaryDirectory(prefix="bench-report-") as tmp:
        root = Path(tmp)
        if args.archive:
            con = duckdb.connect(str(args.archive), read_only=True)
            as_of = args.as_of
            print(f"archive: {args.archive}, night {as_of}")
        else:
            books = tuple(f"Desk {i // 50:02d} / book {i:04d}" for i in range(args.books))
            started = time.perf_counter()
            con = build_archive(root / "archive.duckdb", books, per_book=args.positions,
                                history_nights=args.history)
            as_of = AS_OF
            print(f"archive: {args.books} books x {args.positions} positions, {args.history + 1} nights of book rows, "
                  f"built in {time.perf_counter() - started:.1f} s")
        load = os.getloadavg()
        totals, cpu_totals = [], []
        for run in range(max(args.repeat, 1)):
            steps, files = render_timed(con, as_of, root / "reports", config)
            totals.append(sum(w for w, _ in steps.values()))
            cpu_totals.append(sum(c for _, c in steps.values()))
            print(f"run {run + 1}: " + ", ".join(f"{s} {w:.2f} s (CPU {c:.2f})" for s, (w, c) in steps.items())
                  + f"; {files} files")
        folder = root / "reports" / as_of.isoformat()
        sizes = sorted(p.stat().st_size for p in folder.glob("book-*.html"))
        total = sum(p.stat().st_size for p in folder.iterdir())
        print(f"render: best {min(totals):.2f} s, median {statistics.median(totals):.2f} s wall "
              f"(CPU best {min(cpu_totals):.2f} s) over {len(totals)} runs; load average before "
              f"{load[0]:.2f} {load[1]:.2f} {load[2]:.2f} on {os.cpu_count()} cores; peak RSS "
              f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
        if sizes:
            print(f"book page: median {sizes[len(sizes) // 2] / 1024:.1f} KiB, largest {sizes[-1] / 1024:.1f} KiB; "
                  f"night folder {total / 1024 / 1024:.1f} MiB")
        con.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
