"""One night, end to end: files -> validated tables -> market state -> explain -> controls -> archive -> report.

:func:`prepare_night` does everything that needs no archive (it is also ``attribution check``);
:func:`run_night` adds the lock, the archive transaction and the reports.
"""

from __future__ import annotations

import contextlib
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

from attribution import __version__
from attribution.archive import archive_lock, connect, write_night
from attribution.config import ConfigError, JobConfig
from attribution.contract import NULL_KEY, clean_night
from attribution.controls import BREACH, WATCH, book_states, position_states
from attribution.errors import EXIT_FAILED, EXIT_FINDINGS, EXIT_OK, EXIT_USAGE
from attribution.exceptions_log import REJECTED, WARNING, ExceptionLog
from attribution.lifecycle import STATUSES, match_legs
from attribution.loading import RawNight, prior_date, read_night
from attribution.market import build_market, flag_stale_marks, instrument_terms
from attribution.night import position_rows, stale_flags
from attribution.schema import BOOK_PNL, EXPOSURE_COLUMNS, PNL_COLUMNS, REVAL_COLUMNS, V2_AMOUNT_COLUMNS
from attribution.smile_night import check_smiles, night_smiles
from attribution.timebasis import TimeBasis
from attribution.vol_time import variance_clock

__all__ = ["EXIT_FAILED", "EXIT_FINDINGS", "EXIT_OK", "EXIT_USAGE", "NightOutcome", "PreparedNight",
           "prepare_night", "run_night"]

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


class _Stopwatch:
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


def _resolve_prior(config: JobConfig, as_of: dt.date, prior: dt.date | None) -> dt.date:
    if prior is None:
        return prior_date(config.data_root, as_of)
    if prior >= as_of:
        raise ConfigError(f"--prior: prior date {prior} must be before the run date {as_of}")
    return prior


NO_BOOK = "(no book)"  # the book shown for a rejected position row without one
UNASSIGNED_DESK = "(unassigned)"  # the desk of a book that books.parquet does not list


def _position_books(raw0: RawNight, raw1: RawNight, exceptions: pd.DataFrame) -> pd.DataFrame:
    """The ledger with a ``book`` column (the book of the position a row is about, else null) and
    ``position``: one identity per input position (its trade_id; file and row for a keyless row)."""
    on_positions = exceptions["file"].str.endswith("positions.parquet").to_numpy()
    keys = exceptions["key"].astype(str)
    keyless = keys.str.startswith(NULL_KEY).to_numpy() & on_positions
    book = np.full(len(exceptions), None, dtype=object)
    with_key = on_positions & ~keyless
    wanted = keys[with_key].unique()  # only the few trades the ledger names, not every position
    by_trade = pd.concat([r.tables["positions.parquet"].loc[lambda f: f["trade_id"].isin(wanted), ["trade_id", "book"]]
                          for r in (raw1, raw0)])
    by_trade = by_trade.drop_duplicates("trade_id").set_index("trade_id")["book"]
    book[with_key] = by_trade.reindex(keys[with_key]).to_numpy(dtype=object)
    for raw in (raw0, raw1):
        mine = keyless & (exceptions["file"] == raw.path("positions.parquet")).to_numpy()
        if mine.any():  # the key names the row's number in the file, which is the frame's index label
            rows = keys[mine].str.slice(len(NULL_KEY)).astype(int).to_numpy()
            book[mine] = raw.tables["positions.parquet"]["book"].loc[rows].to_numpy(dtype=object)
    book[on_positions] = pd.Series(book[on_positions], dtype=object).fillna(NO_BOOK).to_numpy()
    position = np.where(keyless, exceptions["file"] + "#" + keys, keys)
    return exceptions.assign(book=book, position=np.where(on_positions, position, None))


def _rejected_positions(ledger: pd.DataFrame) -> pd.DataFrame:
    """One row per rejected input position (book, position identity)."""
    rejected = ledger[(ledger["severity"] == REJECTED) & ledger["position"].notna()]
    return rejected.drop_duplicates("position")[["book", "position"]]


