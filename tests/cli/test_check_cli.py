"""``counterbid check`` on a simulated lake: the table, exit 1 on an error check, exit 2 on bad input."""

from __future__ import annotations

import json
import subprocess
import sys

import pandas as pd
import pytest

from counterbid.cli import main

SPEC = """\
# Invented Quillfen layouts
experiments:
  - id: maker-spotlight
    control_arm: large-tile
    start: 2026-03-02
    arms:
      - {name: large-tile, share: 0.6, position_weights: [0.42, 0.06, 0.03]}
      - {name: tile-stack, share: 0.4, position_weights: [0.25, 0.22, 0.10]}
  - id: featured-rows
    control_arm: classic
    arms:
      - {name: classic,  share: 0.9, position_weights: [0.31, 0.17, 0.06, 0.02]}
      - {name: wide-top, share: 0.1, position_weights: [0.36, 0.12, 0.05, 0.02]}
"""


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("cli_check")
    spec = root / "experiments.yaml"
    spec.write_text(SPEC)
    out = root / "lake"
    code = main(["simulate", "--experiment", str(spec), "--experiment-id", "maker-spotlight", "--out", str(out),
                 "--start", "2026-03-03", "--days", "3", "--auctions-per-day", "1500", "--bidders", "5", "--seed", "3"])
    assert code == 0
    return spec, out


def test_table_flags_warmup_days_and_exits_zero_on_warnings(lake, capsys):
    spec, out = lake
    code = main(["check", "--bids", str(out), "--experiment", str(spec), "--experiment-id", "maker-spotlight"])
    text = capsys.readouterr().out
    assert code == 0
    lines = text.splitlines()
    assert lines[0].startswith("experiment maker-spotlight: 3 day(s), 2 failed check(s), worst: warning")
    warm = [ln.split() for ln in lines if " warmup " in f" {ln} "]
    assert [(w[0], w[3], w[4]) for w in warm] == [("2026-03-03", "NO", "1"), ("2026-03-04", "NO", "2"),
                                                  ("2026-03-05", "yes", "3")]


#: Runs ``counterbid check`` in a fresh interpreter (no test has imported anything yet, warnings at
#: Python's defaults), then says whether pyspark was imported on the way.
CHECK_IN_A_FRESH_PROCESS = """
import sys
from counterbid.cli import main
code = main(sys.argv[1:])
print("pyspark imported:", "pyspark" in sys.modules, file=sys.stdout)
sys.exit(code)
"""


def test_check_keeps_stderr_to_its_own_lines_and_leaves_pyspark_alone(lake):
    # Great Expectations probes for pyspark when imported; PySpark 4.2 then printed two
    # FutureWarnings about pandas 3 on every `counterbid check`, with the Spark engine unused.
    spec, out = lake
    done = subprocess.run([sys.executable, "-c", CHECK_IN_A_FRESH_PROCESS, "check", "--bids", str(out),
                           "--experiment", str(spec), "--experiment-id", "maker-spotlight"],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""
    lines = done.stdout.splitlines()
    assert lines[0].startswith("experiment maker-spotlight: 3 day(s)") and lines[-1] == "pyspark imported: False"


def test_json_output_rows(lake, capsys):
    spec, out = lake
    assert main(["check", "--bids", str(out), "--experiment", str(spec), "--experiment-id", "maker-spotlight",
                 "--format", "json"]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["worst"] == "warning"
    drift = [r for r in payload["rows"] if r["check"] == "drift"]
    assert [r["ds"] for r in drift] == ["2026-03-03", "2026-03-04", "2026-03-05"]
    assert drift[0]["observed"] is None and drift[1]["details"]["by_bidders"]["5"]["trailing_bids"] == 7500


def test_error_check_exits_one(lake, tmp_path, capsys):
    spec, out = lake
    day = pd.read_parquet(out / "ds=2026-03-04" / "maker-spotlight.parquet")
    day.loc[1, "bidder_id"] = day.loc[0, "bidder_id"]  # a bidder twice in one auction
    bad = tmp_path / "bad.parquet"
    day.to_parquet(bad, index=False)
    code = main(["check", "--bids", str(bad), "--experiment", str(spec), "--experiment-id", "maker-spotlight",
                 "--ds", "2026-03-04", "--format", "csv"])
    table = pd.read_csv(pd.io.common.StringIO(capsys.readouterr().out))
    assert code == 1
    # a failed contract stops the statistical checks: the one failure is the contract rule
    assert table.loc[~table["passed"], "check"].tolist() == ["contract_bidder_unique"]


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--bids", "{root}/nowhere"], "nowhere: no such file or folder"),
        (["--bids", "{lake}", "--experiment-id", "nope"], "no experiment with id 'nope'"),
        (["--bids", "{lake}", "--ds", "2026-3-4x"], "--ds: must be a date YYYY-MM-DD"),
        (["--bids", "{lake}", "--ds", "2026-04-01"], "no bids of experiment 'maker-spotlight' on 2026-04-01"),
        (["--bids", "{lake}", "--experiment-id", "featured-rows"], "no bids for experiment 'featured-rows'"),
    ],
)
def test_bad_input_exits_two_with_one_line(lake, capsys, args, message):
    spec, out = lake
    argv = ["check", "--experiment", str(spec)] + [a.format(root=out.parent, lake=out) for a in args]
    code = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2
    assert len(err) == 1 and err[0].startswith("counterbid: error: ") and message in err[0]


def test_one_day_with_the_earlier_days_as_trailing(lake, capsys):
    spec, out = lake
    assert main(["check", "--bids", str(out), "--experiment", str(spec), "--ds", "2026-03-05", "--format", "json"]) == 0
    rows = json.loads(capsys.readouterr().out)["rows"]
    assert {r["ds"] for r in rows} == {"2026-03-05"}
    drift = next(r for r in rows if r["check"] == "drift")
    assert drift["details"]["by_bidders"]["5"]["trailing_bids"] == 15000
