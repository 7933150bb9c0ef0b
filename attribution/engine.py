"""One night, end to end: files -> validated tables -> market state -> explain -> controls -> archive -> report.

:func:`prepare_night` does everything that needs no archive (it is also ``attribution check``);
:func:`run_night` adds the lock, the archive transaction and the reports.
"""

from __future__ import annotations

import collections
import concurrent.futures
import contextlib
import dataclasses
import datetime as dt
import json
import time
import uuid
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa

from attribution import __version__
from attribution.activity import (
    CASH,
    OFFICIAL_BREAK,
    LegActivity,
    cash_rows,
    leg_activity,
    leg_quantities,
    official_breaks,
    official_unknown,
    reconcile,
    unknown_trades,
    with_statuses,
)
from attribution.archive import (
    SET_ONE_THREAD,
    BookHistory,
    OpenNight,
    archive_lock,
    arrow_table,
    begin_night,
    connect,
    dates_with_rows,
)
from attribution.arrow_ipc import from_ipc, to_ipc
from attribution.books import (
    book_frame,
    conservation,
    position_books,
    position_limit_states,
    rejected_positions,
    rejected_size,
)
from attribution.config import ConfigError, JobConfig
from attribution.contract import CleanNight, clean_night, trade_date_warnings, with_events
from attribution.controls import BREACH
from attribution.corporate_actions import restate_prior
from attribution.date_cache import DateCache
from attribution.dividends import going_ex, instrument_pairs, schedule_frame
from attribution.errors import EXIT_FAILED, EXIT_FINDINGS, EXIT_OK, EXIT_USAGE
from attribution.exceptions_log import WARNING, ExceptionLog
from attribution.keys import KeyCodes, NightTrades
from attribution.lifecycle import Legs, match_legs
from attribution.loading import RawNight, folder_for, folder_stamp, prior_date, read_night
from attribution.mark_roll import roll_dates, roll_marks
from attribution.market import InstrumentMarket, build_market, flag_stale_marks, instrument_terms
from attribution.memory import free_large_arrays_at_once
from attribution.night import (
    corporate_flags,
    dividend_income,
    file_columns,
    position_frame,
    position_values,
    reject_non_finite,
    stale_flags,
)
from attribution.smile_night import check_smiles, night_smiles
from attribution.timebasis import TimeBasis
from attribution.vol_time import variance_clock

__all__ = ["EXIT_FAILED", "EXIT_FINDINGS", "EXIT_OK", "EXIT_USAGE", "ArchiveRows", "NightOutcome", "Prepare",
           "PreparedNight", "Stopwatch", "archive_night", "archive_rows", "open_archive", "prepare_night",
           "resolve_prior", "run_night"]

Progress = Callable[[str], None]


@dataclass(frozen=True, slots=True)
class PreparedNight:
    """The night's tables before archiving."""

    as_of: dt.date
    prior_as_of: dt.date
    positions: pd.DataFrame
    books: pd.DataFrame
    exceptions: pd.DataFrame
    hashes: dict[str, str]
    positions_in: int
    rejected_positions: int
    unaccounted: tuple[str, ...]
    stages: tuple[tuple[str, float], ...]
    dividend_schedule: pd.DataFrame | None = None  # rows of the dividend_schedule table (None: not computed)


# The step that computes a night's tables: (config, as_of, prior, progress) -> PreparedNight.
Prepare = Callable[[JobConfig, dt.date, dt.date | None, Progress | None], PreparedNight]


@dataclass(frozen=True, slots=True)
class NightOutcome:
    """What one run did, for the closing summary and the exit code."""

    as_of: dt.date
    prior_as_of: dt.date
    positions_in: int
    archived: int
    rejected: int
    warnings: int
    books: int
    total_pnl: float
    overnight_actual: float
    explained: float
    residual: float
    book_breaches: int
    position_breaches: int
    exit_code: int
    seconds: float
    stages: tuple[tuple[str, float], ...] = ()
    index_path: Path | None = None
    unpriced_new: int = 0
    zones: dict[str, int] = field(default_factory=dict)
    missing_days: tuple[str, ...] = ()  # business days without a folder between the prior and run dates


