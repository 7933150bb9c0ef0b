"""Command line: ``attribution run | backfill | check | demo | history | quality | export | bench``.

Exit codes: 0 success; 1 failure (unusable input file, archive busy, unexpected error; the
archive is left as it was); 2 usage error; 3 finished, with rejected rows or limit breaches, or over a
missing business day.
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as dt
import json
import logging
import math
import sys
import warnings
from collections.abc import Sequence
from pathlib import Path

from attribution import __version__
from attribution.config import ConfigError, JobConfig, load_job, validate
from attribution.console import LOG_FORMAT, ProgressLine, printable, summary, warning_to_log
from attribution.errors import EXIT_FAILED, EXIT_FINDINGS, EXIT_OK, EXIT_USAGE, JobFailure

log = logging.getLogger("attribution")


def _date(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"{text!r} is not a date of the form YYYY-MM-DD") from exc


def _job_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--job", type=Path, help="TOML job file (see jobs/nightly.toml); flags override it")
    p.add_argument("--data", type=Path, help="data root holding the as_of=YYYY-MM-DD folders")
    p.add_argument("--archive", type=Path, help="DuckDB archive file")
    p.add_argument("--reports", type=Path, help="folder the HTML reports are written to")
    p.add_argument("--basis", choices=("ACT/365F", "BUS/252"), help="time basis (default ACT/365F)")
    p.add_argument("--engine", choices=("local", "dask"), help="where the night is computed")
    p.add_argument("--scheduler", help="Dask scheduler address (with --engine dask); none starts a local cluster")
    p.add_argument("--no-reports", action="store_true", help="archive only, write no HTML")
    p.add_argument("--no-revaluation", action="store_true", help="skip the order-independent revaluation split")


def _verbosity(p: argparse.ArgumentParser) -> None:
    p.add_argument("-v", "--verbose", action="count", default=0, help="more log lines (-vv for debug)")


def build_parser() -> argparse.ArgumentParser:
    """The whole command line (also used by the documentation test)."""
    parser = argparse.ArgumentParser(
        prog="attribution",
        description="End-of-day P&L attribution for options books: explain each book's night, "
                    "archive it, report it.",
        epilog="Exit codes: 0 success, 1 failure (the archive unchanged, unless only the reports failed), "
               "2 usage error, 3 finished with rejected rows or limit breaches, or over a missing business day.")
    parser.add_argument("--version", action="version", version=f"attribution {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("run", help="explain one night into the archive and write its reports")
    p.add_argument("--as-of", type=_date, required=True, help="run date YYYY-MM-DD")
    p.add_argument("--prior", type=_date, help="prior date (default: the latest as_of folder before the run date)")
    _job_options(p)
    _verbosity(p)

    p = sub.add_parser("backfill", help="run every night of a date range, in order")
    p.add_argument("--from", dest="start", type=_date, required=True, help="first run date")
    p.add_argument("--to", dest="end", type=_date, required=True, help="last run date")
    p.add_argument("--reports-last", type=int, default=1, metavar="N",
                   help="write reports for the last N nights only (default 1; 0 for none, -1 for all)")
    _job_options(p)
    _verbosity(p)

    p = sub.add_parser("check", help="validate one night's inputs and print the exception ledger; writes nothing")
    p.add_argument("--as-of", type=_date, required=True, help="run date YYYY-MM-DD")
    p.add_argument("--prior", type=_date, help="prior date (default: the latest before the run date)")
    p.add_argument("--json", action="store_true", help="print the ledger as JSON")
    _job_options(p)
    _verbosity(p)

    p = sub.add_parser("demo", help="build the demo desk's year of data, backfill it and write the reports")
    p.add_argument("--into", type=Path, default=Path("demo"), help="folder for data, archive and reports (./demo)")
    p.add_argument("--days", type=int, default=261, help="business days of demo history (default 261)")
    p.add_argument("--seed", type=int, default=7, help="random seed of the demo market (default 7)")
    _verbosity(p)

    p = sub.add_parser("history", help="a book's or a desk's nightly series, with month- and year-to-date sums")
    who = p.add_mutually_exclusive_group()
    who.add_argument("--book", help="book name, exactly as archived")
    who.add_argument("--desk", help="desk name, exactly as archived (book_pnl.desk): the sum of its books")
    p.add_argument("--from", dest="start", type=_date, help="first date")
    p.add_argument("--to", dest="end", type=_date, help="last date")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--schema", action="store_true", help="print the JSON Schema of --json's output and exit")
    p.add_argument("--job", type=Path, help="job file naming the archive")
    p.add_argument("--archive", type=Path, help="DuckDB archive file")
    _verbosity(p)

    p = sub.add_parser("quality", help="the attribution-quality test per book over the archived history")
    p.add_argument("--as-of", type=_date, help="last night of the window (required unless --schema)")
    p.add_argument("--json", action="store_true", help="print a JSON array, one object per book")
    p.add_argument("--schema", action="store_true", help="print the JSON Schema of --json's output and exit")
    p.add_argument("--job", type=Path, help="job file naming the archive")
    p.add_argument("--archive", type=Path, help="DuckDB archive file")
    _verbosity(p)

    p = sub.add_parser("export", help="write one archived night's rows (position_pnl, book_pnl, input_exceptions) "
                                      "as CSV or Parquet files")
    p.add_argument("--as-of", type=_date, required=True, help="the night, YYYY-MM-DD")
    p.add_argument("--format", choices=("csv", "parquet"), required=True, help="file format")
    p.add_argument("--out", type=Path, required=True, help="folder to write <table>.<format> into (created)")
    p.add_argument("--job", type=Path, help="job file naming the archive")
    p.add_argument("--archive", type=Path, help="DuckDB archive file")
    _verbosity(p)

    p = sub.add_parser("bench", help="time a synthetic night of the given size through the whole job")
    p.add_argument("--positions", type=int, default=1_000_000, help="positions (default 1,000,000)")
    p.add_argument("--books", type=int, default=1_000, help="books (default 1,000)")
    p.add_argument("--instruments", type=int, default=20_000, help="instruments (default 20,000)")
    p.add_argument("--underlyings", type=int, default=500, help="underlyings (default 500)")
    p.add_argument("--engine", choices=("local", "dask"), default="local")
    p.add_argument("--keep", type=Path, help="keep the synthetic night, archive and reports in this folder")
    _verbosity(p)
    return parser


def config_from(args: argparse.Namespace) -> JobConfig:
    """The job file (or defaults) with the command line's overrides."""
    config = load_job(args.job) if getattr(args, "job", None) else JobConfig()
    changes: dict[str, object] = {}
    for flag, name in (("data", "data_root"), ("archive", "archive_path"), ("reports", "reports_dir"),
                       ("basis", "time_basis"), ("engine", "engine"), ("scheduler", "scheduler")):
        value = getattr(args, flag, None)
        if value is not None:
            changes[name] = value
    if getattr(args, "no_reports", False):
        changes["write_reports"] = False
    if getattr(args, "no_revaluation", False):
        changes["revaluation"] = False
    return validate(dataclasses.replace(config, **changes), "command line")


