"""One task per staged shard: stored pieces, combined by the estimate step, give the single task's rows.

Real Parquet staging and a real DuckDB results file. The single-task estimate
(``estimate_partition`` estimating the shards one after another) is the reference: the shard tasks
(``estimate_partition_shard``) store each shard's pieces as Parquet frames and
``estimate_partition(shard_tasks=True)`` combines them. The only difference is that bidder ids come
back from the frames as text (the single task meets bidders on private integer codes), so a
variance summed over bidders may differ in its last bits: 1e-12 relative, as for the stored pieces
of the experiment-to-date rows.
"""

from __future__ import annotations

import datetime as dt
import os

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import estimate_arms, parse_experiments
from counterbid.estimators.errors import InputError
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.shard_step import shard_pieces_folder, validated_shards
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 5, 11)
SPEC = {"experiments": [{
    "id": "lanterns", "control_arm": "even", "start": "2026-05-11",
    "arms": [{"name": "even", "share": 0.55, "position_weights": [0.45, 0.2, 0.1]},
             {"name": "steep", "share": 0.45, "position_weights": [0.6, 0.12, 0.03]}]}]}
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high", "n_auctions", "n_bids"]


@pytest.fixture(scope="module")
def experiment():
    return parse_experiments(SPEC)["lanterns"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory, experiment):
    root = tmp_path_factory.mktemp("lake")
    # two days of 2400 auctions x 4 bidders = 9600 bids; bidder ids repeat across auctions
    write_bid_lake(root / "bids", [experiment], start=START, days=2, auctions_per_day=2400, n_bidders=4, seed=29)
    return root / "bids"


def _checked_day(lake, experiment, stage, day, max_bids):
    out = partition.stage_partition(LakeHook(), lake_root=lake, experiment=experiment, ds=day, staging_root=stage,
                                    max_bids_per_shard=max_bids)
    staged = StagedPartition.at(stage, experiment.id, day)
    partition.record_checks(staged, schema_gate(LakeHook(), experiment=experiment, staged=staged))
    return staged, out["shards"]


def _outputs(staged):
    """What the estimate step staged for the write step, minus the time stamp."""
    out = {}
    for name in ("estimates_day", "estimates_to_date"):
        out[name] = pq.read_table(getattr(staged, name)).to_pandas().drop(columns=["computed_at"])
    for table in partition.PIECE_TABLES.values():
        frame = pq.read_table(staged.folder / f"{table}.parquet").to_pandas().drop(columns=["computed_at"])
        out[table] = frame.sort_values([c for c in frame.columns if c != "value"]).reset_index(drop=True)
    return out


def _assert_same(got, want):
    for name, frame in want.items():
        other = got[name]
        assert list(other.columns) == list(frame.columns), name
        assert len(other) == len(frame), name
        for col in frame.columns:
            a, b = frame[col], other[col]
            if pd.api.types.is_float_dtype(a):
                np.testing.assert_allclose(b.to_numpy(float), a.to_numpy(float), rtol=1e-12, atol=0, err_msg=f"{name}.{col}")
            else:
                assert a.astype(str).tolist() == b.astype(str).tolist(), f"{name}.{col}"


@pytest.mark.parametrize("cluster", ["auto", "auction"])
def test_shard_tasks_give_the_single_task_rows(lake, experiment, tmp_path, cluster):
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    staged, shards = _checked_day(lake, experiment, stage, START, 2500)
    assert shards == 4  # ceil(9600 / 2500)
    single = partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r",
                                          cluster=cluster)
    want = _outputs(staged)
    assert validated_shards(stage, START, ["lanterns"]) == [{"experiment_id": "lanterns", "shard": k} for k in range(4)]
    done = [partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=k, cluster=cluster)
            for k in range(4)]
    assert sum(d["bids"] for d in done) == single["day_bids"]
    mapped = partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r",
                                          cluster=cluster, shard_tasks=True)
    assert {k: v for k, v in mapped.items()} == single
    _assert_same(_outputs(staged), want)
    # with repeating bidder ids, 'auto' clusters by bidder: the bidder sums went through the frames
    revenue = want["estimates_day"]["metric"] == "revenue_per_auction"
    assert set(want["estimates_day"].loc[revenue, "cluster"]) == {"bidder" if cluster == "auto" else "auction"}
    assert (len(want["stratum_piece_bidder_sums"]) > 0) == (cluster == "auto")
    # the day's shard pieces are on the shards' own key
    assert sorted(want["stratum_pieces"]["shard"].unique()) == [0, 1, 2, 3]