class Stopwatch:
    """Seconds per stage of a night, each stage reported to ``progress`` as it ends."""

    def __init__(self, progress: Progress | None) -> None:
        self.stages: list[tuple[str, float]] = []
        self.progress = progress
        self._t = time.perf_counter()

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self.stages.append((name, now - self._t))
        self._t = now
        if self.progress:
            self.progress(name)


MISSING_DAY = "missing business day"  # the ledger rule of a business day without a folder between the two dates


def warn_missing_days(config: JobConfig, basis: TimeBasis, prior_as_of: dt.date, as_of: dt.date,
                      log: ExceptionLog) -> None:
    """A warning per business day of the job's calendar between the prior date found and the run date:
    the night would otherwise silently span two or more business days (``--prior`` makes it deliberate)."""
    missing = basis.business_days_between(prior_as_of, as_of)
    for day in missing:
        log.add(str(folder_for(config.data_root, day)), day.isoformat(), MISSING_DAY,
                f"no folder for business day {day}: the night from {prior_as_of} to {as_of} spans "
                f"{len(missing) + 1} business days; name the prior date with --prior if that is meant",
                WARNING)


def resolve_prior(config: JobConfig, as_of: dt.date, prior: dt.date | None,
                  listed: list[dt.date] | None = None) -> dt.date:
    """The prior date given, checked to be before the run date; else the latest data folder before it
    (``listed``: the data folder's dates when already known)."""
    if prior is None:
        return prior_date(config.data_root, as_of, listed)
    if prior >= as_of:
        raise ConfigError(f"--prior: prior date {prior} must be before the run date {as_of}")
    return prior


def _trade_activity(legs: Legs, clean0: CleanNight, clean1: CleanNight, market0: InstrumentMarket,
                    market1: InstrumentMarket, log: ExceptionLog, whole: bool) -> tuple[Legs, LegActivity | None]:
    """The run date's activity per leg, the statuses it sets and the quantity reconciliation (README,
    "Trade activity"); ``whole``: the night holds every position (activity of no trade is warned)."""
    if clean1.activity is None:
        return legs, None
    path = clean1.raw.path("trade_activity.parquet")
    if whole:
        known = pd.Index(np.concatenate([c.raw.tables["positions.parquet"]["trade_id"].to_numpy(dtype=object)
                                         for c in (clean0, clean1)]), dtype=object)
        unknown_trades(clean1.activity, known, path, "activity_id", "activity of an unknown trade", log)
    qty0, qty1 = leg_quantities(legs, clean0, clean1)
    act = leg_activity(clean1.activity, legs, market0, market1)
    legs = with_statuses(legs, act, qty1)
    reconcile(legs, qty0, qty1, act, path, log)
    return legs, act


def _share_trade_ids(trades: NightTrades, raw0: RawNight, run: tuple[RawNight, CleanNight]) -> None:
    """The run date's frames (as read, and their clean rows) hold the prior date's string object of every
    trade id both dates hold (:meth:`NightTrades.prior_texts`): equal values, and the run date's own strings
    of a million trades held over the night (about 60 MB) are freed before the explain builds its rows."""
    file = "positions.parquet"
    prior_ids = raw0.tables[file]["trade_id"].to_numpy(dtype=object)
    raw1, clean1 = run
    frames = [(raw1.tables[file], trades.run), (clean1.positions, clean1.position_keys.get("trade_id"))]
    for frame, codes in frames:
        if codes is None or codes.values is not trades.run.values or len(codes) != len(frame):
            continue  # rows not coded over the run file's values: left as they are
        frame["trade_id"] = pd.Series(trades.prior_texts(prior_ids, codes), index=frame.index, dtype=object,
                                      copy=False)


