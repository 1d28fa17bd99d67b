"""The example daily DAG: import, and dag.test over three days of simulated bids (twice)."""

from __future__ import annotations

import datetime as dt

import duckdb
import numpy as np
import pandas as pd
import pyarrow.dataset as pads
import pytest

from counterbid.cli.backfill import DAG_ID, dags_folder, run_days
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import estimate_arms, load_experiments
from counterbid.estimators import combine_pieces, shard_of, stratum_pieces
from counterbid.operators.pipeline import DEFAULT_CLUSTER, DEFAULT_CONFIDENCE_LEVEL

from .conftest import SPEC_TEXT, START

DAYS = [START + dt.timedelta(days=k) for k in range(3)]
VALUES = ["estimate", "std_error", "ci_low", "ci_high", "n_auctions", "n_bids"]


#: What a parse of the DAG file must not load: the estimator's scipy, the checks' Great Expectations,
#: the estimator's steps, and the hooks' DuckDB, pandas and pyarrow (tasks that list experiments or
#: shards need none of them). Airflow re-parses the file in the DAG processor and before every task.
NOT_AT_PARSE = ("scipy", "great_expectations", "pyspark", "counterbid.operators.partition",
                "counterbid.estimators.checks", "counterbid.estimators.pieces", "counterbid.operators.contract",
                "duckdb", "pandas", "pyarrow")


def test_parsing_the_dag_file_loads_no_estimator_scipy_or_great_expectations(tmp_path):
    # a fresh interpreter, as Airflow's DAG processor and task runner are; the first line lists what loaded
    import subprocess
    import sys

    probe = ("import sys; import counterbid.dags_example.daily as d; "
             f"print(','.join(m for m in {NOT_AT_PARSE!r} if m in sys.modules) or '-'); print(d.DAG_ID)")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300,
                          env={**__import__("os").environ, "COUNTERBID_STAGING": str(tmp_path)})
    assert done.returncode == 0, done.stderr[-2000:]
    loaded, dag_id = done.stdout.split()[-2:]
    assert dag_id == DAG_ID and loaded == "-", f"a parse of the DAG file loads {loaded}"
    # ... while the steps still find them when a task runs
    from counterbid.operators import pipeline

    assert pipeline._partition().run_partition_checks is not None


@pytest.fixture(scope="module")
def bag(airflow_db):
    from airflow.dag_processing.dagbag import DagBag

    return DagBag(dag_folder=str(dags_folder()))


def test_dag_imports_without_errors_or_cycles(bag):
    assert bag.import_errors == {}
    dag = bag.get_dag(DAG_ID)
    dag.check_cycle()  # raises on a cycle
    assert dag.catchup is True
    assert {"active_experiments", "experiment.load", "experiment.validate", "experiment.estimate", "experiment.write"} <= set(dag.task_dict)
    write = dag.get_task("experiment.write")
    assert write.pool == "counterbid_results_writer"
    assert [a.name for a in write.outlets] == ["counterbid_arm_estimates"]
    for task in dag.tasks:
        assert task.on_failure_callback, task.task_id
    assert dag.get_task("experiment.load").upstream_task_ids == {"active_experiments"}
    # every task of the mapped group also depends on the list it is mapped over
    assert dag.get_task("experiment.validate").upstream_task_ids == {"active_experiments", "experiment.load"}
    # the local engine's shard tasks: listed once every validate step ended, mapped one per staged
    # shard, combined by each experiment's estimate step
    assert dag.get_task("day_shards").upstream_task_ids == {"experiment.validate"}
    assert dag.get_task("day_shards").trigger_rule == "all_done"
    assert dag.get_task("estimate_shard").upstream_task_ids == {"day_shards"}
    # the last task: a run whose validate steps all failed maps no shard task and must still fail
    assert dag.get_task("day_settled").upstream_task_ids == {"experiment.validate", "experiment.write"}
    assert dag.get_task("experiment.estimate").upstream_task_ids == {"active_experiments", "experiment.validate",
                                                                      "estimate_shard"}
    # a day of one shard maps no shard task (skipped): the estimate step still runs, never after a failure
    assert dag.get_task("experiment.estimate").trigger_rule == "none_failed"
    assert dag.get_task("experiment.write").upstream_task_ids == {"active_experiments", "experiment.estimate"}


