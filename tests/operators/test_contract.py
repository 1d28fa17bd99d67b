"""The Great Expectations contract suite on real DuckDB relations: one broken rule per case."""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.operators.contract import CONTRACT_CHECKS, build_suites, run_contract

SPEC = {
    "experiments": [
        {
            "id": "maker-spotlight",
            "control_arm": "large-tile",
            "floor": 0.01,
            "arms": [
                {"name": "large-tile", "share": 0.6, "position_weights": [0.42, 0.06, 0.03]},
                {"name": "tile-stack", "share": 0.4, "position_weights": [0.25, 0.22, 0.10]},
            ],
        }
    ]
}
EXP = parse_experiments(SPEC)["maker-spotlight"]


@pytest.fixture(scope="module")
def clean() -> pd.DataFrame:
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), EXP, n_bidders=4, n_auctions=400, rng=3, ds="2026-03-05")
    bids["bid"] = bids["bid"] + 0.02  # above the floor
    return bids.drop(columns=["value", "clicks"])


def _run(frame: pd.DataFrame, **kw):
    con = duckdb.connect()
    con.register("day_bids", frame)
    return {r.check: r for r in run_contract(con, "day_bids", EXP, **kw)}


def _failed(results):
    return sorted(name for name, r in results.items() if not r.passed)


def test_clean_partition_passes_every_expectation(clean):
    results = _run(clean)
    assert list(results) == list(CONTRACT_CHECKS)
    assert _failed(results) == []
    assert results["contract_rank_by_bid"].details["checked"] == 400
    assert all(r.severity == "error" for r in results.values())


def test_suite_is_built_in_code_with_check_names():
    suites = build_suites(EXP, config={"contract": {"max_bidders": 12}})
    auctions = suites["auctions"].expectations
    names = {e.meta["check"] for e in auctions}
    assert {"contract_bidders_per_auction", "contract_rank_by_bid", "contract_arm_in_spec"} <= names
    between = [e for e in auctions if e.meta["check"] == "contract_bidders_per_auction"][0]
    assert (between.min_value, between.max_value) == (2, 12)


def _first_auction(frame):
    return frame["auction_id"] == frame["auction_id"].iloc[0]


@pytest.mark.parametrize(
    ("mutate", "expected"),
    [
        (lambda f: f.assign(bid=np.where(_first_auction(f), np.nan, f["bid"])), "contract_bids_valid"),
        (lambda f: f.assign(bid=np.where(_first_auction(f), np.inf, f["bid"])), "contract_bids_valid"),
        (lambda f: f.assign(bid=np.where(_first_auction(f), -1.0, f["bid"])), "contract_bids_valid"),
        (lambda f: f.assign(bid=np.where(_first_auction(f), 0.005, f["bid"])), "contract_bids_valid"),  # below floor
        (lambda f: f.assign(bidder_id=f["bidder_id"].astype("Int64").mask(_first_auction(f))), "contract_keys_not_null"),
        (lambda f: f.assign(arm=np.where(_first_auction(f), "ghost-arm", f["arm"])), "contract_arm_in_spec"),
        (lambda f: f.assign(experiment_id="other-test"), "contract_experiment_id"),
    ],
)
def test_each_row_rule_fires(clean, mutate, expected):
    results = _run(mutate(clean.copy()))
    assert expected in _failed(results)
    r = results[expected]
    assert r.observed >= 1 and r.threshold == 0
    examples = [x for failure in r.details["failures"] for x in failure["examples"]]
    if expected != "contract_experiment_id":
        assert examples[0]["auction_id"] == int(clean["auction_id"].iloc[0])


def test_duplicate_bidder_in_an_auction(clean):
    f = clean.copy()
    f.loc[1, "bidder_id"] = f.loc[0, "bidder_id"]
    assert "contract_bidder_unique" in _failed(_run(f))


def test_bids_per_auction_bounds(clean):
    single = clean[~((clean["auction_id"] == clean["auction_id"].iloc[0]) & (clean.index % 4 != 0))]
    assert _failed(_run(single)) == ["contract_bidders_per_auction"]
    assert _failed(_run(clean, config={"contract": {"max_bidders": 3}})) == ["contract_bidders_per_auction"]


def test_one_arm_per_auction(clean):
    f = clean.copy()
    first = f.index[_first_auction(f)]
    other = "tile-stack" if f.loc[first[0], "arm"] == "large-tile" else "large-tile"
    f.loc[first[-1], "arm"] = other
    assert _failed(_run(f)) == ["contract_one_arm"]


