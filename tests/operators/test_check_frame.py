"""The checks' bid frame built from Arrow dictionaries (check_runner.frame_of) against Arrow's own to_pandas."""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from counterbid.operators.check_runner import FETCH_BATCH_ROWS, _bids_frame, frame_of


def _same(built: pd.DataFrame, plain: pd.DataFrame) -> None:
    """Equal frames, and each categorical column with the same categories, codes and code dtype."""
    pd.testing.assert_frame_equal(built, plain, check_exact=True)
    for name in plain.columns:
        if isinstance(plain[name].dtype, pd.CategoricalDtype):
            assert built[name].cat.codes.dtype == plain[name].cat.codes.dtype, name
            assert np.array_equal(built[name].cat.codes.to_numpy(), plain[name].cat.codes.to_numpy()), name
            assert built[name].cat.categories.equals(plain[name].cat.categories), name
            assert built[name].cat.ordered == plain[name].cat.ordered, name


def _batches(n: int, rng: np.random.Generator, pieces: int) -> pa.Table:
    """Bids in ``pieces`` batches, each text column dictionary-encoded batch by batch (as the checks fetch them),
    with null ids, null positions and a date column: what Arrow's conversion must agree on."""
    auction = [f"lot-{k}" if k % 97 else None for k in rng.integers(0, n // 4, n)]
    bidder = [f"seat-{k}" for k in rng.integers(0, n, n)]
    position = pa.array([None if k % 5 == 0 else int(k % 4) + 1 for k in range(n)], type=pa.int64())
    base = pa.table({"auction_id": pa.array(auction, pa.large_string()), "bidder_id": pa.array(bidder),
                     "arm": pa.array(rng.choice(["ridge", "basin"], n)), "bid": rng.lognormal(0, 0.5, n),
                     "position": position, "day": pa.array([dt.date(2026, 3, 2)] * n, pa.date32())})
    out = []
    for batch in base.to_batches(max_chunksize=-(-n // pieces)):
        cols = [pc.dictionary_encode(c) if pa.types.is_string(c.type) or pa.types.is_large_string(c.type) else c
                for c in batch.columns]
        out.append(pa.RecordBatch.from_arrays(cols, names=batch.schema.names))
    return pa.Table.from_batches(out).unify_dictionaries()


@pytest.mark.parametrize("pieces", [1, 3])
def test_frame_of_equals_arrows_conversion(pieces):
    table = _batches(20_000, np.random.default_rng(7), pieces)
    assert table.column("auction_id").null_count > 0  # nulls become code -1
    _same(frame_of(table), table.to_pandas())


def test_frame_of_an_empty_dictionary_column():
    empty = pa.table({"auction_id": pa.chunked_array([], type=pa.dictionary(pa.int32(), pa.string())),
                      "bid": pa.array([], pa.float64())})
    _same(frame_of(empty), empty.to_pandas())


def test_frame_of_refuses_a_null_category_as_arrow_does():
    column = pa.DictionaryArray.from_arrays(pa.array([0, 1, 0], pa.int32()), pa.array(["kiln", None]))
    with pytest.raises(ValueError, match="categories cannot be null"):
        pa.table({"arm": column}).to_pandas()
    with pytest.raises(ValueError, match="categories cannot be null"):
        frame_of(pa.table({"arm": column}))


def test_checks_frame_from_duckdb_equals_arrows_conversion(tmp_path):
    """The checks' frame of a real DuckDB relation, fetched in several batches, as to_pandas would build it."""
    rng = np.random.default_rng(11)
    n = FETCH_BATCH_ROWS + 5_000  # two fetch batches: the dictionaries are unified across them
    bids = pd.DataFrame({"auction_id": [f"lot-{k}" for k in rng.integers(0, n // 5, n)],
                         "bidder_id": [f"seat-{k}" for k in rng.integers(0, n // 2, n)],
                         "bid": rng.lognormal(0, 0.5, n)})
    path = tmp_path / "bids.parquet"
    with duckdb.connect() as con:
        con.register("frame", bids)
        con.execute(f"copy (select * from frame) to '{path}' (format parquet)")
        con.read_parquet(str(path)).to_view("day_bids")
        statement = "select auction_id, bidder_id, bid from day_bids"
        built = _bids_frame(con, statement)
        plain = _plain_frame(con, statement)
    assert built["auction_id"].cat.categories.size > 100_000
    _same(built, plain)


def _plain_frame(con, statement: str) -> pd.DataFrame:
    """The same fetch, converted by Arrow's to_pandas (the reference)."""
    reader = con.sql(statement).to_arrow_reader(FETCH_BATCH_ROWS)
    batches = [pa.RecordBatch.from_arrays([pc.dictionary_encode(c) if pa.types.is_string(c.type) else c
                                           for c in b.columns], names=b.schema.names) for b in reader]
    return pa.Table.from_batches(batches).unify_dictionaries().to_pandas()
