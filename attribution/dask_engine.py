"""One night's read, validation, pricing and explain on a Dask cluster, split by book.

The driver (the process that runs ``attribution run``) resolves the prior date and reads only the
``trade_id`` and ``book`` columns of both dates' positions files. It splits the books into groups
(about two per worker thread, balanced by position count) and submits one task per group: the
ordinary :func:`attribution.engine.prepare_night` restricted to that group's books. Each worker
reads every other file whole, checks it, builds both dates' markets and prices and explains its own
positions only. The driver gathers the parts and merges them into the same
:class:`~attribution.engine.PreparedNight` the local engine gives.

Books that share a trade_id (a trade that moved book between the dates, a trade_id booked twice in
two books) always land in one group, and so do the positions without a book, so that every rule
across trades sees all the rows it needs, exactly as in one process.

Merged content: positions in the local engine's order (trades held on the prior date in the prior
file's row order, then new trades in the run file's row order); books sorted by book, as locally;
the exception ledger holds the same rows as locally, in worker order (rows about instruments,
marks, curves and FX rates, found by several workers, are kept with as many copies as the most any
one worker found); hashes from any part; counts summed.

Each task reads and checks the instrument, mark, curve and FX files whole and builds both dates'
markets, so that work is repeated once per group: the split pays where positions outnumber
instruments by far, and on machines with more cores than the pricing kernel can use alone.
The pricing kernel's own threads are not capped on a worker (``prepare_night`` has no such
setting): a large part may use every core of its machine, besides the worker's thread.

Everything after that stays on the driver, as in the local engine: the archive transaction, the
attribution-quality test and the reports. DuckDB lets one process write an archive, and the
report pages draw 60 nights of history from it, so they are rendered on the driver from the
archive, never on the workers.

On a real cluster every worker must import the same version of ``attribution`` (install the
package on each), and the data root must be a path every worker can read under the same name
(a shared file system; give it as an absolute path). The archive and the reports stay on the driver.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import heapq
import logging
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from attribution.activity import CASH, unknown_trades
from attribution.books import NO_BOOK
from attribution.config import JobConfig
from attribution.contract import activity_rows
from attribution.engine import PreparedNight, Progress, Stopwatch, prepare_night, resolve_prior, warn_missing_days
from attribution.errors import JobFailure
from attribution.exceptions_log import ExceptionLog
from attribution.lifecycle import NEW, NEW_UNPRICED, match_keys
from attribution.loading import RawNight, blank_books, folder_for, read_file, read_night
from attribution.timebasis import TimeBasis

log = logging.getLogger("attribution")

INSTALL_HINT = 'pip install -e ".[dask]"'
TASKS_PER_THREAD = 2          # groups per worker thread: a slow group does not leave the others idle
WORKER_WAIT_SECONDS = 60.0    # how long a scheduler may take to show its first worker


@dataclass(frozen=True, slots=True)
class BookGroup:
    """One task's share of the night: its books, whether it takes the rows without a book, its size."""

    books: frozenset[str]
    keep_null_books: bool
    positions: int  # position rows over both dates (the balancing weight)


@dataclass(frozen=True, slots=True)
class PositionKeys:
    """``trade_id`` and ``book`` of one date's positions file, in file order (null as None)."""

    trade_id: np.ndarray
    book: np.ndarray
    blank: np.ndarray  # null, empty or white-space book: the rows kept by ``keep_null_books``


def require_distributed() -> Any:
    """The ``distributed`` module, or a :class:`JobFailure` (exit 1) saying how to install it."""
    try:
        import distributed
    except ImportError as exc:
        raise JobFailure(f'engine "dask" needs dask and distributed, which are not installed: {INSTALL_HINT} '
                         f"(or run with --engine local)") from exc
    return distributed


@contextlib.contextmanager
def cluster_client(config: JobConfig) -> Iterator[Any]:
    """A client of the job's scheduler (``config.scheduler``), or of a two-process local cluster
    started for this run and closed after it."""
    distributed = require_distributed()
    if config.scheduler:
        try:
            client = distributed.Client(config.scheduler)
        except (OSError, TimeoutError) as exc:
            raise JobFailure(f"cannot reach the Dask scheduler at {config.scheduler}: {exc}") from exc
        try:
            yield client
        finally:
            client.close()
        return
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        yield client


