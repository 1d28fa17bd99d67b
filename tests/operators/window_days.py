"""Days of a segmented experiment through the shard tasks, shared by the running-window tests."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from counterbid.estimators import bidder_totals, combine_pieces, gram_of, simulate_segmented_experiment
from counterbid.operators import partition, window_state
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


def shards_estimated(lake, stage, exp, day, max_bids_per_shard: int) -> tuple[StagedPartition, int]:
    """One day loaded in shards, through the schema gate, each shard estimated by its own task; and its shards."""
    out = partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=stage,
                                    max_bids_per_shard=max_bids_per_shard)
    staged = StagedPartition.at(stage, exp.id, day)
    partition.record_checks(staged, schema_gate(LakeHook(), experiment=exp, staged=staged))
    for k in range(out["shards"]):
        partition.estimate_partition_shard(exp, ds=day, staging_root=stage, shard=k)
    return staged, out["shards"]


def pooled(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with the pooled rows' null segment named, so rows index by segment."""
    frame = frame.copy()
    frame["segment"] = frame["segment"].astype(object).where(frame["segment"].notna(), "(pooled)")
    return frame


def write_segmented_lake(root, exp, segments, days, *, column: str, n_auctions: int, rng: int, bidder_pool: int,
                         id_prefix: str, scaled_days: dict[int, int] | None = None):
    """One Parquet file a day of ``exp``'s segmented bids under ``root/ds=DAY``; text bidder ids of one pool.

    Day ``k`` draws with seed ``rng + k`` and auction ids from ``k * 100_000``; a day in ``scaled_days``
    has its bids and values multiplied by ``2**scaled_days[k]``.
    """
    for k, day in enumerate(days):
        bids = simulate_segmented_experiment(segments, exp, n_auctions=n_auctions, rng=rng + k, column=column,
                                             bidder_pool=bidder_pool, first_auction_id=100_000 * k).drop(columns=["ds"])
        bids["bidder_id"] = id_prefix + bids["bidder_id"].astype(str)
        if k in (scaled_days or {}):
            bids[["bid", "value"]] = np.ldexp(bids[["bid", "value"]].to_numpy(), scaled_days[k])
        (root / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(root / f"ds={day}" / f"{exp.id}.parquet", index=False)
    return root


def stored_pieces(hook, exp, days):
    """The stored pieces of ``days``, with their bidder sums."""
    return window_state.pieces_of_rows(hook.stored_piece_frames(experiment_id=exp.id, days=days,
                                                                tables=list(partition.PIECE_TABLES.values())))


def check_rows(hook, exp, day, days, report="report_to_date_estimates"):
    """Stored rows of ``day`` (report ``report``) = ``combine_pieces`` over the stored pieces of ``days``."""
    want = combine_pieces(stored_pieces(hook, exp, days), exp, cluster="auto")
    assert want.cluster == "bidder" and want.segments
    rows = pooled(hook.fetch_df(report, {"experiment_id": exp.id}))
    got = rows[rows["ds"].dt.date == day].set_index(["segment", "arm", "metric"])
    want = pooled(want.table).set_index(["segment", "arm", "metric"])
    assert len(got) == len(want)
    np.testing.assert_allclose(got.loc[want.index, NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float),
                               rtol=1e-12, atol=0)


def check_window(hook, exp, days):
    """Every stored total and form = the plain rebuild (``bidder_totals``, ``gram_of``) of the window's stored pieces."""
    base = hook.bidder_window(experiment_id=exp.id)
    assert [dt.date.fromisoformat(d) for d in str(base[0]["days_used"].iloc[0]).split(",")] == days
    order = str(base[0]["sum_labels"].iloc[0]).split(",")
    window = stored_pieces(hook, exp, days)
    exponent = max(p.bid_exponent for p in window)
    assert int(base[0]["bid_exponent"].iloc[0]) == exponent
    with hook.connect(read_only=True) as con:
        stored = [row[1:] for row in con.execute(
            "select experiment_id, segment, bidder_id, sums from main.bidder_window_totals").fetchall()
            if row[0] == exp.id]
    keys = [None, *sorted({p.key.segment for p in window})]
    assert {s for s, _, _ in stored} == set(keys)
    assert len({(s, b) for s, b, _ in stored}) == len(stored)  # no bidder twice under one key
    for key, n in zip([None if pd.isna(s) else s for s in base[0]["segment"]], base[0]["n_distinct_bidders"]):
        plain = bidder_totals([p for p in window if key is None or p.key.segment == key], bid_exponent=exponent)
        mine = {b: v for s, b, v in stored if s == key}
        assert int(n) == len(mine) == plain.sums.shape[0]
        kept = np.array([mine[b] for b in plain.bidder_ids], dtype=float)
        # a running total adds day by day, the plain one piece by piece: rounding of order 1e-16 times the
        # terms, so a total that nearly cancels is compared on the scale of the totals, not its own
        want = plain.sums[:, [window_state._labels(exp).index(x) for x in order]]
        np.testing.assert_allclose(kept, want, rtol=1e-12, atol=1e-12 * np.abs(want).max())
        form = base[1][[(None if pd.isna(s) else s) == key for s in base[1]["segment"]]]
        np.testing.assert_allclose(window_state._gram_of_rows(form, int(n), exponent, exp).gram, gram_of(plain).gram,
                                   rtol=1e-12, atol=0)
