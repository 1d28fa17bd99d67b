"""Bad-input matrix: one test per case, each a clear one-line error, a failure, and nothing written.

Lake cases go through the daily DAG (``dag.test`` via the backfill runner, real DuckDB, real
Parquet); bid-log and spec cases go through ``counterbid estimate``. Single-bidder auctions are the
one exception: left out and counted, not fatal.
"""

from __future__ import annotations

import datetime as dt
import json
import re
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main as cli_main
from counterbid.cli.backfill import run_days
from counterbid.estimators import parse_experiments, simulate_experiment

DAY = dt.date(2026, 3, 2)
EVIL = "'; drop table arm_estimates; --"
SPEC = {"experiments": [{"id": "tiles", "control_arm": "plain", "start": "2026-03-01", "arms": [
    {"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}


def _bids(n_auctions=400, seed=1, first_auction_id=0) -> pd.DataFrame:
    exp = parse_experiments(SPEC)["tiles"]
    frame = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=n_auctions, rng=seed,
                                first_auction_id=first_auction_id)
    return frame.drop(columns=["ds", "value", "clicks"])


# -- lake cases: the daily DAG -------------------------------------------------------------------
def _pipeline(tmp_path: Path, capture, write_day, *, spec=SPEC, results=None):
    """Lake with a good previous day and a day written by ``write_day(folder)``; run the DAG on it."""
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    lake = tmp_path / "bids"
    previous = lake / f"ds={DAY - dt.timedelta(days=1)}"
    previous.mkdir(parents=True)
    _bids(seed=9, first_auction_id=10**6).to_parquet(previous / "tiles.parquet", index=False)
    day = lake / f"ds={DAY}"
    day.mkdir()
    write_day(day)
    conf = {"lake_root": str(lake), "spec_path": str(tmp_path / "spec.yaml"),
            "results_database": results or str(tmp_path / "results.duckdb"), "staging_root": str(tmp_path / "stage"),
            "clicks_root": ""}
    capfd, caplog = capture
    capfd.readouterr()
    caplog.clear()
    (run,) = run_days([DAY], conf=conf)
    out = capfd.readouterr()
    return run, conf, out.out + out.err + "\n" + caplog.text


def _failed(run, step: str) -> None:
    states = {t: s for t, _, s, _ in run.tasks}
    assert run.state == "failed"
    assert states[f"experiment.{step}"] == "failed", states
    # with the mapped shard tasks between them, a write after a failed step ends skipped or upstream_failed
    assert states["experiment.write"] in ("upstream_failed", "failed", "skipped"), states


def _nothing_written(conf, experiment_id="tiles") -> None:
    path = conf["results_database"]
    if not Path(path).exists():
        return
    with duckdb.connect(path, read_only=True) as con:
        tables = {r[0] for r in con.execute("select table_name from information_schema.tables").fetchall()}
        if "arm_estimates" in tables:
            n = con.execute("select count(*) from arm_estimates where experiment_id = ? and ds = ?",
                            [experiment_id, DAY]).fetchone()[0]
            assert n == 0


def _one_line(text: str, pattern: str) -> str:
    """The single log line that matches ``pattern`` (the failed check or the alert)."""
    lines = [ln for ln in text.splitlines() if re.search(pattern, ln)]
    assert lines, f"no line matches {pattern!r} in:\n{text[-3000:]}"
    return lines[0]


def test_missing_partition(airflow_db, tmp_path, capfd, caplog):
    run, conf, text = _pipeline(tmp_path, (capfd, caplog), lambda day: day.rmdir())
    _failed(run, "load")  # retryable in production (late data); the test runs without retries
    line = _one_line(text, r"MissingPartitionError: .*partition ds=\S+ is missing")
    assert f"ds={DAY}" in line
    _nothing_written(conf)


def test_partition_behind_a_symbolic_link(airflow_db, tmp_path, capfd, caplog):
    def linked(day):  # the day's files live elsewhere; the lake holds a link to their folder
        elsewhere = tmp_path / "elsewhere"
        elsewhere.mkdir()
        _bids().to_parquet(elsewhere / "tiles.parquet", index=False)
        day.rmdir()
        day.symlink_to(elsewhere, target_is_directory=True)

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), linked)
    _failed(run, "load")  # not read as an empty day: one line naming the linked folder
    line = _one_line(text, r"Exception: .*holds Parquet files behind a symbolic link")
    assert f"ds={DAY}" in line
    _nothing_written(conf)


def test_partition_partly_behind_a_symbolic_link(airflow_db, tmp_path, capfd, caplog):
    def half_linked(day):  # half the day's bids in the lake, half in a linked folder that the glob skips
        bids = _bids()
        half = len(bids) // 2
        bids.iloc[:half].to_parquet(day / "tiles.parquet", index=False)
        elsewhere = tmp_path / "elsewhere"
        elsewhere.mkdir()
        bids.iloc[half:].to_parquet(elsewhere / "tiles.parquet", index=False)
        (day / "late").symlink_to(elsewhere, target_is_directory=True)

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), half_linked)
    _failed(run, "load")  # not estimated on the half the lake's read reaches
    line = _one_line(text, r"Exception: .*holds Parquet files behind a symbolic link")
    assert f"ds={DAY}" in line
    _nothing_written(conf)


