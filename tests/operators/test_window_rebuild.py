"""The running window rebuilt bucket by bucket, against the plain in-memory rebuild.

The rebuild streams the stored bidder sums of the window's earlier days from the sink, sets them
aside with today's by bucket of bidders and adds each bucket up alone. The plain formula it
replaces read every stored row into one frame and added every piece's sums bidder by bidder
(``bidder_totals`` over the stored pieces and today's, per key; ``gram_of``). It stays here:

* ``test_bucketed_totals_are_the_plain_totals``: the stored rows of two days, shuffled and cut
  into batches of 37 rows, and a third day's pieces as today's, over 1, 8 and 128 buckets: every
  key's totals are ``bidder_totals`` of the pieces in the plain order, bit for bit (each bidder's
  pieces are put back in that order before they are added), and the forms ``gram_of`` to 1e-12.
* ``test_each_rebuild_trigger_gives_the_plain_window_and_rows``: a segmented experiment of six
  invented days run through the steps (four shard tasks a day, today's sums staged by shard) on a
  DuckDB file and on PostgreSQL, with buckets, gathered groups and streamed batches forced down
  to a few dozen rows. Each rebuild trigger in turn: a day whose bids are 2**210 times larger (a
  new bid unit), a day that arrives after a later one (out of order), a rerun of a day the window
  holds, a day excluded after the window took it in. After each day the to-date rows (estimates,
  standard errors, intervals; pooled and per segment) equal ``combine_pieces`` over the stored
  pieces with their bidder sums, 1e-12 relative, and every stored total and form equals the
  plain rebuild of the window's stored pieces (totals 1e-12 of the largest: the running update
  and the plain formula add a bidder's days in different orders; forms 1e-12 relative).
* Bad input: a stored bidder-sum row without its piece, or naming a label the experiment lacks,
  is one error line naming it.

What it can catch: a bidder split over two buckets, a stored row read twice or dropped between
batches, a piece weighted by another's auctions or unit, a segment's rows mixed with the pooled
ones, today's rows added before the stored days', a rebuild that keeps a stale day.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import scipy.stats as st

from counterbid.estimators import (
    SimulatedSegment, bidder_totals, gram_of, parse_experiments, pieces_to_frames,
)
from counterbid.estimators.errors import InputError
from counterbid.operators import partition, window_rebuild, window_state
from counterbid.operators.shard_step import shard_task_pieces
from counterbid.operators.window_rebuild import PieceRanks, bucket_window, window_bucket_totals

from .window_days import check_rows, check_window, shards_estimated, write_segmented_lake

pytestmark = pytest.mark.filterwarnings("ignore:.*strata with fewer than 100 bids")

FIRST = dt.date(2026, 9, 7)
DAYS = [FIRST + dt.timedelta(days=k) for k in range(6)]
#: Two invented halls of one market; the bidder ids of both come from one pool.
HALLS = {
    "loft": SimulatedSegment(st.gamma(2.2, scale=0.6), {3: 0.5, 4: 0.5}, 0.55),
    "yard": SimulatedSegment(st.lognorm(0.5, scale=1.3), {2: 0.4, 4: 0.6}, 0.45),
}
SHARD_BIDS = 500
LARGE_DAY = 3  # bids 2**210 times larger: beyond 2**200, a bid unit of their own


def _spec(exclude=()):
    return parse_experiments({"experiments": [{
        "id": "lamps", "control_arm": "amber", "start": str(FIRST), "segments": ["hall"],
        "exclude_days": [str(d) for d in exclude], "checks": {"warmup": {"days": 0}},
        "arms": [{"name": "amber", "share": 0.5, "position_weights": [0.44, 0.2, 0.08]},
                 {"name": "cobalt", "share": 0.5, "position_weights": [0.52, 0.17, 0.04]}],
        "what_if": [{"name": "muted", "position_weights": [0.47, 0.19, 0.06]}]}]})["lamps"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    return write_segmented_lake(tmp_path_factory.mktemp("lake") / "bids", _spec(), HALLS, DAYS, column="hall",
                                n_auctions=500, rng=730, bidder_pool=90, id_prefix="stand-",
                                scaled_days={LARGE_DAY: 210})


def _run_day(hook, lake, exp, stage, day) -> str:
    shards_estimated(lake, stage, exp, day, SHARD_BIDS)
    route = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id=f"r-{day}",
                                         shard_tasks=True)["bidder_window"]
    partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    return route


def _small_buckets(monkeypatch):
    monkeypatch.setattr(window_rebuild, "REBUILD_BUCKET_ROWS", 60)
    monkeypatch.setattr(window_rebuild, "GATHER_ROWS", 97)
    monkeypatch.setattr(window_rebuild, "STREAM_BATCH_ROWS", 41)


@pytest.mark.slow
def test_each_rebuild_trigger_gives_the_plain_window_and_rows(sink, lake, tmp_path, monkeypatch):
    _small_buckets(monkeypatch)
    exp = _spec()
    stage = tmp_path / "stage"

    def day(k, want_route, window, spec=exp):
        assert _run_day(sink, lake, spec, stage, DAYS[k]) == want_route
        check_rows(sink, spec, DAYS[k], [DAYS[j] for j in window])
        check_window(sink, spec, [DAYS[j] for j in window])

    day(0, "rebuilt", [0])  # nothing stored: today's totals from an empty window
    day(1, "extended", [0, 1])
    day(2, "extended", [0, 1, 2])
    day(LARGE_DAY, "rebuilt", [0, 1, 2, 3])  # a larger bid unit: every stored total in the new unit
    day(5, "extended", [0, 1, 2, 3, 5])
    day(4, "rebuilt", [0, 1, 2, 3, 4])  # out of order: the days before it and today, the later day left out
    day(2, "rebuilt", [0, 1, 2])  # a rerun of a day the window holds
    day(5, "rebuilt", [0, 2, 3, 4, 5], spec=_spec(exclude=[DAYS[1]]))  # a day the window took in, excluded since


def _day_pieces(lake, tmp_path, exp, k):
    staged, _ = shards_estimated(lake, tmp_path / f"stage-{k}", exp, DAYS[k], SHARD_BIDS)
    return shard_task_pieces(staged, exp, cluster="auto").pieces


def _as_stored(pieces):
    """The pieces as read back from the results tables (ids as text)."""
    return window_state.pieces_of_rows({window_state.PIECE_TABLES[name]: frame
                                        for name, frame in pieces_to_frames(pieces).items()})


def _stored_batches(pieces, rng, size=37):
    """The pieces' bidder-sum rows as a sink streams them: shuffled, in small record batches."""
    rows = pieces_to_frames(pieces)["bidder_sums"].rename(columns={"day": "ds"})
    rows["ds"] = pd.to_datetime(rows["ds"]).dt.date
    rows = rows.iloc[rng.permutation(len(rows))][["ds", "n_bidders", "segment", "shard", "bidder_id", "arm", "value"]]
    table = pa.Table.from_pandas(rows, preserve_index=False)
    return table.to_batches(max_chunksize=size)


