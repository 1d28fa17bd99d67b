"""`counterbid estimate`: output shapes and every bad-input path (one line, exit 2)."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.cli import main
from counterbid.estimators import parse_experiments, simulate_experiment

SPEC = """experiments:
  - id: cli-exp
    payment_rule: first_price
    control_arm: control
    arms:
      - {name: control, share: 0.8, position_weights: [0.31, 0.17, 0.06, 0.02]}
      - {name: wide, share: 0.1, position_weights: [0.29, 0.22, 0.15, 0.02]}
      - {name: single, share: 0.1, position_weights: [0.4]}
"""


@pytest.fixture
def files(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(__import__("yaml").safe_load(SPEC))["cli-exp"]
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=4, n_auctions=3000, rng=1)
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    return spec, path, bids


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_json_output_has_every_arm_and_metric(files, capsys):
    spec, path, _ = files
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"], capsys)
    assert code == 0, err
    payload = json.loads(out)
    assert payload["experiment_id"] == "cli-exp" and payload["n_excluded_auctions"] == 0
    rows = payload["rows"]
    assert set(rows[0]) == {"arm", "segment", "metric", "estimate", "std_error", "ci_low", "ci_high", "n_auctions", "n_bids",
                            "status", "what_if", "effective_share"}
    seen = {(r["arm"], r["metric"]) for r in rows}
    for arm in ("control", "wide", "single"):
        assert (arm, "revenue_per_auction") in seen and (arm, "realized_revenue_per_auction") in seen
    assert ("wide", "revenue_lift_vs_control") in seen and ("control", "revenue_lift_vs_control") not in seen


def test_table_and_csv(files, capsys):
    spec, path, _ = files
    code, out, _ = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 0 and "wide" in out and "revenue_lift_vs_control" in out and "Assumes" in out
    code, out, _ = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "csv", "--level", "0.9"], capsys)
    assert code == 0 and out.splitlines()[0] == ("arm,segment,metric,estimate,std_error,ci_low,ci_high,n_auctions,n_bids,"
                                                 "status,what_if,effective_share")


def test_single_bidder_auctions_reported_not_fatal(files, capsys):
    spec, path, bids = files
    lone = pd.DataFrame({"experiment_id": "cli-exp", "auction_id": [10**9, 10**9 + 1], "bidder_id": [1, 2],
                         "arm": "control", "bid": [0.5, 0.6], "position": pd.array([1, 1], dtype="Int32")})
    pd.concat([bids, lone]).to_parquet(path, index=False)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"], capsys)
    assert code == 0 and json.loads(out)["n_excluded_auctions"] == 2
    assert "left out 2 single-bidder auction(s)" in err


def corrupt(bids, kind):
    b = bids.copy()
    if kind == "missing column":
        return b.drop(columns=["bid"]), "column 'bid' is missing"
    if kind == "non-numeric bid":
        b["bid"] = b["bid"].astype(str)  # a text column, as a CSV export would give
        b.loc[5, "bid"] = "abc"
        return b, "column 'bid' must be numeric .* row 5 holds 'abc'"
    if kind == "negative bid":
        b.loc[7, "bid"] = -1.0
        return b, "column 'bid' row 7 is negative"
    if kind == "NaN bid":
        b.loc[8, "bid"] = np.nan
        return b, "column 'bid' row 8 is NaN"
    if kind == "infinite bid":
        b.loc[9, "bid"] = np.inf
        return b, "column 'bid' row 9 is infinite"
    if kind == "unknown arm":
        b.loc[11, "arm"] = "mystery"
        return b, "unknown arm 'mystery' at row 11"
    if kind == "auction under two arms":
        first = b.index[b.auction_id == b.auction_id.iloc[0]]
        b.loc[first[1], "arm"] = "wide" if b.loc[first[0], "arm"] != "wide" else "control"
        return b, f"auction {b.auction_id.iloc[0]} has bids under two arms .* at row 0, .* at row 1"
    raise AssertionError(kind)


@pytest.mark.parametrize("kind", ["missing column", "non-numeric bid", "negative bid", "NaN bid", "infinite bid",
                                  "unknown arm", "auction under two arms"])
def test_bad_bids_one_line_exit_2(files, capsys, kind):
    spec, path, bids = files
    bad, pattern = corrupt(bids, kind)
    bad.to_parquet(path, index=False)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("counterbid: error: ")
    assert __import__("re").search(pattern, lines[0]), lines[0]


@pytest.mark.parametrize("kind,pattern", [
    ("shares", "shares must sum to 1"),
    ("weights", "non-increasing"),
    ("yaml", "not valid YAML"),
])
def test_bad_spec_one_line_exit_2(files, capsys, kind, pattern):
    spec, path, _ = files
    text = {"shares": SPEC.replace("share: 0.8", "share: 0.7"),
            "weights": SPEC.replace("[0.4]", "[0.4, 0.5]"),
            "yaml": SPEC + "  - {id: [broken\n"}[kind]
    spec.write_text(text)
    code, _, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 2 and len(err.strip().splitlines()) == 1 and pattern in err


def test_unreadable_and_empty_parquet(files, capsys, tmp_path):
    spec, _, bids = files
    junk = tmp_path / "junk.parquet"
    junk.write_bytes(b"this is not parquet")
    code, _, err = run(["estimate", "--bids", str(junk), "--experiment", str(spec)], capsys)
    assert code == 2 and "junk.parquet: not a readable Parquet file" in err and len(err.strip().splitlines()) == 1
    empty = tmp_path / "empty.parquet"
    bids.iloc[:0].to_parquet(empty, index=False)
    code, _, err = run(["estimate", "--bids", str(empty), "--experiment", str(spec)], capsys)
    assert code == 2 and "empty.parquet: holds no bids" in err
    code, _, err = run(["estimate", "--bids", str(tmp_path / "nope"), "--experiment", str(spec)], capsys)
    assert code == 2 and "no such file or folder" in err


def test_real_process_no_traceback(files):
    spec, path, bids = files
    bids.drop(columns=["arm"]).to_parquet(path, index=False)
    proc = subprocess.run([sys.executable, "-m", "counterbid.cli", "estimate", "--bids", str(path), "--experiment", str(spec)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and proc.stdout == ""
    assert proc.stderr.strip() == f"counterbid: error: {path}: column 'arm' is missing (required: auction_id, bidder_id, arm, bid, position)"


@pytest.mark.parametrize("typo,where,key", [
    ("{name: single, share: 0.1, position_weights: [0.4], postion_weights: [0.5, 0.1]}",
     "experiments[0] (id 'cli-exp') arms[2] (single)", "unknown key 'postion_weights'"),
    ("{name: single, share: 0.1, position_weights: [0.4]}\n    checks: {drift: {trailing_day: 3}}",
     "experiments[0] (id 'cli-exp') checks.drift", "unknown setting 'trailing_day'"),
    ("{name: single, share: 0.1, position_weights: [0.4]}\nexperimentz: []", "top level", "unknown key 'experimentz'"),
])
def test_spec_typo_one_line_exit_2(files, capsys, typo, where, key):
    """A misspelt key is an error naming file, experiment and arm, not a silently ignored setting."""
    spec, path, _ = files
    spec.write_text(SPEC.replace("{name: single, share: 0.1, position_weights: [0.4]}", typo))
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"counterbid: error: {spec}: {where}: {key} (known: "), lines


@pytest.mark.parametrize("level,cluster,shown", [("0.975", "bidder", "97.5 %"), ("0.95", "auction", "95 %"),
                                                  ("0.999", "auction", "99.9 %")])
def test_table_says_the_level_and_clustering_used(files, capsys, level, cluster, shown):
    spec, path, _ = files
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--level", level,
                          "--cluster", cluster], capsys)
    assert code == 0, err
    head, columns, *rows = out.splitlines()
    assert head.endswith(f"bids, {shown} intervals clustered by {cluster} (they speak for "
                         + {"bidder": "a new draw of bidders as well as of auctions)",
                            "auction": "these same bidders in new auctions)"}[cluster]), head
    assert columns.split()[:7] == ["arm", "metric", "estimate", "std_error", "ci_low", "ci_high", "cluster"]
    table = [r.split() for r in rows if r.split() and r.split()[0] in ("control", "wide", "single", "_mixture")]
    assert len(table) == 13  # 3 arms x 3 metrics + 2 lifts + 2 mixture rows
    for r in table:  # the realized per-arm average is clustered by auction whatever the option says
        assert r[6] == ("auction" if r[1] == "realized_revenue_per_auction" else cluster), r


SEGMENTED_SPEC = SPEC.replace("    control_arm: control\n", "    control_arm: control\n    segments: [aisle]\n")


@pytest.mark.parametrize("max_bids", [None, "4000"])
def test_segmented_log_gives_pooled_and_per_segment_rows_in_every_format(tmp_path, capsys, monkeypatch, max_bids):
    """A segmented log through the command line: JSON rows carry the segment (null on pooled rows)
    and equal the library's numbers; in several shards the shards' segment pieces combine."""
    from counterbid.estimators import SimulatedSegment, estimate_arms, simulate_segmented_experiment

    if max_bids:
        monkeypatch.setenv("COUNTERBID_MAX_BIDS_PER_SHARD", max_bids)
    spec = tmp_path / "spec.yaml"
    spec.write_text(SEGMENTED_SPEC)
    exp = parse_experiments(__import__("yaml").safe_load(SEGMENTED_SPEC))["cli-exp"]
    segments = {"bulk": SimulatedSegment(st.beta(2.0, 5.0, scale=3.0), 4, 0.6),
                "fresh": SimulatedSegment(st.lognorm(0.5, scale=2.0), 4, 0.4)}
    bids = simulate_segmented_experiment(segments, exp, n_auctions=3000, rng=3, column="aisle")
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json",
                          "--cluster", "auction"], capsys)
    assert code == 0, err
    payload = json.loads(out)
    assert payload["segments"] == {"bulk": int((bids.groupby("auction_id")["aisle"].first() == "bulk").sum()),
                                   "fresh": int((bids.groupby("auction_id")["aisle"].first() == "fresh").sum())}
    got = pd.DataFrame(payload["rows"])
    want = estimate_arms(bids, exp, cluster="auction").table
    assert got["segment"].isna().sum() == 13 and set(got["segment"].dropna()) == {"bulk", "fresh"}
    assert got[["arm", "segment", "metric"]].astype(object).fillna("").values.tolist() == \
        want[["arm", "segment", "metric"]].astype(object).fillna("").values.tolist()
    if max_bids:  # shards are strata of their own: other numbers, the same shape
        assert payload["shards"] > 1
    else:  # JSON carries 10 decimals
        np.testing.assert_allclose(got["estimate"].to_numpy(float), want["estimate"].to_numpy(float), atol=1e-9)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 0, err
    assert "(pooled)" in out and " fresh " in out


def test_segment_changing_within_an_auction_is_one_line(tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SEGMENTED_SPEC)
    exp = parse_experiments(__import__("yaml").safe_load(SEGMENTED_SPEC))["cli-exp"]
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=4, n_auctions=200, rng=4)
    bids["aisle"] = np.where(np.arange(len(bids)) == 5, "fresh", "bulk")
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert code == 2 and out == ""
    line = err.strip().splitlines()
    assert len(line) == 1 and f"auction {bids['auction_id'].iloc[5]} has two values of segment column 'aisle'" in line[0]


def test_simulate_writes_segments_that_estimate_reads_back(tmp_path, capsys):
    """`counterbid simulate --segment ...` writes the spec's segment column; each segment's auctions
    have its own bidder count, and `estimate` gives its rows."""
    spec = tmp_path / "spec.yaml"
    spec.write_text(SEGMENTED_SPEC)
    code, _, err = run(["simulate", "--experiment", str(spec), "--out", str(tmp_path / "lake"), "--auctions-per-day",
                        "1500", "--segment", "bulk:beta:4:0.6", "--segment", "fresh:lognorm:6:0.4", "--seed", "5"],
                       capsys)
    assert code == 0, err
    path = tmp_path / "lake" / "ds=2026-01-05" / "cli-exp.parquet"
    bids = pd.read_parquet(path)
    sizes = bids.groupby("auction_id").agg(aisle=("aisle", "first"), n=("bid", "size"))
    assert sizes.groupby("aisle")["n"].unique().map(list).to_dict() == {"bulk": [4], "fresh": [6]}
    assert 0.55 < (sizes["aisle"] == "bulk").mean() < 0.65  # 1,500 auctions: sd of the share 0.013
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"], capsys)
    assert code == 0, err
    assert set(json.loads(out)["segments"]) == {"bulk", "fresh"}
    for bad, words in ((["--segment", "bulk:gamma:4:0.6"], "expected LABEL:VALUES:BIDDERS:SHARE"),
                       (["--segment", "bulk:beta:1:0.6"], "BIDDERS must be a whole number >= 2"),
                       ([], "declares segments (aisle): give them with --segment")):
        code, out, err = run(["simulate", "--experiment", str(spec), "--out", str(tmp_path / "bad"), *bad], capsys)
        assert code == 2 and words in err and len(err.strip().splitlines()) == 1, err
        assert not (tmp_path / "bad").exists()