def test_one_shard_has_no_shard_task_and_the_estimate_step_gives_the_single_task_rows(lake, experiment, tmp_path):
    """A day staged as one shard maps no shard task: the estimate step estimates it itself (nothing of it
    is stored as pieces and read back), the single task's rows; a day of several shards still needs every
    shard task's pieces."""
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    staged, shards = _checked_day(lake, experiment, stage, START, None)
    assert shards == 1 and validated_shards(stage, START, ["lanterns"]) == []
    partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r")
    want = _outputs(staged)
    assert len(want["stratum_piece_bidder_sums"]) > 0  # bidder ids repeat: 'auto' clusters by bidder
    partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r", shard_tasks=True)
    assert not (staged.day / "pieces").exists()
    _assert_same(_outputs(staged), want)
    # an experiment of several shards beside it is listed shard by shard, and its shard tasks stay required
    other = tmp_path / "stage-two"
    _checked_day(lake, experiment, other, START, 5000)
    assert validated_shards(other, START, ["lanterns"]) == [{"experiment_id": "lanterns", "shard": k} for k in (0, 1)]
    with pytest.raises(InputError, match="the pieces of shard 0 of 2 of experiment 'lanterns' are missing"):
        partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=other, run_id="r",
                                     shard_tasks=True)
    # the independent reference: the estimator itself on the staged day's bids (what `counterbid
    # estimate` computes), not the estimate step on another route
    bids = pq.read_table(staged.shard(0)).to_pandas()
    reference = estimate_arms(bids, experiment).to_frame()
    got = want["estimates_day"]
    assert len(got) == len(reference) > 0
    key = ["arm", "metric"]
    merged = got.merge(reference, on=key, suffixes=("", "_ref"), validate="one_to_one")
    assert len(merged) == len(reference)
    for col in ("estimate", "std_error", "ci_low", "ci_high"):
        np.testing.assert_allclose(merged[col].to_numpy(float), merged[f"{col}_ref"].to_numpy(float), rtol=1e-12,
                                   atol=0, err_msg=col)


def test_a_retried_shard_replaces_its_pieces_and_a_missing_shard_is_named(lake, experiment, tmp_path):
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    staged, _ = _checked_day(lake, experiment, stage, START, 2500)
    for k in (0, 1, 3):
        partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=k)
    with pytest.raises(InputError) as missing:  # shard 2's task has not run
        partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r", shard_tasks=True)
    assert str(missing.value) == (f"{shard_pieces_folder(staged, 2)}: the pieces of shard 2 of 4 of experiment "
                                  "'lanterns' are missing; run its 'estimate_shard' task first")
    first = {p.name: p.read_bytes() for p in sorted(shard_pieces_folder(staged, 1).iterdir())}
    partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=1)  # a retry
    again = {p.name: p.read_bytes() for p in sorted(shard_pieces_folder(staged, 1).iterdir())}
    assert again == first  # the same files, nothing left beside them
    assert sorted(p.name for p in (staged.day / "pieces").iterdir()) == ["shard=0", "shard=1", "shard=3"]
    # pieces of another clustering are refused, naming the shard
    partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=2, cluster="auction")
    with pytest.raises(InputError, match=r"shard=2: the pieces of shard 2 were estimated with cluster 'auction'"):
        partition.estimate_partition(hook, experiment=experiment, ds=START, staging_root=stage, run_id="r", shard_tasks=True)
    # a new load of the day removes the pieces with the shards they came from
    _checked_day(lake, experiment, stage, START, 2500)
    assert not (staged.day / "pieces").exists()


