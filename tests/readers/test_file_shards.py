"""The one-file split with the md5 rule once per auction (`readers/file_shards.py`) against DuckDB's split.

DuckDB's route (``sql/bid_log_read_shards.sql``: the md5 of every bid's auction id, rows streamed
into the shard files) is the plain formula: the shortcut must write the same rows, in the same
order, with the same Arrow types, into the same shard files -- compared as whole tables, exactly --
and hand every other input back to that route.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.readers import file_shards
from counterbid.readers.engines import LocalEngine
from counterbid.readers.memory_shards import MEMORY_BUDGET_ENV
from counterbid.readers.shards import staged_bid_log_shards

SPEC = {"experiments": [
    {"id": "kilns", "control_arm": "even", "payment_rule": "gsp", "arms": [
        {"name": "even", "share": 0.6, "position_weights": [0.5, 0.25, 0.1]},
        {"name": "steep", "share": 0.4, "position_weights": [0.7, 0.1]},
    ]},
]}
EXP = parse_experiments(SPEC)["kilns"]


def _log(text: bool, rng: int = 4) -> pd.DataFrame:
    bids = simulate_experiment(st.lognorm(0.6, scale=1.1), EXP, n_bidders={1: 0.05, 2: 0.35, 4: 0.6},
                               n_auctions=1500, rng=rng, bidder_pool=400)
    if text:  # non-ASCII too: the md5 of the UTF-8 bytes
        bids["auction_id"] = "kiln-é-" + bids["auction_id"].astype(str)
        bids["bidder_id"] = "potter-" + bids["bidder_id"].astype(str)
    bids["glazed"] = bids["bid"] > 1.0  # a boolean and a narrow integer column travel as they are
    bids["tray"] = (bids.index % 7).astype(np.int16)  # (and the simulator's `ds`, a timestamp)
    return bids


def _tables(path, n, by_auction):
    with staged_bid_log_shards(path, n, by_auction=by_auction) as shards:
        return [(k, pq.read_table(p)) for k, p in shards]


def _same_files(path, n):
    fast, plain = _tables(path, n, True), _tables(path, n, False)
    assert [k for k, _ in fast] == [k for k, _ in plain]
    for (k, a), (_, b) in zip(fast, plain):
        assert a.schema.equals(b.schema), k
        assert a.equals(b), k
    return fast


@pytest.mark.parametrize("text", [False, True])
@pytest.mark.parametrize("n", [2, 5])
def test_the_split_by_auction_writes_duckdbs_shard_files(tmp_path, monkeypatch, text, n):
    monkeypatch.setattr(file_shards, "SPLIT_BATCH_ROWS", 997)  # many batches, each cut across shards
    bids = _log(text)
    path = tmp_path / "kilns.parquet"
    bids.to_parquet(path, index=False)
    assert file_shards.split_by_auction(path, tmp_path / "out", n)  # the shortcut really applies
    found = _same_files(path, n)
    assert sum(t.num_rows for _, t in found) == len(bids) and len(found) == n


@pytest.mark.parametrize("dtype", ["int64", "int32", "uint64"])
def test_integer_ids_out_of_order_are_split_too(tmp_path, dtype):
    bids = _log(False).sample(frac=1.0, random_state=3)  # auctions scattered over the log
    if dtype == "uint64":  # beyond int64: only their runs are numbered here, so DuckDB's route splits these
        bids["auction_id"] = bids["auction_id"].astype(np.uint64) + np.uint64(2**63)
    else:
        bids["auction_id"] = bids["auction_id"].astype(dtype)
    path = tmp_path / "shuffled.parquet"
    bids.to_parquet(path, index=False)
    assert file_shards.split_by_auction(path, tmp_path / "out", 3) == (dtype != "uint64")
    _same_files(path, 3)
    in_runs = tmp_path / "in_runs.parquet"
    bids.sort_values("auction_id", kind="stable").to_parquet(in_runs, index=False)
    assert file_shards.split_by_auction(in_runs, tmp_path / "out_runs", 3)
    _same_files(in_runs, 3)


@pytest.mark.parametrize("case", ["text_recurs", "null_id", "dictionary", "folder"])
def test_other_logs_are_left_to_duckdbs_route(tmp_path, case):
    bids = _log(case != "null_id")
    target = tmp_path / "kilns.parquet"
    if case == "text_recurs":  # text ids not written auction by auction
        bids = bids.sample(frac=1.0, random_state=5)
    elif case == "null_id":
        bids["auction_id"] = bids["auction_id"].astype("Int64")
        bids.loc[bids.index[10], "auction_id"] = pd.NA
    elif case == "dictionary":  # a column DuckDB converts (a dictionary of text becomes plain text)
        bids["shelf"] = pd.Categorical(np.where(bids.index % 2, "upper", "lower"))
    elif case == "folder":
        target = tmp_path / "day"
        target.mkdir()
    table = pa.Table.from_pandas(bids, preserve_index=False)
    pq.write_table(table, target / "part-0.parquet" if case == "folder" else target)
    assert not file_shards.split_by_auction(target, tmp_path / "out", 3)
    if case != "folder":
        _same_files(target, 3)  # DuckDB's route ran for both


def test_estimates_through_either_split_are_identical(tmp_path, monkeypatch):
    """The command line's file-based split (memory budget 0) estimates the same numbers either way."""
    path = tmp_path / "kilns.parquet"
    _log(True, rng=11).to_parquet(path, index=False)
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "0")
    from counterbid.readers.engines import estimate_bid_log

    fast = estimate_bid_log(path, EXP, engine=LocalEngine(), max_bids_per_shard=1200)
    monkeypatch.setattr(file_shards, "split_by_auction", lambda *a, **k: False)
    plain = estimate_bid_log(path, EXP, engine=LocalEngine(), max_bids_per_shard=1200)
    assert fast.shards == plain.shards > 1
    pd.testing.assert_frame_equal(fast.table, plain.table, check_exact=True)