# The columns of each date's position rows (as read) the controls look up after the explain: the book of a trade the
# ledger names or of a row without a trade_id (both dates), the prior row of a rejected trade (its instrument and
# quantity: what it weighed), and every trade_id (the conservation count when the ids were not coded where read).
PRIOR_CONTROL_COLUMNS = ("trade_id", "book", "instrument_id", "quantity")
RUN_CONTROL_COLUMNS = ("trade_id", "book")


def _kept_column(column: pd.Series, codes: KeyCodes | None) -> pd.Series:
    """A copy of one column of a date's position rows, for the controls' look-ups. A text column coded where read
    whose values repeat (a book, an instrument) is kept as a pandas categorical of those codes: two bytes a row
    instead of an eight-byte pointer (a null reads as NaN, not None: both are a missing value to every look-up)."""
    if codes is not None and len(codes) == len(column) and codes.uniques is not None and len(codes.values) < len(codes):
        categories = pd.Index(codes.uniques, dtype=object, copy=False)
        return pd.Series(pd.Categorical.from_codes(codes.codes, categories=categories), index=column.index,
                         copy=False)
    return pd.Series(column.to_numpy(copy=True), index=column.index, dtype=column.dtype, copy=False)


def _rows_for_controls(raw: RawNight, clean: CleanNight, columns: tuple[str, ...]) -> tuple[RawNight, CleanNight]:
    """The date's tables with its position rows as read cut to ``columns`` (copied: the other columns are freed;
    the same index, so a row's number in its file is kept), without their codes and without its clean rows.
    The caller's own ``raw`` and ``clean`` are left as they are (a backfill's cache may hold them)."""
    file = "positions.parquet"
    tables = dict(raw.tables)
    if file in tables:
        rows, codes = tables[file], raw.keys.get(file, {})
        tables[file] = pd.DataFrame({c: _kept_column(rows[c], codes.get(c)) for c in columns}, index=rows.index,
                                    copy=False)
    cut = dataclasses.replace(raw, tables=tables, keys={f: k for f, k in raw.keys.items() if f != file})
    # no row, copied: an empty slice would be a view holding every column's whole array
    return cut, dataclasses.replace(clean, raw=cut, positions=clean.positions.iloc[:0].copy(), position_keys={})


