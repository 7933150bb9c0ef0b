"""The demo builder's work sharing (attribution/demo/helpers.py): every item once, in order, errors raised.

Self-consistency checks of the demo's own machinery (no outside reference applies): results must not depend on
which thread computed them, and nothing may be lost or silently skipped.
"""

from __future__ import annotations

import threading
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from attribution.demo.helpers import FromBothEnds, ParquetFiles


def test_from_both_ends_gives_every_item_once_in_order():
    calls: list[int] = []
    lock = threading.Lock()

    def compute(i: int) -> tuple[int, int]:
        with lock:
            calls.append(i)
        return i, i * i

    items = FromBothEnds(200, compute)
    got = [items.get(i) for i in range(200)]
    items.close()
    assert got == [(i, i * i) for i in range(200)]
    assert sorted(calls) == list(range(200))  # each computed exactly once, by one thread or the other


def test_from_both_ends_raises_a_failure_of_either_thread():
    def compute(i: int) -> int:
        if i in (3, 96):  # one near the main thread's end, one near the helper's
            raise ValueError(f"item {i}")
        return i

    items = FromBothEnds(100, compute)
    with pytest.raises(ValueError, match="item"):
        for i in range(100):
            items.get(i)
        items.close()


def test_parquet_files_writes_every_table(tmp_path: Path):
    tables = {tmp_path / f"t{i}.parquet": pa.table({"x": list(range(i + 1))}) for i in range(50)}
    with ParquetFiles() as files:
        for path, table in tables.items():
            files.put(table, path)
    for path, table in tables.items():
        assert pq.read_table(path).equals(table)


def test_parquet_files_raises_a_failed_write(tmp_path: Path):
    files = ParquetFiles()
    files.put(pa.table({"x": [1]}), tmp_path / "missing-folder" / "t.parquet")
    with pytest.raises(OSError):
        files.finish()