@pytest.fixture(scope="module")
def three_days(tmp_path_factory, bag):
    root = tmp_path_factory.mktemp("e2e")
    spec = root / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    experiments = load_experiments(spec)
    write_bid_lake(root / "bids", experiments.values(), start=START, days=3, auctions_per_day=3000, n_bidders=5, seed=21)
    conf = {"lake_root": str(root / "bids"), "spec_path": str(spec), "results_database": str(root / "results.duckdb"),
            "staging_root": str(root / "staging"), "clicks_root": ""}
    runs = run_days(DAYS, conf=conf)
    return root, conf, experiments, runs


def _table(path, name):
    key = "position" if name == "arm_position_weights" else "metric"
    with duckdb.connect(str(path), read_only=True) as con:
        return con.execute(f"select * from {name} order by experiment_id, ds, arm, {key}").df()


def _lake(root):
    df = pads.dataset(str(root / "bids"), format="parquet", partitioning="hive").to_table().to_pandas()
    df["ds"] = pd.to_datetime(df["ds"]).dt.date
    return df


def _assert_rows_equal(got, want):
    merged = want.merge(got, on=["arm", "metric"], how="outer", suffixes=("", "_db"), indicator=True)
    assert (merged["_merge"] == "both").all() and len(got) == len(want)
    for col in VALUES:
        # stored bidder sums come back in a portable order (by day, stratum, shard, bidder id), so a
        # combined variance may differ from the in-memory one in its last bits: 1e-12 relative
        pd.testing.assert_series_equal(merged[col], merged[f"{col}_db"], check_names=False, check_exact=False,
                                       rtol=1e-12, atol=0.0, check_dtype=False)


