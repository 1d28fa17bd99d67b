"""The example DAG's mapped shard tasks when one shard fails: the failure names the shard, the other
shard tasks finish, and no experiment of the day is written (the estimate steps wait for every
shard task of the day: a shard failed after its retries holds the day back, and the run fails with
one failure, the shard's).

A day of two experiments, each split into 3 shards (``max_bids_per_shard`` 3000, 8000 bids). In
experiment ``kites`` (floor 0.3) every bid of the auctions of shard 1 is put below the floor and
unshown: the day passes its checks (the contract and the counting checks hold, and some bid of the
day reaches the floor), but shard 1 alone holds no bid the floor lets through, which the estimator
refuses for that shard. One real ``dag.test`` run through ``counterbid backfill``'s ``run_days``.
"""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from counterbid.cli.backfill import run_days
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import load_experiments, shard_of

DAY = dt.date(2026, 6, 1)
SPEC_TEXT = """
experiments:
  - id: kites
    control_arm: low
    start: 2026-06-01
    floor: 0.3
    arms:
      - {name: low,  share: 0.5, position_weights: [0.4, 0.2]}
      - {name: high, share: 0.5, position_weights: [0.4, 0.3]}
  - id: reeds
    control_arm: one
    start: 2026-06-01
    arms:
      - {name: one, share: 0.5, position_weights: [0.3, 0.1]}
      - {name: two, share: 0.5, position_weights: [0.3, 0.2]}
"""


@pytest.fixture
def lake(tmp_path, airflow_db):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    write_bid_lake(tmp_path / "bids", load_experiments(spec).values(), start=DAY, days=1, auctions_per_day=2000,
                   n_bidders=4, seed=63)
    path = tmp_path / "bids" / f"ds={DAY}" / "kites.parquet"
    table = pq.read_table(path)
    sunk = shard_of(table.column("auction_id").to_pandas(), 3) == 1
    bids = np.where(sunk, 0.1, table.column("bid").to_numpy())
    unshown = pa.scalar(None, type=table.schema.field("position").type)
    position = pc.if_else(pa.array(sunk), unshown, table.column("position"))
    table = table.set_column(table.schema.get_field_index("bid"), "bid", pa.array(bids))
    table = table.set_column(table.schema.get_field_index("position"), "position", position)
    pq.write_table(table, path)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "results_database": str(tmp_path / "r.duckdb"),
            "staging_root": str(tmp_path / "staging"), "clicks_root": "", "max_bids_per_shard": "3000"}
    return conf, int(sunk.sum())


def test_a_failed_shard_names_itself_and_holds_the_day_back(lake):
    conf, sunk = lake
    assert sunk > 1000  # about a third of the bids
    (run,) = run_days([DAY], conf=conf)
    states = {(task, m): state for task, m, state, _ in run.tasks}
    assert run.state == "failed", run.line()
    assert sorted(m for (task, m), s in states.items() if task == "estimate_shard" and s == "success") == [0, 2, 3, 4, 5]
    assert states[("estimate_shard", 1)] == "failed"  # kites, shard 1 (kites is listed first)
    assert len(run.reasons) == 1 and run.reasons[0].startswith("estimate_shard"), run.reasons
    assert "(shard 1): the floor 0.3 lies above every bid" in run.reasons[0]
    assert {s for (task, _), s in states.items() if task in ("experiment.estimate", "experiment.write")} == {"upstream_failed"}
    with duckdb.connect(conf["results_database"], read_only=True) as con:  # the checks' outcomes only
        tables = {name for (name,) in con.execute("select table_name from information_schema.tables").fetchall()}
        assert "data_checks" in tables
        for table in ("arm_estimates", "arm_estimates_to_date", "stratum_pieces"):
            assert table not in tables or con.execute(f"select count(*) from {table}").fetchone() == (0,), table
