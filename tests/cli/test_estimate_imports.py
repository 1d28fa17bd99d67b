"""`counterbid estimate` leaves unloaded what it does not use (process start dominates a 1M-bid run).

A real process estimates a small log and reports the modules it ended with: the statistical
checks, the simulator, the study, ``scipy.stats``, Airflow and the operators stay out; DuckDB
stays out while the log is one shard and its auction ids are integers (it computes the shard hash
only when there are several, and keys text ids only when both identity columns are text).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment

SPEC = """experiments:
  - id: lean-run
    control_arm: low
    arms:
      - {name: low, share: 0.6, position_weights: [0.5, 0.25, 0.1]}
      - {name: steep, share: 0.4, position_weights: [0.7, 0.1]}
"""

PROBE = """
import json, sys
from counterbid.cli import main
code = main(sys.argv[1:])
pool = sys.modules["pyarrow"].default_memory_pool().backend_name if "pyarrow" in sys.modules else None
print(json.dumps({"code": code, "modules": sorted(sys.modules), "pool": pool}))
"""

NEVER = ("scipy.stats", "scipy.optimize", "scipy.interpolate", "airflow", "counterbid.operators",
         "counterbid.estimators.checks",
         "counterbid.estimators.simulate", "counterbid.estimators.study", "counterbid.estimators.two_step")


@pytest.fixture
def small_log(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(__import__("yaml").safe_load(SPEC))["lean-run"]
    bids = simulate_experiment(st.lognorm(0.4, scale=1.3), exp, n_bidders=4, n_auctions=2500, rng=8)
    bids["bidder_id"] = "seat-" + (bids["bidder_id"] % 400).astype(str)  # text ids that repeat
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    return spec, path, len(bids)


def _loaded(*argv, env=None) -> dict:
    proc = subprocess.run([sys.executable, "-c", PROBE, *argv], capture_output=True, text=True, timeout=300, env=env)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


@pytest.mark.parametrize("shards", [1, 3])
def test_estimate_loads_no_module_it_does_not_use(small_log, shards):
    spec, path, n_bids = small_log
    found = _loaded("estimate", "--bids", str(path), "--experiment", str(spec), "--format", "csv",
                    "--max-bids-per-shard", str(-(-n_bids // shards)))
    assert found["code"] == 0
    modules = set(found["modules"])
    assert "counterbid.estimators.pieces" in modules  # it did estimate
    loaded = sorted(m for m in modules if any(m == name or m.startswith(name + ".") for name in NEVER))
    assert loaded == []
    assert ("duckdb" in modules) == (shards > 1)


@pytest.mark.parametrize("asked", [None, "mimalloc"])
@pytest.mark.parametrize("text_ids", [True, False])
def test_text_ids_are_read_with_the_c_library_allocator_unless_told(small_log, tmp_path, asked, text_ids):
    spec, path, _ = small_log
    if not text_ids:  # the same log with integer bidder ids: Arrow's default pool stays
        import pandas as pd

        bids = pd.read_parquet(path)
        bids["bidder_id"] = bids["bidder_id"].str.removeprefix("seat-").astype("int64")
        path = tmp_path / "integer_ids.parquet"
        bids.to_parquet(path, index=False)
    env = {k: v for k, v in os.environ.items() if k != "ARROW_DEFAULT_MEMORY_POOL"}
    if asked:
        env["ARROW_DEFAULT_MEMORY_POOL"] = asked
    found = _loaded("estimate", "--bids", str(path), "--experiment", str(spec), "--format", "csv", env=env)
    assert found["code"] == 0
    if asked or text_ids:
        assert found["pool"] == (asked or "system")
    else:  # Arrow's own default pool (mimalloc or jemalloc in pyarrow's wheels), not the C library's
        assert found["pool"] != "system"