def test_three_days_match_estimate_arms_and_the_pieces_of_the_window(three_days):
    """Daily rows: ``estimate_arms`` of the day, exactly. To-date rows: ``combine_pieces`` of the
    days in the window (the first day is a warm-up day, left out), computed here from the lake."""
    root, conf, experiments, runs = three_days
    assert [r.state for r in runs] == ["success"] * 3, [r.line() for r in runs]
    for run in runs:  # each day is one shard: no shard task is mapped; each experiment's estimate step estimates it
        states = sorted((task_id, state) for task_id, _, state, _ in run.tasks
                        if task_id in ("estimate_shard", "experiment.estimate"))
        assert states == [("estimate_shard", "skipped"), ("experiment.estimate", "success"),
                          ("experiment.estimate", "success")], run.tasks
    daily = _table(conf["results_database"], "arm_estimates")
    to_date = _table(conf["results_database"], "arm_estimates_to_date")
    lake = _lake(root)
    for exp in experiments.values():
        bids = lake[lake["experiment_id"] == exp.id]
        pieces = {day: stratum_pieces(bids[bids["ds"] == day].reset_index(drop=True), exp, day=day, cluster=DEFAULT_CLUSTER)
                  for day in DAYS}
        for k, day in enumerate(DAYS):
            want = estimate_arms(bids[bids["ds"] == day].reset_index(drop=True), exp, cluster=DEFAULT_CLUSTER)
            got = daily[(daily["experiment_id"] == exp.id) & (daily["ds"] == pd.Timestamp(day))]
            # the run's defaults are stored beside every row (the realized averages: by auction)
            assert set(got["confidence_level"]) == {DEFAULT_CONFIDENCE_LEVEL}
            realized = got["metric"] == "realized_revenue_per_auction"
            assert set(got.loc[~realized, "cluster"]) == {want.cluster}
            assert set(got.loc[realized, "cluster"]) == {"auction"}
            _assert_rows_equal(got, want.table)
            mine = to_date[(to_date["experiment_id"] == exp.id) & (to_date["ds"] == pd.Timestamp(day))]
            if k == 0:  # the only day so far is a warm-up day: to-date rows without numbers, saying why
                assert len(mine) == len(got) and set(mine["status"]) == {"warming_up,warning"}  # the warm-up check warned
                assert mine["estimate"].isna().all() and mine["first_ds"].isna().all()
                assert set(mine["n_days_used"]) == {0} and set(mine["days_left_out"]) == {f"{DAYS[0]} (warmup)"}
                continue
            window = DAYS[1:k + 1]
            want = combine_pieces([p for d in window for p in pieces[d]], exp, cluster=DEFAULT_CLUSTER)
            _assert_rows_equal(mine, want.table)
            assert set(mine["first_ds"]) == {pd.Timestamp(DAYS[1])}
            assert set(mine["days_used"]) == {str(DAYS[1]) if k == 1 else f"{DAYS[1]}..{DAYS[k]}"}
            assert set(mine["days_left_out"]) == {f"{DAYS[0]} (warmup)"}
            assert set(mine["n_days_used"]) == {k} and set(mine["n_days_left_out"]) == {1}
    # the first day is inside the experiments' one-day warm-up: its rows are written, marked
    # 'warning' (warnings pass, errors stop the day); welfare rows carry the estimator's own flag
    first = daily["ds"] == pd.Timestamp(DAYS[0])
    welfare = daily["metric"] == "welfare_per_auction"
    assert set(daily.loc[first & ~welfare, "status"]) == {"warning"}
    assert set(daily.loc[first & welfare, "status"]) == {"no_interval,warning"}
    assert daily["run_id"].nunique() == 3
    # ... and equal the combination of the daily pieces as stored in the results database
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.window_state import PIECE_TABLES, pieces_of_rows

    hook = ResultsHook(database=conf["results_database"])
    for exp in experiments.values():
        stored = hook.stored_piece_frames(experiment_id=exp.id, days=DAYS[1:], tables=list(PIECE_TABLES.values()))
        want = combine_pieces(pieces_of_rows(stored), exp, cluster=DEFAULT_CLUSTER)
        got = to_date[(to_date["experiment_id"] == exp.id) & (to_date["ds"] == pd.Timestamp(DAYS[2]))]
        got = got.set_index(["arm", "metric"]).loc[list(zip(want.table["arm"], want.table["metric"]))]
        np.testing.assert_array_equal(got["estimate"].to_numpy(float), want.table["estimate"].to_numpy(float))
        # bidder sums read back meet by id text, not by shared codes: the last bit may differ
        np.testing.assert_allclose(got["std_error"].to_numpy(float), want.table["std_error"].to_numpy(float), rtol=1e-13)
        # anytime-valid bounds on every row with an interval, wider than the fixed one (docs/method.md)
        banded = got[got["std_error"].notna()]
        assert banded["anytime_low"].notna().all() and (banded["anytime_horizon_auctions"] > 0).all()
        assert ((banded["anytime_high"] - banded["anytime_low"]) > 1.5 * (banded["ci_high"] - banded["ci_low"])).all()
    # the stored pieces: one per (experiment, day, number of bidders, shard); one shard a day here
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        pieces_per_day = con.execute("select experiment_id, ds, count(*), max(shard) from stratum_pieces "
                                     "group by all order by all").fetchall()
        quantile_days = con.execute("select count(distinct ds) from bid_quantiles").fetchone()[0]
    assert [(e, n, s) for e, _, n, s in pieces_per_day] == [(e, 1, 0) for e in ("banners", "tiles") for _ in DAYS]
    assert quantile_days == 3


