"""The one per-shard body (`readers.shards.one_shard_pieces`) given a shard's file or its rows in memory.

The in-memory split hands each shard's rows of the day's frame to the same function the
file-based split gives each shard's file; both must give the same pieces, exactly (same rows,
same order, same pure estimator), and the same outcome for a shard of single-bidder auctions and
for a bad row.
"""

from __future__ import annotations

import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import BID_COLUMNS, parse_experiments, simulate_experiment
from counterbid.estimators.errors import InputError, NothingToEstimate
from counterbid.readers.bid_log import read_bids
from counterbid.readers.shards import one_shard_pieces

ARMS = [{"name": "even", "share": 0.5, "position_weights": [0.3, 0.3, 0.1]},
        {"name": "top", "share": 0.5, "position_weights": [0.6, 0.1]}]
EXP = parse_experiments({"experiments": [{"id": "kiosk", "control_arm": "even", "floor": 0.3, "arms": ARMS}]})["kiosk"]
NO_FLOOR = parse_experiments({"experiments": [{"id": "kiosk", "control_arm": "even", "arms": ARMS}]})["kiosk"]


def _shard_file(tmp_path, bids: pd.DataFrame):
    path = tmp_path / "shard.parquet"
    bids.to_parquet(path, index=False)
    return path, read_bids(path, columns=["experiment_id", *BID_COLUMNS])


@pytest.mark.parametrize("cluster", ["auto", "auction", "bidder"])
def test_frame_and_file_give_the_same_pieces(tmp_path, cluster):
    bids = simulate_experiment(st.lognorm(0.6, scale=0.9), EXP, n_bidders={2: 0.2, 3: 0.5, 6: 0.3},
                               n_auctions=1500, rng=4, bidder_pool=300)
    bids["bidder_id"] = "booth-" + bids["bidder_id"].astype(str)
    path, frame = _shard_file(tmp_path, bids)
    from_file = one_shard_pieces(2, path, EXP, cluster=cluster, day="2026-05-04", where="log (shard 2)")
    from_rows = one_shard_pieces(2, frame, EXP, cluster=cluster, day="2026-05-04", where="log (shard 2)")
    assert len(from_file.pieces) == len(from_rows.pieces) == 3
    assert all(a.equals(b) for a, b in zip(from_file.pieces, from_rows.pieces))
    assert from_file.n_excluded_auctions == from_rows.n_excluded_auctions
    assert {p.key.shard for p in from_rows.pieces} == {2}


def test_single_bidder_shard_is_counted_or_refused_alike(tmp_path):
    bids = simulate_experiment(st.lognorm(0.6, scale=0.9), NO_FLOOR, n_bidders=1, n_auctions=40, rng=5)
    path, frame = _shard_file(tmp_path, bids)
    for source in (path, frame):
        found = one_shard_pieces(1, source, NO_FLOOR, where="log (shard 1)", alone=False)
        assert (found.pieces, found.n_excluded_auctions, found.single_bidders_only) == ([], 40, True)
    messages = []
    for source in (path, frame.copy()):
        with pytest.raises(NothingToEstimate) as caught:
            one_shard_pieces(1, source, NO_FLOOR, where="log (shard 1)", alone=True)
        messages.append(str(caught.value))
    assert messages[0] == messages[1]


def test_bad_row_gives_the_same_line(tmp_path):
    bids = simulate_experiment(st.lognorm(0.6, scale=0.9), EXP, n_bidders=3, n_auctions=200, rng=6)
    bids.loc[37, "bid"] = -1.0
    path, frame = _shard_file(tmp_path, bids)
    messages = []
    for source in (path, frame):
        with pytest.raises(InputError) as caught:
            one_shard_pieces(0, source, EXP, where="log (shard 0)")
        messages.append(str(caught.value))
    assert messages[0] == messages[1] and "row 37" in messages[0] and "log (shard 0)" in messages[0]