@pytest.mark.parametrize("bits", [0, 3, 7])
def test_bucketed_totals_are_the_plain_totals(lake, tmp_path, bits):
    exp = _spec()
    stored = [p for k in (0, LARGE_DAY) for p in _day_pieces(lake, tmp_path, exp, k)]
    today = _day_pieces(lake, tmp_path, exp, 1)
    stored = _as_stored(stored)
    exponent = max(p.bid_exponent for p in [*stored, *today])
    assert min(p.bid_exponent for p in stored) < exponent  # pieces of two units
    labels, segments = window_state._labels(exp), sorted(HALLS)
    by_shard = {}
    for i, p in enumerate(today):
        by_shard.setdefault(int(p.shard), []).append((i, p))
    rows = bucket_window(_stored_batches(stored, np.random.default_rng(bits)), stored, list(by_shard.values()),
                         tmp_path / "rows", labels=labels, segments=segments, exponent=exponent, bits=bits)
    buckets = list(rows.buckets())
    assert len(buckets) <= 2 ** bits and (len(buckets) > 1) == (bits > 0)
    totals = [window_bucket_totals(rows, b) for b in buckets]
    for key in [None, *segments]:
        mine = [p for p in [*stored, *today] if key is None or p.key.segment == key]
        plain = bidder_totals(mine, bid_exponent=exponent)
        ids = [i for t in totals if key in t for i in t[key][0].to_pylist()]
        sums = np.concatenate([t[key][1] for t in totals if key in t])
        assert len(ids) == len(set(ids)) == plain.sums.shape[0]  # no bidder in two buckets
        np.testing.assert_array_equal(sums[pd.Index(ids).get_indexer(plain.bidder_ids)], plain.sums)  # bit for bit
        form = sum(t[key][1].T @ t[key][1] for t in totals if key in t)
        np.testing.assert_allclose(form, gram_of(plain).gram, rtol=1e-12, atol=0)


def test_a_stored_row_without_its_piece_or_label_is_one_error_line(lake, tmp_path):
    exp = _spec()
    stored = _as_stored(_day_pieces(lake, tmp_path, exp, 0))
    labels, segments = window_state._labels(exp), sorted(HALLS)
    batch = _stored_batches(stored, np.random.default_rng(1), size=10_000)[0]
    ranks = PieceRanks.of(stored, segments, max(p.bid_exponent for p in stored))
    # a row of a shard no stored piece has
    shard = pa.array(np.full(batch.num_rows, 99, np.int64))
    bad = batch.set_column(batch.schema.get_field_index("shard"), "shard", shard)
    with pytest.raises(InputError, match=r"shard 99, segment .* has no stored stratum piece") as err:
        ranks.locate(bad)
    assert "\n" not in str(err.value)
    arm = pa.array(["lantern"] * batch.num_rows)
    bad = batch.set_column(batch.schema.get_field_index("arm"), "arm", arm)
    with pytest.raises(InputError, match="names label 'lantern'"):
        bucket_window([bad], stored, [], tmp_path / "rows", labels=labels, segments=segments,
                      exponent=max(p.bid_exponent for p in stored), bits=2)