def test_a_day_split_into_shards_combines_its_shards_and_the_days(three_days, tmp_path, capsys):
    """A tiny ``max_bids_per_shard`` (15 000 bids a day -> 4 shards): one mapped ``estimate_shard``
    task per shard of each experiment; the daily rows combine the shards' pieces (each shard
    estimated from its own auctions, chosen by ``shard_of``), are ``counterbid estimate`` of the
    day's log under the same sharding, and the to-date rows combine the stored pieces of the
    window's days."""
    root, conf, experiments, _ = three_days
    db = tmp_path / "sharded.duckdb"
    runs = run_days(DAYS, conf={**conf, "results_database": str(db), "staging_root": str(tmp_path / "stage"),
                                "max_bids_per_shard": "4000"})
    assert [r.state for r in runs] == ["success"] * 3, [r.line() for r in runs]
    for run in runs:  # 2 experiments x 4 shards, each its own task instance
        mapped = sorted(m for task_id, m, state, _ in run.tasks if task_id == "estimate_shard" and state == "success")
        assert mapped == list(range(8)), run.tasks
    _assert_like_the_command_line(root, db, experiments, DAYS[0], capsys, shards=4, max_bids=4000)
    daily, to_date = _table(db, "arm_estimates"), _table(db, "arm_estimates_to_date")
    lake = _lake(root)
    exp = experiments["tiles"]
    pieces = {}
    for day in DAYS:
        frame = lake[(lake["experiment_id"] == "tiles") & (lake["ds"] == day)].reset_index(drop=True)
        shard = shard_of(frame["auction_id"], 4)
        pieces[day] = [p for k in range(4) for p in stratum_pieces(frame[shard == k].reset_index(drop=True), exp,
                                                                      shard=k, day=day, cluster=DEFAULT_CLUSTER)]
        got = daily[(daily["experiment_id"] == "tiles") & (daily["ds"] == pd.Timestamp(day))]
        _assert_rows_equal(got, combine_pieces(pieces[day], exp, cluster=DEFAULT_CLUSTER).table)
        assert set(got.loc[got["metric"] == "revenue_per_auction", "n_auctions"]) == {frame["auction_id"].nunique()}
    last = to_date[(to_date["experiment_id"] == "tiles") & (to_date["ds"] == pd.Timestamp(DAYS[2]))]
    _assert_rows_equal(last, combine_pieces(pieces[DAYS[1]] + pieces[DAYS[2]], exp, cluster=DEFAULT_CLUSTER).table)
    with duckdb.connect(str(db), read_only=True) as con:
        shards = con.execute("select ds, count(distinct shard) from stratum_pieces where experiment_id = 'tiles' "
                             "group by ds order by ds").fetchall()
    assert [n for _, n in shards] == [4, 4, 4]


def _assert_like_the_command_line(root, db, experiments, day, capsys, *, shards, max_bids):
    """The stored daily rows of ``day`` equal ``counterbid estimate`` of each experiment's log of that day."""
    import json

    from counterbid.cli import main

    daily = _table(db, "arm_estimates")
    for exp in experiments.values():
        capsys.readouterr()  # the DAG runs' log lines
        code = main(["estimate", "--bids", str(root / "bids" / f"ds={day}" / f"{exp.id}.parquet"), "--experiment",
                     str(root / "spec.yaml"), "--experiment-id", exp.id, "--format", "json",
                     "--max-bids-per-shard", str(max_bids), "--cluster", DEFAULT_CLUSTER])
        out, err = capsys.readouterr()
        assert code == 0, err
        result = json.loads(out)
        assert result["shards"] == shards
        want = pd.DataFrame(result["rows"])
        got = daily[(daily["experiment_id"] == exp.id) & (daily["ds"] == pd.Timestamp(day))]
        merged = want.merge(got, on=["arm", "metric"], suffixes=("", "_db"), validate="one_to_one")
        assert len(merged) == len(want) == len(got)
        for col in ("estimate", "std_error"):  # the JSON output keeps 10 decimals
            np.testing.assert_allclose(merged[f"{col}_db"].to_numpy(float), merged[col].to_numpy(float), rtol=0, atol=1e-10)
        assert merged["n_auctions"].tolist() == merged["n_auctions_db"].tolist()


def test_level_and_cluster_are_run_parameters(three_days, tmp_path):
    """A run's conf sets the level and clustering; the stored intervals are those, and say so."""
    root, conf, experiments, _ = three_days
    db = tmp_path / "params.duckdb"
    runs = run_days(DAYS[:1], conf={**conf, "results_database": str(db), "staging_root": str(tmp_path / "stage"),
                                    "confidence_level": 0.9, "cluster": "bidder"})
    assert [r.state for r in runs] == ["success"], [r.line() for r in runs]
    daily = _table(db, "arm_estimates")
    lake = _lake(root)
    for exp in experiments.values():
        bids = lake[(lake["experiment_id"] == exp.id) & (lake["ds"] == DAYS[0])].reset_index(drop=True)
        want = estimate_arms(bids, exp, confidence_level=0.9, cluster="bidder")
        got = daily[daily["experiment_id"] == exp.id].set_index(["arm", "metric"]).loc[list(zip(want.table["arm"], want.table["metric"]))]
        np.testing.assert_array_equal(got["ci_low"].to_numpy(float), want.table["ci_low"].to_numpy(float))  # NaN == NaN here
        np.testing.assert_array_equal(got["ci_high"].to_numpy(float), want.table["ci_high"].to_numpy(float))
        assert set(got["confidence_level"]) == {0.9}
    assert set(daily.loc[daily["metric"] != "realized_revenue_per_auction", "cluster"]) == {"bidder"}


