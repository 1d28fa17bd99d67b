"""The running window's daily update, bucket by bucket of bidders, against the plain totals and the full recombination.

A segmented experiment of three days whose text ids come from one small pool, so every bidder
bids in several shards, both segments and every day; each day is staged in four shards,
estimated by shard tasks and combined by the estimate step, with a bucket size forced down to
a few dozen rows (so today's bidders spread over many buckets, and a bidder's rows of different
shards and strata must meet in one bucket). After each day, on a DuckDB file and on PostgreSQL:

* the day's and the to-date rows (pooled and per segment) equal ``combine_pieces`` over the stored
  pieces with their bidder sums (the plain recombination, which matches bidders on their id text),
  1e-12 relative;
* every stored running total ``U_b`` (per segment key and bidder) equals
  ``bidder_totals`` of the window's stored pieces (1e-12 of the largest total: the two add in a
  different order), and each stored form its ``gram_of``, 1e-12 relative;
* the staged bidder-sum rows equal, row for row, those the pieces' frames give.

What it can catch: a bidder split over two buckets (counted as two bidders, its totals halved),
a bucket's lookup missing stored bidders, a bucket's totals written twice or not at all, a
segment's rows mixed with another's, the combine step keeping per-bidder rows in memory.
"""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import (
    SimulatedSegment, bidder_totals, gram_of, parse_experiments,
)
from counterbid.operators import partition, window_buckets
from counterbid.operators.shard_step import shard_task_pieces
from counterbid.operators.staged_bidder_sums import staged_shards
from counterbid.operators.window_buckets import bucket_bits, bucket_today, bucket_totals

from .window_days import check_rows, check_window, shards_estimated, write_segmented_lake

FIRST = dt.date(2026, 8, 3)
DAYS = [FIRST + dt.timedelta(days=k) for k in range(3)]
MARKETS = {
    "dawn": SimulatedSegment(st.gamma(2.5, scale=0.5), {3: 0.6, 4: 0.4}, 0.6),
    "dusk": SimulatedSegment(st.lognorm(0.55, scale=1.2), {2: 0.3, 4: 0.7}, 0.4),
}
SHARD_BIDS = 700  # about 2800 bids a day: four shards
BUCKET_ROWS = 40  # a day has several hundred (piece, bidder) rows: 2**MAX_BITS or fewer buckets of a few dozen


def _spec():
    return parse_experiments({"experiments": [{
        "id": "kettles", "control_arm": "plain", "start": str(FIRST), "segments": ["market"],
        "checks": {"warmup": {"days": 0}},
        "arms": [{"name": "plain", "share": 0.5, "position_weights": [0.42, 0.21, 0.09]},
                 {"name": "ridge", "share": 0.5, "position_weights": [0.5, 0.16, 0.05]}],
        "what_if": [{"name": "gentle", "position_weights": [0.46, 0.2, 0.07]}]}]})["kettles"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    return write_segmented_lake(tmp_path_factory.mktemp("lake") / "bids", _spec(), MARKETS, DAYS, column="market",
                                n_auctions=800, rng=510, bidder_pool=120, id_prefix="counter-")


def _run_day(hook, lake, exp, stage, day):
    """Load (four shards), the schema gate, one task per shard, the combining estimate, the write."""
    staged, shards = shards_estimated(lake, stage, exp, day, SHARD_BIDS)
    assert shards == 4
    summary = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id=f"r-{day}",
                                           shard_tasks=True)
    sums = staged.folder / f"{partition.PIECE_TABLES['bidder_sums']}.parquet"
    assert sums.is_dir() and staged_shards(sums) == {0, 1, 2, 3}  # one part per shard, written shard by shard
    staged_sums = pq.read_table(sums).to_pandas()
    partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    return summary, staged_sums


