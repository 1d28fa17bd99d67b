"""A shard's rows moved through Spark's shuffle as a few Arrow IPC payloads rather than row by row.

Spark's row shuffle serialises, compresses, writes, reads and sorts every bid as a row of its own
and then converts the rows to Arrow for the shard's Python worker; at 10M bids that cost the JVM
more CPU than the whole estimate costs the local engine. Here each input partition's Python
worker cuts its Arrow batches by shard and hands Spark one binary payload (an Arrow IPC stream)
per shard and about :data:`PAYLOAD_ROWS` bids (:func:`pack_by_shard`); Spark shuffles those few
large rows by shard; the shard's worker decodes them back into one table (:func:`unpack_payloads`),
which the estimate puts in read order by its ``bid_order`` key (the payloads arrive in any order).

Pure pyarrow: testable without Spark.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

import numpy as np
import pyarrow as pa

__all__ = ["PAYLOAD_COLUMNS", "PAYLOAD_ROWS", "pack_by_shard", "unpack_payloads"]

#: Columns of the rows Spark shuffles: the shard, the bids in the payload, the Arrow IPC stream.
PAYLOAD_COLUMNS = "shard long, payload_rows long, payload binary"
#: Bids per payload (about 15 MB of the contract's columns): large enough that Spark handles few rows.
PAYLOAD_ROWS = 1 << 18

_SCHEMA = pa.schema([("shard", pa.int64()), ("payload_rows", pa.int64()), ("payload", pa.binary())])


def _payload(shard: int, batches: list[pa.RecordBatch]) -> pa.RecordBatch:
    """One shuffle row: ``batches`` (one schema) as an Arrow IPC stream."""
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, batches[0].schema) as writer:
        for batch in batches:
            writer.write_batch(batch)
    rows = sum(b.num_rows for b in batches)
    return pa.RecordBatch.from_arrays([pa.array([shard], pa.int64()), pa.array([rows], pa.int64()),
                                       pa.array([sink.getvalue().to_pybytes()], pa.binary())], schema=_SCHEMA)


def pack_by_shard(batches: Iterable[pa.RecordBatch], *, payload_rows: int = PAYLOAD_ROWS) -> Iterator[pa.RecordBatch]:
    """An input partition's bids as payload rows, one per shard and about ``payload_rows`` bids.

    Parameters
    ----------
    batches : iterable of pyarrow.RecordBatch
        Bids with an int64 ``shard`` column (never null), in any order.
    payload_rows : int, optional
        Bids at which a shard's payload is sent.

    Returns
    -------
    iterator of pyarrow.RecordBatch
        Rows of :data:`PAYLOAD_COLUMNS`; every input row in exactly one payload, its columns unchanged.
    """
    pending: dict[int, list[pa.RecordBatch]] = {}
    counts: dict[int, int] = {}
    for batch in batches:
        if batch.num_rows == 0:
            continue
        shard = batch.column("shard").to_numpy(zero_copy_only=False)
        first = shard[0]
        if (shard == first).all():
            parts = [(int(first), batch)]
        else:
            order = np.argsort(shard, kind="stable")
            ordered = batch.take(pa.array(order))
            keys, starts = np.unique(shard[order], return_index=True)
            ends = [*starts[1:], len(order)]
            parts = [(int(k), ordered.slice(s, e - s)) for k, s, e in zip(keys, starts, ends)]
        for key, part in parts:
            pending.setdefault(key, []).append(part)
            counts[key] = counts.get(key, 0) + part.num_rows
            if counts[key] >= payload_rows:
                yield _payload(key, pending.pop(key))
                counts[key] = 0
    for key, parts in pending.items():
        yield _payload(key, parts)


def unpack_payloads(table: pa.Table) -> pa.Table:
    """One shard's payload rows back as one table of bids (payload order; the caller sorts by read order).

    Raises
    ------
    ValueError
        A payload decodes to another number of bids than it says (a programming error, not an input's).
    """
    parts = []
    payloads = table.column("payload")
    expected = table.column("payload_rows").to_pylist()
    for k in range(table.num_rows):
        decoded = pa.ipc.open_stream(payloads[k].as_buffer()).read_all()
        if decoded.num_rows != expected[k]:
            raise ValueError(f"a shard payload holds {decoded.num_rows} bids, not {expected[k]}")
        parts.append(decoded)
    return pa.concat_tables(parts).combine_chunks() if len(parts) > 1 else parts[0]

