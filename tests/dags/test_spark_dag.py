"""The daily DAG with the Spark engine (``COUNTERBID_ENGINE=spark``) under ``dag.test``.

The estimate task runs through the Apache Spark provider on a ``local[2]`` session built from an
Airflow connection defined in the environment. Every stored row must equal the local engine's on
the same lake; a shard of single-bidder auctions only is left out on both; bad bids stop both
settings at the shared validate step.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
import threading
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
import yaml

# before any test imports Great Expectations: its Spark support (the Spark validate step's contract) is probed
# once, at import; Airflow runs each task in a process of its own, dag.test() runs them all in this one
pytest.importorskip("pyspark")

from counterbid.cli.backfill import DAG_ID, run_days
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.estimators import shard_of

from .conftest import START

pytestmark = pytest.mark.spark

DAYS = [START, START + dt.timedelta(days=1)]
SPARK_CONN = "counterbid_test_spark"
#: The cluster's Airflow connection: master URL as host, Spark settings as extras (the provider's reading).
SPARK_CONNECTION = {"conn_type": "spark", "host": "local[2]",
                    "extra": {"spark.sql.shuffle.partitions": "4", "spark.driver.memory": "1g",
                              "spark.ui.enabled": "false", "spark.ui.showConsoleProgress": "false"}}
# started a week before the days run here: past the warm-up check, so both days are in the to-date window
SPEC = {"experiments": [{"id": "tiles", "control_arm": "plain", "start": str(START - dt.timedelta(days=7)), "arms": [
    {"name": "plain", "share": 0.6, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bold", "share": 0.4, "position_weights": [0.5, 0.15, 0.05]}]}]}
#: Every table the write step fills from the estimate step's files (the check tables are the validate step's).
ESTIMATE_TABLES = ("arm_estimates", "arm_estimates_to_date", "stratum_pieces", "stratum_piece_arms",
                   "stratum_piece_covariance", "stratum_piece_bidder_sums")
PROVENANCE = ("run_id", "computed_at")
#: The issue's bound: Spark's numbers equal the local engine's to 1e-9 relative.
RTOL = 1e-9


@pytest.fixture
def spark_engine(monkeypatch, java_home):
    """The DAG parsed with the Spark engine; the cluster's connection in ``AIRFLOW_CONN_<ID>``; a Java runtime."""
    monkeypatch.setenv("JAVA_HOME", java_home)

    def use(engine: str) -> None:
        monkeypatch.setenv("COUNTERBID_ENGINE", engine)
        monkeypatch.setenv("COUNTERBID_SPARK_CONN", SPARK_CONN if engine == "spark" else "")
        monkeypatch.setenv(f"AIRFLOW_CONN_{SPARK_CONN.upper()}", json.dumps(SPARK_CONNECTION))

    return use


def _stored(path) -> dict[str, pd.DataFrame]:
    """Every estimate table of a results file, provenance dropped, rows in the order of their keys."""
    out = {}
    with duckdb.connect(str(path), read_only=True) as con:
        for name in ESTIMATE_TABLES:
            frame = con.execute(f"select * from {name}").df().drop(columns=list(PROVENANCE))
            keys = [c for c in frame.columns if not pd.api.types.is_float_dtype(frame[c])]
            out[name] = frame.sort_values(keys).reset_index(drop=True)
    return out


def _stored_checks(con) -> pd.DataFrame:
    """The stored check outcomes (details and provenance aside), by day and check."""
    return con.execute('select ds, "check", severity, passed, observed, threshold from data_checks '
                       'order by ds, "check"').df()


class StagingWatch:
    """Looks at the staging folder every few milliseconds while a DAG runs (a thread): the bid files and the day
    manifests it ever saw there. The local load step's shard files stay from load to write, so they are seen."""

    def __init__(self, root: Path) -> None:
        self.root, self.bid_files, self.manifests = root, set(), set()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, daemon=True)

    def _watch(self) -> None:
        while not self._stop.wait(0.01):
            for path in self.root.glob("*/ds=*/day/**/*"):  # <experiment>/ds=<day>/day: what the load step wrote
                if path.name == "shards.json":
                    self.manifests.add(str(path))
                elif path.suffix == ".parquet":
                    self.bid_files.add(str(path))

    def __enter__(self) -> "StagingWatch":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join(timeout=30)


