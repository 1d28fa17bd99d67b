"""``counterbid estimate`` and ``counterbid simulate`` with the spec's payment rule, a floor and quality factors.

Bad inputs end in one line ``counterbid: error: ...`` and exit status 2. Revenue is checked against
Myerson's (1981) formula, computed by ``expected_revenue_per_auction`` (Gauss-Legendre quadrature;
checked against ``scipy.integrate.quad`` in tests/estimators/test_simulate_rules.py).
"""

from __future__ import annotations

import json
import re

import pandas as pd
import pytest
import scipy.stats as st

from counterbid.cli import main
from counterbid.estimators import expected_revenue_per_auction

SPEC = """experiments:
  - id: quillfen-gsp
    payment_rule: {rule}
    control_arm: control
    floor: 0.5
    arms:
      - {{name: control, share: 0.7, position_weights: [0.4, 0.2, 0.1]}}
      - {{name: steep, share: 0.3, position_weights: [0.6, 0.1]}}
"""


@pytest.fixture
def lake(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC.format(rule="gsp"))
    out = tmp_path / "lake"
    assert main(["simulate", "--experiment", str(spec), "--out", str(out), "--auctions-per-day", "6000",
                 "--bidders", "4", "--values", "lognorm", "--quality", "0.6", "1.4", "--seed", "3"]) == 0
    path = next(out.rglob("*.parquet"))
    return spec, path


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_simulate_and_estimate_follow_the_spec(lake, capsys):
    spec, path = lake
    bids = pd.read_parquet(path)
    assert "quality" in bids and bids.loc[bids["bid"] * bids["quality"] < 0.5, "position"].isna().all()
    code, out, _ = run(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"], capsys)
    payload = json.loads(out)
    assert code == 0 and payload["payment_rule"] == "gsp" and payload["floor"] == 0.5 and payload["quality"] is True
    rows = {(r["arm"], r["metric"]): r for r in payload["rows"]}
    values = st.lognorm(0.5, scale=0.8)  # the command's lognorm: effective values
    for arm, w in (("control", [0.4, 0.2, 0.1]), ("steep", [0.6, 0.1])):
        r = rows[(arm, "revenue_per_auction")]
        assert abs(r["estimate"] - expected_revenue_per_auction(values, w, 4, floor=0.5)) < 3 * r["std_error"]
    code, out, _ = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    assert "payment rule gsp, floor 0.5, ranked by bid x quality" in out


@pytest.mark.parametrize("kind,pattern", [
    ("rule", r"unknown payment_rule 'english'"),
    ("floor above", r"the floor 1000.0 lies above every effective bid"),
    ("quality zero", r"column 'quality' row 5 is not positive"),
    ("quality null", r"column 'quality' row 5 is missing"),
    ("shown below floor", r"row \d+ has effective bid .* below the floor 0.5 but position 1"),
])
def test_bad_inputs_one_line_exit_2(lake, capsys, kind, pattern):
    spec, path = lake
    bids = pd.read_parquet(path)
    if kind == "rule":
        spec.write_text(SPEC.format(rule="english"))
    elif kind == "floor above":
        spec.write_text(SPEC.format(rule="gsp").replace("floor: 0.5", "floor: 1000.0"))
    elif kind == "quality zero":
        bids.loc[5, "quality"] = 0.0
    elif kind == "quality null":
        bids.loc[5, "quality"] = None
    else:
        i = bids.index[bids["position"].isna() & (bids["bid"] * bids["quality"] < 0.5)][0]
        bids.loc[i, "position"] = 1
    bids.to_parquet(path, index=False)
    code, out, err = run(["estimate", "--bids", str(path), "--experiment", str(spec)], capsys)
    lines = err.strip().splitlines()
    assert code == 2 and out == "" and len(lines) == 1 and lines[0].startswith("counterbid: error: ")
    assert re.search(pattern, lines[0]), lines[0]