def test_rank_by_bid_with_tie_tolerance(clean):
    f = clean.copy()
    first = f.index[_first_auction(f)]  # rows of auction 0, sorted by bid (top first)
    top, second = first[0], first[1]
    f.loc[second, "bid"] = f.loc[top, "bid"] + 1e-12  # a tie within tolerance: fine
    assert _failed(_run(f)) == []
    f.loc[second, "bid"] = f.loc[top, "bid"] + 0.5  # position 2 outbids position 1
    results = _run(f)
    assert _failed(results) == ["contract_rank_by_bid"]
    assert results["contract_rank_by_bid"].observed == 1
    # an unshown bidder that outbids a shown one
    g = clean.copy()
    g.loc[first[0], "position"] = pd.NA
    assert _failed(_run(g)) == ["contract_rank_by_bid"]


def test_schema_failures_stop_before_the_aggregates(clean):
    results = _run(clean.drop(columns=["position"]))
    assert _failed(results) == ["contract_columns", "contract_types"]
    assert "contract_rank_by_bid" not in results
    typed = _run(clean.assign(bid=clean["bid"].map(lambda b: f"{b:.4f}")))
    assert _failed(typed) == ["contract_types"]
    failure = typed["contract_types"].details["failures"][0]
    assert failure["column"] == "bid"


def test_empty_relation(clean):
    results = _run(clean.iloc[:0])
    assert _failed(results) == ["contract_rows"]


def test_a_validated_frame_is_not_kept_by_the_context(clean):
    # The suite runs once per shard in one context: a data source left registered keeps its batch (the
    # shard's aggregates), so a day's shards would all stay in memory until the context goes.
    import gc
    import weakref

    from counterbid.operators.contract import _context, _validate

    context = _context()
    suites = build_suites(EXP, context=context)
    con = duckdb.connect()
    con.register("day_bids", clean)
    con.execute("create view day_bids_q as select *, 1.0 as quality from day_bids")
    from counterbid.sql import render_sql

    frames = [con.execute(render_sql("check_auction_aggregates", relation="day_bids_q"),
                          {"floor": 0.01, "tie_tolerance": 1e-9}).df() for _ in range(3)]
    refs = [weakref.ref(f) for f in frames]
    outcomes = [_validate(context, suites["auctions"], f, f"auctions_{i}") for i, f in enumerate(frames)]
    assert all(o.success for o in outcomes) and outcomes[0].results[0].result["element_count"] == 400
    del frames
    gc.collect()
    assert sum(r() is not None for r in refs) == 0  # each shard's frame is gone once validated
    assert list(context.data_sources.all()) == []
    # a shard's second run under the same name (a rerun in one process) still works
    again = con.execute(render_sql("check_auction_aggregates", relation="day_bids_q"),
                        {"floor": 0.01, "tie_tolerance": 1e-9}).df()
    assert _validate(context, suites["auctions"], again, "auctions_0").success


def test_the_contract_runs_without_loading_what_gx_would_only_draw_with(tmp_path):
    # a fresh interpreter, as a validate task is: the suite runs for real (a broken rule is caught), altair
    # is never loaded, and a later `import altair` in the same process gets the real library
    import subprocess
    import sys

    probe = """
import sys
import duckdb, pandas as pd
from counterbid.estimators import parse_experiments
from counterbid.operators.contract import run_contract
exp = parse_experiments({"experiments": [{"id": "perch", "control_arm": "a", "arms": [
    {"name": "a", "share": 0.5, "position_weights": [0.3, 0.1]},
    {"name": "b", "share": 0.5, "position_weights": [0.3, 0.2]}]}]})["perch"]
frame = pd.DataFrame({"experiment_id": "perch", "auction_id": ["u1", "u1", "u2", "u2"],
                      "bidder_id": ["k1", "k2", "k1", "k1"], "arm": ["a", "a", "b", "b"],
                      "bid": [1.0, 0.5, 0.9, 0.4], "position": [1, 2, 1, 2]})
con = duckdb.connect()
con.register("bids", frame)
failed = sorted(r.check for r in run_contract(con, "bids", exp) if not r.passed)
print(",".join(failed))
print("altair" in sys.modules)
import altair
print(hasattr(altair, "Chart"))
"""
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=300, cwd=tmp_path)
    assert done.returncode == 0, done.stderr[-2000:]
    failed, loaded, real = done.stdout.split()[-3:]
    assert failed == "contract_bidder_unique"  # auction u2 has one bidder twice
    assert loaded == "False" and real == "True"
