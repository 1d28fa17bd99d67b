"""The stored status (check warning + estimator flags), level and clustering of each results row."""

from __future__ import annotations

import re

import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import estimate_arms, parse_experiments, simulate_experiment
from counterbid.estimators.errors import InputError
from counterbid.estimators.intervals import format_level, interval_label, row_clusters
from counterbid.operators.stored_rows import CHECK_FLAGS, STATUS_PATTERN, check_flags, stored_status, with_stored_columns
from counterbid.sql import load_sql


@pytest.mark.parametrize("check,own,stored", [
    ("ok", "ok", "ok"), ("warning", "ok", "warning"), ("ok", None, "ok"), ("ok", float("nan"), "ok"),
    ("ok", "no_interval,few_bids", "few_bids,no_interval"), ("warning", "degenerate", "degenerate,warning"),
    ("warning", "few_bids, warning", "few_bids,warning"),
])
def test_stored_status_is_ok_or_sorted_flags(check, own, stored):
    assert stored_status(check, own) == stored
    assert re.fullmatch(STATUS_PATTERN, stored)


def test_a_failed_dependence_check_flags_every_row_of_the_day():
    assert check_flags(["drift", "auction_dependence", "warmup"]) == ("heterogeneous_auctions",)
    assert check_flags(["drift"]) == () and set(CHECK_FLAGS) == {"auction_dependence"}
    assert stored_status("warning", "few_bids", flags=check_flags(["auction_dependence"])) == \
        "few_bids,heterogeneous_auctions,warning"
    with pytest.raises(InputError, match="lowercase"):
        stored_status("ok", "ok", flags=("Mixed",))


@pytest.mark.parametrize("check,own", [("error", "ok"), ("ok", "Few bids"), ("ok", "")])
def test_stored_status_refuses_what_it_cannot_store(check, own):
    with pytest.raises(InputError):
        stored_status(check, own)


def test_the_tables_constraint_is_the_same_pattern():
    # the current tables are built by schema version 2's step (anchored regexp_matches is a full match)
    for name in ("results_v2_create_arm_estimates", "results_v2_create_arm_estimates_to_date"):
        assert f"regexp_matches(status, '^{STATUS_PATTERN}$')" in load_sql(name)


@pytest.mark.parametrize("level,text", [(0.95, "95 %"), (0.975, "97.5 %"), (0.9, "90 %"), (0.999, "99.9 %"),
                                        (0.6827, "68.27 %"), (0.5, "50 %")])
def test_levels_are_printed_exactly(level, text):
    assert format_level(level) == text
    assert interval_label(level, "bidder") == f"{text}, clustered by bidder"


def test_table_without_estimator_status_gets_level_cluster_and_check_status():
    spec = {"experiments": [{"id": "e", "control_arm": "a", "arms": [
        {"name": "a", "share": 0.5, "position_weights": [0.4, 0.2]}, {"name": "b", "share": 0.5, "position_weights": [0.5, 0.1]}]}]}
    exp = parse_experiments(spec)["e"]
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=600, rng=3)
    # a table without the estimator's status column (an older estimator's) counts as 'ok'
    result = estimate_arms(bids, exp, confidence_level=0.9, cluster="bidder")
    table = result.to_frame().drop(columns="status")
    out = with_stored_columns(table, result, check_status="warning")
    assert set(out["status"]) == {"warning"} and set(out["confidence_level"]) == {0.9}
    realized = out["metric"] == "realized_revenue_per_auction"
    assert set(out.loc[realized, "cluster"]) == {"auction"} and set(out.loc[~realized, "cluster"]) == {"bidder"}
    pd.testing.assert_series_equal(row_clusters(table["metric"], result.cluster), out["cluster"])
    flagged = with_stored_columns(table.copy(), result, check_status="warning", flags=check_flags(["auction_dependence"]))
    assert set(flagged["status"]) == {"heterogeneous_auctions,warning"}


def test_anytime_columns_on_the_rows_with_an_interval_and_refused_without_auctions():
    import dataclasses

    from counterbid.operators.stored_rows import with_anytime_columns

    exp = parse_experiments({"experiments": [{"id": "reed-rows", "control_arm": "a", "arms": [
        {"name": "a", "share": 0.5, "position_weights": [0.5, 0.2]},
        {"name": "b", "share": 0.5, "position_weights": [0.6, 0.1]}]}]})["reed-rows"]
    result = estimate_arms(simulate_experiment(st.uniform(), exp, n_bidders=3, n_auctions=600, rng=2), exp)
    table = result.to_frame()
    with_anytime_columns(table, result, horizon_auctions=28 * 600)  # one day of 28 planned
    banded = table["metric"] != "welfare_per_auction"
    # x* = 8.212 at 95 %: m(1/28) = sqrt((1 + 28/x*)(log(1 + x*/28) + 2 log 20)) = 5.2492
    half = (table["anytime_high"] - table["estimate"])[banded] / table["std_error"][banded]
    assert half.to_numpy() == pytest.approx(5.2492, abs=1e-4)
    assert table.loc[~banded, "anytime_low"].isna().all() and (table["anytime_horizon_auctions"] == 16800).all()
    with pytest.raises(InputError, match="`horizon_auctions` must be a whole number >= 1"):
        with_anytime_columns(table, result, horizon_auctions=0)
    with pytest.raises(InputError, match="n_auctions must be a whole number"):
        with_anytime_columns(table, dataclasses.replace(result, n_auctions=0), horizon_auctions=10)
