"""Text keys as integer codes: each key column hashed once, by Arrow, where it is read.

A key column (trade_id, book, instrument_id, ...) becomes :class:`KeyCodes`: per row the place of
its value among the column's distinct values (-1 where null), and those distinct values once, as
Arrow text and as Python strings. The row rules of :mod:`attribution.contract` (null, blank,
duplicate, one of a list) and the matching of the two dates' trades (:mod:`attribution.lifecycle`)
then work on the integer codes and test each distinct value once; no later step hashes the
millions of trade ids again as Python objects (Arrow hashes their bytes several times faster).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from attribution.arrays import BoolArray, IntArray, ObjectArray
from attribution.memory import hand_back_arrow_memory

# A text whose first character is a printable ASCII character other than the space is surely not blank
# (``str.strip`` removes only white space, the trailing-NUL rule only NULs): tested on the whole dictionary
# by Arrow. Any other value (empty, or starting with white space, a control or a non-ASCII character) is
# tested by Python's own rule below: exactly the rule of the row checks, on the few values that need it.
_SURELY_NOT_BLANK = "^[!-~]"


def blank_text(text: ObjectArray) -> BoolArray:
    """Per non-null value: empty or only white space once read as text (trailing NUL characters
    count as nothing, as they did when the values were converted to fixed-width numpy text)."""
    return np.fromiter((not (v if type(v) is str else str(v)).rstrip("\x00").strip() for v in text),
                       dtype=bool, count=len(text))


@dataclass(frozen=True, slots=True)
class KeyCodes:
    """A text column as integer codes over its distinct values."""

    codes: NDArray[np.int32]  # per row, the index of its value in ``values``; -1 where null
    values: pa.Array       # the distinct non-null values (Arrow text), in order of first appearance
    # the same as Python strings; None where not kept (a column of distinct ids: its frame holds the strings,
    # and a pointer per distinct value would add 8 bytes a row): made from ``values`` when asked
    uniques: ObjectArray | None

    def __len__(self) -> int:
        return len(self.codes)

    def texts(self) -> ObjectArray:
        """The distinct values as Python strings (new ones when they are not kept)."""
        if self.uniques is not None:
            return self.uniques
        return self.values.to_numpy(zero_copy_only=False).astype(object, copy=False)

    def without_texts(self) -> KeyCodes:
        """The same codes without the Python strings of the distinct values kept."""
        return KeyCodes(self.codes, self.values, None)

    def per_row(self) -> ObjectArray:
        """The column as an object array of ``str`` (None where null): one object per distinct value."""
        return np.append(self.texts(), None).astype(object, copy=False)[self.codes]

    def blank_values(self) -> BoolArray:
        """Per distinct value: empty or only white space (see :func:`blank_text`)."""
        blank = np.zeros(len(self.values), dtype=bool)
        if not len(blank):
            return blank
        surely = pc.match_substring_regex(self.values, _SURELY_NOT_BLANK)
        check = np.flatnonzero(~np.asarray(surely.to_numpy(zero_copy_only=False), dtype=bool))
        if check.size:
            texts = self.values.take(pa.array(check)).to_numpy(zero_copy_only=False).astype(object, copy=False)
            blank[check] = blank_text(texts)
        return blank

    def take(self, rows: IntArray | BoolArray) -> KeyCodes:
        """The codes of some rows (a mask or row numbers), over the same distinct values (these codes themselves
        for a mask of every row: a file without a rejected row costs no copy)."""
        if rows.dtype == np.bool_ and len(rows) == len(self.codes) and rows.all():
            return self
        return KeyCodes(self.codes[rows], self.values, self.uniques)


def encode(column: pa.ChunkedArray | pa.Array) -> KeyCodes:
    """One hash pass (Arrow's) over a text column, plain or dictionary-encoded, of any chunking.

    A dictionary-encoded column has its (short) dictionaries encoded again, so the distinct values
    are distinct even where a file's dictionary repeats a value or its row groups have dictionaries
    of their own.
    """
    chunks = column.chunks if isinstance(column, pa.ChunkedArray) else [column]
    if chunks and pa.types.is_dictionary(chunks[0].type):
        words = pa.concat_arrays([c.dictionary.cast(pa.string()) for c in chunks])
        encoded = words.dictionary_encode()
        remap = np.append(encoded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32), -1)
        parts, start = [], 0
        for chunk in chunks:
            local = chunk.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64, copy=False)
            parts.append(remap[np.where(local < 0, -1, local + start)])
            start += len(chunk.dictionary)
        codes = np.concatenate(parts).astype(np.int32, copy=False)
        values = encoded.dictionary
        used = np.bincount(codes[codes >= 0], minlength=len(values)) > 0
        if not used.all():  # a dictionary value no row holds is no value of the column
            renumber = np.append(np.cumsum(used) - 1, -1).astype(np.int32)
            codes = renumber[codes]
            values = values.filter(pa.array(used))
    else:
        text = pa.concat_arrays([c.cast(pa.string()) for c in chunks]) if chunks else pa.array([], pa.string())
        encoded = text.dictionary_encode()
        codes = encoded.indices.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int32, copy=False)
        values = encoded.dictionary
    uniques = values.to_numpy(zero_copy_only=False).astype(object, copy=False)
    return KeyCodes(codes, values, uniques)


def lookup(values: pa.Array, among: pa.Array) -> IntArray:
    """The place of each of ``values`` among the distinct texts ``among`` (-1 where absent)."""
    found = pc.index_in(values, value_set=among)
    return found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.intp, copy=False)


def match(left: KeyCodes, right: KeyCodes, at: IntArray | None = None) -> tuple[IntArray, IntArray]:
    """For keys unique and non-null on each side: the row of each left key on the right (-1 if absent), and back.

    The two sides' distinct values are matched once (Arrow; ``at``: that match when already made, each right
    value's place among the left values); the rows follow by integer look-ups.
    """
    if at is None:
        at = lookup(right.values, left.values)
    row_of_left = np.full(len(left.values), -1, dtype=np.intp)
    row_of_left[left.codes] = np.arange(len(left.codes), dtype=np.intp)
    row_of_right = np.full(len(right.values), -1, dtype=np.intp)
    row_of_right[right.codes] = np.arange(len(right.codes), dtype=np.intp)
    right_of_left = np.full(len(left.values) + 1, -1, dtype=np.intp)  # the last slot: a value on no side
    found = np.flatnonzero(at >= 0)
    right_of_left[at[found]] = row_of_right[found]
    left_rows = np.append(row_of_left, -1)[at[right.codes]]
    return right_of_left[left.codes], left_rows


@dataclass(frozen=True, slots=True)
class NightTrades:
    """The trade ids of a night's two positions files as read (every row, before the row rules), matched once:
    the trades' matching (:mod:`attribution.lifecycle`) and the conservation count (:mod:`attribution.books`)
    share the one hash pass over the two dates' distinct ids."""

    prior: KeyCodes
    run: KeyCodes
    run_in_prior: IntArray  # each distinct run-date id's place among the prior date's (-1: not there)

    @classmethod
    def of(cls, prior: KeyCodes | None, run: KeyCodes | None) -> NightTrades | None:
        """None unless both dates' trade ids were coded where read."""
        if prior is None or run is None:
            return None
        trades = cls(prior, run, lookup(run.values, prior.values))
        hand_back_arrow_memory()  # the hash table of a million prior ids
        return trades

    def universe(self) -> pa.Array:
        """The distinct non-null trade ids over both files."""
        return pa.concat_arrays([self.prior.values, self.run.values.filter(pa.array(self.run_in_prior < 0))])

    def nulls(self) -> int:
        """Rows without a trade_id, over both files."""
        return int((self.prior.codes < 0).sum() + (self.run.codes < 0).sum())

    def count(self) -> TradeCount:
        """What the conservation count needs of the two files' ids, without their per-row codes."""
        return TradeCount(self.universe(), self.nulls())

    def prior_texts(self, prior_ids: ObjectArray, run: KeyCodes) -> ObjectArray:
        """The trade ids of some rows of the run file (coded by ``run``) as Python strings shared with the prior
        date: an id the prior file also holds is the prior file's own string object for it, taken from
        ``prior_ids`` (the prior file's trade_id column, row for row with ``self.prior.codes``); any other id a
        new string (None where null). The values are equal to the file's; a trade held over the night is then
        one Python string instead of two (about 60 MB over a million trades). The new trades' strings are new
        objects too: the run file's own strings, each a few dozen bytes among the others, would otherwise keep
        most of the memory holding them in use after the rest are freed."""
        at_prior = np.full(len(self.prior.values) + 1, -1, dtype=np.intp)  # the last slot: a null id
        rows = np.flatnonzero(self.prior.codes >= 0)
        at_prior[self.prior.codes[rows]] = rows  # a row holding each prior value (any: they are equal)
        prior_value = np.append(self.run_in_prior, len(self.prior.values))[run.codes]  # null codes: the last
        prior_row = at_prior[prior_value]
        shared = np.full(len(prior_row), None, dtype=object)
        hit = np.flatnonzero(prior_row >= 0)
        shared[hit] = prior_ids[prior_row[hit]]
        new = np.flatnonzero((prior_row < 0) & (run.codes >= 0))
        if new.size:
            shared[new] = run.values.take(pa.array(run.codes[new])).to_numpy(zero_copy_only=False)
        return shared

    def matches(self, left: KeyCodes, right: KeyCodes) -> bool:
        """Whether ``left`` and ``right`` (codes of some rows of the prior and run files) use this night's values."""
        return left.values is self.prior.values and right.values is self.run.values


@dataclass(frozen=True, slots=True)
class TradeCount:
    """The distinct trade ids of a night's two positions files and their rows without one (:meth:`NightTrades.count`):
    all the conservation count of :mod:`attribution.books` reads of them, held while the night's rows are made."""

    ids: pa.Array  # the distinct non-null trade ids over both files
    null_rows: int

    def universe(self) -> pa.Array:
        """The distinct non-null trade ids over both files."""
        return self.ids

    def nulls(self) -> int:
        """Rows without a trade_id, over both files."""
        return self.null_rows