def test_rerun_replaces_rows_without_duplicates(three_days):
    root, conf, _, _ = three_days
    before = {t: _table(conf["results_database"], t) for t in ("arm_estimates", "arm_estimates_to_date")}
    runs = run_days(DAYS, conf=conf)
    assert [r.state for r in runs] == ["success"] * 3
    for name, old in before.items():
        new = _table(conf["results_database"], name)
        assert len(new) == len(old)
        assert not new.duplicated(["experiment_id", "ds", "arm", "metric"]).any()
        provenance = ["run_id", "computed_at"]
        pd.testing.assert_frame_equal(new.drop(columns=provenance), old.drop(columns=provenance), check_exact=True)
        assert set(new["run_id"]).isdisjoint(old["run_id"])  # really rewritten by the new runs
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        lift = con.execute("select span, count(*) from arm_lift group by span order by span").fetchall()
        cumulative = con.execute("select distinct ds from arm_estimates_cumulative").fetchall()
        weights = con.execute("select count(*) from arm_position_weights").fetchone()[0]
    assert lift == [("day", 6), ("to_date", 6)]  # 2 experiments x 1 non-control arm x 3 days (day 1's to date: no number)
    assert cumulative == [(DAYS[-1],)]
    assert weights == 3 * (3 + 3 + 2 + 2)  # days x (positions of each arm)
    assert not any((root / "staging").rglob("*.parquet"))


@pytest.mark.slow
def test_backfill_command_writes_what_the_dag_writes(three_days, tmp_path):
    """``counterbid backfill`` in its own process (fresh Airflow home) for the first two days."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    root, conf, _, _ = three_days
    results = tmp_path / "backfill.duckdb"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("AIRFLOW", "COUNTERBID_"))}
    exe = Path(sys.executable).with_name("counterbid")
    done = subprocess.run(
        [str(exe), "backfill", "--lake", conf["lake_root"], "--experiments", conf["spec_path"], "--results", str(results),
         "--start", str(DAYS[0]), "--end", str(DAYS[1])],
        env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    assert f"{DAYS[1]} success" in done.stderr
    provenance = ["run_id", "computed_at"]
    for name in ("arm_estimates", "arm_estimates_to_date", "arm_position_weights"):
        got = _table(results, name).drop(columns=provenance)
        want = _table(conf["results_database"], name).drop(columns=provenance)
        want = want[want["ds"] <= pd.Timestamp(DAYS[1])].reset_index(drop=True)
        pd.testing.assert_frame_equal(got, want, check_exact=True)


@pytest.mark.parametrize("argv, message", [
    (["--start", "2026-03-02", "--end", "someday"], "--end: must be a date"),
    (["--start", "2026-03-05", "--end", "2026-03-02"], "is before --start"),
    (["--start", "2026-03-02", "--end", "2026-03-02", "--lake", "/no/such/lake"], "no such folder"),
])
def test_backfill_bad_input_is_one_line(argv, message, tmp_path, capsys):
    from counterbid.cli import main

    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC_TEXT)
    base = {"--lake": str(tmp_path), "--experiments": str(spec), "--results": str(tmp_path / "r.duckdb")}
    flags = dict(zip(argv[::2], argv[1::2]))
    args = [x for k, v in {**base, **flags}.items() for x in (k, v)]
    assert main(["backfill", *args]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("counterbid: error:") and message in err[0]
    assert not (tmp_path / "r.duckdb").exists()  # nothing half-written


def test_backfill_rejects_a_broken_spec(tmp_path, capsys):
    from counterbid.cli import main

    spec = tmp_path / "spec.yaml"
    spec.write_text("experiments: [{id: x, arms: [{name: a, share: 0.4, position_weights: [1.0]}]}]\n")
    assert main(["backfill", "--lake", str(tmp_path), "--experiments", str(spec), "--results", str(tmp_path / "r.duckdb"),
                 "--start", "2026-03-02", "--end", "2026-03-02"]) == 2
    assert "shares must sum to 1" in capsys.readouterr().err


MEASURED_SPEC = """
experiments:
  - id: strips
    control_arm: flat
    start: 2026-03-02
    arms:
      - {name: flat,  share: 0.6, position_weights: measured}
      - {name: steep, share: 0.4, position_weights: [0.5, 0.15, 0.05]}