def _conservation(raw0: RawNight, raw1: RawNight, archived: pd.Series,
                  rejected: pd.DataFrame) -> tuple[int, tuple[str, ...]]:
    """Positions in (distinct trades over both dates, plus keyless rows) and any unaccounted."""
    ids = []
    keyless = 0
    for raw in (raw0, raw1):
        tid = raw.tables["positions.parquet"]["trade_id"]
        ids.append(tid[tid.notna()].astype(str))
        keyless += int(tid.isna().sum())
    universe = pd.Index(pd.concat(ids).unique())
    accounted = pd.Index(archived.astype(str)).union(pd.Index(rejected["position"].astype(str)))
    missing = universe.difference(accounted)
    return len(universe) + keyless, tuple(missing[:20].tolist())


def _book_frame(positions: pd.DataFrame, exceptions: pd.DataFrame, rejected: pd.DataFrame,
                config: JobConfig, as_of: dt.date, prior_as_of: dt.date) -> pd.DataFrame:
    """One row per book: sums, counts by status, rejected and warning counts, limit state."""
    amounts = list(PNL_COLUMNS) + list(REVAL_COLUMNS) + list(EXPOSURE_COLUMNS) + list(V2_AMOUNT_COLUMNS)
    grouped = positions.groupby("book", sort=True)
    sums = grouped[amounts].sum(min_count=0)
    for column in REVAL_COLUMNS:  # NULL when the method is off
        sums[column] = grouped[column].sum(min_count=1)
    counts = pd.crosstab(positions["book"], positions["status"]).reindex(columns=list(STATUSES), fill_value=0)
    rejected_books = rejected["book"].value_counts()
    warn = exceptions[exceptions["severity"] == WARNING]
    keys = warn["key"].unique()  # a warning touches a book through one of its instruments or trades
    by_instrument = positions.loc[positions["instrument_id"].isin(keys), ["book", "instrument_id"]]
    by_trade = positions.loc[positions["trade_id"].isin(keys), ["book", "trade_id"]]
    touched = pd.concat([by_instrument.rename(columns={"instrument_id": "key"}),
                         by_trade.rename(columns={"trade_id": "key"})]).drop_duplicates()
    warnings = touched.merge(warn[["key"]], on="key").groupby("book").size()
    books = sums.index.union(rejected_books.index)
    frame = sums.reindex(books, fill_value=0.0)
    for column in REVAL_COLUMNS:
        frame[column] = sums[column].reindex(books)
    frame = frame.reset_index(names="book")
    counts = counts.reindex(books, fill_value=0)
    for status in STATUSES:
        frame[status] = counts[status].to_numpy()
    frame["positions"] = counts.sum(axis=1).to_numpy()
    frame["rejected"] = rejected_books.reindex(books, fill_value=0).to_numpy()
    frame["warnings"] = warnings.reindex(books, fill_value=0).to_numpy()
    limits = [config.limits_for(b) for b in frame["book"]]
    states, applied = book_states(frame["pnl_residual"], frame["pnl_actual"],
                                  [x.residual_abs for x in limits], [x.residual_rel for x in limits],
                                  [x.relative_floor for x in limits], [x.watch_fraction for x in limits])
    breaches = (positions["limit_state"] == BREACH).groupby(positions["book"]).sum().reindex(books, fill_value=0)
    frame["position_breaches"] = breaches.to_numpy()
    frame["residual_limit"] = applied
    frame["limit_state"] = np.where((states == "within") & (frame["position_breaches"] > 0), WATCH, states)
    frame["as_of"], frame["prior_as_of"] = pd.Timestamp(as_of), pd.Timestamp(prior_as_of)
    frame["desk"] = UNASSIGNED_DESK
    frame["official_pnl"] = frame["official_break"] = np.nan
    return frame[[name for name, _ in BOOK_PNL]]