def _estimate_summaries(days: list[dt.date]) -> list[dict]:
    """What the estimate task of each day's latest run returned (its XCom), in day order."""
    from airflow.models.dagrun import DagRun
    from airflow.models.xcom import XComModel
    from airflow.utils.session import create_session

    out = []
    with create_session() as session:
        for day in days:
            run = (session.query(DagRun).filter(DagRun.dag_id == DAG_ID,
                                                DagRun.logical_date == dt.datetime.combine(day, dt.time(), dt.timezone.utc))
                   .one())
            (value,) = session.query(XComModel.value).filter(
                XComModel.dag_run_id == run.id, XComModel.task_id == "experiment.estimate",
                XComModel.key == "return_value").one()
            out.append(json.loads(value) if isinstance(value, str) else value)
    return out


def _largest_relative_difference(got: pd.DataFrame, want: pd.DataFrame, name: str) -> float:
    """Non-numeric columns equal; numeric ones to RTOL relative (NaN where the other is NaN); the largest difference."""
    assert list(got.columns) == list(want.columns), name
    assert len(got) == len(want) > 0, name
    largest = 0.0
    for col in want.columns:
        if pd.api.types.is_numeric_dtype(want[col]) and not pd.api.types.is_bool_dtype(want[col]):
            a, b = got[col].to_numpy(float), want[col].to_numpy(float)
            assert np.array_equal(np.isnan(a), np.isnan(b)), f"{name}.{col}: NaN in different rows"
            finite = ~np.isnan(b)
            scale = np.maximum(np.abs(a[finite]), np.abs(b[finite]))
            diff = np.abs(a[finite] - b[finite])
            rel = np.divide(diff, scale, out=np.zeros_like(diff), where=scale > 0)
            if rel.size:
                largest = max(largest, float(rel.max()))
            assert (rel <= RTOL).all(), f"{name}.{col}: relative difference {rel.max():.3g} > {RTOL}"
        else:
            pd.testing.assert_series_equal(got[col], want[col], check_dtype=False, obj=f"{name}.{col}")
    return largest


def test_spark_engine_stores_the_local_engines_rows(spark_engine, airflow_db, tmp_path, record_property):
    """Two days of two strata (4 and 6 bidders), each split by the load step into 3 shards: the
    Spark setting's stored day rows, to-date rows (day 2 combines day 1's stored pieces with its
    own) and stratum pieces equal the local engine's to 1e-9 relative."""
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(SPEC))
    experiment = parse_experiments(SPEC)["tiles"]
    write_bid_lake(tmp_path / "bids", [experiment], start=START, days=len(DAYS), auctions_per_day=500,
                   n_bidders={4: 0.5, 6: 0.5}, seed=5)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "staging_root": str(tmp_path / "stage"),
            "clicks_root": "", "max_bids_per_shard": "1000"}  # about 2 500 bids a day: 3 shards
    results, watched = {}, {}
    for engine in ("local", "spark"):
        spark_engine(engine)
        results[engine] = tmp_path / f"{engine}.duckdb"
        with StagingWatch(tmp_path / "stage") as watched[engine]:
            runs = run_days(DAYS, conf={**conf, "results_database": str(results[engine])})
        assert [r.state for r in runs] == ["success"] * len(DAYS), [r.line() for r in runs]
        # the estimate ran on the engine asked for, in 3 shards: its summary (XCom) says so
        assert [(s["engine"], s["shards"]) for s in _estimate_summaries(DAYS)] == [(engine, 3)] * len(DAYS)
    local, spark = _stored(results["local"]), _stored(results["spark"])
    assert sorted(set(local["stratum_pieces"]["shard"])) == [0, 1, 2]
    assert sorted(set(local["stratum_pieces"]["n_bidders"])) == [4, 6]
    assert len(local["stratum_piece_bidder_sums"]) > 0  # bidder ids repeat: clustered by bidder, sums stored
    assert set(local["arm_estimates_to_date"]["n_days_used"]) == {1, 2}
    largest = {name: _largest_relative_difference(spark[name], local[name], name) for name in ESTIMATE_TABLES}
    # the checks ran on Spark (load and validate too): the same stored outcomes and day summaries for the drift check
    with duckdb.connect(str(results["local"]), read_only=True) as a, duckdb.connect(str(results["spark"]),
                                                                                      read_only=True) as b:
        pd.testing.assert_frame_equal(_stored_checks(b), _stored_checks(a), rtol=RTOL)
        assert len(_stored_checks(a)) > 10 and _stored_checks(a)["passed"].all()
        quantiles = [c.execute("select * exclude (run_id, computed_at) from bid_quantiles order by all").df()
                     for c in (a, b)]
        assert len(quantiles[0]) > 0
        largest["bid_quantiles"] = _largest_relative_difference(quantiles[1], quantiles[0], "bid_quantiles")
    # no step of the Spark setting copied the day onto the worker: the staging folder held its manifest, no bids
    assert watched["local"].bid_files and watched["local"].manifests  # the watch sees the local route's shards
    assert watched["spark"].manifests and not watched["spark"].bid_files, watched["spark"].bid_files
    record_property("spark_vs_local_largest_relative_difference", max(largest.values()))
    print(f"\nlargest relative difference, Spark vs local: {largest}")


