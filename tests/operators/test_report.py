"""The HTML report from a real results database built by the pipeline steps."""

from __future__ import annotations

import datetime as dt

import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import CheckResult, parse_experiments
from counterbid.operators import partition
from counterbid.operators.check_runner import write_check_results
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.report import ASSUMPTIONS, cumulative_table, format_cumulative, write_report
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 3, 2)
SPEC = {"experiments": [{
    "id": "tiles", "control_arm": "plain", "start": "2026-03-02",
    "arms": [{"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    exp = parse_experiments(SPEC)["tiles"]
    write_bid_lake(root / "bids", [exp], start=START, days=3, auctions_per_day=1500, n_bidders=4, seed=8)
    hook = ResultsHook(database=root / "results.duckdb")
    for k in range(3):
        day = START + dt.timedelta(days=k)
        partition.stage_partition(hook, lake_root=root / "bids", experiment=exp, ds=day, staging_root=root / "s")
        staged = StagedPartition.at(root / "s", exp.id, day)
        partition.record_checks(staged, schema_gate(hook, experiment=exp, staged=staged))
        partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=root / "s", run_id=f"r{k}")
        partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=root / "s")
    return root, hook


def test_report_has_plots_assumptions_and_days(results):
    root, hook = results
    page = write_report(hook, root / "out")
    text = page.read_text()
    for assumption in ASSUMPTIONS:
        assert assumption in text
    for png in ("tiles_revenue.png", "tiles_lift.png"):
        assert f'src="{png}"' in text
        assert (root / "out" / png).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    for k in range(3):
        assert f"<th>{START + dt.timedelta(days=k)}</th>" in text
    assert "data checks" not in text  # no data_checks table: nothing shown
    assert "4,500 auctions pooled" in text


def test_report_shows_the_worst_check_status_per_day(results, tmp_path):
    root, hook = results
    with hook.connect() as con:  # stored by the pipeline's own writer (it creates the table)
        write_check_results(con, [CheckResult("sample_ratio", "warning", False, 0.001, 0.01),
                                  CheckResult("rows", "error", True, 1.0, 1.0)], experiment_id="tiles", ds="2026-03-03",
                            run_id="r")
    text = write_report(hook, tmp_path).read_text()
    assert "<th>data checks</th>" in text
    assert "warning (1/2 failed)" in text and text.count("not run") == 2
    with hook.connect() as con:
        con.execute("drop table data_checks")


def test_cumulative_table_text(results):
    _, hook = results
    text = format_cumulative(cumulative_table(hook))
    assert text.startswith("tiles: 2026-03-02 .. 2026-03-04, 4500 auctions, status ok")
    assert "lift vs control" in text and "_mixture" in text