def prepare_night(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
                  progress: Progress | None = None, books: frozenset[str] | None = None,
                  keep_null_books: bool = True) -> PreparedNight:
    """Read, validate, price and explain one night; nothing is written.

    ``books`` limits the night to the positions of those books (plus those without a book when
    ``keep_null_books``): one part of a night split over a cluster (:mod:`attribution.dask_engine`).
    Every other file is read and checked whole. None takes every position.
    """
    watch = _Stopwatch(progress)
    prior_as_of = _resolve_prior(config, as_of, prior)
    raw0 = read_night(config.data_root, prior_as_of, books, keep_null_books)
    raw1 = read_night(config.data_root, as_of, books, keep_null_books)
    watch.lap("read")
    log = ExceptionLog(as_of)
    basis = TimeBasis(config.time_basis, config.holidays)
    clean0 = clean_night(raw0, log, config.checks, config.reporting_currency)
    clean1 = clean_night(raw1, log, config.checks, config.reporting_currency)
    watch.lap("validate")
    market0 = build_market(clean0, instrument_terms(clean0, clean1), basis, config.checks, log)
    market1 = build_market(clean1, instrument_terms(clean1, clean0), basis, config.checks, log)
    stale = flag_stale_marks(market0, market1, config.checks.stale_spot_move,
                             raw1.path("option_marks.parquet"), log)
    legs = match_legs(clean0, clean1, market0, market1, log)
    clock = variance_clock(basis, config.vol_time, prior_as_of, as_of, market0.expiry, market0.tau_years,
                           market1.expiry, market1.tau_years)
    vol0, vol1 = (market0.vol, market1.vol) if clock is None else (
        market0.vol / np.sqrt(clock.ratio0), market1.vol / np.sqrt(clock.ratio1))
    smiles = night_smiles(market0, market1, vol0, vol1)
    check_smiles(smiles, market1, market1.vol, config.smile.off_smile_vol, raw1.path("option_marks.parquet"), log)
    watch.lap("market")
    positions = position_rows(legs, clean0, clean1, market0, market1, basis, config.revaluation, smiles,
                              config.smile.dynamics, clock)
    positions = stale_flags(positions, market1.ids[stale].to_numpy())
    watch.lap("explain")
    limits = [config.limits_for(b) for b in pd.unique(positions["book"])]
    by_book = dict(zip(pd.unique(positions["book"]), limits, strict=True))
    position_limit = positions["book"].map({b: x.position_abs for b, x in by_book.items()}).to_numpy(float)
    fraction = positions["book"].map({b: x.watch_fraction for b, x in by_book.items()}).to_numpy(float)
    positions["limit_state"] = position_states(positions["pnl_residual"], position_limit, fraction)
    ledger = _position_books(raw0, raw1, log.frame())
    rejected = _rejected_positions(ledger)
    exceptions = ledger.drop(columns="position")
    books = _book_frame(positions, exceptions, rejected, config, as_of, prior_as_of)
    positions_in, missing = _conservation(raw0, raw1, positions["trade_id"], rejected)
    watch.lap("controls")
    hashes = {raw.path(f): h for raw in (raw0, raw1) for f, h in raw.hashes.items()}
    return PreparedNight(as_of, prior_as_of, positions, books, exceptions, hashes, positions_in, len(rejected),
                         missing, tuple(watch.stages))


def _runs_frame(night: PreparedNight, config: JobConfig, run_id: str, started: dt.datetime,
                exit_code: int, seconds: float) -> pd.DataFrame:
    return pd.DataFrame([{
        "run_id": run_id, "as_of": pd.Timestamp(night.as_of), "prior_as_of": pd.Timestamp(night.prior_as_of),
        "started_at": started, "finished_at": dt.datetime.now(), "status": "complete",
        "tool_version": __version__, "input_hashes": json.dumps(night.hashes, sort_keys=True),
        "job_settings": json.dumps(config.as_record(), sort_keys=True),
        "positions_in": night.positions_in, "positions_archived": len(night.positions),
        "positions_rejected": night.rejected_positions,
        "warnings": int((night.exceptions["severity"] == WARNING).sum()),
        "book_breaches": int((night.books["limit_state"] == BREACH).sum()),
        "position_breaches": int((night.positions["limit_state"] == BREACH).sum()),
        "exit_code": exit_code, "seconds": seconds,
    }])