def _cmd_run(args: argparse.Namespace) -> int:
    from attribution.runner import run_night
    config = config_from(args)
    progress = ProgressLine(6)
    outcome = run_night(config, args.as_of, args.prior, progress=progress.step)
    progress.close()
    print(summary(outcome, config))
    return outcome.exit_code


def _cmd_backfill(args: argparse.Namespace) -> int:
    from attribution.backfill import backfill
    config = config_from(args)
    return backfill(config, args.start, args.end, args.reports_last, echo=print)


def _cmd_check(args: argparse.Namespace) -> int:
    from attribution.engine import prepare_night
    config = config_from(args)
    night = prepare_night(config, args.as_of, args.prior)
    ledger = night.exceptions.assign(as_of=night.exceptions["as_of"].astype(str))
    if args.json:
        print(json.dumps(ledger.to_dict(orient="records"), indent=1))
    else:
        for row in ledger.itertuples(index=False):
            print(printable(f"{row.severity:<8} {row.file}  key={row.key}  rule: {row.rule}  ({row.detail})"))
        print(f"{night.positions_in:,} positions in: {len(night.positions):,} would be explained, "
              f"{night.rejected_positions:,} rejected; {(ledger['severity'] == 'warning').sum():,} warning(s)")
    missing = night.exceptions["rule"] == "missing business day"
    return EXIT_FINDINGS if night.rejected_positions or missing.any() else EXIT_OK


