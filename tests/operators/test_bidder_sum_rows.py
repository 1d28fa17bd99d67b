"""The day's bidder sums staged label by label (`operators/bidder_sum_rows.py`) against the frame.

The plain formula is the one frame of every (bidder, label) row (``pieces_to_frames`` through the
estimate step's ``_stored_frames``) converted to Arrow; the streamed file must hold the same rows
in the same order with the same column types, for text and integer ids, segmented pieces, pieces
without sums, and none at all.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment, stratum_pieces
from counterbid.operators import partition
from counterbid.operators.bidder_sum_rows import write_bidder_sum_rows

DAY = dt.date(2026, 4, 20)
WHEN = pd.Timestamp("2026-04-21T02:30:00.123456", tz="UTC")


def _exp(segmented):
    doc = {"id": "kites", "control_arm": "calm", "arms": [
        {"name": "calm", "share": 0.6, "position_weights": [0.4, 0.2, 0.1]},
        {"name": "gusty", "share": 0.4, "position_weights": [0.5, 0.15]}]}
    if segmented:
        doc["segments"] = ["field"]
    return parse_experiments({"experiments": [doc]})["kites"]


def _pieces(segmented, text, cluster="bidder"):
    exp = _exp(segmented)
    bids = simulate_experiment(st.lognorm(0.5, scale=0.9), exp, n_bidders={3: 0.5, 4: 0.5}, n_auctions=900, rng=12,
                               bidder_pool=300)
    if text:
        bids["bidder_id"] = "string-" + bids["bidder_id"].astype(str)
    if segmented:
        bids["field"] = np.where(bids["auction_id"] % 2 == 0, "hill", "shore")
    return stratum_pieces(bids, exp, shard=3, day=DAY, cluster=cluster)


@pytest.mark.parametrize(("segmented", "text", "cluster"),
                         [(False, True, "bidder"), (True, True, "bidder"), (False, False, "bidder"),
                          (False, True, "auction")])
def test_streamed_rows_equal_the_frames_rows(tmp_path, segmented, text, cluster):
    pieces = _pieces(segmented, text, cluster)
    if cluster == "bidder":  # one piece without sums among the others adds no rows
        pieces = pieces[:1] + [pieces[1].without_bidder_sums()] + pieces[2:]
    frame = partition._stored_frames(pieces, experiment_id="kites", ds=DAY, run_id="r7", computed_at=WHEN)
    want = pa.Table.from_pandas(frame[partition.PIECE_TABLES["bidder_sums"]], preserve_index=False)
    target = tmp_path / "sums.parquet"
    n = write_bidder_sum_rows(pieces, target, experiment_id="kites", ds=DAY, run_id="r7", computed_at=WHEN)
    got = pq.read_table(target)
    assert n == got.num_rows == want.num_rows and (n > 0) == (cluster == "bidder")
    if n:  # (an empty frame's date column has no type; the streamed file's is date32 either way)
        assert got.schema.remove_metadata() == want.schema.remove_metadata()
        assert got.to_pylist() == want.to_pylist()
    else:
        assert got.column_names == want.column_names
    small = partition._stored_frames(pieces, experiment_id="kites", ds=DAY, run_id="r7", computed_at=WHEN,
                                     with_sums=False)
    assert partition.PIECE_TABLES["bidder_sums"] not in small
    for name in ("stratum_pieces", "stratum_piece_arms", "stratum_piece_covariance"):
        pd.testing.assert_frame_equal(small[name], frame[name])
