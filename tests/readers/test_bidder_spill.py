"""Shards' bidder sums set aside on disk and added bucket by bucket (`readers/bidder_spill.py`).

The plain path keeps every shard's per-bidder sums in its pieces and lets ``combine_pieces`` add
them bidder by bidder (text ids factorized across shards). The spill adds the same rows, in the
same order within each bidder, one run of buckets at a time; ``max_spill_rows=1`` forces one
bucket per pass (hundreds of passes on these logs), the default reads every bucket in one pass.
The per-bidder totals are the same doubles; the forms' sums of outer products and the lift's
``G_kk - 2 r G_kc + r^2 G_cc`` differ from the plain path only by rounding (~1e-15 relative on
sums of a few thousand terms), hence 1e-12.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import combine_pieces, n_shards, parse_experiments, simulate_experiment
from counterbid.readers.bidder_spill import BidderSpill
from counterbid.readers.engines import LocalEngine, estimate_bid_log
from counterbid.readers.memory_shards import MEMORY_BUDGET_ENV
from counterbid.readers.shards import bid_log_rows, pieces_by_shard, staged_bid_log_shards

MAX = 1400  # bids per shard: 5-6 shards of the logs below


def _experiment(segmented: bool):
    doc = {"experiments": [{"id": "lanterns", "control_arm": "even", "payment_rule": "gsp", "arms": [
        {"name": "even", "share": 0.6, "position_weights": [0.4, 0.2, 0.1]},
        {"name": "steep", "share": 0.4, "position_weights": [0.6, 0.15]},
    ]}]}
    if segmented:
        doc["experiments"][0]["segments"] = ["stall_row"]
    return parse_experiments(doc)["lanterns"]


def _log(exp, segmented: bool, rng=8) -> pd.DataFrame:
    """Text auction and bidder ids; bidders drawn from a small pool, so they repeat across shards."""
    bids = simulate_experiment(st.lognorm(0.45, scale=1.1), exp, n_bidders={3: 0.5, 4: 0.5},
                               n_auctions=1900, rng=rng, bidder_pool=650)
    bids["auction_id"] = "lamp-" + bids["auction_id"].astype(str)
    bids["bidder_id"] = "wick-" + bids["bidder_id"].astype(str)
    if segmented:  # one row label per auction: odd and even auction numbers
        number = bids["auction_id"].str.slice(5).astype(int)
        bids["stall_row"] = np.where(number % 3 == 0, "north", "south")
    return bids


def _plain(path, exp, cluster):
    """Every shard's sums kept in its pieces (hashed ids), added by ``combine_pieces``."""
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX)) as shards:
        found = pieces_by_shard(shards, exp, cluster=cluster, source=str(path), hash_bidders=True)
    assert all(p.bidder_sums is not None for p in found.pieces)
    return combine_pieces(found.pieces, exp, cluster=cluster, n_excluded_auctions=found.n_excluded_auctions,
                          source=str(path))


def _same_numbers(a, b):
    keys = ["arm", "metric", "segment", "n_auctions", "n_bids", "status"]
    assert a.table[keys].equals(b.table[keys])
    for col in ("estimate", "std_error", "ci_low", "ci_high", "lift", "lift_std_error"):
        if col in a.table:
            np.testing.assert_allclose(a.table[col].to_numpy(float), b.table[col].to_numpy(float), rtol=1e-12,
                                       atol=0, err_msg=col)


@pytest.mark.parametrize("segmented", [False, True])
@pytest.mark.parametrize("cluster", ["auto", "bidder"])
def test_spilled_sums_in_tiny_passes_equal_the_plain_combination(tmp_path, monkeypatch, segmented, cluster):
    exp = _experiment(segmented)
    path = tmp_path / "lanterns.parquet"
    _log(exp, segmented).to_parquet(path, index=False)
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "0")  # the file-based split, where the spill runs
    plain = _plain(path, exp, cluster)
    tiny = LocalEngine(max_spill_rows=1)
    found = tiny.log_pieces(str(path), exp, max_bids_per_shard=MAX, cluster=cluster)
    assert found.shards >= 5 and found.gram is not None and all(p.bidder_sums is None for p in found.pieces)
    assert bool(found.segment_grams) == segmented
    forced = estimate_bid_log(path, exp, engine=tiny, max_bids_per_shard=MAX, cluster=cluster)
    one_pass = estimate_bid_log(path, exp, max_bids_per_shard=MAX, cluster=cluster)
    assert plain.cluster == forced.cluster == one_pass.cluster == "bidder"
    assert plain.table["std_error"].notna().any()
    _same_numbers(forced, plain)
    _same_numbers(one_pass, plain)
    if segmented:
        assert set(forced.segments) == {"north", "south"}


def test_runs_cover_every_bucket_once_and_respect_the_row_budget(tmp_path):
    exp = _experiment(False)
    path = tmp_path / "lanterns.parquet"
    _log(exp, False, rng=9).to_parquet(path, index=False)
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX)) as shards:
        spill = BidderSpill(tmp_path / "spill", max_rows=300, bits=6)
        (tmp_path / "spill").mkdir()
        pieces_by_shard(shards, exp, cluster="bidder", source=str(path), hash_bidders=True, spill=spill)
    runs = spill._runs()
    assert runs[0][0] == 0 and runs[-1][1] == 64 and all(a[1] == b[0] for a, b in zip(runs, runs[1:]))
    per_bucket = sum(np.diff(p.bounds) for p in spill._parts)
    sizes = [int(per_bucket[lo:hi].sum()) for lo, hi in runs]
    assert len(runs) > 3 and all(s <= 300 or hi - lo == 1 for s, (lo, hi) in zip(sizes, runs))


def test_a_shard_without_bidder_sums_leaves_the_combination_by_auction(tmp_path):
    """Under ``auto`` a shard whose ids do not repeat keeps no sums: no form, as the plain path
    would combine by auction."""
    exp = _experiment(False)
    bids = _log(exp, False)
    bids["bidder_id"] = "once-" + pd.Series(np.arange(len(bids))).astype(str)  # every bid its own bidder
    path = tmp_path / "once.parquet"
    bids.to_parquet(path, index=False)
    spill = BidderSpill(tmp_path)
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX)) as shards:
        found = pieces_by_shard(shards, exp, cluster="auto", source=str(path), hash_bidders=True, spill=spill)
    assert spill.grams() is None
    assert combine_pieces(found.pieces, exp, cluster="auto").cluster == "auction"
