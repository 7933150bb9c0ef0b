"""Behaviour check for refactors: run the demo desk's last nights into an archive, then compare two
such runs column by column (and their report pages byte by byte, run identifiers masked).

    python benchmarks/compare_archives.py run OUT [--days 261] [--nights 3]
    python benchmarks/compare_archives.py synthetic OUT [--positions 1000000] [--books 1000] ...
    python benchmarks/compare_archives.py compare OUT_BEFORE OUT_AFTER

``run`` builds the demo desk's data (``--days`` business days, the demo's default seed) in
``OUT/data`` and backfills its last ``--nights`` nights with the command line into
``OUT/archive.duckdb`` (reports for every one of them in ``OUT/reports``). It uses only the command
line and ``build_demo``, so the same script runs on the code before and after a change (for the
code of another commit: ``git archive <commit> | tar -x -C DIR``, then run from ``DIR`` with
``PYTHONPATH=DIR``).

``synthetic`` writes ``attribution bench``'s synthetic night (:mod:`attribution.synthetic`: the same
seed, so the same files on both sides; hedges and American options included) of the given size in
``OUT/data`` and runs its night with the command line into ``OUT/archive.duckdb`` and ``OUT/reports``.

``compare`` prints, per archive table, the rows on each side and every column whose values differ
(exactly: the same floats, the same texts, the same NULLs); the run record's clock, identity and
the folders named in its settings are left out. Then it compares every report file, with the run
identifier and times masked. Exit code 0 when everything matches, 1 otherwise.
"""

from __future__ import annotations

import argparse
import json
import re
import subprocess
import sys
import tempfile
from pathlib import Path

import duckdb
import pandas as pd

# Different on every run by construction: the run's identity and clock, and where it ran.
VOLATILE = {"runs": {"run_id", "started_at", "finished_at", "seconds", "job_settings", "input_hashes"}}
SETTINGS_PATHS = {"data_root", "archive_path", "reports_dir"}
_MASKS = (re.compile(r"\b[0-9a-f]{32}\b|\b[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}\b"),
          re.compile(r"\d{4}-\d{2}-\d{2} \d{2}:\d{2}:\d{2}(\.\d+)?"),
          re.compile(r"\d+\.\d+ s\b"))


