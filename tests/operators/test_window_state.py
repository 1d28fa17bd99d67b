"""The running bidder window through the steps: the same to-date rows as the full recombination.

Five days of one experiment whose bidders (text ids from a pool of 240) come back every day, so
``auto`` clusters by bidder; day 3 is excluded by the spec. Each day runs load, validate,
estimate and write on a DuckDB file and on PostgreSQL, then reruns of an earlier and of the last
day. After every write, the stored to-date rows must equal ``combine_pieces`` over every stored
piece of the window with its bidder sums (the recombination the window replaces) to 1e-12
relative (exact identities; the running form's rounding is of order 1e-16 times the ratio of the
form to a lift's variance), and the stored window must equal a rebuild from the stored pieces.
What it can catch: a day counted twice or missing after a rerun or a left-out day, a returning
bidder counted as new, a stored window that no longer matches its days' pieces, either sink's SQL.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import bidder_totals, combine_pieces, gram_of, parse_experiments, simulate_experiment
from counterbid.operators import partition, window_state
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 6, 1)
DAYS = [START + dt.timedelta(days=k) for k in range(5)]
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


def _spec():
    return parse_experiments({"experiments": [{
        "id": "lanterns", "control_arm": "even", "start": str(START), "exclude_days": [str(DAYS[2])],
        "checks": {"warmup": {"days": 0}},
        "arms": [{"name": "even", "share": 0.6, "position_weights": [0.4, 0.25, 0.1]},
                 {"name": "tall", "share": 0.4, "position_weights": [0.55, 0.2, 0.05]}],
        # a layout that did not run: its revenue is one more column of the bidder sums and of the window
        "what_if": [{"name": "between", "position_weights": [0.48, 0.22, 0.08]}]}]})["lanterns"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("lake") / "bids"
    exp = _spec()
    for k, day in enumerate(DAYS):
        bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.5, 4: 0.5}, n_auctions=700,
                                   rng=40 + k, bidder_pool=240, first_auction_id=10_000 * k).drop(columns=["ds"])
        bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
        (root / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(root / f"ds={day}" / "lanterns.parquet", index=False)
    return root


@pytest.fixture(params=["duckdb", pytest.param("postgres", marks=pytest.mark.postgres)])
def sink(request, tmp_path):
    if request.param == "duckdb":
        return ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    return ResultsHook(database=request.getfixturevalue("postgres_url"))


def _run_day(hook, lake, exp, stage, day, run):
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, day)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=day)
    partition.record_checks(staged, results)
    out = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id=run)
    partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    return out


def _check_against_full_recombination(hook, exp, day, days_used):
    stored = hook.stored_piece_frames(experiment_id=exp.id, days=days_used, tables=list(partition.PIECE_TABLES.values()))
    pieces = window_state.pieces_of_rows(stored)
    want = combine_pieces(pieces, exp, cluster="auto")
    assert want.cluster == "bidder"  # the bidders repeat: the case where the window matters
    rows = hook.fetch_df("report_to_date_estimates", {"experiment_id": exp.id})
    got = rows[rows["ds"].dt.date == day].set_index(["arm", "metric"])
    want = want.table.set_index(["arm", "metric"])
    assert set(got.xs("revenue_per_auction", level="metric")["cluster"]) == {"bidder"} and len(got) == len(want)
    np.testing.assert_allclose(got.loc[want.index, NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float),
                               rtol=1e-12, atol=0)


def _check_stored_window(hook, exp):
    base = hook.bidder_window(experiment_id=exp.id)
    if base is None:
        return None
    days = [dt.date.fromisoformat(d) for d in str(base[0]["days_used"].iloc[0]).split(",")]
    stored = hook.stored_piece_frames(experiment_id=exp.id, days=days, tables=list(partition.PIECE_TABLES.values()))
    rebuilt = gram_of(bidder_totals(window_state.pieces_of_rows(stored)))
    assert int(base[0]["n_distinct_bidders"].iloc[0]) == rebuilt.n_bidders
    kept = window_state._gram_of_rows(base[1][base[1]["segment"].isna()], rebuilt.n_bidders, rebuilt.bid_exponent, exp)
    np.testing.assert_allclose(kept.gram, rebuilt.gram, rtol=1e-12, atol=0)
    return days


def test_daily_runs_reruns_and_a_left_out_day_give_the_full_recombination(sink, lake, tmp_path):
    exp = _spec()
    stage = tmp_path / "stage"
    used = {DAYS[0]: DAYS[:1], DAYS[1]: DAYS[:2], DAYS[2]: DAYS[:2], DAYS[3]: [DAYS[0], DAYS[1], DAYS[3]],
            DAYS[4]: [DAYS[0], DAYS[1], DAYS[3], DAYS[4]]}
    routes = []
    for day in DAYS:
        routes.append(_run_day(sink, lake, exp, stage, day, f"r-{day}")["bidder_window"])
        _check_against_full_recombination(sink, exp, day, used[day])
        assert _check_stored_window(sink, exp) == used[day]
    # first day rebuilt (nothing stored), then today's bidders only; day 3 is left out: the window as stored
    assert routes == ["rebuilt", "extended", "stored", "extended", "extended"]
    # a rerun of an earlier day rebuilds its window (and the stored window becomes its window) ...
    assert _run_day(sink, lake, exp, stage, DAYS[1], "again-2")["bidder_window"] == "rebuilt"
    _check_against_full_recombination(sink, exp, DAYS[1], used[DAYS[1]])
    assert _check_stored_window(sink, exp) == used[DAYS[1]]
    # ... so the last day, run again, rebuilds too; and a rerun of the day the window ends on as well
    for run in ("again-5", "third-5"):
        assert _run_day(sink, lake, exp, stage, DAYS[4], run)["bidder_window"] == "rebuilt"
        _check_against_full_recombination(sink, exp, DAYS[4], used[DAYS[4]])
        assert _check_stored_window(sink, exp) == used[DAYS[4]]


def test_a_write_without_the_window_drops_a_window_that_covers_its_day(lake, tmp_path):
    exp = _spec()
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    for day in DAYS[:2]:
        _run_day(hook, lake, exp, stage, day, f"r-{day}")
    assert _check_stored_window(hook, exp) == DAYS[:2]
    # day 1's pieces written again by a writer that brings no window (e.g. an older estimate step)
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=DAYS[0], staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, DAYS[0])
    partition.record_checks(staged, partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAYS[0]))
    partition.estimate_partition(hook, experiment=exp, ds=DAYS[0], staging_root=stage, run_id="again-1")
    (staged.folder / "bidder_window.json").unlink()
    partition.write_partition(hook, experiment_id=exp.id, ds=DAYS[0], staging_root=stage)
    assert hook.bidder_window(experiment_id=exp.id) is None
    # the next day rebuilds from the stored pieces
    assert _run_day(hook, lake, exp, stage, DAYS[2], "r-3")["bidder_window"] == "rebuilt"
    assert _check_stored_window(hook, exp) == DAYS[:2]