def _clean(value: object) -> object:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dt.date | dt.datetime):
        return value.isoformat()[:10]
    if hasattr(value, "item"):
        return _clean(value.item())
    return value


def records(frame: object) -> list[dict[str, object]]:
    """A frame as JSON-ready records: NaN becomes null, dates ISO strings."""
    return [{k: _clean(v) for k, v in row.items()} for row in frame.to_dict(orient="records")]  # type: ignore[attr-defined]


def _archive_of(args: argparse.Namespace) -> Path:
    if args.archive:
        return args.archive
    return load_job(args.job).archive_path if args.job else JobConfig().archive_path


HISTORY_SHOWN = ("pnl_total", "pnl_actual", "pnl_delta", "pnl_gamma", "pnl_vega", "pnl_volga", "pnl_vanna",
                 "pnl_theta", "pnl_rates", "pnl_dividend", "pnl_explained", "pnl_residual", "pnl_fx_translation")
TO_DATE_SHOWN = ("pnl_total", "pnl_actual", "pnl_delta", "pnl_gamma", "pnl_vega", "pnl_volga", "pnl_vanna",
                 "pnl_theta", "pnl_rates", "pnl_dividend", "pnl_explained", "pnl_residual", "pnl_higher_order",
                 "pnl_mark_gap", "pnl_new_trade", "pnl_expiry", "pnl_amendment", "pnl_fx_translation", "pnl_cash",
                 "official_break")


def _history_text(frame: object, who: str) -> str:
    """The nightly table, then the last night's figures beside their month- and year-to-date sums."""
    states = ["limit_state", "zone"] if "zone" in frame.columns else ["book_breaches"]  # type: ignore[attr-defined]
    nightly = frame[["as_of", *HISTORY_SHOWN, "pnl_total_mtd", "pnl_total_ytd", *states]]  # type: ignore[index]

    def money(x: float) -> str:
        return f"{x:,.0f}"
    last = frame.iloc[-1]  # type: ignore[attr-defined]
    lines = [nightly.to_string(index=False, float_format=money), "",
             f"{who}, night of {_clean(last['as_of'])}: the night, month to date and year to date",
             f"{'':<20}{'night':>16}{'month to date':>16}{'year to date':>16}"]
    for column in TO_DATE_SHOWN:
        cells = [last[column], last[f"{column}_mtd"], last[f"{column}_ytd"]]
        lines.append(f"{column:<20}" + "".join(f"{'-' if _clean(v) is None else money(v):>16}" for v in cells))
    lines.append(f"{'limit breaches':<20}{'':>16}{int(last['breaches_mtd']):>16}{int(last['breaches_ytd']):>16}")
    return "\n".join(lines)


def json_schema(command: str) -> str:
    """The JSON Schema (draft 2020-12) of ``attribution COMMAND --json``'s output, as shipped in the package."""
    return (Path(__file__).parent / "schemas" / f"{command}.schema.json").read_text(encoding="utf-8")


