"""Shard payloads (`readers/spark_batches.py`): every bid in exactly one payload of its shard, columns unchanged."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from counterbid.readers.spark_batches import pack_by_shard, unpack_payloads


def _batches(n: int, shards: int, size: int, rng: int = 3) -> list[pa.RecordBatch]:
    gen = np.random.default_rng(rng)
    table = pa.table({
        "auction_id": pa.array(gen.integers(0, n // 4, n), pa.int64()),
        "bidder_id": pa.array([f"lot-{k}" for k in gen.integers(0, 900, n)], pa.string()),
        "bid": pa.array(gen.lognormal(0.0, 0.5, n), mask=gen.random(n) < 0.01),
        "position": pa.array(gen.integers(1, 5, n), pa.int32()).to_pandas().mask(gen.random(n) < 0.05),
        "shard": pa.array(gen.integers(0, shards, n), pa.int64()),
        "bid_order": pa.array(np.arange(n, dtype=np.int64)),
    })
    return table.to_batches(max_chunksize=size)


@pytest.mark.parametrize("payload_rows", [1, 700, 1 << 18])
def test_every_bid_lands_once_in_a_payload_of_its_shard(payload_rows):
    batches = _batches(5000, shards=3, size=611)
    whole = pa.Table.from_batches(batches)
    rows = pa.Table.from_batches(list(pack_by_shard(iter(batches), payload_rows=payload_rows)))
    if payload_rows > 5000:  # one payload per shard when none fills up
        assert sorted(rows.column("shard").to_pylist()) == [0, 1, 2]
    for shard in range(3):
        mine = rows.filter(pa.compute.equal(rows.column("shard"), shard))
        back = unpack_payloads(mine)
        assert back.schema == whole.schema
        expected = whole.filter(pa.compute.equal(whole.column("shard"), shard))
        # within a shard the payloads keep the input's order, so sorting by the read-order key restores it
        order = np.argsort(back.column("bid_order").to_numpy(), kind="stable")
        assert back.take(pa.array(order)).equals(expected)
        assert sum(mine.column("payload_rows").to_pylist()) == expected.num_rows


def test_a_payload_that_decodes_to_other_rows_is_refused():
    rows = pa.Table.from_batches(list(pack_by_shard(iter(_batches(300, shards=1, size=100)))))
    wrong = rows.set_column(1, "payload_rows", pa.array([299], pa.int64()))
    with pytest.raises(ValueError, match="holds 300 bids, not 299"):
        unpack_payloads(wrong)