def _official(frame: pd.DataFrame, exceptions: pd.DataFrame, clean1: CleanNight, config: JobConfig,
              part: frozenset[str] | None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Book rows with the official P&L and its break; break warnings added to the ledger (keyed by book)."""
    if clean1.official.empty:
        return frame, exceptions
    log = ExceptionLog(clean1.raw.as_of)
    path = clean1.raw.path("official_pnl.parquet")
    limits = [config.limits_for(b).official_break for b in frame["book"]]
    frame, _ = official_breaks(frame, clean1.official, limits, path, log)
    official_unknown(clean1.official, frame, part, path, log)
    extra = log.frame()
    if extra.empty:
        return frame, exceptions
    extra = extra.assign(book=np.where(extra["rule"] == OFFICIAL_BREAK, extra["key"], None))[exceptions.columns]
    return frame, pd.concat([exceptions, extra], ignore_index=True) if len(exceptions) else extra


def _market(config: JobConfig, basis: TimeBasis, clean: CleanNight, terms: pd.DataFrame, log: ExceptionLog,
            shared: DateCache | None) -> InstrumentMarket:
    """The date's market state with its missing marks rolled forward (shared across a backfill's nights)."""
    marks_file = clean.raw.path("option_marks.parquet")

    def build(terms: pd.DataFrame, log: ExceptionLog) -> InstrumentMarket:
        market = build_market(clean, terms, basis, config.checks, log, config.american_precision)
        return roll_marks(market, terms, config, basis, marks_file, log)

    if shared is None:
        return build(terms, log)
    as_of = clean.raw.as_of
    sources = tuple((d, folder_stamp(config.data_root, d))
                    for d in roll_dates(config.data_root, as_of, basis, config.checks.mark_roll_days,
                                        shared.available_dates(config.data_root)))
    key = (basis, config.checks, config.american_precision, config.reporting_currency, config.data_root, sources)
    return shared.market(clean, terms, key, log, build)


def prepare_night(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
                  progress: Progress | None = None, books: frozenset[str] | None = None,
                  keep_null_books: bool = True, cache: DateCache | None = None) -> PreparedNight:
    """Read, validate, price and explain one night; nothing is written.

    ``books`` limits the night to the positions of those books (plus those without a book when
    ``keep_null_books``): one part of a night split over a cluster (:mod:`attribution.dask_engine`).
    Every other file is read and checked whole. None takes every position.
    ``cache``: a backfill's :class:`~attribution.date_cache.DateCache`; a date's reading, row rules
    and market state computed for the previous night are reused where they are the same work.
    """
    free_large_arrays_at_once()  # a night's freed columns leave the process (not one value changes)
    watch = Stopwatch(progress)
    shared = cache if books is None else None  # a part of a night (one group of books) is never shared
    prior_as_of = resolve_prior(config, as_of, prior, None if shared is None else
                                shared.available_dates(config.data_root))
    if shared is None:
        raw0 = read_night(config.data_root, prior_as_of, books, keep_null_books)
        raw1 = read_night(config.data_root, as_of, books, keep_null_books)
    else:
        raw0, raw1 = shared.read(config.data_root, prior_as_of), shared.read(config.data_root, as_of)
    watch.lap("read")
    log = ExceptionLog(as_of)
    basis = TimeBasis(config.time_basis, config.holidays)
    if prior is None:
        warn_missing_days(config, basis, prior_as_of, as_of, log)
    if shared is None:
        clean0 = clean_night(raw0, log, config.checks, config.reporting_currency, run_date=False)
        clean1 = clean_night(raw1, log, config.checks, config.reporting_currency)
    else:
        clean0 = shared.holdings(raw0, log, config.checks, config.reporting_currency)
        clean1 = with_events(shared.holdings(raw1, log, config.checks, config.reporting_currency), log)
    clean0, restated = restate_prior(clean0, clean1, log)  # a split tonight: the prior date in new units
    trade_date_warnings(clean1, log)
    watch.lap("validate")
    terms0, terms1 = instrument_terms(clean0, clean1), instrument_terms(clean1, clean0)
    market0 = _market(config, basis, clean0, terms0, log, shared)
    market1 = _market(config, basis, clean1, terms1, log, shared)
    stale = flag_stale_marks(market0, market1, config.checks.stale_spot_move,
                             raw1.path("option_marks.parquet"), log)
    trades = NightTrades.of(*(raw.keys.get("positions.parquet", {}).get("trade_id") for raw in (raw0, raw1)))
    if trades is not None:
        _share_trade_ids(trades, raw0, (raw1, clean1))
    legs = match_legs(clean0, clean1, market0, market1, log, trades)
    legs, activity = _trade_activity(legs, clean0, clean1, market0, market1, log, books is None)
    # what the rows and the controls need of the two dates' position rows, then the rest of those rows goes: the
    # explain runs without them (a million positions: about 100 MB)
    files = file_columns(legs, clean0, clean1)
    (raw0, clean0), (raw1, clean1) = (_rows_for_controls(raw, clean, columns) for raw, clean, columns in
                                      ((raw0, clean0, PRIOR_CONTROL_COLUMNS), (raw1, clean1, RUN_CONTROL_COLUMNS)))
    count = None if trades is None else trades.count()
    del trades
    clock = variance_clock(basis, config.vol_time, prior_as_of, as_of, market0.expiry, market0.tau_years,
                           market1.expiry, market1.tau_years)
    vol0, vol1 = (market0.vol, market1.vol) if clock is None else (
        market0.vol / np.sqrt(clock.ratio0), market1.vol / np.sqrt(clock.ratio1))
    smiles = night_smiles(market0, market1, vol0, vol1)
    check_smiles(smiles, market1, market1.vol, config.smile.off_smile_vol, raw1.path("option_marks.parquet"), log)
    watch.lap("market")
    # The legs and the files' columns are handed over: this frame keeps no reference to them (a call's arguments
    # are the callee's alone in CPython), so the explain frees each as soon as the rows have what they need of it
    # (a million positions: about 40 MB less when the rows' last columns are made).
    handed = [legs, files]
    del legs, files
    with np.errstate(all="ignore"):  # overflows and underflows are caught row by row just below
        values, n = position_values(handed.pop(0), handed.pop(), clean0, clean1, market0, market1, basis,
                                    config.revaluation, smiles, config.smile.dynamics, clock, activity)
    del activity
    positions = position_frame(values, n)
    del values
    positions = reject_non_finite(positions, raw0.path("positions.parquet"), raw1.path("positions.parquet"), log)
    positions = stale_flags(positions, market1.ids[stale].to_numpy())
    went_ex = going_ex(clean0.dividends, clean1.dividends, prior_as_of, as_of)
    positions = corporate_flags(dividend_income(positions, went_ex), restated, went_ex)
    pairs = instrument_pairs(market1.underlying, market1.currency)
    schedule = schedule_frame(as_of, prior_as_of, clean1.dividends, clean0.dividends, pairs, clean1.curves, basis,
                              went_ex)
    positions = cash_rows(positions, clean1, config.reporting_currency, log, books)
    watch.lap("explain")
    # what the controls look up in the two dates' position rows first (the ledger is whole: no later step adds a
    # row about a position), then those columns go too: the book sums run without them
    ledger = position_books(raw0, raw1, log.frame(keyless=True))
    rejected = rejected_positions(ledger)
    exceptions = ledger.drop(columns="position")
    sizes = rejected_size(rejected, raw0, market0, clean0.fx)
    if count is None:  # the ids were not coded where read: counted on the rows as read, while they are held
        positions_in, missing = conservation(raw0, raw1, positions["trade_id"], rejected)
    hashes = {raw.path(f): h for raw in (raw0, raw1) for f, h in raw.hashes.items()}
    (raw0, clean0), (raw1, clean1) = _rows_for_controls(raw0, clean0, ()), _rows_for_controls(raw1, clean1, ())
    if count is not None:  # the distinct ids only: counted once the rows are gone
        positions_in, missing = conservation(raw0, raw1, positions["trade_id"], rejected, count)
    del count, ledger
    positions["limit_state"] = pd.Series(position_limit_states(positions, config), index=positions.index, dtype=object)
    frame = book_frame(positions, exceptions, rejected, config, as_of, prior_as_of, clean1.desks, sizes)
    frame, exceptions = _official(frame, exceptions, clean1, config, books)
    books = frame
    watch.lap("controls")
    return PreparedNight(as_of, prior_as_of, positions, books, exceptions, hashes, positions_in, len(rejected),
                         missing, tuple(watch.stages), schedule)


@dataclass(frozen=True, slots=True)
class _Counts:
    """The night's counts for its run record and its outcome, each counted once."""

    archived: int
    warnings: int
    book_breaches: int
    position_breaches: int

    @classmethod
    def of(cls, night: PreparedNight) -> _Counts:
        return cls(archived=int((night.positions["status"] != CASH).sum()),
                   warnings=int((night.exceptions["severity"] == WARNING).sum()),
                   book_breaches=int((night.books["limit_state"] == BREACH).sum()),
                   position_breaches=int((night.positions["limit_state"] == BREACH).sum()))


