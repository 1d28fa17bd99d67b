"""The check runner over a real DuckDB database, and the idempotent data_checks table."""

from __future__ import annotations

import datetime as dt
import json

import duckdb
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import InputError, parse_experiments, simulate_experiment
from counterbid.estimators.checks import STATISTICAL_CHECKS, CheckResult, worst_failure
from counterbid.operators.check_runner import read_check_results, run_checks, write_check_results
from counterbid.operators.contract import CONTRACT_CHECKS

SPEC = {
    "experiments": [
        {
            "id": "maker-spotlight",
            "control_arm": "large-tile",
            "start": "2026-03-02",
            "arms": [
                {"name": "large-tile", "share": 0.6, "position_weights": [0.42, 0.06, 0.03]},
                {"name": "tile-stack", "share": 0.4, "position_weights": [0.25, 0.22, 0.10]},
            ],
        }
    ]
}
EXP = parse_experiments(SPEC)["maker-spotlight"]
VALUES = st.lognorm(0.5, scale=0.8)


def _day(ds: str, seed: int, first: int, **kw) -> pd.DataFrame:
    return simulate_experiment(VALUES, EXP, n_bidders=5, n_auctions=1500, rng=seed, ds=ds, first_auction_id=first,
                               **kw).drop(columns=["value", "clicks"])


@pytest.fixture(scope="module")
def lake() -> dict[str, pd.DataFrame]:
    history = pd.concat([_day(f"2026-03-0{d}", d, d * 10**5) for d in (6, 7, 8)], ignore_index=True)
    return {
        "history": history,
        "settled": _day("2026-03-09", 9, 9 * 10**5),
        "unadapted": _day("2026-03-09", 9, 9 * 10**5, belief_shares=[1.0, 0.0]),
    }


def _con(today: pd.DataFrame, history: pd.DataFrame | None = None):
    con = duckdb.connect()
    con.register("day_bids", today.drop(columns=["ds"]))
    if history is not None:
        con.register("trailing_bids", history)
    return con


def test_clean_day_passes_every_check(lake):
    results = run_checks(_con(lake["settled"], lake["history"]), "day_bids", EXP, ds="2026-03-09",
                         history_relation="trailing_bids")
    assert [r.check for r in results] == list(CONTRACT_CHECKS) + list(STATISTICAL_CHECKS)
    assert worst_failure(results) is None, [r.describe() for r in results if not r.passed]
    drift = {r.check: r for r in results}["drift"]
    assert drift.details["by_bidders"]["5"]["trailing_bids"] == len(lake["history"])


def test_unadapted_bidders_raise_a_drift_warning(lake):
    results = run_checks(_con(lake["unadapted"], lake["history"]), "day_bids", EXP, ds="2026-03-09",
                         history_relation="trailing_bids")
    failed = {r.check: r for r in results if not r.passed}
    assert set(failed) == {"drift"} and worst_failure(results) == "warning"


def test_warmup_day_and_config_override(lake):
    results = run_checks(_con(lake["settled"]), "day_bids", EXP, ds="2026-03-03",
                         config={"warmup": {"severity": "error"}})
    by = {r.check: r for r in results}
    assert not by["warmup"].passed and by["warmup"].severity == "error" and by["warmup"].observed == 1
    assert by["drift"].observed is None  # no history relation


def test_contract_error_skips_the_statistical_checks(lake):
    broken = lake["settled"].copy()
    broken.loc[0, "bid"] = -1.0
    results = run_checks(_con(broken), "day_bids", EXP, ds="2026-03-09")
    assert [r.check for r in results] == list(CONTRACT_CHECKS)
    # the negative bid sits at position 1, so it is also out of rank order
    assert [r.check for r in results if not r.passed] == ["contract_bids_valid", "contract_rank_by_bid"]
    assert worst_failure(results) == "error"


def test_contract_as_warning_reports_inputs_error(lake):
    broken = lake["settled"].copy()
    broken.loc[0, "bid"] = -1.0
    results = run_checks(_con(broken), "day_bids", EXP, ds="2026-03-09", config={"contract": {"severity": "warning"}})
    last = results[-1]
    assert last.check == "equilibrium_inputs" and not last.passed and "negative" in last.details["error"]


@pytest.mark.parametrize("name", ["day bids", "x;drop table t", "1st"])
def test_relation_names_are_validated(lake, name):
    with pytest.raises(InputError, match="relation must be"):
        run_checks(_con(lake["settled"]), name, EXP, ds="2026-03-09")


def test_write_is_idempotent_and_replaces_the_day(tmp_path):
    db = duckdb.connect(str(tmp_path / "results.duckdb"))
    first = [CheckResult("drift", "warning", False, 1e-5, 1e-3, {"by_bidders": {"5": {"pvalue": 1e-5}}}),
             CheckResult("sample_ratio", "error", True, 0.4, 1e-3)]
    assert write_check_results(db, first, experiment_id=EXP.id, ds="2026-03-09", run_id="run-1") == 2
    write_check_results(db, first, experiment_id=EXP.id, ds="2026-03-10", run_id="run-1")
    second = [CheckResult("sample_ratio", "error", False, 1e-6, 1e-3)]
    stamp = dt.datetime(2026, 3, 10, 5, tzinfo=dt.timezone.utc)
    write_check_results(db, second, experiment_id=EXP.id, ds=dt.date(2026, 3, 9), run_id="run-2", checked_at=stamp)
    write_check_results(db, second, experiment_id=EXP.id, ds=dt.date(2026, 3, 9), run_id="run-2", checked_at=stamp)
    out = read_check_results(db, experiment_id=EXP.id, ds="2026-03-09")
    assert out[["check", "passed", "run_id"]].values.tolist() == [["sample_ratio", False, "run-2"]]
    assert pd.Timestamp(out["checked_at"].iloc[0]) == pd.Timestamp(stamp)
    other = read_check_results(db, experiment_id=EXP.id, ds="2026-03-10")
    assert json.loads(other.set_index("check").loc["drift", "details"]) == {"by_bidders": {"5": {"pvalue": 1e-5}}}
    assert list(out.columns) == ["experiment_id", "ds", "check", "severity", "passed", "observed", "threshold",
                                 "details", "run_id", "checked_at"]


def test_failed_write_rolls_back_to_the_previous_rows(tmp_path):
    db = duckdb.connect(str(tmp_path / "results.duckdb"))
    write_check_results(db, [CheckResult("drift", "warning", True, 0.3, 1e-3)], experiment_id="e", ds="2026-03-09")
    bad = [CheckResult("drift", "warning", False, 1e-5, 1e-3), CheckResult("shading", "warning", True, "oops", 0.05)]
    with pytest.raises(duckdb.Error):
        write_check_results(db, bad, experiment_id="e", ds="2026-03-09")
    out = read_check_results(db, experiment_id="e", ds="2026-03-09")
    assert out[["check", "passed"]].values.tolist() == [["drift", True]]


def test_duplicate_check_names_are_refused(tmp_path):
    db = duckdb.connect(str(tmp_path / "results.duckdb"))
    twice = [CheckResult("drift", "warning", True), CheckResult("drift", "warning", False)]
    with pytest.raises(InputError, match="name check 'drift' twice"):
        write_check_results(db, twice, experiment_id="e", ds="2026-03-09")