def test_empty_partition(airflow_db, tmp_path, capfd, caplog):
    run, conf, text = _pipeline(tmp_path, (capfd, caplog), lambda day: _bids().iloc[:0].to_parquet(day / "tiles.parquet"))
    _failed(run, "validate")
    _one_line(text, r"^\s*- schema_rows \[error\] FAILED: observed 0 vs threshold 1")
    _nothing_written(conf)


def test_corrupt_parquet_file(airflow_db, tmp_path, capfd, caplog):
    def corrupt(day):
        (day / "tiles.parquet").write_bytes(b"PAR1" + b"\x00 not a parquet footer " * 20)

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), corrupt)
    _failed(run, "load")
    line = _one_line(text, r"Error: .*parquet")  # the exception line: what is wrong, and which file
    assert f"ds={DAY}/tiles.parquet" in line and "magic bytes" in line
    _nothing_written(conf)


def test_column_missing(airflow_db, tmp_path, capfd, caplog):
    run, conf, text = _pipeline(tmp_path, (capfd, caplog), lambda day: _bids().drop(columns=["bid"]).to_parquet(day / "tiles.parquet"))
    _failed(run, "validate")
    # the earlier day has the column, so the lake read fills it with nulls on this day
    _one_line(text, r"^\s*- schema_(column|nulls)_bid \[error\] FAILED")
    _nothing_written(conf)


def test_column_of_wrong_type(airflow_db, tmp_path, capfd, caplog):
    def wrong(day):
        frame = _bids()
        frame.assign(position=frame["position"].astype("string")).to_parquet(day / "tiles.parquet")

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), wrong)
    _failed(run, "validate")
    line = _one_line(text, r"^\s*- schema_column_position \[error\] FAILED")
    assert "'found': 'VARCHAR'" in line
    _nothing_written(conf)


def _corrupt(day):
    (day / "tiles.parquet").write_bytes(b"PAR1" + b"\x00 not a parquet footer " * 20)


@pytest.mark.postgres
@pytest.mark.parametrize("write_day, step", [
    (lambda day: day.rmdir(), "load"),
    (_corrupt, "load"),
    (lambda day: _bids().drop(columns=["bid"]).to_parquet(day / "tiles.parquet"), "validate"),
    (lambda day: _bids().iloc[:0].to_parquet(day / "tiles.parquet"), "validate"),
], ids=["missing-partition", "corrupt-parquet", "column-missing", "empty-partition"])
def test_lake_cases_leave_no_rows_in_postgres(write_day, step, airflow_db, tmp_path, capfd, caplog, postgres_url):
    import psycopg

    run, conf, _ = _pipeline(tmp_path, (capfd, caplog), write_day, results=postgres_url)
    _failed(run, step)
    with psycopg.connect(postgres_url) as con:
        present = {r[0] for r in con.execute(
            "select table_name from information_schema.tables where table_schema = 'main'").fetchall()}
        if "arm_estimates" in present:  # created by the validate step's check recorder, never filled
            for table in ("arm_estimates", "arm_estimates_to_date", "arm_position_weights"):
                n = con.execute(f"select count(*) from main.{table} where ds = %s", [DAY]).fetchone()[0]
                assert n == 0, table