def _read_keys(config: JobConfig, as_of: dt.date) -> PositionKeys:
    path = folder_for(config.data_root, as_of) / "positions.parquet"
    table = pq.read_table(path, columns=["trade_id", "book"])
    book = table.column("book").cast(pa.string())
    return PositionKeys(table.column("trade_id").cast(pa.string()).to_numpy(zero_copy_only=False).astype(object),
                        book.to_numpy(zero_copy_only=False).astype(object), blank_books(book))


def position_keys(config: JobConfig, prior_as_of: dt.date, as_of: dt.date) -> tuple[PositionKeys, PositionKeys]:
    """Both dates' trade ids and books. A file that cannot be read fails exactly as a local run does."""
    try:
        return _read_keys(config, prior_as_of), _read_keys(config, as_of)
    except (OSError, KeyError, pa.ArrowException, ValueError) as exc:
        read_night(config.data_root, prior_as_of)  # raises the local engine's message for the first bad file
        read_night(config.data_root, as_of)
        raise JobFailure(f"{config.data_root}: positions cannot be read for {prior_as_of} / {as_of}: {exc}") from exc


def _components(keys: tuple[PositionKeys, ...]) -> tuple[np.ndarray, np.ndarray, int, np.ndarray]:
    """Books joined by shared trade ids: (book names, component of each book, component of the rows
    without a book, position rows per component)."""
    book = np.concatenate([k.book for k in keys])
    trade = np.concatenate([k.trade_id for k in keys])
    no_book = np.concatenate([k.blank for k in keys]) | (book == NO_BOOK)
    book_code, names = pd.factorize(pd.Series(book, dtype=object).where(~no_book))
    n_books = len(names)
    book_node = np.where(no_book, n_books, book_code)  # node n_books: every row without a book
    trade_code, trades = pd.factorize(pd.Series(trade, dtype=object))
    has_trade = trade_code >= 0
    n_nodes = n_books + 1 + len(trades)
    edges = coo_matrix((np.ones(int(has_trade.sum())), (book_node[has_trade], n_books + 1 + trade_code[has_trade])),
                       shape=(n_nodes, n_nodes))
    _, label = connected_components(edges, directed=False)
    weight = np.bincount(label[book_node], minlength=int(label.max()) + 1)
    return np.asarray(names, dtype=object), label[:n_books], int(label[n_books]), weight


def book_groups(keys: tuple[PositionKeys, ...], n_groups: int) -> tuple[BookGroup, ...]:
    """Split the books into at most ``n_groups`` groups of about equal position count (deterministic).

    Books joined by a shared trade_id stay together; the group holding the rows without a book
    comes first and is the only one with ``keep_null_books``.
    """
    names, label, null_label, weight = _components(keys)
    by_label = pd.Series(names, dtype=object).groupby(label, sort=True)
    units = [(int(weight[lab]), min(books), lab, frozenset(books)) for lab, books in by_label]
    if weight[null_label] > 0 and null_label not in set(label.tolist()):
        units.append((int(weight[null_label]), "", null_label, frozenset()))
    units.sort(key=lambda u: (-u[0], u[1]))
    count = max(1, min(n_groups, len(units)))
    heap = [(0, k) for k in range(count)]
    members: list[list[tuple[int, str, int, frozenset[str]]]] = [[] for _ in range(count)]
    for unit in units:  # largest first into the lightest group: one step per book group, not per position
        load, k = heapq.heappop(heap)
        members[k].append(unit)
        heapq.heappush(heap, (load + unit[0], k))
    has_null = [any(u[2] == null_label for u in m) for m in members]
    first = has_null.index(True) if any(has_null) else 0
    order = [first] + [k for k in range(count) if k != first]
    return tuple(BookGroup(frozenset().union(*(u[3] for u in members[k])), k == first,
                           sum(u[0] for u in members[k])) for k in order)


