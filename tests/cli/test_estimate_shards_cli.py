"""`counterbid estimate --max-bids-per-shard`: a log estimated shard by shard, as the pipeline does."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main
from counterbid.estimators import estimate_arms, parse_experiments, simulate_experiment
from counterbid.estimators import combine_pieces, shard_of, stratum_pieces

SPEC = """experiments:
  - id: strip
    control_arm: near
    arms:
      - {name: near, share: 0.6, position_weights: [0.35, 0.15, 0.05]}
      - {name: far,  share: 0.4, position_weights: [0.30, 0.20, 0.10]}
"""


@pytest.fixture
def files(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(yaml.safe_load(SPEC))["strip"]
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.4, 5: 0.6}, n_auctions=4000, rng=4)
    bids["auction_id"] = "lot-" + bids["auction_id"].astype(str)  # text ids: hashed as their UTF-8 text
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    return spec, path, bids, exp


def _json(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 0, err
    return json.loads(out)


def test_sharded_log_is_the_combination_of_its_shards(files, capsys, monkeypatch):
    spec, path, bids, exp = files
    base = ["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"]
    sharded = _json([*base, "--max-bids-per-shard", "5000"], capsys)  # 16 800 bids: 4 shards
    assert sharded["shards"] == 4
    shard = shard_of(bids["auction_id"], 4)
    pieces = [p for k in range(4) for p in stratum_pieces(bids[shard == k].reset_index(drop=True), exp, shard=k)]
    want = combine_pieces(pieces, exp)
    got = pd.DataFrame(sharded["rows"])
    np.testing.assert_allclose(got["estimate"].to_numpy(float), want.table["estimate"].to_numpy(float), rtol=0, atol=1e-10)  # the JSON output keeps 10 decimals
    np.testing.assert_allclose(got["std_error"].to_numpy(float), want.table["std_error"].to_numpy(float), rtol=0, atol=1e-10)  # the JSON output keeps 10 decimals
    assert got["n_auctions"].tolist() == want.table["n_auctions"].tolist()
    # one shard (the default here) is estimate_arms of the whole log
    whole = _json(base, capsys)
    assert whole["shards"] == 1
    np.testing.assert_allclose(pd.DataFrame(whole["rows"])["estimate"].to_numpy(float),
                               estimate_arms(bids, exp).table["estimate"].to_numpy(float), rtol=0, atol=1e-10)  # the JSON output keeps 10 decimals
    # shards cost a bias of order 1/N per shard: far inside the standard error at these sizes
    rev = got["metric"] == "revenue_per_auction"
    gap = np.abs(got.loc[rev, "estimate"].to_numpy() - pd.DataFrame(whole["rows"]).loc[rev, "estimate"].to_numpy())
    assert (gap < got.loc[rev, "std_error"].to_numpy()).all()
    # the environment sets the default
    monkeypatch.setenv("COUNTERBID_MAX_BIDS_PER_SHARD", "9000")
    assert _json(base, capsys)["shards"] == 2


@pytest.mark.parametrize("value, message", [
    ("0", "--max-bids-per-shard must be a whole number of bids >= 1; got 0"),
    ("-5", "--max-bids-per-shard must be a whole number of bids >= 1; got -5"),
])
def test_bad_shard_size_is_one_line(files, capsys, value, message):
    spec, path, _, _ = files
    code = main(["estimate", "--bids", str(path), "--experiment", str(spec), "--max-bids-per-shard", value])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0] == f"counterbid: error: {message}"


def test_bad_environment_value_is_named(files, capsys, monkeypatch):
    spec, path, _, _ = files
    monkeypatch.setenv("COUNTERBID_MAX_BIDS_PER_SHARD", "4M")
    assert main(["estimate", "--bids", str(path), "--experiment", str(spec)]) == 2
    assert capsys.readouterr().err.strip() == \
        "counterbid: error: COUNTERBID_MAX_BIDS_PER_SHARD must be a whole number of bids >= 1; got '4M'"


def test_a_bid_without_an_auction_id_is_refused_in_every_shard_count(files, capsys):
    """md5 of a null id is null: such a bid must land in a shard (0) and be refused there, not vanish."""
    spec, path, bids, exp = files
    holed = bids.copy()
    holed.loc[holed.index[7], "auction_id"] = None
    holed.to_parquet(path, index=False)
    for max_bids in ("100000", "5000"):  # one shard, then four
        code = main(["estimate", "--bids", str(path), "--experiment", str(spec), "--max-bids-per-shard", max_bids])
        _, err = capsys.readouterr()
        assert code == 2, (max_bids, err)
        assert err.count("\n") == 1 and "'auction_id'" in err and "null" in err, err


def test_a_log_without_auction_ids_gets_the_missing_column_line_in_every_shard_count(files, capsys):
    spec, path, bids, exp = files
    bids.drop(columns=["auction_id"]).to_parquet(path, index=False)
    lines = set()
    for max_bids in ("100000", "5000"):  # one shard, then (were there ids) four
        code = main(["estimate", "--bids", str(path), "--experiment", str(spec), "--max-bids-per-shard", max_bids])
        _, err = capsys.readouterr()
        assert code == 2 and err.count("\n") == 1 and "'auction_id' is missing" in err, err
        lines.add(err)
    assert len(lines) == 1  # the same line whatever the shard setting