#: Single-bidder auctions are accepted (left out and counted) by this spec's contract.
LONE_SPEC = {"experiments": [{**SPEC["experiments"][0], "checks": {"contract": {"min_bidders": 1}}}]}


def _day_with_a_shard_of_lone_bidders(day_folder: Path, shards: int) -> int:
    """A day whose shard 0 (of ``shards``) holds only single-bidder auctions; the others 4 bidders each.

    The day as a whole is valid (the checks pass, the single-bidder auctions are left out); shard 0
    alone has nothing to estimate, and must add only its left-out auctions. Returns the number of bids.
    """
    experiment = parse_experiments(LONE_SPEC)["tiles"]
    frame = simulate_experiment(st.uniform(0, 1), experiment, n_bidders=4, n_auctions=600, rng=3)
    frame = frame.drop(columns=["ds", "value", "clicks"])
    lone = shard_of(frame["auction_id"], shards) == 0
    top = frame["position"] == 1
    frame = frame[~lone | top].reset_index(drop=True)  # shard 0: only each auction's top bid
    day_folder.mkdir(parents=True)
    frame.to_parquet(day_folder / "tiles.parquet", index=False)
    return len(frame)


def test_a_shard_of_single_bidder_auctions_is_left_out_on_both_engines(spark_engine, airflow_db, tmp_path):
    """A valid day whose shard 0 holds only single-bidder auctions: both engines estimate it from the
    other shards (shard 0 adds its left-out auctions), with the same rows. Both engines used to fail
    the day because shard 0 alone had nothing to estimate."""
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(LONE_SPEC))
    n_bids = _day_with_a_shard_of_lone_bidders(tmp_path / "bids" / f"ds={START}", shards=3)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "staging_root": str(tmp_path / "stage"),
            "clicks_root": "", "max_bids_per_shard": str(math.ceil(n_bids / 3))}
    stored = {}
    for engine in ("local", "spark"):
        spark_engine(engine)
        (run,) = run_days([START], conf={**conf, "results_database": str(tmp_path / f"{engine}.duckdb")})
        assert run.state == "success", run.line()
        (summary,) = _estimate_summaries([START])
        assert (summary["engine"], summary["shards"]) == (engine, 3)
        with duckdb.connect(str(tmp_path / f"{engine}.duckdb"), read_only=True) as con:
            stored[engine] = con.execute("select * from arm_estimates order by arm, metric").df().drop(
                columns=list(PROVENANCE))
            assert sorted(r[0] for r in con.execute("select distinct shard from stratum_pieces").fetchall()) == [1, 2]
            # the validate step's distribution checks read shard 1, the first shard with an auction to check
            (details,) = con.execute("select details from data_checks where \"check\" = 'monotone_values'").fetchone()
            assert json.loads(details)["sample"]["shard"] == 1, details
    _largest_relative_difference(stored["spark"], stored["local"], "arm_estimates")


