"""`counterbid estimate` with what-if layouts in the spec: rows that say so, in the table and JSON."""

from __future__ import annotations

import json

import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main
from counterbid.estimators import parse_experiments, simulate_experiment

SPEC = """experiments:
  - id: loomfair
    control_arm: narrow
    arms:
      - {name: narrow, share: 0.7, position_weights: [0.4, 0.2]}
      - {name: broad, share: 0.3, position_weights: [0.35, 0.25, 0.1]}
    what_if:
      - {name: tall-top, position_weights: [0.5, 0.15]}
      - {name: level-pair, position_weights: [0.3, 0.3]}
"""


@pytest.fixture
def files(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(yaml.safe_load(SPEC))["loomfair"]
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=3000, rng=3)
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    return spec, path


def test_json_rows_mark_the_what_if_layouts(files, capsys):
    spec, path = files
    assert main(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"]) == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    marked = {(r["arm"], r["metric"]) for r in rows if r["what_if"]}
    assert marked == {(a, m) for a in ("tall-top", "level-pair")
                      for m in ("revenue_per_auction", "welfare_per_auction", "revenue_lift_vs_control")}
    tall = next(r for r in rows if r["arm"] == "tall-top" and r["metric"] == "revenue_per_auction")
    assert tall["status"] == "ok" and tall["effective_share"] > 0 and tall["ci_low"] < tall["estimate"]
    assert all(r["effective_share"] is None for r in rows if not r["what_if"])


def test_table_explains_what_if_rows(files, capsys):
    spec, path = files
    assert main(["estimate", "--bids", str(path), "--experiment", str(spec)]) == 0
    out = capsys.readouterr().out
    assert "tall-top" in out and "effective_share" in out
    assert "bidders would respond to such a layout as they would if it ran" in out


def test_measured_what_if_weights_refused_in_one_line(files, capsys, tmp_path):
    spec, path = files
    bad = tmp_path / "bad.yaml"
    bad.write_text(SPEC.replace("[0.5, 0.15]", "measured"))
    assert main(["estimate", "--bids", str(path), "--experiment", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "what_if[0] (tall-top): position_weights cannot be 'measured'" in err[0]
