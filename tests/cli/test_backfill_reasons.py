"""``counterbid backfill``'s last lines name why each failed day failed, not only its date."""

from __future__ import annotations

import datetime as dt

import pandas as pd
import pytest

from counterbid.cli import main
from counterbid.cli.backfill import REASON_CHARS, FailureRecorder
from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import load_experiments

DAY = dt.date(2026, 4, 13)
SPEC = """
experiments:
  - id: deck-rows
    control_arm: narrow
    start: 2026-04-13
    arms:
      - {name: narrow, share: 0.6, position_weights: [0.42, 0.18, 0.06]}
      - {name: broad,  share: 0.4, position_weights: [0.38, 0.22, 0.08]}
"""


def test_each_failed_day_is_named_with_its_task_experiment_and_error(tmp_path, monkeypatch, capsys, airflow_db):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    write_bid_lake(tmp_path / "bids", load_experiments(spec).values(), start=DAY, days=2, auctions_per_day=400,
                   n_bidders=4, seed=4)
    part = sorted((tmp_path / "bids" / f"ds={DAY + dt.timedelta(days=1)}").glob("*.parquet"))[0]
    frame = pd.read_parquet(part)
    frame.loc[3, "bid"] = -1.0  # day 2: a negative bid, stopped by the contract at validate
    frame.to_parquet(part)
    # day 3 has no partition at all: the load step fails (retries are off in backfill)
    monkeypatch.chdir(tmp_path)
    args = ["backfill", "--lake", str(tmp_path / "bids"), "--experiments", str(spec), "--results",
            str(tmp_path / "r.duckdb"), "--start", str(DAY), "--end", str(DAY + dt.timedelta(days=2))]
    assert main(args) == 1
    err = capsys.readouterr().err.rstrip().splitlines()
    day2, day3 = DAY + dt.timedelta(days=1), DAY + dt.timedelta(days=2)
    assert err[-3] == f"counterbid: 2 of 3 day(s) failed: {day2}, {day3}"
    assert err[-2].startswith(f"  {day2} experiment.validate (deck-rows): AirflowFailException: 1 check(s) failed "
                              f"for experiment 'deck-rows' on {day2}: contract_bids_valid [error] FAILED"), err[-2]
    assert err[-1] == (f"  {day3} experiment.load (deck-rows): MissingPartitionError: {tmp_path / 'bids'}: "
                       f"partition ds={day3} is missing (no such folder)")


def test_a_long_reason_is_cut_and_keeps_one_line():
    class Ti:
        task_id = "experiment.estimate"

    class Task:
        experiment_id = "deck-rows"

    recorder = FailureRecorder()
    recorder({"ti": Ti(), "task": Task(), "exception": ValueError("first line:\n  - " + "x" * 1000)})
    recorder({"ti": Ti(), "task": None, "exception": None})
    assert recorder.reasons[0].startswith("experiment.estimate (deck-rows): ValueError: first line: xxx")
    assert len(recorder.reasons[0]) < REASON_CHARS + 60 and recorder.reasons[0].endswith("...")
    assert "\n" not in recorder.reasons[0]
    assert recorder.reasons[1] == "experiment.estimate: failed (no exception recorded)"