class ArchiveSession:
    """The archive held by this process: locked at once, opened (and created) only when first written."""

    def __init__(self, config: JobConfig) -> None:
        self._path = config.archive_path
        self._con: duckdb.DuckDBPyConnection | None = None

    @property
    def con(self) -> duckdb.DuckDBPyConnection:
        if self._con is None:
            self._con = connect(self._path)
        return self._con

    def close(self) -> None:
        if self._con is not None:
            self._con.close()
            self._con = None


@contextlib.contextmanager
def open_archive(config: JobConfig) -> Iterator[ArchiveSession]:
    """Lock the archive for the runs of this process (one run, or a whole backfill)."""
    with archive_lock(config.archive_path):
        session = ArchiveSession(config)
        try:
            yield session
        finally:
            session.close()


def run_night(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
              progress: Progress | None = None, session: ArchiveSession | None = None,
              client: object | None = None) -> NightOutcome:
    """Run one night into the archive (and reports); the archive is locked for the whole run.

    ``session`` is an archive already held with :func:`open_archive` (a backfill keeps one).
    ``client``: with ``config.engine == "dask"``, a Dask client already connected (a backfill can
    keep one, see :func:`attribution.dask_engine.cluster_client`); None connects for this night.
    A run that fails before archiving leaves the archive as it was (not even created).
    """
    if session is None:
        with open_archive(config) as own:
            return run_night(config, as_of, prior, progress, own, client)
    started, t0 = dt.datetime.now(), time.perf_counter()
    if config.engine == "dask":
        from attribution.dask_engine import prepare_night_dask
        night = prepare_night_dask(config, as_of, prior, progress, client)
    else:
        night = prepare_night(config, as_of, prior, progress)
    if night.unaccounted:
        raise RuntimeError(f"{as_of}: positions neither archived nor rejected: {', '.join(night.unaccounted)}")
    watch = _Stopwatch(progress)
    book_breaches = int((night.books["limit_state"] == BREACH).sum())
    position_breaches = int((night.positions["limit_state"] == BREACH).sum())
    findings = night.rejected_positions > 0 or book_breaches > 0 or position_breaches > 0
    exit_code = EXIT_FINDINGS if findings else EXIT_OK
    frames = {"position_pnl": night.positions, "book_pnl": night.books, "input_exceptions": night.exceptions,
              "runs": _runs_frame(night, config, str(uuid.uuid4()), started, exit_code, time.perf_counter() - t0)}
    con = session.con
    quality = write_night(con, as_of, frames)
    watch.lap("archive")
    index_path = None
    if config.write_reports:
        from attribution.report import render_night
        index_path = render_night(con, as_of, config.reports_dir, config)
        watch.lap("report")
    pos = night.positions
    return NightOutcome(
        as_of=as_of, prior_as_of=night.prior_as_of, positions_in=night.positions_in, archived=len(pos),
        rejected=night.rejected_positions, warnings=int((night.exceptions["severity"] == WARNING).sum()),
        books=len(night.books), total_pnl=float(pos["pnl_total"].sum()),
        overnight_actual=float(pos["pnl_actual"].sum()), explained=float(pos["pnl_explained"].sum()),
        residual=float(pos["pnl_residual"].sum()), book_breaches=book_breaches,
        position_breaches=position_breaches, exit_code=exit_code, seconds=time.perf_counter() - t0,
        stages=night.stages + tuple(watch.stages), index_path=index_path,
        unpriced_new=int((pos["status"] == "new_unpriced").sum()),
        zones={str(k): int(v) for k, v in quality["zone"].value_counts().items()},
    )
