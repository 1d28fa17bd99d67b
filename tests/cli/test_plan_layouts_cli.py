"""``counterbid plan --lift-half-width``: candidate layouts ranked from a real Parquet bid log (table, JSON, CSV)."""

from __future__ import annotations

import json

import pandas as pd
import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main
from counterbid.estimators import parse_experiments, simulate_experiment

# An invented marketplace whose arms both sell two identical top tiles: a candidate with a steeper
# top has unbounded weights against the mixture that ran (thin_support); one that keeps the
# identical tiles is supported, and by control alone too, so any share settles its lift.
SPEC = """experiments:
  - id: reedhall
    control_arm: twin-tiles
    arms:
      - {name: twin-tiles, share: 0.8, position_weights: [0.3, 0.3, 0.1]}
      - {name: low-triple, share: 0.2, position_weights: [0.25, 0.25, 0.2]}
    what_if:
      - {name: deep-third, position_weights: [0.28, 0.28, 0.15]}
"""
COMMON = ["--days", "5", "--auctions-per-day", "4000", "--lift-half-width", "0.01"]


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    root = tmp_path_factory.mktemp("plan_layouts")
    spec = root / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(yaml.safe_load(SPEC))["reedhall"]
    path = root / "bids.parquet"
    simulate_experiment(st.beta(2, 5), exp, n_bidders=4, n_auctions=2500, rng=8).to_parquet(path, index=False)
    layouts = root / "layouts.yaml"
    layouts.write_text("- {name: wide-third, position_weights: [0.3, 0.3, 0.25]}\n")
    return spec, path, layouts


def test_json_ranks_spec_and_given_layouts(files, capsys):
    spec, path, layouts = files
    assert main(["plan", "--experiment", str(spec), "--bids", str(path), *COMMON, "--layout", "steep=0.5,0.2",
                 "--layouts-file", str(layouts), "--format", "json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["control_arm"] == "twin-tiles" and out["lift_half_width"] == 0.01 and out["bids_auctions"] == 2500
    rows = {r["layout"]: r for r in out["candidates"]}
    assert {k: r["origin"] for k, r in rows.items()} == {"deep-third": "spec", "steep": "given", "wide-third": "given"}
    steep = rows["steep"]
    assert steep["status"] == "thin_support" and steep["revenue_per_auction"] is None
    assert steep["needed_share"] is None and steep["revenue_rank"] is None
    for name in ("deep-third", "wide-third"):
        r = rows[name]
        assert r["status"] == "any_share" and r["needed_share"] == 0.001 and r["share_rank"] == 1
        assert r["revenue_low"] < r["revenue_per_auction"] < r["revenue_high"]
    # selling more of the third tile earns more: wide-third above deep-third
    assert rows["wide-third"]["revenue_rank"] == 1 and rows["deep-third"]["revenue_rank"] == 2
    assert [r["layout"] for r in out["candidates"]][-1] == "steep"  # thin rows last


def test_table_and_csv(files, capsys):
    spec, path, _ = files
    assert main(["plan", "--experiment", str(spec), "--bids", str(path), *COMMON]) == 0
    text = capsys.readouterr().out
    assert "settle its lift to +-0.01 in 5 days x 4000 auctions" in text
    assert "deep-third" in text and "any_share: the lift settles even at 0.001" in text
    assert "as they would if it ran" in text
    assert main(["plan", "--experiment", str(spec), "--bids", str(path), *COMMON, "--format", "csv"]) == 0
    from io import StringIO

    frame = pd.read_csv(StringIO(capsys.readouterr().out))
    assert list(frame["layout"]) == ["deep-third"] and frame["needed_share"].iloc[0] == 0.001


@pytest.mark.parametrize("extra, message", [
    (["--layout", "steep"], "--layout 'steep': expected NAME=W1,W2,..."),
    (["--layout", "twin-tiles=0.5,0.1"], "name 'twin-tiles' is already an arm's"),
    (["--layout", "up=0.1,0.5"], "weights must be non-increasing"),
    (["--layout", "deep-third=0.5"], "candidate 'deep-third': name given twice"),
])
def test_bad_layouts_one_line(files, capsys, extra, message):
    spec, path, _ = files
    assert main(["plan", "--experiment", str(spec), "--bids", str(path), *COMMON, *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("counterbid: error: ") and message in err and err.count("\n") == 1


def test_ranking_needs_bids_and_a_half_width(files, capsys):
    spec, path, _ = files
    assert main(["plan", "--experiment", str(spec), "--days", "5", "--auctions-per-day", "4000",
                 "--lift-half-width", "0.01"]) == 2
    assert "give --bids" in capsys.readouterr().err
    assert main(["plan", "--experiment", str(spec), "--bids", str(path), "--days", "5", "--auctions-per-day", "4000",
                 "--layout", "a=0.5"]) == 2
    assert "give --lift-half-width H too" in capsys.readouterr().err