def test_a_failing_shard_names_the_shard(lake, experiment, tmp_path):
    stage = tmp_path / "stage"
    staged, _ = _checked_day(lake, experiment, stage, START, 2500)
    # shard 3's file replaced by a negative bid after the checks (a shard task reads its shard alone)
    target = next(staged.shard(3).glob("*.parquet"))
    table = pq.read_table(target)
    bids = table.column("bid").to_numpy().copy()
    bids[5] = -1.0
    pq.write_table(table.set_column(table.schema.get_field_index("bid"), "bid", pa.array(bids)), target.with_suffix(".tmp"))
    os.replace(target.with_suffix(".tmp"), target)
    with pytest.raises(InputError, match=r"\(shard 3\): column 'bid' row 5 is negative"):
        partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=3)
    with pytest.raises(InputError, match=r"shard 7 of experiment 'lanterns' on 2026-05-11 was not staged"):
        partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=7)
    assert not shard_pieces_folder(staged, 3).exists()  # nothing half-written


def test_a_shard_task_refuses_a_day_that_failed_its_checks(lake, experiment, tmp_path):
    stage = tmp_path / "stage"
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=experiment, ds=START, staging_root=stage)
    with pytest.raises(InputError, match="run the 'validate' step"):
        partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=0)


def test_the_shard_operator_names_the_shard_when_it_fails(lake, experiment, tmp_path):
    """Bad bids fail without retry (AirflowFailException); a storage failure is retried (ShardTaskError);
    both messages name the shard, the experiment and the day."""
    import yaml
    from airflow.sdk.exceptions import AirflowFailException

    from counterbid.operators.pipeline import EstimateShardOperator, ShardTaskError

    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(SPEC))
    stage = tmp_path / "stage"
    staged, _ = _checked_day(lake, experiment, stage, START, 2500)

    def run(k):
        return EstimateShardOperator(task_id="estimate_shard", experiment_id="lanterns", spec_path=spec,
                                     staging_root=stage, ds=str(START), shard=k).execute({})

    assert run(0)["pieces"] >= 1 and shard_pieces_folder(staged, 0).is_dir()
    target = next(staged.shard(2).glob("*.parquet"))
    table = pq.read_table(target)  # column types kept: only one bid changes
    bids = table.column("bid").to_numpy().copy()
    bids[0] = float("nan")
    pq.write_table(table.set_column(table.schema.get_field_index("bid"), "bid", pa.array(bids)), target)
    with pytest.raises(AirflowFailException, match=r"\(shard 2\): column 'bid' row \d+ is"):
        run(2)
    (staged.day / "pieces").rename(staged.day / "pieces-aside")
    (staged.day / "pieces").write_text("not a folder")  # the pieces cannot be stored
    with pytest.raises(ShardTaskError, match=r"^shard 1 of experiment 'lanterns' on 2026-05-11: \w+Error"):
        run(1)
    with pytest.raises(AirflowFailException, match="`shard` must be a whole number; got 'one'"):
        run("one")


def test_segmented_shards_keep_each_segments_bidder_sums(tmp_path):
    """Several segments in one shard: each piece gets back its own segment's bidder sums.

    The wide file holds every stratum of a shard; two segments with the same number of bidders
    share a shard, so a stratum read back by number of bidders alone would sum the other segment's
    bidders into its variance. Bidder clustering is forced so the sums are used; the single task is
    the reference (1e-12).
    """
    import scipy.stats as st

    from counterbid.estimators import SimulatedSegment

    spec = {"experiments": [dict(SPEC["experiments"][0], id="lamps", segments=["aisle"])]}
    lamps = parse_experiments(spec)["lamps"]
    aisles = {"upper": SimulatedSegment(st.gamma(3.0, scale=0.4), 4, 0.5),
              "lower": SimulatedSegment(st.lognorm(0.5, scale=1.2), 4, 0.5)}
    root = tmp_path / "lake" / "bids"
    write_bid_lake(root, [lamps], start=START, days=1, auctions_per_day=2400, seed=31, segments=aisles)
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    staged, shards = _checked_day(root, lamps, stage, START, 2500)
    assert shards == 4
    partition.estimate_partition(hook, experiment=lamps, ds=START, staging_root=stage, run_id="r", cluster="bidder")
    want = _outputs(staged)
    for k in range(shards):
        partition.estimate_partition_shard(lamps, ds=START, staging_root=stage, shard=k, cluster="bidder")
    partition.estimate_partition(hook, experiment=lamps, ds=START, staging_root=stage, run_id="r", cluster="bidder",
                                 shard_tasks=True)
    day = want["estimates_day"]
    revenue = day["metric"] == "revenue_per_auction"
    assert set(day["segment"].dropna()) == {"upper", "lower"} and set(day.loc[revenue, "cluster"]) == {"bidder"}
    _assert_same(_outputs(staged), want)