def test_sql_looking_experiment_id_is_refused_when_the_spec_loads(airflow_db, tmp_path, capfd, caplog):
    """An id like ``'; drop table ...`` is refused by the spec's own rules (arm names' alphabet), in one
    line naming it, before any experiment is loaded: no staging folder, no row, the table untouched."""
    spec = {"experiments": [SPEC["experiments"][0], {**SPEC["experiments"][0], "id": EVIL}]}

    def both(day):
        _bids().to_parquet(day / "tiles.parquet", index=False)
        _bids(seed=3, first_auction_id=2 * 10**6).assign(experiment_id=EVIL).to_parquet(day / "evil.parquet", index=False)

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), both, spec=spec)
    assert run.state == "failed"
    states = {t: s for t, _, s, _ in run.tasks}
    assert states["active_experiments"] == "failed", states
    assert not any(t.startswith("experiment.") and s == "success" for t, s in states.items()), states
    line = _one_line(text, r"InputError: .*experiment id")
    assert f"experiments[1]: experiment id {EVIL!r} must be 1-128 characters" in line
    assert not (tmp_path / "stage").exists()
    _nothing_written(conf)


# -- bid-log and spec cases: counterbid estimate -----------------------------------------------------
@pytest.fixture
def spec_file(tmp_path):
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump(SPEC))
    return path


def _estimate(tmp_path, capsys, frame: pd.DataFrame | None, spec, *extra) -> tuple[int, str, str]:
    bids = tmp_path / "bids.parquet"
    if frame is not None:
        frame.to_parquet(bids, index=False)
    code = cli_main(["estimate", "--bids", str(bids), "--experiment", str(spec), "--format", "json", *extra])
    out = capsys.readouterr()
    return code, out.out, out.err


def _refused(result, pattern: str) -> str:
    code, out, err = result
    lines = err.strip().splitlines()
    assert code == 2
    assert out == ""  # no rows written
    assert len(lines) == 1 and lines[0].startswith("counterbid: error:"), err
    assert re.search(pattern, lines[0]), lines[0]
    return lines[0]


def _set(frame: pd.DataFrame, row: int, column: str, value) -> pd.DataFrame:
    frame = frame.copy()
    if isinstance(value, str) and column == "bid":
        frame[column] = frame[column].astype(object)
    frame.loc[row, column] = value
    return frame


@pytest.mark.parametrize("value, what", [(np.nan, "NaN or null"), (np.inf, "infinite"), (-0.25, "negative")])
def test_bad_bid_values(tmp_path, capsys, spec_file, value, what):
    line = _refused(_estimate(tmp_path, capsys, _set(_bids(), 37, "bid", value), spec_file), "column 'bid' row 37 is")
    assert what in line and "bids.parquet" in line


def test_string_bids(tmp_path, capsys, spec_file):
    frame = _bids()
    frame["bid"] = frame["bid"].map("{:.4f}".format)
    frame.loc[11, "bid"] = "1,25"
    _refused(_estimate(tmp_path, capsys, frame, spec_file), r"column 'bid' must be numeric .* row 11 holds '1,25'")


def test_duplicate_bid_rows(tmp_path, capsys, spec_file):
    frame = _bids()
    frame = pd.concat([frame, frame.iloc[[42]]], ignore_index=True)
    _refused(_estimate(tmp_path, capsys, frame, spec_file), rf"bids twice in auction .*rows 42 and {len(frame) - 1}")


def test_unknown_arm(tmp_path, capsys, spec_file):
    _refused(_estimate(tmp_path, capsys, _set(_bids(), 5, "arm", "mystery"), spec_file), r"unknown arm 'mystery' at row 5")


def test_auction_split_over_two_arms(tmp_path, capsys, spec_file):
    frame = _bids()
    first = frame.index[frame["auction_id"] == frame.loc[0, "auction_id"]]
    other = "bold" if frame.loc[0, "arm"] == "plain" else "plain"
    frame.loc[first[-1], "arm"] = other
    _refused(_estimate(tmp_path, capsys, frame, spec_file), rf"auction {frame.loc[0, 'auction_id']} has bids under two arms")