def _concat(frames: list[pd.DataFrame]) -> pd.DataFrame:
    """Row-wise concatenation skipping empty parts (an empty part's columns may lack the others' dtypes)."""
    full = [f for f in frames if len(f)]
    if not full:
        return frames[0].reset_index(drop=True)
    return pd.concat(full, ignore_index=True) if len(full) > 1 else full[0].reset_index(drop=True)


def local_order(positions: pd.DataFrame, keys: tuple[PositionKeys, PositionKeys]) -> pd.DataFrame:
    """Rows in the local engine's order: prior-date trades by prior-file row, then new trades by run-file row,
    then the books' cash rows by book.

    An archived trade_id is unique in its file (every copy of a repeated one is rejected), so its row
    there is well defined.
    """
    trade = positions["trade_id"].to_numpy(dtype=object)
    is_new = positions["status"].isin([NEW, NEW_UNPRICED]).to_numpy()
    row = np.where(is_new, match_keys(trade, keys[1].trade_id)[0], match_keys(trade, keys[0].trade_id)[0])
    is_cash = (positions["status"] == CASH).to_numpy()  # the books' cash rows come last, by book
    row = np.where(is_cash, pd.Series(positions["book"]).rank(method="dense").fillna(0).to_numpy(), row)
    return positions.iloc[np.lexsort((row, is_new, is_cash))].reset_index(drop=True)


def merge_exceptions(parts: list[pd.DataFrame]) -> pd.DataFrame:
    """Every position's rows once (each is in one part); rows without a book (instrument, mark, curve,
    FX rows, found by several workers) kept once, as many copies as the most any one part holds."""
    frame = _concat([p.assign(_part=k) for k, p in enumerate(parts)])
    shared = frame["book"].isna().to_numpy()
    columns = [c for c in frame.columns if c not in ("book", "_part")]
    copy = frame.groupby([*columns, "_part"], sort=False, dropna=False).cumcount().to_numpy()
    repeated = pd.DataFrame({c: frame[c].to_numpy(dtype=object) for c in columns}).assign(_copy=copy).duplicated()
    return frame[~(shared & repeated.to_numpy())].drop(columns="_part").reset_index(drop=True)


def merge_parts(parts: list[PreparedNight], keys: tuple[PositionKeys, PositionKeys],
                stages: tuple[tuple[str, float], ...]) -> PreparedNight:
    """One night from its parts (see the module docstring for what is merged how)."""
    positions = local_order(_concat([p.positions for p in parts]), keys)
    books = _concat([p.books for p in parts]).sort_values("book", kind="stable").reset_index(drop=True)
    unaccounted = tuple(t for p in parts for t in p.unaccounted)[:20]
    return PreparedNight(parts[0].as_of, parts[0].prior_as_of, positions, books,
                         merge_exceptions([p.exceptions for p in parts]), parts[0].hashes,
                         sum(p.positions_in for p in parts), sum(p.rejected_positions for p in parts),
                         unaccounted, stages, parts[0].dividend_schedule)  # every part reads every dividend


def with_event_books(groups: tuple[BookGroup, ...], config: JobConfig, as_of: dt.date,
                     keys: tuple[PositionKeys, PositionKeys]) -> tuple[BookGroup, ...]:
    """Books named only by the run date's cash_flows or official_pnl (no position on either date) go
    to the first group, so that one task makes their cash row and official break, as locally."""
    folder = folder_for(config.data_root, as_of)
    named: set[str] = set()
    for file in ("cash_flows.parquet", "official_pnl.parquet"):
        if (folder / file).exists():
            try:
                books = pq.read_table(folder / file, columns=["book"]).column("book").cast(pa.string())
            except (OSError, KeyError, pa.ArrowException):
                continue  # the task's own read reports the file exactly as a local run does
            named |= {b for b in books.to_pylist() if b is not None}
    held = {b for k in keys for b in k.book.tolist() if b is not None}
    extra = frozenset(named - held)
    if not extra or not groups:
        return groups
    first = groups[0]
    return (BookGroup(first.books | extra, first.keep_null_books, first.positions), *groups[1:])