"""


def test_measured_position_weights_run_through_validate_estimate_and_write(bag, tmp_path):
    """An arm with ``position_weights: measured``, a real click log, two days under ``dag.test``.

    The weights the DAG stores must be the weighted isotonic fit of the click log's pooled
    clicks / impressions (computed here with ``scipy.optimize.isotonic_regression`` directly on
    the Parquet files), and the stored estimates must be ``estimate_arms`` run with them.
    """
    from scipy.optimize import isotonic_regression

    spec = tmp_path / "spec.yaml"
    spec.write_text(MEASURED_SPEC)
    measured = load_experiments(spec)["strips"]
    # the bids are simulated with known weights for the 'measured' arm; the click log follows them
    truth = measured.with_position_weights({"flat": [0.4, 0.2, 0.1]})
    write_bid_lake(tmp_path / "bids", [truth], start=START, days=2, auctions_per_day=3000, n_bidders=4, seed=8,
                   clicks_root=tmp_path / "clicks")
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec),
            "results_database": str(tmp_path / "results.duckdb"), "staging_root": str(tmp_path / "staging"),
            "clicks_root": str(tmp_path / "clicks")}
    runs = run_days(DAYS[:2], conf=conf)
    assert [r.state for r in runs] == ["success"] * 2, [r.line() for r in runs]

    stored = _table(conf["results_database"], "arm_position_weights")
    clicks = pads.dataset(str(tmp_path / "clicks"), format="parquet", partitioning="hive").to_table().to_pandas()
    clicks["ds"] = pd.to_datetime(clicks["ds"]).dt.date
    lake = _lake(tmp_path)
    daily = _table(conf["results_database"], "arm_estimates")
    for day in DAYS[:2]:
        rows = stored[stored["ds"] == pd.Timestamp(day)]
        flat = rows[rows["arm"] == "flat"].sort_values("position")
        assert set(flat["source"]) == {"measured"} and set(rows.loc[rows["arm"] == "steep", "source"]) == {"spec"}
        # the default window (7 days) reaches back before the first day: every day so far is pooled
        assert set(flat["first_click_ds"]) == {pd.Timestamp(day - dt.timedelta(days=6))}
        pooled = (clicks[(clicks["arm"] == "flat") & (clicks["ds"] <= day)]
                  .groupby("position")[["impressions", "clicks"]].sum().sort_index())
        want = isotonic_regression((pooled["clicks"] / pooled["impressions"]).to_numpy(),
                                   weights=pooled["impressions"].to_numpy(float), increasing=False).x
        assert flat["position"].tolist() == pooled.index.tolist()
        assert flat["impressions"].tolist() == pooled["impressions"].tolist()
        assert flat["clicks"].tolist() == pooled["clicks"].tolist()
        np.testing.assert_allclose(flat["weight"].to_numpy(), want, rtol=1e-12)
        assert flat["weight"].to_numpy() == pytest.approx([0.4, 0.2, 0.1], abs=0.02)  # the simulated truth
        filled = measured.with_position_weights({"flat": flat["weight"].tolist()})
        frame = lake[lake["ds"] == day].reset_index(drop=True)
        want_est = estimate_arms(frame, filled)
        got = daily[daily["ds"] == pd.Timestamp(day)]
        merged = want_est.table.merge(got, on=["arm", "metric"], how="outer", suffixes=("", "_db"), indicator=True)
        assert (merged["_merge"] == "both").all() and len(got) == len(want_est.table)
        for col in VALUES:
            pd.testing.assert_series_equal(merged[col], merged[f"{col}_db"], check_names=False, check_exact=True,
                                           check_dtype=False)
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        stored_checks = con.execute("select count(*), count(distinct ds) from data_checks where experiment_id = 'strips'").fetchone()
    assert stored_checks[0] > 0 and stored_checks[1] == 2  # the full runner ran on both days


def _pg_table(url, name):
    import psycopg

    key = "position" if name == "arm_position_weights" else "metric"
    with psycopg.connect(url) as con:
        cur = con.execute(f"select * from main.{name} order by experiment_id, ds, arm, {key}")
        return pd.DataFrame.from_records(cur.fetchall(), columns=[d.name for d in cur.description])


def _comparable(frame):
    """Provenance dropped; dates, times and nulls in one representation (DuckDB's .df() vs psycopg's objects)."""
    out = frame.drop(columns=["run_id", "computed_at"]).copy()
    for col in ("ds", "first_ds", "first_click_ds"):
        if col in out:
            out[col] = pd.to_datetime(out[col]).astype("datetime64[us]")
    for col in ("impressions", "clicks"):
        if col in out:
            out[col] = out[col].astype("Float64")
    return out.reset_index(drop=True)


@pytest.mark.postgres
def test_three_days_into_postgres_match_duckdb_and_rerun_identically(three_days, postgres_url, record_property):
    """The same 3 days through the DAG into PostgreSQL: every row equals the DuckDB sink's, before and after a rerun."""
    root, conf, _, _ = three_days
    pg_conf = {**conf, "results_database": postgres_url, "staging_root": str(root / "staging-pg")}
    tables = ("arm_estimates", "arm_estimates_to_date", "arm_position_weights")
    runs = run_days(DAYS, conf=pg_conf)
    assert [r.state for r in runs] == ["success"] * 3, [r.line() for r in runs]
    first = {t: _pg_table(postgres_url, t) for t in tables}
    for name in tables:
        want = _comparable(_table(conf["results_database"], name))
        got = _comparable(first[name])
        # to-date rows start after the warm-up day the window leaves out: as many days as DuckDB holds
        assert len(got) == len(want) > 0 and got["ds"].nunique() == want["ds"].nunique() >= 2
        pd.testing.assert_frame_equal(got, want, check_exact=True, check_dtype=False, obj=name)
        record_property(f"postgres_rows_{name}", len(got))
        print(f"\n{name}: {len(got)} rows in PostgreSQL, identical to DuckDB's (all columns but run_id, computed_at)")
    runs = run_days(DAYS, conf=pg_conf)
    assert [r.state for r in runs] == ["success"] * 3
    for name in tables:
        again = _pg_table(postgres_url, name)
        assert len(again) == len(first[name])
        pd.testing.assert_frame_equal(_comparable(again), _comparable(first[name]), check_exact=True, obj=name)
        assert set(again["run_id"]).isdisjoint(first[name]["run_id"])  # really rewritten
    import psycopg

    with psycopg.connect(postgres_url) as con:
        lift = con.execute("select span, count(*) from main.arm_lift group by span order by span").fetchall()
        cumulative = con.execute("select distinct ds from main.arm_estimates_cumulative").fetchall()
        checks = con.execute("select count(distinct (experiment_id, ds)) from main.data_checks").fetchone()[0]
    # day 1 (warm-up) has to-date rows too, without numbers (status warming_up): 3 days x 2 lift rows per span
    assert lift == [("day", 6), ("to_date", 6)]
    # the cumulative view holds the latest day only; every (experiment, day) has its checks stored
    assert cumulative == [(DAYS[-1],)]
    assert checks == len(DAYS) * len(load_experiments(conf["spec_path"])) == 6
    # the stored check outcomes too (the DuckDB file's are from its own latest run of the same days)
    check_cols = "experiment_id, ds, \"check\", severity, passed, observed, threshold, cast(details as varchar) as details"
    order = "order by experiment_id, ds, \"check\""
    with duckdb.connect(conf["results_database"], read_only=True) as con:
        want = con.execute(f"select {check_cols} from data_checks {order}").df()
    with psycopg.connect(postgres_url) as con:
        cur = con.execute(f"select {check_cols} from main.data_checks {order}")
        got = pd.DataFrame.from_records(cur.fetchall(), columns=[d.name for d in cur.description])
    assert len(got) == len(want) > 0
    pd.testing.assert_frame_equal(_comparable(got.assign(run_id=0, computed_at=0)),
                                  _comparable(want.assign(run_id=0, computed_at=0)), check_exact=True, check_dtype=False)
    print(f"data_checks: {len(got)} rows in PostgreSQL, identical to DuckDB's (all columns but run_id, checked_at)")
