"""Work shared between the demo builder's main thread and one helper thread (the machine's second core).

numpy and pyarrow release the GIL inside their loops, so a second thread runs on the second core; more threads
than cores only fight over the GIL (measured: about half as much CPU again for the same work), so there is at most
one helper, and none on a single core. Each helper takes its work from the other end of the main thread's, and the main
thread does whatever is still waiting when it gets there, so neither idles while the other is busy. What is
computed does not depend on which thread computes it.

* :class:`FromBothEnds`: items needed in order by the main thread (``get(0)``, ``get(1)``, ...); the helper
  computes them from the last backwards until the two meet.
* :class:`ParquetFiles`: tables handed over to be written; the helper writes them as they come, and leaving
  the ``with`` block has the main thread write what is left, then wait for the helper (on an error: only stop it).
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Generic, TypeVar

import pyarrow as pa
import pyarrow.parquet as pq

from attribution.pricing import _available_cores

T = TypeVar("T")


def _helper_wanted() -> bool:
    return _available_cores() > 1


def _write(table: pa.Table, path: Path) -> None:
    """``pq.write_table`` into a file opened here: the same bytes, without resolving a filesystem per file (a
    fifth of the cost of a small file)."""
    with pa.OSFile(str(path), "wb") as sink:
        pq.write_table(table, sink)


class FromBothEnds(Generic[T]):
    """``compute(i)`` for i in 0..n-1: the main thread asks in order, the helper takes the last unclaimed one."""

    def __init__(self, n: int, compute: Callable[[int], T]) -> None:
        self._compute = compute
        self._lock = threading.Lock()
        self._front, self._back = 0, n - 1  # unclaimed: front..back
        self._results: list[T | None] = [None] * n
        self._ready = [threading.Event() for _ in range(n)]
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._from_back, daemon=True) if _helper_wanted() else None
        if self._thread is not None:
            self._thread.start()

    def _from_back(self) -> None:
        while True:
            with self._lock:
                if self._back < self._front:
                    return
                i, self._back = self._back, self._back - 1
            try:
                self._results[i] = self._compute(i)
            except BaseException as error:  # handed to the main thread, which raises it
                self._error = error
                for event in self._ready:
                    event.set()
                return
            self._ready[i].set()

    def get(self, i: int) -> T:
        """Item ``i`` (the main thread asks for 0, 1, 2, ... in order)."""
        with self._lock:
            mine = self._front <= i <= self._back
            if mine:
                self._front = i + 1
        if mine:
            return self._compute(i)
        self._ready[i].wait()
        if self._error is not None:
            raise self._error
        result = self._results[i]
        self._results[i] = None  # kept once only
        assert result is not None
        return result

    def close(self) -> None:
        """Wait for the helper (after the last :meth:`get`, it has nothing left); raise its failure."""
        if self._thread is not None:
            self._thread.join()
        if self._error is not None:
            raise self._error


class ParquetFiles:
    """``pq.write_table`` of every table handed over, on the helper while the main thread makes the next ones."""

    def __init__(self) -> None:
        self._queue: queue.SimpleQueue[tuple[pa.Table, Path] | None] = queue.SimpleQueue()
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._drain, daemon=True) if _helper_wanted() else None
        if self._thread is not None:
            self._thread.start()

    def put(self, table: pa.Table, path: Path) -> None:
        if self._thread is None:
            _write(table, path)
        else:
            self._queue.put((table, path))

    def _write_next(self, block: bool) -> bool:
        try:
            item = self._queue.get(block=block)
        except queue.Empty:
            return False
        if item is None:
            return False
        try:
            _write(*item)
        except BaseException as error:  # the first failure is raised by finish()
            self._error = self._error or error
        return True

    def _drain(self) -> None:
        while self._write_next(block=True):
            pass

    def __enter__(self) -> ParquetFiles:
        return self

    def __exit__(self, kind: type[BaseException] | None, *_: object) -> None:
        if kind is None:
            self.finish()
        elif self._thread is not None:  # the block failed: the files are not wanted, stop the helper
            self._queue.put(None)
            self._thread.join()

    def finish(self) -> None:
        """Write what is still waiting (the main thread helping), wait for the helper, raise a failed write."""
        if self._thread is not None:
            while self._write_next(block=False):
                pass
            self._queue.put(None)
            self._thread.join()
        if self._error is not None:
            raise self._error
