"""Arrow tables as Arrow IPC stream bytes: how a night's archive rows cross from a backfill's worker process.

Pickling a ``pa.Table`` pickles every column (its type, its chunks, each buffer) as a separate object: for a
night of seventy columns that costs more than the rows' bytes. One IPC stream per table writes the schema once
and the buffers as they are; reading it back gives the same schema (metadata included), the same chunks and
the same values bit for bit, its buffers pointing into the bytes (no copy).
"""

from __future__ import annotations

import pyarrow as pa


def to_ipc(table: pa.Table) -> bytes:
    """``table`` as the bytes of one Arrow IPC stream (its schema, then each of its record batches)."""
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def from_ipc(data: bytes) -> pa.Table:
    """The table :func:`to_ipc` wrote (its buffers are views of ``data``)."""
    with pa.ipc.open_stream(pa.py_buffer(data)) as reader:
        return reader.read_all()