# The tables of a night's rows, in the order they are inserted (the quality test and the run record follow).
NIGHT_TABLES = ("position_pnl", "book_pnl", "input_exceptions", "dividend_schedule")


@dataclass(frozen=True, slots=True)
class ArchiveRows:
    """A night as the archive takes it: its tables as Arrow in the archive's column order (a table without a row
    tonight left out) and the figures of its run record and outcome. :func:`archive_rows` builds it from the
    night's frames, where they were computed (a backfill's worker process): Arrow pickles as plain buffers, so
    the process that archives loads it cheaply and does no pandas work of its own."""

    as_of: dt.date
    prior_as_of: dt.date
    tables: dict[str, pa.Table]
    hashes: dict[str, str]
    positions_in: int
    rejected_positions: int
    unaccounted: tuple[str, ...]
    stages: tuple[tuple[str, float], ...]
    counts: _Counts
    books: int
    total_pnl: float
    overnight_actual: float
    explained: float
    residual: float
    unpriced_new: int
    official_breaks: int
    missing_days: tuple[str, ...]  # business days without a folder between the prior and run dates

    def __reduce__(self) -> tuple[Callable[..., ArchiveRows], tuple[object, ...]]:
        """Pickled with each table as Arrow IPC bytes (:mod:`attribution.arrow_ipc`): a backfill's worker hands
        a night back at a fraction of the cost of pickling its Arrow columns one by one, the same rows arriving."""
        values = tuple({name: to_ipc(table) for name, table in self.tables.items()} if f.name == "tables"
                       else getattr(self, f.name) for f in dataclasses.fields(self))
        return _unpickled_rows, values


