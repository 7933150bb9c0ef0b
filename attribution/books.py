"""Book aggregation and the night's conservation: from position rows and the exception ledger to one row per book.

* :func:`position_books` gives each ledger row the book of the position it is about;
* :func:`rejected_positions` lists each rejected input position once;
* :func:`conservation` counts the positions in and names any neither archived nor rejected;
* :func:`position_limit_states` and :func:`book_frame` apply the job's residual limits per position and per book.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from attribution.activity import POSITION_BREAK
from attribution.config import JobConfig
from attribution.contract import NULL_KEY
from attribution.controls import BREACH, WATCH, book_states, position_states
from attribution.exceptions_log import REJECTED, WARNING
from attribution.group_sums import sums_by_group
from attribution.keys import NightTrades, TradeCount
from attribution.lifecycle import STATUSES
from attribution.loading import RawNight
from attribution.market import InstrumentMarket, take
from attribution.schema import (
    BOOK_PNL,
    EXPOSURE_COLUMNS,
    PNL_COLUMNS,
    REVAL_COLUMNS,
    UNASSIGNED_DESK,
    V2_AMOUNT_COLUMNS,
)
from attribution.valuation import MarketState, value_and_greeks

NO_BOOK = "(no book)"  # the book shown for a rejected position row without one


def position_books(raw0: RawNight, raw1: RawNight, exceptions: pd.DataFrame) -> pd.DataFrame:
    """The ledger with a ``book`` column (the book of the position a row is about, else null) and
    ``position``: one identity per input position (its trade_id; file and row for a keyless row).

    ``exceptions`` carries the ``keyless`` flag of :meth:`ExceptionLog.frame` (a real key may read like
    a keyless row's key text, so the flag, not the text, says which rows have no key); the result does not."""
    file = exceptions["file"].to_numpy(dtype=object)
    file_code, files = pd.factorize(file)  # a ledger names a handful of files: each tested once
    on_positions = _per_file(file_code, [isinstance(f, str) and f.endswith("positions.parquet") for f in files])
    keys = exceptions["key"].astype(str).to_numpy(dtype=object)
    keyless = exceptions["keyless"].to_numpy(dtype=bool) & on_positions
    exceptions = exceptions.drop(columns="keyless")
    book = np.full(len(exceptions), None, dtype=object)
    position_break = (exceptions["rule"] == POSITION_BREAK).to_numpy()  # keyed by trade_id: shown with its book
    with_key = (on_positions & ~keyless) | position_break
    book[with_key] = _books_of_trades(keys[with_key], (raw1, raw0))  # only the few trades the ledger names
    for raw in (raw0, raw1):
        mine = keyless & _per_file(file_code, [f == raw.path("positions.parquet") for f in files])
        if mine.any():  # the key names the row's number in the file, which is the frame's index label
            rows = pd.Series(keys[mine], dtype=object).str.slice(len(NULL_KEY)).astype(int).to_numpy()
            book[mine] = raw.tables["positions.parquet"]["book"].loc[rows].to_numpy(dtype=object)
    named = book[on_positions]
    named[pd.isna(named)] = NO_BOOK
    book[on_positions] = named
    position = keys.copy()
    position[keyless] = file[keyless] + "#" + keys[keyless]
    return exceptions.assign(book=book, position=np.where(on_positions, position, None))


def _per_file(file_code: np.ndarray, per_file: list[bool]) -> np.ndarray:
    """Per ledger row, the flag of its file (codes of ``pd.factorize``; -1, no file: False)."""
    flags = np.append(np.asarray(per_file, dtype=bool), False)
    return flags[file_code]


def _books_of_trades(trade_ids: np.ndarray, raws: tuple[RawNight, ...]) -> np.ndarray:
    """The book of each trade_id: its first row in the first of ``raws`` that has one (NaN if none does)."""
    wanted = pd.unique(trade_ids)
    book = np.full(len(wanted), np.nan, dtype=object)
    missing = np.ones(len(wanted), dtype=bool)
    for raw in raws:
        table = raw.tables["positions.parquet"]
        at = pd.Index(wanted, dtype=object).get_indexer(pd.Index(table["trade_id"].to_numpy(dtype=object),
                                                                 dtype=object, copy=False))
        rows = np.flatnonzero(at >= 0)
        found, first = np.unique(at[rows], return_index=True)  # a trade's first row in the file
        new = missing[found]
        book[found[new]] = table["book"].to_numpy(dtype=object)[rows[first[new]]]
        missing[found[new]] = False
    return book[pd.Index(wanted, dtype=object).get_indexer(trade_ids)]


def rejected_positions(ledger: pd.DataFrame) -> pd.DataFrame:
    """One row per rejected input position (book, position identity)."""
    position = ledger["position"].to_numpy(dtype=object)
    rows = np.flatnonzero((ledger["severity"].to_numpy(dtype=object) == REJECTED) & ~pd.isna(position))
    _, first = np.unique(pd.factorize(position[rows])[0], return_index=True)  # each position's first row
    return ledger[["book", "position"]].iloc[rows[np.sort(first)]]


def rejected_size(rejected: pd.DataFrame, raw0: RawNight, market0: InstrumentMarket, fx0: pd.Series) -> pd.DataFrame:
    """Per book, what the rejected positions weighed on the prior date: value and vega at the prior state.

    A rejected position is valued when the prior date holds it (its file row, by trade_id) in an instrument
    the prior market prices, with a finite quantity and an FX rate; its value is quantity x multiplier x prior
    mark x prior FX, its vega the model's at the prior state (per vol point). The others (new trades, a
    keyless row, no usable prior mark) are counted in ``rejected_unvalued``, never valued at 0 silently.
    Columns: book, rejected_prior_value, rejected_vega_per_vol_point, rejected_unvalued.
    """
    columns = ["rejected_prior_value", "rejected_vega_per_vol_point", "rejected_unvalued"]
    if rejected.empty:
        return pd.DataFrame(columns=["book", *columns])
    prior = raw0.tables["positions.parquet"]
    prior = prior[prior["trade_id"].isin(rejected["position"])].drop_duplicates("trade_id")
    prior = rejected.merge(prior[["trade_id", "instrument_id", "quantity"]], how="left",
                           left_on="position", right_on="trade_id")
    idx = market0.locate(prior["instrument_id"].to_numpy(dtype=object))
    i = np.maximum(idx, 0)  # read only where idx >= 0 (a prior market may price no instrument at all)
    quantity = prior["quantity"].to_numpy(dtype=float)
    fx = pd.Series(take(market0.currency, idx, None), dtype=object).map(fx0).to_numpy(dtype=float)
    ok = ((idx >= 0) & take(market0.usable, idx, False).astype(bool) & np.isfinite(take(market0.price, idx, np.nan))
          & np.isfinite(quantity) & np.isfinite(fx))
    value = np.zeros(len(prior))
    vega = np.zeros(len(prior))
    k = np.flatnonzero(ok)
    if k.size:
        units = quantity[k] * market0.multiplier[i[k]] * fx[k]
        j = i[k]
        state = MarketState(market0.spot[j], market0.vol[j], market0.tau_years[j], market0.rate[j],
                            market0.div_yield[j])
        greeks, _ = value_and_greeks(market0.strike[j], market0.cp[j], state, market0.american[j],
                                     scheme=market0.american_scheme, group=j)
        value[k] = units * market0.price[j]
        vega[k] = units * greeks.vega / 100.0
    code, books = pd.factorize(prior["book"].to_numpy(dtype=object), sort=True)
    sums, _ = sums_by_group([value, vega], code, len(books))  # a book's own rows, in order
    unvalued = np.bincount(code[~ok & (code >= 0)], minlength=len(books)).astype(np.int64)
    return pd.DataFrame({"book": books.astype(object), columns[0]: sums[0], columns[1]: sums[1],
                         columns[2]: unvalued})


# The accounted trade ids are looked for in this many parts: Arrow's look-up hashes a copy of the ids it looks in
# (a million ids: about 60 MB at once, the controls' peak); in four parts a quarter of it, for three more passes
# over the distinct ids (about 0.1 s at a million).
ACCOUNTED_PARTS = 4


def conservation(raw0: RawNight, raw1: RawNight, archived: pd.Series, rejected: pd.DataFrame,
                 trades: NightTrades | TradeCount | None = None) -> tuple[int, tuple[str, ...]]:
    """Positions in (distinct trades over both dates, plus keyless rows) and any unaccounted.

    ``trades``: the two files' trade ids as read, matched once (:class:`attribution.keys.NightTrades`, or its
    :meth:`~attribution.keys.NightTrades.count`): the distinct ids are then its values, and each is looked for
    among the accounted ones by Arrow."""
    if trades is not None:
        # the archived ids as they are when no position was rejected (the usual night: no copy of a pointer a row)
        accounted = archived.to_numpy(dtype=object)
        if len(rejected):
            accounted = np.concatenate([accounted, rejected["position"].to_numpy(dtype=object)])
        universe = trades.universe()
        try:
            accounted_text = pa.array(accounted, type=pa.string(), from_pandas=True)
        except (pa.ArrowInvalid, pa.ArrowTypeError):  # a value that is not text: compared as pandas compares it
            ids = universe.to_numpy(zero_copy_only=False).astype(object, copy=False)
            missing = np.sort(ids[~pd.Index(ids, dtype=object).isin(accounted)])
            return len(universe) + trades.nulls(), tuple(missing[:20].tolist())
        del accounted
        found = np.zeros(len(universe), dtype=bool)
        step = -(-len(accounted_text) // ACCOUNTED_PARTS) or 1
        for lo in range(0, len(accounted_text), step):  # each part's hash table a fraction of the night's ids
            part = pc.is_in(universe, value_set=accounted_text.slice(lo, step))
            found |= np.asarray(part.to_numpy(zero_copy_only=False), dtype=bool)
        missing = universe.filter(pa.array(~found)).to_numpy(zero_copy_only=False)
        return len(universe) + trades.nulls(), tuple(np.sort(missing.astype(object))[:20].tolist())
    ids = []
    keyless = 0
    for raw in (raw0, raw1):
        tid = raw.tables["positions.parquet"]["trade_id"].to_numpy(dtype=object)
        null = pd.isna(tid)
        ids.append(tid[~null])
        keyless += int(null.sum())
    # trade ids are text (the loader reads them as strings): hashed as they are, once, no sorted index built
    universe = pd.unique(np.concatenate(ids))
    accounted = np.concatenate([archived.to_numpy(dtype=object), rejected["position"].to_numpy(dtype=object)])
    missing = np.sort(universe[~pd.Index(universe, dtype=object).isin(accounted)])  # normally none
    return len(universe) + keyless, tuple(missing[:20].tolist())


def book_frame(positions: pd.DataFrame, exceptions: pd.DataFrame, rejected: pd.DataFrame,
                config: JobConfig, as_of: dt.date, prior_as_of: dt.date,
                desks: pd.Series | None = None, rejected_sizes: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per book: sums, counts by status, rejected and warning counts, limit state, desk.

    ``desks``: the run date's desk per book (books.parquet); a book it does not list is ``(unassigned)``.
    ``rejected_sizes``: :func:`rejected_size`'s rows (a book without one left out nothing: zeros).
    The columns are gathered as arrays and the frame is made once (a night has a handful of books: column by
    column frame edits cost more than the sums).
    """
    amounts = list(PNL_COLUMNS) + list(REVAL_COLUMNS) + list(EXPOSURE_COLUMNS) + list(V2_AMOUNT_COLUMNS)
    # the books sorted, hashed once: every per-book figure below is a bincount or a sum over these codes
    book_code, book_names = pd.factorize(positions["book"].to_numpy(dtype=object), sort=True)
    # the amounts summed book by book over each book's own rows in order, a few columns at a time (sums_by_group)
    summed, counted = sums_by_group([positions[column].to_numpy(dtype=float) for column in amounts], book_code,
                                    len(book_names))
    reval = [amounts.index(c) for c in REVAL_COLUMNS]
    reval_summed = np.where(counted[reval] > 0, summed[reval], np.nan)  # NULL when the method is off
    names = pd.Index(book_names, dtype=object, name="book")
    rejected_books = rejected["book"].value_counts()
    books = names.union(rejected_books.index)
    row = names.get_indexer(books)  # each book's row among the sums; -1: a book with rejected rows only
    found = row >= 0
    at = np.where(found, row, 0)

    def per_book(values: np.ndarray, fill: float | int) -> np.ndarray:
        return np.where(found, values[at], fill) if len(values) else np.full(len(books), fill)

    columns: dict[str, object] = {"book": books.to_numpy(dtype=object)}
    for j, column in enumerate(amounts):
        columns[column] = per_book(summed[j], 0.0)
    for j, column in enumerate(REVAL_COLUMNS):
        columns[column] = per_book(reval_summed[j], np.nan)
    status_code = pd.Index(STATUSES, dtype=object).get_indexer(pd.Index(positions["status"].to_numpy(dtype=object),
                                                                         dtype=object, copy=False))
    known = status_code >= 0  # a status outside STATUSES (a book's cash row) is no position
    cells = np.bincount(book_code[known] * len(STATUSES) + status_code[known],
                        minlength=len(names) * len(STATUSES)).reshape(len(names), len(STATUSES)).astype(np.int64)
    for j, status in enumerate(STATUSES):
        columns[status] = per_book(cells[:, j], 0).astype(np.int64)
    columns["positions"] = per_book(cells.sum(axis=1), 0).astype(np.int64)
    columns["rejected"] = rejected_books.reindex(books, fill_value=0).to_numpy().astype(np.int64)
    columns["warnings"] = per_book(_warnings_per_book(positions, exceptions, book_code, len(names)), 0).astype(np.int64)
    limits = [config.limits_for(b) for b in columns["book"]]  # type: ignore[union-attr]
    states, applied = book_states(columns["pnl_residual"], columns["pnl_actual"],
                                  [x.residual_abs for x in limits], [x.residual_rel for x in limits],
                                  [x.relative_floor for x in limits], [x.watch_fraction for x in limits])
    in_breach = (positions["limit_state"] == BREACH).to_numpy(dtype=bool)
    breaches = per_book(np.bincount(book_code[in_breach], minlength=len(names)), 0).astype(np.int64)
    columns["position_breaches"] = breaches
    columns["residual_limit"] = applied
    columns["limit_state"] = np.where((states == "within") & (breaches > 0), WATCH, states)
    columns["as_of"], columns["prior_as_of"] = pd.Timestamp(as_of), pd.Timestamp(prior_as_of)
    book_index = pd.Index(columns["book"], dtype=object, copy=False)
    columns["desk"] = pd.Series(_desks_of(book_index, desks), dtype=object)  # kept as Python text
    columns["official_pnl"] = columns["official_break"] = np.nan
    columns["delta_units"] = np.nan  # units of different underlyings (and currencies) do not add up: per underlying
    sizes = (rejected_sizes if rejected_sizes is not None else pd.DataFrame(columns=["book"])).set_index("book")
    for column in ("rejected_prior_value", "rejected_vega_per_vol_point", "rejected_unvalued"):
        values = sizes[column] if column in sizes else pd.Series(dtype=float)
        columns[column] = values.reindex(book_index).fillna(0).to_numpy()
    columns["rejected_unvalued"] = columns["rejected_unvalued"].astype(np.int64)  # type: ignore[attr-defined]
    return pd.DataFrame({name: columns[name] for name, _ in BOOK_PNL})


def _desks_of(books: pd.Index, desks: pd.Series | None) -> np.ndarray:
    """The desk of each book (``desks``: desk per book), ``(unassigned)`` where it lists none."""
    if desks is None or not len(desks):
        return np.full(len(books), UNASSIGNED_DESK, dtype=object)
    at = desks.index.get_indexer(books)
    desk = np.where(at >= 0, desks.to_numpy(dtype=object)[np.maximum(at, 0)], None)
    desk[pd.isna(desk)] = UNASSIGNED_DESK
    return desk


def _warnings_per_book(positions: pd.DataFrame, exceptions: pd.DataFrame, book_code: np.ndarray,
                       books: int) -> np.ndarray:
    """Warning rows per book (codes of ``book_code``): a warning touches a book through one of its instruments
    or trades, and counts once per (book, key) it touches, however many positions share that key."""
    warn = exceptions.loc[(exceptions["severity"] == WARNING).to_numpy(), "key"].to_numpy(dtype=object)
    if not len(warn) or not len(book_code):
        return np.zeros(books, dtype=np.int64)
    key_code, keys = pd.factorize(warn)  # a null key touches nothing
    per_key = np.bincount(key_code[key_code >= 0], minlength=len(keys))
    index = pd.Index(keys, dtype=object)
    pairs = []
    for column in ("instrument_id", "trade_id"):
        hit = index.get_indexer(pd.Index(positions[column].to_numpy(dtype=object), dtype=object, copy=False))
        pairs.append(np.stack([book_code[hit >= 0], hit[hit >= 0]], axis=1))
    touched = np.unique(np.concatenate(pairs), axis=0)
    return np.bincount(touched[:, 0], weights=per_key[touched[:, 1]], minlength=books).astype(np.int64)


def _status_counts(book_code: np.ndarray, status: np.ndarray, books: pd.Index) -> pd.DataFrame:
    """Positions per book (rows, in ``books``' order: the codes' order) and status (columns: STATUSES)."""
    status_code = pd.Index(STATUSES).get_indexer(status)
    known = status_code >= 0  # a status outside STATUSES (a book's cash row) is no position
    cells = np.bincount(book_code[known] * len(STATUSES) + status_code[known],
                        minlength=len(books) * len(STATUSES)).reshape(len(books), len(STATUSES))
    return pd.DataFrame(cells.astype(np.int64), index=books, columns=list(STATUSES))


def position_limit_states(positions: pd.DataFrame, config: JobConfig) -> np.ndarray:
    """Each position's residual limit state under its book's position limit and watch fraction."""
    code, books = pd.factorize(positions["book"].to_numpy(dtype=object), use_na_sentinel=False)
    limits = [config.limits_for(b) for b in books]
    position_limit = np.array([x.position_abs for x in limits], dtype=float)[code]
    fraction = np.array([x.watch_fraction for x in limits], dtype=float)[code]
    return position_states(positions["pnl_residual"], position_limit, fraction)