def _unknown_activity(night: PreparedNight, config: JobConfig, as_of: dt.date,
                      keys: tuple[PositionKeys, PositionKeys]) -> PreparedNight:
    """Warn activity rows of trades in neither date's positions: only the driver sees every trade."""
    folder = folder_for(config.data_root, as_of)
    frame, _ = read_file(folder, "trade_activity.parquet")
    if frame is None:
        return night
    ledger = ExceptionLog(as_of)
    clean = activity_rows(RawNight(as_of, folder, {"trade_activity.parquet": frame}, {}), ExceptionLog(as_of))
    known = pd.Index(np.concatenate([k.trade_id for k in keys]))
    unknown_trades(clean, known, str(folder / "trade_activity.parquet"), "activity_id",
                   "activity of an unknown trade", ledger)
    extra = ledger.frame()
    if extra.empty:
        return night
    extra = extra.assign(book=None)[night.exceptions.columns]
    exceptions = pd.concat([night.exceptions, extra], ignore_index=True) if len(night.exceptions) else extra
    return dataclasses.replace(night, exceptions=exceptions)  # every other table as merged (dividends included)


def _threads(client: Any) -> int:
    try:
        client.wait_for_workers(1, timeout=WORKER_WAIT_SECONDS)
    except TimeoutError as exc:
        raise JobFailure(f"the Dask scheduler has no worker after {WORKER_WAIT_SECONDS:.0f} s") from exc
    return max(1, sum(client.nthreads().values()))


def _on_cluster(client: Any, config: JobConfig, as_of: dt.date, prior: dt.date | None,
                watch: Stopwatch) -> PreparedNight:
    prior_as_of = resolve_prior(config, as_of, prior)
    keys = position_keys(config, prior_as_of, as_of)
    groups = with_event_books(book_groups(keys, TASKS_PER_THREAD * _threads(client)), config, as_of, keys)
    log.info("%s: %d book group(s) of %s positions", as_of, len(groups), [g.positions for g in groups])
    futures = [client.submit(prepare_night, config, as_of, prior_as_of, None, g.books, g.keep_null_books,
                             pure=False) for g in groups]
    parts = client.gather(futures)
    watch.lap("cluster")
    night = merge_parts(parts, keys, ())
    night = _unknown_activity(night, config, as_of, keys)
    watch.lap("merge")
    return night


def prepare_night_dask(config: JobConfig, as_of: dt.date, prior: dt.date | None = None,
                       progress: Progress | None = None, client: Any = None) -> PreparedNight:
    """:func:`attribution.engine.prepare_night` on a Dask cluster, split by book; same content.

    ``client``: a connected ``distributed.Client`` to use (the caller keeps it open); None
    connects to ``config.scheduler`` or starts a local cluster for this night (stage "connect").
    Stages: "connect" (only when a cluster is started or joined here), "cluster" (reading the
    books, and every worker's read, validation, market and explain, in wall time) and "merge".
    """
    require_distributed()
    watch = Stopwatch(progress)
    if client is not None:
        night = _on_cluster(client, config, as_of, prior, watch)
    else:
        with cluster_client(config) as own:
            watch.lap("connect")
            night = _on_cluster(own, config, as_of, prior, watch)
    exceptions = night.exceptions
    if prior is None:  # the workers get the prior date resolved here, so the driver checks for a gap (as locally)
        gap = ExceptionLog(as_of)
        warn_missing_days(config, TimeBasis(config.time_basis, config.holidays), night.prior_as_of, as_of, gap)
        if gap.count("warning"):
            exceptions = pd.concat([gap.frame().assign(book=None), exceptions], ignore_index=True)
    return PreparedNight(night.as_of, night.prior_as_of, night.positions, night.books, exceptions,
                         night.hashes, night.positions_in, night.rejected_positions, night.unaccounted,
                         tuple(watch.stages), night.dividend_schedule)


__all__ = ["BookGroup", "PositionKeys", "book_groups", "cluster_client", "merge_parts", "position_keys",
           "prepare_night_dask", "require_distributed"]