def test_single_bidder_auctions_are_left_out_and_counted(tmp_path, capsys, spec_file):
    frame = _bids()
    lone = frame.groupby("auction_id").head(1).head(3).assign(auction_id=lambda f: f["auction_id"] + 10**6)
    code, out, err = _estimate(tmp_path, capsys, pd.concat([frame, lone], ignore_index=True), spec_file)
    assert code == 0
    payload = json.loads(out)
    assert payload["n_excluded_auctions"] == 3
    assert "left out 3 single-bidder auction(s)" in err
    revenue = [r for r in payload["rows"] if r["metric"] == "revenue_per_auction" and r["arm"] == "plain"]
    assert revenue[0]["n_auctions"] == 400 and revenue[0]["n_bids"] == 1600  # the 3 lone bids are not counted


def test_spec_not_yaml(tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text("experiments: [ {id: tiles, arms: [\n  - : :\n")
    _refused(_estimate(tmp_path, capsys, _bids(), spec), r"spec\.yaml: not valid YAML at line \d+")


def _spec_with(tmp_path, **changes) -> Path:
    doc = json.loads(json.dumps(SPEC))
    exp = doc["experiments"][0]
    for key, value in changes.items():
        if key.startswith("arm1_"):
            exp["arms"][1][key[5:]] = value
        else:
            exp[key] = value
    path = tmp_path / "spec.yaml"
    path.write_text(yaml.safe_dump(doc))
    return path


def test_shares_not_summing_to_one(tmp_path, capsys):
    spec = _spec_with(tmp_path, arm1_share=0.2)
    _refused(_estimate(tmp_path, capsys, _bids(), spec), r"arm shares must sum to 1 .* they sum to 0\.9\b")


def test_position_weights_that_increase(tmp_path, capsys):
    spec = _spec_with(tmp_path, arm1_position_weights=[0.5, 0.6, 0.05])
    _refused(_estimate(tmp_path, capsys, _bids(), spec), r"arms\[1\] \(bold\) position_weights: weights must be non-increasing; position 2")


def test_unknown_payment_rule(tmp_path, capsys):
    spec = _spec_with(tmp_path, payment_rule="second_price_per_impression")
    _refused(_estimate(tmp_path, capsys, _bids(), spec), r"unknown payment_rule 'second_price_per_impression'")


def test_experiment_id_not_in_spec(tmp_path, capsys, spec_file):
    _refused(_estimate(tmp_path, capsys, _bids(), spec_file, "--experiment-id", "banners"),
             r"no experiment with id 'banners' \(found: tiles\)")


def test_sql_looking_arm_is_an_unknown_arm(tmp_path, capsys, spec_file):
    line = _refused(_estimate(tmp_path, capsys, _set(_bids(), 3, "arm", EVIL), spec_file), "unknown arm")
    assert repr(EVIL) in line and "at row 3" in line


def test_sql_looking_auction_and_bidder_ids_are_plain_data(tmp_path, capsys, spec_file):
    """String ids that look like SQL estimate exactly like the integer ids they replace."""
    frame = _bids()
    code, plain, _ = _estimate(tmp_path, capsys, frame, spec_file)
    assert code == 0
    evil = frame.assign(auction_id=EVIL + frame["auction_id"].astype(str), bidder_id=frame["bidder_id"].astype(str) + EVIL)
    code, tricked, err = _estimate(tmp_path, capsys, evil, spec_file)
    assert code == 0, err
    assert json.loads(tricked)["rows"] == json.loads(plain)["rows"]


def test_non_positive_quality_stops_the_day_naming_the_row(airflow_db, tmp_path, capfd, caplog):
    def with_bad_quality(day):
        frame = _bids().assign(quality=1.0)
        frame.loc[5, "quality"] = 0.0
        frame.to_parquet(day / "tiles.parquet", index=False)

    run, conf, text = _pipeline(tmp_path, (capfd, caplog), with_bad_quality)
    _failed(run, "validate")
    line = _one_line(text, r"^\s*- schema_quality_positive \[error\] FAILED")
    assert "column 'quality' row 5" in line
    _nothing_written(conf)