def _unpickled_rows(*values: object) -> ArchiveRows:
    """The :class:`ArchiveRows` that :meth:`ArchiveRows.__reduce__` pickled."""
    names = [f.name for f in dataclasses.fields(ArchiveRows)]
    fields = dict(zip(names, values, strict=True))
    fields["tables"] = {name: from_ipc(data) for name, data in fields["tables"].items()}  # type: ignore[attr-defined]
    return ArchiveRows(**fields)  # type: ignore[arg-type]


def archive_rows(night: PreparedNight) -> ArchiveRows:
    """The night's archive rows and figures (see :class:`ArchiveRows`). The night is consumed: its position rows
    lose their trade ids once those are Arrow text (a million positions: about 70 MB of Python strings freed before
    the other text columns are converted)."""
    frames = {"position_pnl": night.positions, "book_pnl": night.books, "input_exceptions": night.exceptions,
              "dividend_schedule": night.dividend_schedule}
    pos, exceptions = night.positions, night.exceptions
    tables = {name: arrow_table(frame, name, consume=name == "position_pnl") for name, frame in frames.items()
              if frame is not None and not frame.empty}
    return ArchiveRows(
        as_of=night.as_of, prior_as_of=night.prior_as_of, tables=tables,
        hashes=night.hashes, positions_in=night.positions_in, rejected_positions=night.rejected_positions,
        unaccounted=night.unaccounted, stages=night.stages, counts=_Counts.of(night), books=len(night.books),
        total_pnl=float(pos["pnl_total"].sum()), overnight_actual=float(pos["pnl_actual"].sum()),
        explained=float(pos["pnl_explained"].sum()), residual=float(pos["pnl_residual"].sum()),
        unpriced_new=int((pos["status"] == "new_unpriced").sum()),
        official_breaks=int((exceptions["rule"] == OFFICIAL_BREAK).sum()),
        missing_days=tuple(exceptions.loc[exceptions["rule"] == MISSING_DAY, "key"].astype(str)),
    )


def _runs_table(night: ArchiveRows, config: JobConfig, run_id: str, started: dt.datetime,
                exit_code: int, seconds: float, counts: _Counts) -> pa.Table:
    """The night's run record (one row) as Arrow, typed as a pandas frame of it would convert (dates as
    timestamps, text as large strings): a one-row frame cost more to build and convert than the insert itself."""
    text, number = pa.large_string(), pa.int64()
    record: tuple[tuple[str, object, pa.DataType], ...] = (
        ("run_id", run_id, text),
        ("as_of", pd.Timestamp(night.as_of), pa.timestamp("s")),
        ("prior_as_of", pd.Timestamp(night.prior_as_of), pa.timestamp("s")),
        ("started_at", started, pa.timestamp("us")), ("finished_at", dt.datetime.now(), pa.timestamp("us")),
        ("status", "complete", text), ("tool_version", __version__, text),
        ("input_hashes", json.dumps(night.hashes, sort_keys=True), text),
        ("job_settings", json.dumps(config.as_record(), sort_keys=True), text),
        ("positions_in", night.positions_in, number), ("positions_archived", counts.archived, number),
        ("positions_rejected", night.rejected_positions, number), ("warnings", counts.warnings, number),
        ("book_breaches", counts.book_breaches, number), ("position_breaches", counts.position_breaches, number),
        ("exit_code", exit_code, number), ("seconds", seconds, pa.float64()),
    )
    return pa.Table.from_arrays([pa.array([value], kind) for _, value, kind in record],
                                names=[name for name, _, _ in record])


