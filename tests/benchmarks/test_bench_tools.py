"""The benchmark's own instruments: the process-tree memory sampler and the engine comparison."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from .compare_engines import compare_frames

#: A child that starts two grandchildren at once, each holding 300 MiB of touched memory for a second.
_TREE = """
import subprocess, sys
grandchild = "import numpy as np, time; a = np.ones(300 * 2**20 // 8); time.sleep(1.0)"
running = [subprocess.Popen([sys.executable, "-c", grandchild]) for _ in range(2)]
assert all(p.wait(timeout=120) == 0 for p in running)
"""


#: Measures _TREE from a fresh, small interpreter: a child started with vfork begins its ru_maxrss at
#: its parent's peak, and pytest's own process is several hundred MiB.
_MEASURE = f"""
import json, sys
sys.path.insert(0, {str(Path(__file__).resolve().parent)!r})
from bench_estimator import run_child
r = run_child([sys.executable, "-c", {_TREE!r}], tree=True)
print(json.dumps({{k: v for k, v in r.items() if k not in ("stdout", "stderr")}}))
"""


def test_tree_memory_sums_the_processes_where_ru_maxrss_takes_the_largest():
    r = json.loads(subprocess.run([sys.executable, "-c", _MEASURE], check=True, capture_output=True,
                                  text=True, timeout=300).stdout)
    # wait4's ru_maxrss is the largest single peak among the child and its reaped descendants: one
    # grandchild (300 MiB + numpy's import, ~30 MiB), not two
    assert 300 < r["rss_mib"] < 450
    # the tree's sampled peak holds both 300 MiB arrays at once (each held 1 s against a 50 ms interval)
    assert r["tree_pss_mib"] > 600
    assert r["tree_rss_mib"] >= r["tree_pss_mib"] - 1
    assert r["tree_processes"] == 3
    assert r["peak_roles_mib"]["workers"] > 600


def _frame():
    return pd.DataFrame({"arm": ["control", "wide", "wide"], "metric": ["revenue_per_auction"] * 2 + ["lift"],
                         "estimate": [0.5, 0.25, 0.0], "std_error": [0.01, np.nan, 0.0], "n_bids": [10, 20, 30]})


def test_compare_frames_finds_the_largest_relative_difference_and_text_changes():
    local = _frame()
    same = compare_frames(local, local.copy())
    assert same["max_relative"] == 0.0 and not same["problems"]
    assert same["numeric_cells"] == 9 and same["text_cells"] == 6

    spark = local.copy()
    spark.loc[1, "estimate"] = 0.25 * (1 + 4e-12)  # relative 4e-12 / (1 + 4e-12)
    spark.loc[2, "estimate"] = 1e-300  # both-zero cells count 0; one side zero is a relative difference of 1
    found = compare_frames(local, spark)
    assert found["max_relative"] == 1.0 and "row 2" in found["where"]
    spark.loc[2, "estimate"] = 0.0
    found = compare_frames(local, spark)
    assert abs(found["max_relative"] - 4e-12) < 1e-15 and "wide, revenue_per_auction" in found["where"]
    assert not found["problems"]

    spark.loc[0, "std_error"] = np.nan
    spark.loc[2, "metric"] = "revenue_lift"
    found = compare_frames(local, spark)
    assert found["text_differences"] == 1
    assert any("NaN on one side" in q for q in found["problems"])
    assert compare_frames(local, spark.iloc[:2])["problems"]  # a missing row is a difference, not a pass
