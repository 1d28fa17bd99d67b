"""``read_bids``: the batch-by-batch Parquet reader gives the frame pyarrow's own conversion gives."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from counterbid.readers import bid_log as io
from counterbid.estimators import InputError


def _table(n, seed, *, arms=("control", "wide"), auction_start=0):
    rng = np.random.default_rng(seed)
    position = pa.array(rng.integers(1, 5, n), pa.int32(), mask=rng.random(n) < 0.2)
    return pa.table({
        "experiment_id": pa.array(["e"] * n),
        "auction_id": pa.array(np.arange(auction_start, auction_start + n) // 4, pa.int64()),
        "bidder_id": pa.array(rng.integers(0, 300, n), pa.int64()),
        "arm": pa.array(rng.choice(list(arms), n)),
        "bid": pa.array(rng.lognormal(0, 0.5, n)),
        "position": position,
    })


def _same_values(frame: pd.DataFrame, table: pa.Table) -> None:
    reference = table.to_pandas()
    assert list(frame.columns) == list(reference.columns)
    for name in reference.columns:
        got, want = frame[name], reference[name]
        assert got.isna().tolist() == want.isna().tolist(), name
        np.testing.assert_array_equal(got.astype(object).where(got.notna(), None).to_numpy(),
                                      want.astype(object).where(want.notna(), None).to_numpy(), err_msg=name)


def test_file_roundtrip_with_narrow_dtypes(tmp_path, monkeypatch):
    monkeypatch.setattr(io, "BATCH_ROWS", 1_000)  # many batches
    table = _table(5_321, 0)
    pq.write_table(table, tmp_path / "bids.parquet", row_group_size=700)
    frame = io.read_bids(tmp_path / "bids.parquet")
    _same_values(frame, table)
    assert frame["arm"].dtype == "category" and frame["experiment_id"].dtype == "category"
    assert frame["auction_id"].dtype == np.int16 and frame["bidder_id"].dtype == np.int16
    assert str(frame["position"].dtype) == "Int8"  # nulls kept as nulls


def test_widening_when_a_later_batch_needs_it(tmp_path, monkeypatch):
    monkeypatch.setattr(io, "BATCH_ROWS", 500)
    small, big = _table(1_000, 1), _table(1_000, 2, auction_start=10**10, arms=("five", "control"))
    pq.write_table(pa.concat_tables([small, big]), tmp_path / "bids.parquet", row_group_size=500)
    frame = io.read_bids(tmp_path / "bids.parquet")
    _same_values(frame, pa.concat_tables([small, big]))
    assert frame["auction_id"].dtype == np.int64
    assert sorted(frame["arm"].cat.categories) == ["control", "five", "wide"]


def test_hive_folder_unifies_dictionaries_and_reads_partition_columns(tmp_path):
    for day, seed, arms in (("2026-03-02", 3, ("control", "wide")), ("2026-03-03", 4, ("wide", "five"))):
        (tmp_path / f"ds={day}").mkdir()
        pq.write_table(_table(800, seed, arms=arms), tmp_path / f"ds={day}" / "part.parquet")
    frame = io.read_bids(tmp_path, columns=["ds", "arm", "bid", "nope"])
    assert list(frame.columns) == ["ds", "arm", "bid"]
    assert len(frame) == 1_600
    assert frame["arm"].value_counts().index.isin(["control", "wide", "five"]).all()
    np.testing.assert_array_equal(frame["arm"].astype(str).to_numpy()[:800],
                                  _table(800, 3, arms=("control", "wide")).column("arm").to_numpy(zero_copy_only=False))


def test_null_strings_and_float_nulls(tmp_path):
    table = pa.table({"arm": pa.array(["a", None, "b"]), "bid": pa.array([1.0, None, 2.0]),
                      "auction_id": pa.array([1, None, 2], pa.int64())})
    pq.write_table(table, tmp_path / "b.parquet")
    frame = io.read_bids(tmp_path / "b.parquet")
    assert frame["arm"].isna().tolist() == [False, True, False]
    assert np.isnan(frame["bid"][1])
    assert frame["auction_id"].isna().tolist() == [False, True, False]


def test_empty_and_corrupt_files_are_one_line_errors(tmp_path):
    pq.write_table(_table(0, 0), tmp_path / "empty.parquet")
    with pytest.raises(InputError, match="holds no bids"):
        io.read_bids(tmp_path / "empty.parquet")
    (tmp_path / "bad.parquet").write_bytes(b"not parquet at all")
    with pytest.raises(InputError, match="not a readable Parquet file"):
        io.read_bids(tmp_path / "bad.parquet")


def test_a_file_inside_a_key_value_folder_keeps_its_own_columns(tmp_path):
    # staged files live in folders like ds=2026-03-02 and carry a ds column of their own
    folder = tmp_path / "ds=2026-03-02"
    folder.mkdir()
    table = _table(50, 9).append_column("ds", pa.array([dt.date(2026, 3, 2)] * 50, pa.date32()))
    pq.write_table(table, folder / "day.parquet")
    frame = io.read_bids(folder / "day.parquet")
    assert pd.Timestamp(frame["ds"].iloc[0]).date() == dt.date(2026, 3, 2)


def test_text_identity_columns_from_the_schema(tmp_path):
    table = pa.table({"auction_id": pa.array([7, 7, 9], pa.int64()), "bidder_id": pa.array(["kiosk-a", "kiosk-b", "kiosk-a"]),
                      "arm": pa.array(["wide", "wide", "five"]), "bid": pa.array([1.0, 2.0, 3.0])})
    pq.write_table(table, tmp_path / "text.parquet")
    assert io.text_identity_columns(tmp_path / "text.parquet") == ["bidder_id"]
    coded = table.set_column(1, "bidder_id", pc.dictionary_encode(table.column("bidder_id")))
    pq.write_table(coded, tmp_path / "coded.parquet", store_schema=True)
    assert io.text_identity_columns(tmp_path / "coded.parquet") == []  # stored as a dictionary: no whole-column encoding
    assert io.text_identity_columns(tmp_path / "missing.parquet") == []