class ArchiveSession:
    """The archive held by this process: locked at once, opened (and created) only when first written.
    ``one_thread``: DuckDB works on one thread (the other cores are busy computing nights). ``one_night``: the
    session writes one night and closes: its commit folds DuckDB's log into the file (closing would fold it
    anyway), so the rows are written once, not to the log first and then to the file."""

    def __init__(self, config: JobConfig, one_thread: bool = False, one_night: bool = False) -> None:
        self._path = config.archive_path
        self._one_thread = one_thread
        self.one_night = one_night
        self._con: duckdb.DuckDBPyConnection | None = None
        self._dates: set[dt.date] | None = None  # dates with rows in the archive, read once, kept up to date here
        self._history: BookHistory | None = None  # the quality test's rows, read once, kept up to date by each commit

    def holds(self, as_of: dt.date) -> bool:
        """Whether the archive may have rows of ``as_of`` (true unless known not to): its rows must be replaced.
        Nothing else writes the archive while this session holds its lock, so the dates read once stay true."""
        if type(as_of) is not dt.date:
            return True
        if self._dates is None:
            self._dates = dates_with_rows(self.con)
        return as_of in self._dates

    def written(self, as_of: dt.date) -> None:
        """Note a date just committed."""
        if self._dates is not None and type(as_of) is dt.date:
            self._dates.add(as_of)

    @property
    def con(self) -> duckdb.DuckDBPyConnection:
        if self._con is None:
            self._con = connect(self._path)
            if self._one_thread:
                self._con.execute(SET_ONE_THREAD)
        return self._con

    @property
    def history(self) -> BookHistory:
        """The book rows the quality test reads (nothing else writes the archive while the session holds it)."""
        if self._history is None:
            self._history = BookHistory(self.con)
        return self._history

    def close(self) -> None:
        if self._con is not None:
            self._con.close()
            self._con = None
        self._dates = None
        self._history = None


@contextlib.contextmanager
def open_archive(config: JobConfig, one_thread: bool = False, one_night: bool = False) -> Iterator[ArchiveSession]:
    """Lock the archive for the runs of this process (one run, or a whole backfill); see :class:`ArchiveSession`."""
    with archive_lock(config.archive_path):
        session = ArchiveSession(config, one_thread, one_night)
        try:
            yield session
        finally:
            session.close()


def run_night(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
              progress: Progress | None = None, session: ArchiveSession | None = None,
              prepare: Prepare | None = None) -> NightOutcome:
    """Run one night into the archive (and reports); the archive is locked for the whole run.

    ``session`` is an archive already held with :func:`open_archive` (a backfill keeps one).
    ``prepare`` computes the night's tables: :func:`prepare_night` in this process when None. The
    job's engine is chosen above this function (:func:`attribution.runner.run_night` passes the
    Dask engine's step for ``engine = "dask"``), so the engine here knows no cluster.
    A run that fails before archiving leaves the archive as it was (not even created).
    """
    if prepare is None and config.engine != "local":
        raise ConfigError(f"engine = {config.engine!r}: run the night through attribution.runner.run_night")
    if session is None:
        with open_archive(config, one_night=True) as own:
            return run_night(config, as_of, prior, progress, own, prepare)
    started, t0 = dt.datetime.now(), time.perf_counter()
    night = (prepare or prepare_night)(config, as_of, prior, progress)
    rows = archive_rows(night)
    del night  # its frames: the Arrow rows hold what the archive takes (their numbers without a copy)
    return archive_night(config, rows, session, progress, started, t0)