def test_a_bucketed_daily_update_over_shard_tasks_gives_the_plain_totals_and_rows(sink, lake, tmp_path, monkeypatch):
    monkeypatch.setattr(window_buckets, "WINDOW_BUCKET_ROWS", BUCKET_ROWS)
    exp = _spec()
    stage = tmp_path / "stage"
    routes = []
    for k, day in enumerate(DAYS):
        summary, staged_sums = _run_day(sink, lake, exp, stage, day)
        routes.append(summary["bidder_window"])
        check_rows(sink, exp, day, [day], "report_daily_estimates")
        check_rows(sink, exp, day, DAYS[:k + 1], "report_to_date_estimates")
        check_window(sink, exp, DAYS[:k + 1])
        # the staged rows are those the pieces' frames give, row for row
        stored = sink.stored_piece_frames(experiment_id=exp.id, days=[day], tables=["stratum_piece_bidder_sums"])
        keys = ["n_bidders", "shard", "segment", "bidder_id", "arm"]
        want = stored["stratum_piece_bidder_sums"].sort_values(keys).reset_index(drop=True)
        got = staged_sums.sort_values(keys).reset_index(drop=True)
        assert len(got) == len(want) > 0
        assert got[keys].astype(str).equals(want[keys].astype(str))
        np.testing.assert_array_equal(got["value"].to_numpy(), want["value"].to_numpy())
        assert staged_sums["bidder_id"].nunique() < len(staged_sums) / 4  # bidders repeat across shards and labels
    # the first day is rebuilt (nothing stored), then today's bidders only, over many buckets
    assert routes == ["rebuilt", "extended", "extended"]


def test_the_combine_step_hands_each_shards_bidder_rows_on_and_keeps_none(lake, tmp_path):
    exp = _spec()
    staged, _ = shards_estimated(lake, tmp_path / "stage", exp, DAYS[0], SHARD_BIDS)
    handed = []
    (tmp_path / "spill").mkdir()
    found = shard_task_pieces(staged, exp, cluster="auto", spill_folder=tmp_path / "spill",
                              bidder_rows_sink=lambda shard, pieces: handed.append((shard, pieces)))
    assert [s for s, _ in handed] == [0, 1, 2, 3]
    # handed with their sums, the ids as an Arrow text column (no Python string per bidder)
    assert all(p.bidder_sums is not None and isinstance(p.bidder_ids, pa.ChunkedArray)
               for _, pieces in handed for p in pieces)
    assert found.gram is not None and all(p.bidder_sums is None and p.bidder_ids is None for p in found.pieces)
    # the day's form from the spill = the plain form of the handed pieces (bidders met on their text)
    as_text = [dataclasses.replace(p, bidder_ids=p.bidder_ids.to_numpy()) for _, pieces in handed for p in pieces]
    plain = gram_of(bidder_totals(as_text, bid_exponent=found.gram.bid_exponent))
    assert found.gram.n_bidders == plain.n_bidders
    np.testing.assert_allclose(found.gram.gram, plain.gram, rtol=1e-12, atol=0)


@pytest.mark.parametrize("bits", [0, 3, 7])
def test_bucket_totals_add_up_to_the_plain_totals(lake, tmp_path, bits):
    """Over every bucket, the totals of each key are ``bidder_totals`` of today's pieces: same bidders, 1e-12."""
    exp = _spec()
    staged, _ = shards_estimated(lake, tmp_path / "stage", exp, DAYS[1], SHARD_BIDS)
    pieces = shard_task_pieces(staged, exp, cluster="auto").pieces
    exponent = max(p.bid_exponent for p in pieces) + 1  # a window in a larger unit than today's
    rows = bucket_today(([p for p in pieces if p.shard == k] for k in range(4)), tmp_path / "rows",
                        exponent=exponent, bits=bits)
    buckets = list(rows.buckets())
    assert len(buckets) <= 2 ** bits and (len(buckets) > 1) == (bits > 0)  # 120 bidders over the buckets
    for key in [None, "dawn", "dusk"]:
        plain = bidder_totals([p for p in pieces if key is None or p.key.segment == key], bid_exponent=exponent)
        got_ids, got_sums = [], []
        for bucket in buckets:
            totals = bucket_totals(rows, bucket).get(key)
            if totals is not None:
                got_ids += list(totals.bidder_ids)
                got_sums.append(totals.sums)
        assert len(got_ids) == len(set(got_ids)) == plain.sums.shape[0]  # no bidder in two buckets
        where = pd.Index(got_ids).get_indexer(plain.bidder_ids)
        np.testing.assert_allclose(np.concatenate(got_sums)[where], plain.sums, rtol=1e-12, atol=0)


def test_bucket_bits_fit_the_rows_asked_for():
    assert [bucket_bits(n, 100) for n in (0, 1, 100, 101, 400, 401)] == [0, 0, 0, 1, 2, 3]
    assert bucket_bits(10**12, 1) == window_buckets.MAX_BITS
    with pytest.raises(Exception, match="at least 1"):
        bucket_bits(10, 0)
