"""``counterbid study`` and ``counterbid plan`` end to end (real files: CSV, PNG, Parquet)."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest

from counterbid.cli import main

SPEC = Path(__file__).resolve().parents[2] / "dags_example" / "experiments.yaml"
TINY_STUDY = ["--quick", "--bidders", "3", "--sizes", "20", "200", "--reps", "4", "--two-step-reps", "2",
              "--share-reps", "3", "--share-auctions", "300", "--seed", "5"]


def test_study_writes_tables_figures_and_summary(tmp_path, capsys):
    out = tmp_path / "study"
    assert main(["study", "--out", str(out), *TINY_STUDY]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == ["accuracy_by_share.csv", "accuracy_by_share.png", "accuracy_by_size.csv", "accuracy_by_size.png",
                     "interval_coverage.csv", "interval_coverage.png", "summary.md"]
    size = pd.read_csv(out / "accuracy_by_size.csv")
    assert set(size["method"]) == {"ordstat", "two_step"}
    assert sorted(size["n_bids"].unique()) == [20, 200]
    assert set(size["distribution"]) == {"uniform", "beta", "lognormal"}
    share = pd.read_csv(out / "accuracy_by_share.csv")
    assert set(share["method"]) == {"ordstat", "informed_ab", "realized_average"}
    for png in out.glob("*.png"):
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    summary = (out / "summary.md").read_text()
    assert "## RMSE x sqrt(N)" in summary and "## Coverage" in summary
    assert "![RMSE vs share](accuracy_by_share.png)" in summary
    # Same seed, same numbers; no scratch folder is left behind.
    assert main(["study", "--out", str(out), *TINY_STUDY]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(out / "accuracy_by_size.csv"), size)
    assert not [p for p in out.iterdir() if p.name.startswith(".study-")]


def test_study_bad_jobs_is_one_line_error(tmp_path, capsys):
    assert main(["study", "--out", str(tmp_path), "--quick", "--jobs", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["counterbid: error: --jobs must be >= 1; got 0"]
    assert list(tmp_path.iterdir()) == []


def test_plan_from_an_assumed_distribution_json(capsys):
    rc = main(["plan", "--experiment", str(SPEC), "--experiment-id", "featured-rows", "--days", "3",
               "--auctions-per-day", "4000", "--bidders", "4", "--shares", "0.05", "0.2",
               "--calibration-auctions", "1500", "--target-half-width", "1.0", "--format", "json"])
    assert rc == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["basis"] == "assumed" and doc["n_auctions"] == 12000
    rows = pd.DataFrame(doc["rows"])
    assert set(rows["arm"]) == {"classic", "wide-top", "five-slot"}
    assert set(rows["share"]) == {0.05, 0.2}
    assert (rows["half_width"] > 0).all()
    # A target of 1.0 revenue per auction is met by the smallest candidate share.
    assert doc["recommended_share"] == 0.05


def test_plan_from_pilot_bids_table(tmp_path, capsys):
    lake = tmp_path / "lake"
    assert main(["simulate", "--experiment", str(SPEC), "--experiment-id", "gallery-premium", "--out", str(lake),
                 "--days", "1", "--auctions-per-day", "3000", "--bidders", "4", "--seed", "2"]) == 0
    capsys.readouterr()
    rc = main(["plan", "--experiment", str(SPEC), "--bids", str(lake), "--days", "7", "--auctions-per-day", "2000",
               "--shares", "0.1", "0.3", "--calibration-auctions", "1500", "--target-half-width", "1e-9"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "from pilot bids" in out
    assert "no candidate share reaches half-width 1e-09" in out
    assert "two-premium" in out and "informed_ab_half_width" in out


@pytest.mark.parametrize("extra, message", [
    (["--days", "0", "--auctions-per-day", "100"], "`days` must be an integer >= 1; got 0"),
    (["--days", "1", "--auctions-per-day", "100", "--bids", "/nonexistent/pilot"], "/nonexistent/pilot: no such file"),
    (["--days", "1", "--auctions-per-day", "100", "--shares", "1.5"], "`shares` must be"),
])
def test_plan_bad_input_is_one_line_error(extra, message, capsys):
    rc = main(["plan", "--experiment", str(SPEC), "--experiment-id", "gallery-premium", *extra])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("counterbid: error: ") and message in err[0]