def _commit_and_publish(config: JobConfig, open_night: OpenNight, fold_log: bool) -> Path:
    """Read the figures of the night's pages inside its open transaction, then commit it on a second thread while
    the pages are rendered and written; they are moved into place once the commit has returned, so no page is
    published for a night that is not archived. Return the index page.

    DuckDB's commit runs without Python's lock: on two cores a 100,000-position night's commit (0.30-0.32 s, folding
    the log) runs beside the rendering and writing of its 100 pages (about 0.2 s) instead of after them. If the
    reads fail, the night is committed as when its pages fail after the commit, and the reads' error is raised (a
    query that failed inside DuckDB has ended the transaction: then nothing is archived).
    """
    from attribution.report import load_report, publish_report
    try:
        frames = load_report(open_night.con, open_night.as_of, config)
    except BaseException:
        with contextlib.suppress(duckdb.Error):
            open_night.commit(fold_log)
        raise
    with concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="attribution-commit") as pool:
        committing = pool.submit(open_night.commit, fold_log)
        try:
            return publish_report(frames, open_night.as_of, config.reports_dir, config, committing.result)
        except BaseException:
            failed = committing.exception()  # waits for the commit: a night not archived is the error to raise
            if failed is not None:
                raise failed from None
            raise


def archive_night(config: JobConfig, night: ArchiveRows, session: ArchiveSession, progress: Progress | None = None,
                  started: dt.datetime | None = None, t0: float | None = None) -> NightOutcome:
    """Archive a night computed already (one transaction), then write its reports if the job asks.

    ``started`` and ``t0`` (``time.perf_counter()``): when the run began, if before this call (the night
    computed by the caller); the run record's clock starts here otherwise. ``night.tables`` is emptied once
    the rows are inserted: a large night's rows are not held in memory while its reports are written.
    """
    free_large_arrays_at_once()
    if started is None or t0 is None:
        started, t0 = dt.datetime.now(), time.perf_counter()
    as_of = night.as_of
    if night.unaccounted:
        raise RuntimeError(f"{as_of}: positions neither archived nor rejected: {', '.join(night.unaccounted)}")
    watch = Stopwatch(progress)
    counts = night.counts
    book_breaches, position_breaches = counts.book_breaches, counts.position_breaches
    missing_days = night.missing_days
    findings = (night.rejected_positions > 0 or book_breaches > 0 or position_breaches > 0
                or night.official_breaks > 0 or bool(missing_days))
    exit_code = EXIT_FINDINGS if findings else EXIT_OK
    tables = dict(night.tables)
    tables["runs"] = _runs_table(night, config, str(uuid.uuid4()), started, exit_code, time.perf_counter() - t0,
                                 counts)
    open_night = begin_night(session.con, as_of, tables, replace=session.holds(as_of), history=session.history)
    session.written(as_of)  # (if it is rolled back, the date's next write only deletes rows it need not)
    tables.clear()
    night.tables.clear()  # in the transaction: the reports read it there
    index_path = None
    if config.write_reports:
        watch.lap("archive")  # the inserts: the commit runs while the pages are rendered
        index_path = _commit_and_publish(config, open_night, session.one_night)
        watch.lap("report")
    else:
        open_night.commit(session.one_night)
        watch.lap("archive")
    quality = open_night.quality
    return NightOutcome(
        as_of=as_of, prior_as_of=night.prior_as_of, positions_in=night.positions_in,
        archived=counts.archived, rejected=night.rejected_positions, warnings=counts.warnings,
        books=night.books, total_pnl=night.total_pnl, overnight_actual=night.overnight_actual,
        explained=night.explained, residual=night.residual, book_breaches=book_breaches,
        position_breaches=position_breaches, exit_code=exit_code, seconds=time.perf_counter() - t0,
        stages=night.stages + tuple(watch.stages), index_path=index_path, unpriced_new=night.unpriced_new,
        zones=dict(collections.Counter(str(z) for z in quality["zone"] if isinstance(z, str))),
        missing_days=missing_days,
    )
