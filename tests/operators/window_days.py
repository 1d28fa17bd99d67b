"""Days of a segmented experiment through the shard tasks, shared by the running-window tests."""

from __future__ import annotations

import numpy as np
import pandas as pd

from counterbid.estimators import simulate_segmented_experiment

from counterbid.operators import partition
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition


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
