"""Strata through the steps: stored pieces round-trip, drift from stored summaries, the analysis window."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pytest
import scipy.stats as st

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import expected_revenue_per_auction, parse_experiments, simulate_experiment
from counterbid.estimators import combine_pieces, stratum_pieces
from counterbid.operators import partition, window_state
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 3, 2)
DAYS = [START + dt.timedelta(days=k) for k in range(4)]


def _spec(**over):
    exp = {"id": "tiles", "control_arm": "plain", "start": "2026-03-02", "checks": {"warmup": {"days": 1}},
           "arms": [{"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
                    {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}
    exp.update(over)
    return parse_experiments({"experiments": [exp]})["tiles"]


def test_pieces_round_trip_through_the_results_tables(tmp_path):
    exp = _spec()
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.5, 4: 0.5}, n_auctions=1500, rng=3)
    bids["bidder_id"] = "b-" + bids["bidder_id"].astype(str)  # text bidder ids, repeated across auctions
    pieces = stratum_pieces(bids, exp, shard=2, day=START, cluster="bidder")
    hook = ResultsHook(database=tmp_path / "r.duckdb")
    frames = partition._stored_frames(pieces, experiment_id="tiles", ds=START, run_id="r1",
                                      computed_at=np.datetime64("2026-03-03T01:00"))
    for _ in range(2):  # a rerun replaces the day's rows
        hook.replace_partition(experiment_id="tiles", ds=START,
                               tables={t: pa.Table.from_pandas(f, preserve_index=False) for t, f in frames.items()})
    stored = hook.stored_piece_frames(experiment_id="tiles", days=[START], tables=list(partition.PIECE_TABLES.values()))
    back = window_state.pieces_of_rows(stored)
    assert len(back) == len(pieces) == 2
    for a, b in zip(pieces, back):
        assert a.equals(b), a.key
    # the combination of the stored pieces is the combination of the computed ones; the in-memory
    # pieces match bidders by shared codes, the stored ones by id text: the sums may differ in the last bit
    want, got = combine_pieces(pieces, exp, cluster="bidder").table, combine_pieces(back, exp, cluster="bidder").table
    np.testing.assert_allclose(got["std_error"].to_numpy(float), want["std_error"].to_numpy(float), rtol=1e-14)
    np.testing.assert_array_equal(got["estimate"].to_numpy(float), want["estimate"].to_numpy(float))
    assert hook.stored_piece_days(experiment_id="tiles", ds=START + dt.timedelta(days=1)) == [START]
    assert hook.stored_piece_days(experiment_id="tiles", ds=START) == []


def _run_day(hook, lake, exp, stage, day):
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, day)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=day)
    partition.record_checks(staged, results)
    partition.store_checks(hook, results, experiment_id=exp.id, ds=day, run_id=f"r{day}")
    out = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id=f"r{day}")
    partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    return {r.check: r for r in results}, out


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("lake")
    write_bid_lake(root / "bids", [_spec()], start=START, days=4, auctions_per_day=1500, n_bidders=4, seed=31)
    return root / "bids"


def test_drift_reads_the_stored_summaries_and_the_window_follows_the_spec(lake, tmp_path):
    exp = _spec(burn_in_days=2, exclude_days=[str(DAYS[3])])
    hook = ResultsHook(database=tmp_path / "r.duckdb")
    runs = [_run_day(hook, lake, exp, tmp_path / "stage", day) for day in DAYS]
    # drift compares with the stored summaries of the trailing days in the window: days 1-2 are
    # burn-in (no reference for anyone), so day 3 has none and day 4 has day 3's
    for k in (0, 1, 2):
        assert runs[k][0]["drift"].details["note"] == "no trailing days"
    stratum = runs[3][0]["drift"].details["by_bidders"]["4"]
    assert stratum["trailing_days"] == 1 and stratum["trailing_bids"] == 6000
    quantiles = hook.fetch_df("bid_quantiles_select_trailing", {"experiment_id": "tiles", "first_day": START, "ds": DAYS[3]})
    assert len(quantiles) == 3 * 257 and set(quantiles["n_bids"]) == {6000}
    # the window: days 1-2 burn-in, day 4 excluded; day 3 alone is combined
    to_date = hook.fetch_df("report_to_date_estimates", {"experiment_id": "tiles"})
    # to-date rows from day one: the burn-in days' hold no number yet (status warming_up)
    assert sorted(set(to_date["ds"].dt.date)) == DAYS[:4]
    burn_in = to_date[to_date["ds"].dt.date < DAYS[2]]
    assert {s.split(",")[0] for s in burn_in["status"]} == {"warming_up"} and burn_in["estimate"].isna().all()
    last = to_date[to_date["ds"].dt.date == DAYS[3]]
    assert set(last["days_used"]) == {str(DAYS[2])}
    assert set(last["days_left_out"]) == {f"{DAYS[0]}..{DAYS[1]} (burn_in),{DAYS[3]} (excluded)"}
    assert runs[3][1]["days_used"] == str(DAYS[2])
    daily = hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"})
    day3 = daily[daily["ds"].dt.date == DAYS[2]].set_index(["arm", "metric"])["estimate"]
    np.testing.assert_array_equal(last.set_index(["arm", "metric"]).loc[day3.index, "estimate"].to_numpy(), day3.to_numpy())


def test_the_default_window_leaves_out_a_day_whose_drift_check_failed(lake, tmp_path):
    """Day 3 of the lake is rewritten with values 20 % higher (the market moved): its drift check
    fails against the stored summaries of days 1-2, and the to-date rows of days 3 and 4 leave it out."""
    import pandas as pd

    exp = _spec()
    moved = tmp_path / "bids"
    for day in DAYS:
        (moved / f"ds={day}").mkdir(parents=True)
        frame = pd.read_parquet(lake / f"ds={day}" / "tiles.parquet")
        if day == DAYS[2]:
            frame = simulate_experiment(st.lognorm(0.5, scale=0.96), exp, n_bidders=4, n_auctions=1500, rng=77,
                                        first_auction_id=10**7).drop(columns=["ds"])
        frame.to_parquet(moved / f"ds={day}" / "tiles.parquet", index=False)
    hook = ResultsHook(database=tmp_path / "r.duckdb")
    runs = [_run_day(hook, moved, exp, tmp_path / "stage", day) for day in DAYS]
    assert not runs[2][0]["drift"].passed
    to_date = hook.fetch_df("report_to_date_estimates", {"experiment_id": "tiles"})
    third = to_date[to_date["ds"].dt.date == DAYS[2]]
    assert set(third["days_used"]) == {str(DAYS[1])}
    assert set(third["days_left_out"]) == {f"{DAYS[0]} (warmup),{DAYS[2]} (drift)"}
    # day 4 is compared with the window's trailing days only (day 2: day 1 is a warm-up day, day 3 drifted)
    assert runs[3][0]["drift"].passed and runs[3][0]["drift"].details["by_bidders"]["4"]["trailing_days"] == 1
    last = to_date[to_date["ds"].dt.date == DAYS[3]]
    assert set(last["days_used"]) == {f"{DAYS[1]},{DAYS[3]}"}
    assert set(last["days_left_out"]) == {f"{DAYS[0]} (warmup),{DAYS[2]} (drift)"}
    assert not any((tmp_path / "stage").rglob("*.parquet"))  # every folder cleaned after its write


@pytest.mark.slow
def test_the_default_window_leaves_warm_up_days_out_and_lands_on_the_truth(tmp_path):
    """Six days, the first two with bidders not yet adapted (they bid as if only the control arm
    ran: ``write_bid_lake(warmup_days=2)``). Truth: each arm's revenue per auction in its own
    equilibrium (Myerson 1981, Lemma 3; ``expected_revenue_per_auction``, quadrature). The default
    window leaves the two warm-up days out (their warm-up check fails; the drift check of the
    adapted days compares them with adapted days only) and every arm lands within 3 SE; the same
    stored pieces combined with the warm-up days included miss by more than 3 SE on the
    non-control arm (the estimand then mixes in days whose bids answer another mixture)."""
    values = st.lognorm(0.5, scale=0.8)
    exp = _spec(checks={"warmup": {"days": 2}})
    write_bid_lake(tmp_path / "bids", [exp], start=START, days=6, auctions_per_day=8000, n_bidders=4, seed=17,
                   values=values, warmup_days=2)
    hook = ResultsHook(database=tmp_path / "r.duckdb")
    days = [START + dt.timedelta(days=k) for k in range(6)]
    runs = [_run_day(hook, tmp_path / "bids", exp, tmp_path / "stage", day) for day in days]
    assert [r["drift"].passed for r, _ in runs] == [True] * 6  # adapted days are compared with adapted days
    assert runs[2][0]["drift"].details["note"] == "no trailing days"  # the first adapted day has no reference
    rows = hook.fetch_df("report_cumulative")
    default = rows[rows["metric"] == "revenue_per_auction"].set_index("arm")
    assert set(default["days_left_out"]) == {f"{days[0]}..{days[1]} (warmup)"}
    assert set(default["days_used"]) == {f"{days[2]}..{days[5]}"}
    stored = hook.stored_piece_frames(experiment_id="tiles", days=days, tables=list(partition.PIECE_TABLES.values()))
    included = combine_pieces(window_state.pieces_of_rows(stored), exp, cluster="auto")
    included = included.table[included.table["metric"] == "revenue_per_auction"].set_index("arm")
    misses = {}
    for arm in exp.arms:
        truth = expected_revenue_per_auction(values, arm.position_weights, 4)
        for name, table in (("default", default), ("warm-up included", included)):
            misses[(name, arm.name)] = (table.loc[arm.name, "estimate"] - truth) / table.loc[arm.name, "std_error"]
    print("to-date revenue per auction minus truth, in SE:", {k: round(v, 2) for k, v in misses.items()})
    assert all(abs(misses[("default", a.name)]) < 3 for a in exp.arms), misses
    assert abs(misses[("warm-up included", "bold")]) > 3, misses