def test_bad_bids_stop_both_settings_at_validate_with_the_same_line(spark_engine, airflow_db, tmp_path, capfd, caplog):
    """A negative bid: the Spark validate step refuses the day as the local one does -- the same failing
    checks with the same counts and offending auction, the same stored check rows -- and the estimate and
    write steps do not run (nothing is written). Bad input that reaches the estimate step itself ends in
    the local engine's line on Spark too (``tests/readers/test_spark_shards.py``,
    ``tests/operators/test_spark_estimate.py``)."""
    spec = tmp_path / "spec.yaml"
    spec.write_text(yaml.safe_dump(SPEC))
    experiment = parse_experiments(SPEC)["tiles"]
    write_bid_lake(tmp_path / "bids", [experiment], start=START, days=1, auctions_per_day=300, n_bidders=4, seed=9)
    day_file = next((tmp_path / "bids" / f"ds={START}").glob("*.parquet"))
    frame = pd.read_parquet(day_file)
    frame.loc[frame.index[123], "bid"] = -1.0
    frame.to_parquet(day_file, index=False)
    conf = {"lake_root": str(tmp_path / "bids"), "spec_path": str(spec), "staging_root": str(tmp_path / "stage"),
            "clicks_root": "", "max_bids_per_shard": "400"}
    lines, checks, auctions = {}, {}, {}
    for engine in ("local", "spark"):
        spark_engine(engine)
        capfd.readouterr()
        caplog.clear()
        (run,) = run_days([START], conf={**conf, "results_database": str(tmp_path / f"{engine}.duckdb")})
        out = capfd.readouterr()
        states = {t: s for t, _, s, _ in run.tasks}
        assert run.state == "failed" and states["experiment.validate"] == "failed", states
        # both engines: the estimate step is held back by its failed validate step (local engine: no
        # experiment passed, so no shard task is mapped either, and day_settled fails the run too)
        assert states["experiment.estimate"] == "upstream_failed", states
        assert engine == "spark" or states["day_settled"] == "upstream_failed", states
        text = out.out + out.err + caplog.text
        # the alert's line up to its details (the local route's details also name the staged shard file)
        found = sorted(set(re.findall(r"contract_bids_valid \[error\] FAILED: [^{\n]*", text)))
        assert found, text[-3000:]
        lines[engine] = found
        with duckdb.connect(str(tmp_path / f"{engine}.duckdb"), read_only=True) as con:
            tables = {r[0] for r in con.execute("select table_name from information_schema.tables").fetchall()}
            if "arm_estimates" in tables:
                assert con.execute("select count(*) from arm_estimates").fetchone()[0] == 0  # nothing half-written
            checks[engine] = _stored_checks(con)
            (details,) = con.execute("select details from data_checks where \"check\" = 'contract_bids_valid'").fetchone()
            auctions[engine] = [e["auction_id"] for f in json.loads(details)["failures"] for e in f["examples"]]
    assert lines["spark"] == lines["local"]
    pd.testing.assert_frame_equal(checks["spark"], checks["local"])
    assert not checks["local"]["passed"].all() and "contract_bids_valid" in set(checks["local"]["check"])
    assert auctions["spark"] == auctions["local"] == [int(frame.loc[frame.index[123], "auction_id"])]


def test_engine_setting_picks_the_estimate_operator(spark_engine, airflow_db, monkeypatch):
    """Parse time: ``spark`` makes the estimate task the provider-run operator on the named connection
    (reading ``lake_root``); an unknown engine is an import error naming the setting."""
    from airflow.dag_processing.dagbag import DagBag

    from counterbid.cli.backfill import dags_folder
    from counterbid.operators.pipeline import EstimateArmsOperator
    from counterbid.operators.spark_pipeline import SparkEstimateArmsOperator

    spark_engine("spark")
    estimate = DagBag(dag_folder=str(dags_folder())).get_dag(DAG_ID).get_task("experiment.estimate")
    assert isinstance(estimate, SparkEstimateArmsOperator)
    assert (estimate.conn_id, estimate.lake_root) == (SPARK_CONN, "{{ params.spark_lake_root or params.lake_root }}")
    assert {"lake_root", "conn_id", "confidence_level", "cluster", "experiment_id"} <= set(estimate.template_fields)
    spark_engine("local")
    estimate = DagBag(dag_folder=str(dags_folder())).get_dag(DAG_ID).get_task("experiment.estimate")
    assert type(estimate) is EstimateArmsOperator
    monkeypatch.setenv("COUNTERBID_ENGINE", "dask")
    errors = DagBag(dag_folder=str(dags_folder())).import_errors
    assert len(errors) == 1 and "COUNTERBID_ENGINE must be 'local' or 'spark'; got 'dask'" in next(iter(errors.values()))
