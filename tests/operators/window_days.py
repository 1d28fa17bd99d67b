"""Days of a segmented experiment through the shard tasks, shared by the running-window tests."""

from __future__ import annotations

import pandas as pd

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