def run(out: Path, days: int, nights: int) -> None:
    """Build the demo data and backfill its last ``nights`` nights through the command line."""
    from attribution.demo import build_demo

    out.mkdir(parents=True, exist_ok=True)
    summary = build_demo(out / "data", business_days=days)
    dates = summary.dates
    holidays = ", ".join(d.isoformat() for d in summary.holidays)
    job = out / "job.toml"
    job.write_text(f'[job]\ndata_root = "data"\narchive = "archive.duckdb"\nreports = "reports"\n'
                   f"[time]\nholidays = [{holidays}]\n", encoding="utf-8")
    cmd = [sys.executable, "-m", "attribution.cli", "backfill", "--job", str(job),
           "--from", dates[-nights].isoformat(), "--to", dates[-1].isoformat(), "--reports-last", str(nights)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    print(done.stdout)
    if done.returncode not in (0, 3):
        sys.exit(f"backfill failed ({done.returncode}): {done.stderr}")
    print(f"archived {nights} night(s) {dates[-nights]} .. {dates[-1]} into {out / 'archive.duckdb'}")


def run_synthetic(out: Path, positions: int, books: int, instruments: int, underlyings: int) -> None:
    """Write the bench's synthetic night and run it through the command line."""
    from attribution.synthetic import write_synthetic_night

    out.mkdir(parents=True, exist_ok=True)
    night = write_synthetic_night(out / "data", positions, books, instruments, underlyings)
    cmd = [sys.executable, "-m", "attribution.cli", "run", "--as-of", night.run.isoformat(),
           "--data", str(out / "data"), "--archive", str(out / "archive.duckdb"), "--reports", str(out / "reports")]
    done = subprocess.run(cmd, capture_output=True, text=True, check=False)
    print(done.stdout)
    if done.returncode not in (0, 3):
        sys.exit(f"run failed ({done.returncode}): {done.stderr}")
    print(f"archived the synthetic night {night.run} ({positions:,} positions) into {out / 'archive.duckdb'}")


def _table(con: duckdb.DuckDBPyConnection, name: str) -> pd.DataFrame:
    frame = con.execute(f"SELECT * FROM {name}").df()  # name from the archive's own catalogue
    if "file" in frame.columns:  # input files named below the run's own folder
        frame["file"] = frame["file"].str.replace(r"^.*/(as_of=[^/]+/[^/]+)$", r"\1", regex=True)
    keys = [c for c in frame.columns if c not in VOLATILE.get(name, set())][:6]
    return frame.sort_values(keys, kind="stable", ignore_index=True) if len(frame) else frame


def _same(a: pd.Series, b: pd.Series) -> bool:
    if len(a) != len(b):
        return False
    na, nb = a.isna().to_numpy(), b.isna().to_numpy()
    if (na != nb).any():
        return False
    return bool((a[~na].to_numpy() == b[~nb].to_numpy()).all())


def _settings(con: duckdb.DuckDBPyConnection) -> list[tuple[dict, dict]]:
    """Per run: its settings without the folders, and its input hashes keyed by the path below the data root."""
    rows = con.execute("SELECT job_settings, input_hashes FROM runs ORDER BY as_of").fetchall()
    return [({k: v for k, v in json.loads(s or "{}").items() if k not in SETTINGS_PATHS},
             {re.sub(r"^.*/(as_of=[^/]+/[^/]+)$", r"\1", k): v for k, v in json.loads(h or "{}").items()})
            for s, h in rows]


def compare_archives(before: Path, after: Path) -> int:
    """Print the differences table by table; return how many columns or tables differ."""
    a, b = duckdb.connect(str(before), read_only=True), duckdb.connect(str(after), read_only=True)
    problems = 0
    names = {r[0] for r in a.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    names_b = {r[0] for r in b.execute("SELECT table_name FROM information_schema.tables").fetchall()}
    if names != names_b:
        print(f"tables differ: {sorted(names ^ names_b)}")
        problems += 1
    for name in sorted(names & names_b):
        fa, fb = _table(a, name), _table(b, name)
        if list(fa.columns) != list(fb.columns):
            print(f"{name}: columns on one side only: {sorted(set(fa.columns) ^ set(fb.columns))}")
            problems += 1
        compared = [c for c in fa.columns if c in fb.columns and c not in VOLATILE.get(name, set())]
        differing = [c for c in compared if not _same(fa[c], fb[c])]
        problems += len(differing) + (len(fa) != len(fb))
        print(f"{name:<17} rows {len(fa):>7,} / {len(fb):>7,}  columns compared {len(compared):>3}  "
              f"differing: {', '.join(differing) or 'none'}")
    settings_a, settings_b = _settings(a), _settings(b)
    same_settings = settings_a == settings_b
    if not same_settings:
        print("settings before:", settings_a[0][0], "\nsettings after: ", settings_b[0][0])
    problems += not same_settings
    print(f"runs.job_settings and input_hashes (folders left out): {'same' if same_settings else 'DIFFERENT'}")
    a.close()
    b.close()
    return problems


def _masked(path: Path, out: Path) -> str:
    text = path.read_text(encoding="utf-8").replace(str(out.resolve()), "OUT").replace(str(out), "OUT")
    for pattern in _MASKS:
        text = pattern.sub("#", text)
    return text


def compare_reports(before: Path, after: Path) -> int:
    """Compare every report file (relative paths and masked text); return how many differ."""
    files_a = {p.relative_to(before) for p in before.rglob("*") if p.is_file()}
    files_b = {p.relative_to(after) for p in after.rglob("*") if p.is_file()}
    problems = len(files_a ^ files_b)
    for missing in sorted(files_a ^ files_b):
        print(f"report file on one side only: {missing}")
    for rel in sorted(files_a & files_b):
        if _masked(before / rel, before.parent) != _masked(after / rel, after.parent):
            print(f"report file differs: {rel}")
            problems += 1
    print(f"report files compared: {len(files_a & files_b)}, differing: {problems}")
    return problems


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("run")
    p.add_argument("out", type=Path, nargs="?")
    p.add_argument("--days", type=int, default=261)
    p.add_argument("--nights", type=int, default=3)
    p = sub.add_parser("synthetic")
    p.add_argument("out", type=Path, nargs="?")
    p.add_argument("--positions", type=int, default=1_000_000)
    p.add_argument("--books", type=int, default=1_000)
    p.add_argument("--instruments", type=int, default=20_000)
    p.add_argument("--underlyings", type=int, default=500)
    p = sub.add_parser("compare")
    p.add_argument("before", type=Path)
    p.add_argument("after", type=Path)
    args = parser.parse_args()
    if args.command == "run":
        run(args.out or Path(tempfile.mkdtemp(prefix="archive-")), args.days, args.nights)
        return 0
    if args.command == "synthetic":
        run_synthetic(args.out or Path(tempfile.mkdtemp(prefix="archive-")), args.positions, args.books,
                      args.instruments, args.underlyings)
        return 0
    problems = compare_archives(args.before / "archive.duckdb", args.after / "archive.duckdb")
    problems += compare_reports(args.before / "reports", args.after / "reports")
    print("IDENTICAL" if not problems else f"{problems} difference(s)")
    return 0 if not problems else 1


if __name__ == "__main__":
    sys.exit(main())