def test_a_shard_with_no_bid_at_the_floor_gives_the_single_task_rows(tmp_path):
    """Shard 2 of 4 holds no eligible bid: its task stores zero pieces (``floor_quantile`` 1), and the
    shard tasks' rows equal the single task's and the estimator's own combination of the shards."""
    from counterbid.estimators import combine_pieces, shard_of, stratum_pieces

    spec = {"experiments": [dict(SPEC["experiments"][0], id="lanterns-floor", floor=0.35)]}
    exp = parse_experiments(spec)["lanterns-floor"]
    lake = tmp_path / "bids"
    write_bid_lake(lake, [exp], start=START, days=1, auctions_per_day=2400, n_bidders=4, seed=41)
    path = lake / f"ds={START}" / "lanterns-floor.parquet"
    frame = pq.read_table(path).to_pandas()
    shard = shard_of(frame["auction_id"], 4)
    frame.loc[shard == 2, "bid"] = np.linspace(0.01, 0.34, int((shard == 2).sum()))
    frame.loc[shard == 2, "position"] = np.nan
    frame["position"] = frame["position"].astype("Int64")
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path)
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    staged, shards = _checked_day(lake, exp, stage, START, 2500)
    assert shards == 4
    single = partition.estimate_partition(hook, experiment=exp, ds=START, staging_root=stage, run_id="r")
    want = _outputs(staged)
    for k in range(4):
        partition.estimate_partition_shard(exp, ds=START, staging_root=stage, shard=k)
    mapped = partition.estimate_partition(hook, experiment=exp, ds=START, staging_root=stage, run_id="r",
                                          shard_tasks=True)
    assert mapped == single
    got = _outputs(staged)
    _assert_same(got, want)
    stored = got["stratum_pieces"]
    assert set(stored.loc[stored["shard"] == 2, "floor_quantile"]) == {1.0}
    assert (stored.loc[stored["shard"] != 2, "floor_quantile"] < 1.0).all()
    pieces = [p for k in range(4) for p in stratum_pieces(frame[shard == k].reset_index(drop=True), exp, shard=k,
                                                          day=START, cluster="auto")]
    reference = combine_pieces(pieces, exp, cluster="auto").table
    rows = got["estimates_day"].merge(reference, on=["arm", "metric"], suffixes=("", "_ref"), validate="one_to_one")
    assert len(rows) == len(reference)
    for col in ("estimate", "std_error", "n_auctions"):
        np.testing.assert_allclose(rows[col].to_numpy(float), rows[f"{col}_ref"].to_numpy(float), rtol=1e-12, atol=0,
                                   err_msg=col)


def test_the_days_bidder_form_in_one_bucket_per_pass_equals_the_text_recombination(lake, experiment, tmp_path):
    """The estimate step adds the shards' bidder sums bucket by bucket on 64-bit hashes of the id
    text; forced to one bucket per pass (``max_spill_rows=1``: hundreds of passes) its form equals
    the plain one, every piece's sums matched on their text and squared (``bidder_totals`` and
    ``gram_of``), to 1e-12, and counts the same distinct bidders."""
    from counterbid.estimators import bidder_totals, gram_of
    from counterbid.operators.shard_step import shard_task_pieces

    stage = tmp_path / "stage"
    staged, shards = _checked_day(lake, experiment, stage, START, 2500)
    for k in range(shards):
        partition.estimate_partition_shard(experiment, ds=START, staging_root=stage, shard=k, cluster="bidder")
    experiment, _ = partition.staged_experiment(experiment, staged)
    (tmp_path / "spill").mkdir()
    forced = shard_task_pieces(staged, experiment, cluster="bidder", spill_folder=tmp_path / "spill", max_spill_rows=1)
    plain = shard_task_pieces(staged, experiment, cluster="bidder")
    assert plain.gram is None and forced.gram is not None
    want = gram_of(bidder_totals(plain.pieces, bid_exponent=forced.gram.bid_exponent))
    assert forced.gram.n_bidders == want.n_bidders < sum(p.n_bids for p in plain.pieces)
    np.testing.assert_allclose(forced.gram.gram, want.gram, rtol=1e-12, atol=0)
