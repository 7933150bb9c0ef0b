"""Sums of float columns per group that depend on each group's own rows alone (NaN skipped, counted).

Used wherever a figure of one book is a sum over its rows, so that a night split by book (the Dask engine)
archives the very bits of the whole night.
"""

from __future__ import annotations

import numpy as np

SUM_BLOCK_COLUMNS = 4  # columns gathered in book order at a time (4 columns: 32 MB at 1M positions)


def sums_by_group(columns: list[np.ndarray], code: np.ndarray, groups: int) -> tuple[np.ndarray, np.ndarray]:
    """Per group, the sum of each of ``columns`` (1-d float arrays) over the rows of ``code`` (0..groups-1; a
    row coded -1 belongs to no group and is left out), NaN skipped, and how many values were not NaN: two
    (columns, groups) arrays (a group without rows: sum 0, count 0).

    A stable sort gathers each group's rows in their order and each group is summed over its own run of
    values, so a book's sums depend on its own rows alone: never on the other books of the night (a night
    split by book, as the Dask engine does, archives the very same bits). pandas' grouped sums sort the rows
    with an unstable sort first, so the order in which a book's rows were added changed with the other books.
    The columns are gathered a few at a time, so no copy of every amount of the night is held at once.
    """
    sums = np.zeros((len(columns), groups))
    counts = np.zeros((len(columns), groups), dtype=np.int64)
    rows = np.flatnonzero(code >= 0)
    if not rows.size:
        return sums, counts
    rows = rows[np.argsort(code[rows], kind="stable")]  # each group's rows together, in their order
    ordered = code[rows]
    starts = np.flatnonzero(np.concatenate(([True], ordered[1:] != ordered[:-1])))
    present = ordered[starts]
    for lo in range(0, len(columns), SUM_BLOCK_COLUMNS):
        block_columns = columns[lo:lo + SUM_BLOCK_COLUMNS]
        terms = np.empty((len(block_columns), rows.size))
        for j, column in enumerate(block_columns):  # gathered straight into the block: no second copy
            np.take(np.asarray(column, dtype=float), rows, out=terms[j])
        not_nan = ~np.isnan(terms)
        terms[~not_nan] = 0.0
        block = slice(lo, lo + len(terms))
        sums[block, present] = np.add.reduceat(terms, starts, axis=1) + 0.0  # + 0.0: a sum of -0.0 alone is 0.0
        for j, flags in enumerate(not_nan, start=lo):  # a row at a time: reduceat casts its whole input to int64
            counts[j, present] = np.add.reduceat(flags, starts, dtype=np.int64)
    return sums, counts