def _cmd_history(args: argparse.Namespace) -> int:
    if args.schema:
        print(json_schema("history"), end="")
        return EXIT_OK
    if args.book is None and args.desk is None:
        raise ConfigError("history: name a book (--book) or a desk (--desk)")
    from attribution.archive import connect
    from attribution.periods import book_series, desk_series
    con = connect(_archive_of(args), read_only=True)
    try:
        if args.desk is not None:
            frame, who = desk_series(con, args.desk, args.start, args.end), f"desk {args.desk!r}"
        else:
            frame, who = book_series(con, args.book, args.start, args.end), f"book {args.book!r}"
    finally:
        con.close()
    if frame.empty:
        print(printable(f"no archived nights for {who}"), file=sys.stderr)
        return EXIT_FAILED
    if args.json:
        print(json.dumps(records(frame), indent=1))
        return EXIT_OK
    print(_history_text(frame, printable(who)))
    return EXIT_OK


def _cmd_quality(args: argparse.Namespace) -> int:
    if args.schema:
        print(json_schema("quality"), end="")
        return EXIT_OK
    if args.as_of is None:
        raise ConfigError("quality: --as-of is required")
    from attribution.archive import connect, quality_series
    from attribution.quality_table import quality_frame
    con = connect(_archive_of(args), read_only=True)
    try:
        frame = quality_frame(quality_series(con, args.as_of), args.as_of)
    finally:
        con.close()
    if args.json:
        print(json.dumps(records(frame), indent=1))
        return EXIT_OK
    if frame.empty:
        print(f"no archived nights up to {args.as_of}")
        return EXIT_OK
    print(frame.to_string(index=False, float_format=lambda x: f"{x:.3f}"))
    return EXIT_OK


def _cmd_export(args: argparse.Namespace) -> int:
    from attribution.archive import connect
    from attribution.export import export_night
    con = connect(_archive_of(args), read_only=True)
    try:
        written = export_night(con, args.as_of, args.format, args.out)
    finally:
        con.close()
    for table, rows in written.items():
        print(f"{args.out / f'{table}.{args.format}'}  {rows:,} row(s)")
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from attribution.demo.run import run_demo
    return run_demo(args.into, days=args.days, seed=args.seed, echo=print)


def _cmd_bench(args: argparse.Namespace) -> int:
    from attribution.bench import run_bench
    return run_bench(positions=args.positions, books=args.books, instruments=args.instruments,
                     underlyings=args.underlyings, engine=args.engine, keep=args.keep, echo=print)


COMMANDS = {"run": _cmd_run, "backfill": _cmd_backfill, "check": _cmd_check, "demo": _cmd_demo,
            "history": _cmd_history, "quality": _cmd_quality, "export": _cmd_export, "bench": _cmd_bench}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``attribution`` console script."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return EXIT_USAGE if exc.code not in (0, None) else EXIT_OK
    level = [logging.WARNING, logging.INFO, logging.DEBUG][min(args.verbose, 2)]
    logging.basicConfig(level=level, stream=sys.stderr, format=LOG_FORMAT)
    with warnings.catch_warnings():
        # Library warnings (numpy overflow, ...) name source lines, which tell a user nothing: the rows they
        # concern are rejected by rule in the exception ledger. They go to the debug log (-vv) instead.
        warnings.showwarning = warning_to_log
        return _dispatch(args)


def _dispatch(args: argparse.Namespace) -> int:
    """Run the command; every failure becomes one line on stderr and an exit code."""
    try:
        return COMMANDS[args.command](args)
    except BrokenPipeError:  # the reader went away (e.g. piped into head): not an error of the job
        sys.stderr.close()
        return EXIT_OK
    except ConfigError as exc:
        print(f"attribution: usage error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except (JobFailure, FileNotFoundError) as exc:
        print(f"attribution: failed: {exc}", file=sys.stderr)
        return EXIT_FAILED
    except Exception as exc:  # noqa: BLE001 - the scheduler needs one line and a code, the log has the trace
        log.debug("unexpected error", exc_info=True)
        print(f"attribution: failed: {type(exc).__name__}: {exc} (rerun with -vv for the trace)", file=sys.stderr)
        return EXIT_FAILED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
