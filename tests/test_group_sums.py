"""Sums per group that depend on each group's own rows alone (attribution.group_sums)."""

from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest

from attribution import group_sums
from attribution.group_sums import SUM_BLOCK_COLUMNS, sums_by_group


def test_a_books_sums_do_not_depend_on_the_other_books() -> None:
    """Bit for bit: a book's sums are the same with or without other books' rows around its own.

    A night split by book (the Dask engine) must archive the whole night's bits (README, "Running on a Dask
    cluster"). Reference: the function's own sums of the book alone (exact equality, no tolerance).
    """
    rng = np.random.default_rng(3)
    mine = rng.normal(0.0, 1e4, (12, 500)) * rng.choice([1.0, 1e-6, 1e6], (12, 500))  # two blocks of columns
    mine[1, ::7] = np.nan
    alone, alone_counts = sums_by_group(list(mine), np.zeros(500, dtype=np.intp), 1)
    for others in (1, 10, 3_000):
        rows = mine.shape[1] + others
        code = np.ones(rows, dtype=np.intp)
        code[np.sort(rng.choice(rows, 500, replace=False))] = 0  # my rows, in their order, among the others'
        values = rng.normal(0.0, 1e4, (12, rows))
        values[:, code == 0] = mine
        sums, counts = sums_by_group(list(values), code, 2)
        np.testing.assert_array_equal(sums[:, 0], alone[:, 0])
        np.testing.assert_array_equal(counts[:, 0], alone_counts[:, 0])


def test_group_sums_skip_nan_count_values_and_are_accurate() -> None:
    """NaN is skipped and counted out; an all-NaN group sums to 0 with count 0; sums agree with math.fsum
    (Python's correctly rounded sum, the reference) to 1e-12 of the sum of magnitudes."""
    values = np.array([[1.0, np.nan, 2.5, np.nan, -0.0], [np.nan, np.nan, 4.0, 1.0, np.nan]])
    sums, counts = sums_by_group(list(values), np.array([0, 1, 0, 1, 2]), 3)
    np.testing.assert_array_equal(sums, [[3.5, 0.0, 0.0], [4.0, 1.0, 0.0]])
    np.testing.assert_array_equal(counts, [[2, 0, 1], [1, 1, 0]])
    assert not np.signbit(sums[0, 2])  # a sum of -0.0 alone is 0.0
    rng = np.random.default_rng(8)
    big = rng.normal(0.0, 1.0, (1, 200_000)) * 10.0 ** rng.integers(-6, 7, 200_000)
    code = rng.integers(0, 3, 200_000)
    sums, _ = sums_by_group(list(big), code, 3)
    for g in range(3):
        part = big[0, code == g]
        assert abs(sums[0, g] - math.fsum(part)) <= 1e-12 * np.abs(part).sum()


def test_group_sums_hold_one_gathered_block_and_little_more(monkeypatch: pytest.MonkeyPatch) -> None:
    """Memory: the sums of eight columns gathered eight at a time hold the block of gathered values (8 x rows x 8
    bytes) and little more (traced by tracemalloc, Python's allocation tracer): the NaN flags are counted a row at
    a time, not cast to a block of int64 (numpy's reduceat with an int64 dtype converts its whole input first:
    2.3x the block in all). The job gathers fewer columns at a time (SUM_BLOCK_COLUMNS): less still."""
    rng = np.random.default_rng(1)
    rows = 250_000
    columns = [np.where(rng.random(rows) < 0.1, np.nan, rng.normal(size=rows)) for _ in range(8)]
    code = rng.integers(-1, 50, rows)
    assert SUM_BLOCK_COLUMNS <= 8
    monkeypatch.setattr(group_sums, "SUM_BLOCK_COLUMNS", 8)
    tracemalloc.start()
    try:
        sums_by_group(columns, code, 50)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak <= 1.75 * (8 * rows * 8)
