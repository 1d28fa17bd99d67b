"""The benchmark's own instruments: the process-tree memory sampler and the engine comparison."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd

from .compare_engines import compare_frames

#: A child that starts two grandchildren at once, each holding 300 MiB of touched memory for a second
#: after both hold it (a file each in a shared folder is the meeting point: under load one grandchild's
#: numpy import can outlast the other's whole life).
_TREE = """
import subprocess, sys, tempfile
grandchild = '''
import numpy as np, os, sys, time
a = np.ones(300 * 2**20 // 8)
open(os.path.join(sys.argv[1], str(os.getpid())), "w").close()
give_up = time.monotonic() + 120
while len(os.listdir(sys.argv[1])) < 2 and time.monotonic() < give_up:
    time.sleep(0.01)
time.sleep(1.0)
'''
meeting = tempfile.mkdtemp()
running = [subprocess.Popen([sys.executable, "-c", grandchild, meeting]) for _ in range(2)]
assert all(p.wait(timeout=180) == 0 for p in running)
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
    # each role's own peak RSS: the two grandchildren's arrays summed, the child itself small
    assert r["peak_rss_by_role_mib"]["workers"] > 600
    assert r["peak_rss_by_role_mib"]["driver"] < 200


#: A child that starts a grandchild it never waits for and exits at once; the grandchild, orphaned,
#: spins for about a second of CPU (as a PySpark driver leaves its JVM behind).
_ORPHAN = """
import subprocess, sys
spin = "import time\\nend = time.process_time() + 1.0\\nwhile time.process_time() < end: pass"
subprocess.Popen([sys.executable, "-c", spin])
"""
_MEASURE_ORPHAN = _MEASURE.replace(repr(_TREE), repr(_ORPHAN)).replace(", tree=True", "")


def test_cpu_counts_the_orphan_a_child_leaves_behind():
    r = json.loads(subprocess.run([sys.executable, "-c", _MEASURE_ORPHAN], check=True, capture_output=True,
                                  text=True, timeout=300).stdout)
    assert r["cpu_complete"]
    # os.wait4 of the child alone sees only its own start-up; the orphan's spin is reaped here
    assert r["cpu_orphans"] >= 0.95
    assert r["cpu"] >= r["cpu_orphans"] + 0.01


_FAILING = "import sys; print('step one fine', file=sys.stderr); print('bids.parquet: no column bid', file=sys.stderr); sys.exit(3)"


_MEASURE_FAILING = _MEASURE.replace(
    f"r = run_child([sys.executable, \"-c\", {_TREE!r}], tree=True)\nprint(json.dumps({{k: v for k, v in r.items() if k not in (\"stdout\", \"stderr\")}}))",
    f"try:\n    run_child([sys.executable, '-c', {_FAILING!r}])\nexcept SystemExit as exc:\n    print(json.dumps(str(exc)))")


def test_a_failed_child_ends_with_its_last_error_line_and_its_measurements():
    # in a fresh interpreter: run_child makes its process a subreaper
    out = subprocess.run([sys.executable, "-c", _MEASURE_FAILING], check=True, capture_output=True, text=True,
                         timeout=300).stdout
    last = json.loads(out).strip().splitlines()[-1]
    assert last.startswith("bids.parquet: no column bid [exit 3 after ")
    assert "peak RSS" in last and "CPU" in last


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


def test_a_failed_dag_step_reports_its_error_line_cpu_and_peak_rss():
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_dag_steps import StepFailed, _child

    hungry = ("import numpy as np, sys; a = np.ones(200 * 2**20 // 8); "
              "raise SystemExit('staging/part-007.parquet: column bid is not a number')")
    try:
        _child([sys.executable, "-c", hungry])
    except StepFailed as failed:
        assert failed.exit_code == 1
        assert failed.last_line == "staging/part-007.parquet: column bid is not a number"
        assert failed.rss_mib > 200 and failed.cpu > 0
    else:
        raise AssertionError("a failing step must raise StepFailed")


def test_the_window_bench_adds_the_shard_tasks_to_the_estimate_step_it_reports(tmp_path):
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_window import combined, shard_tasks, staged_shards

    day = tmp_path / "bench" / "ds=2026-03-04" / "day"
    for name in ("shard=10", "shard=2", "shard=0"):
        (day / name).mkdir(parents=True)
    (day / "shard=3.partial").mkdir()
    (day / "shards.json").write_text("{}")
    assert staged_shards(tmp_path, "2026-03-04") == [0, 2, 10]  # numeric order, staged folders only
    assert staged_shards(tmp_path, "2026-03-05") == []
    assert shard_tasks(tmp_path, "2026-03-04") == [0, 2, 10]
    (tmp_path / "bench" / "ds=2026-03-06" / "day" / "shard=0").mkdir(parents=True)
    assert staged_shards(tmp_path, "2026-03-06") == [0] and shard_tasks(tmp_path, "2026-03-06") == []  # as the DAG

    shards = [{"cpu": 2.5, "wall": 3.0, "rss_mib": 900.0}, {"cpu": 1.5, "wall": 2.0, "rss_mib": 700.0}]
    combine = {"cpu": 4.0, "wall": 6.0, "rss_mib": 800.0, "route": "extended", "to_date_bids": 3_000_000}
    r = combined(shards, combine)
    assert (r["cpu"], r["wall"], r["rss_mib"]) == (8.0, 11.0, 900.0)  # CPU and wall summed, the largest peak
    assert (r["shard_cpu"], r["shard_rss_mib"], r["shards"]) == (4.0, 900.0, 2)
    assert (r["combine_cpu"], r["combine_rss_mib"]) == (4.0, 800.0)
    assert r["route"] == "extended" and r["to_date_bids"] == 3_000_000


def test_event_log_stages_sum_their_tasks_and_count_the_idle_task_slots(tmp_path):
    # one job of two stages on 2 task threads: stage 3 has one long and one short task (a straggler
    # leaves a slot idle), stage 4 a single task; a rolling log's folder reads as its files in order
    from .spark_event_stages import app_log, event_lines, stage_tallies

    def task(stage, launch, finish, cpu_ns, written=0, read=0):
        return {"Event": "SparkListenerTaskEnd", "Stage ID": stage,
                "Task Info": {"Launch Time": launch, "Finish Time": finish},
                "Task Metrics": {"Executor Run Time": finish - launch, "Executor CPU Time": cpu_ns, "JVM GC Time": 100,
                                 "Shuffle Write Metrics": {"Shuffle Bytes Written": written, "Shuffle Records Written": 7},
                                 "Shuffle Read Metrics": {"Local Bytes Read": read, "Remote Bytes Read": 0,
                                                          "Total Records Read": 0},
                                 "Input Metrics": {"Records Read": 5}}}

    events = [{"Event": "SparkListenerJobStart", "Job ID": 0, "Stage IDs": [3, 4],
               "Properties": {"spark.job.description": "full"}},
              task(3, 1_000, 9_000, 6 * 10**9, written=2**20), task(3, 1_000, 3_000, 10**9, written=2**20),
              {"Event": "SparkListenerStageCompleted", "Stage Info": {"Stage ID": 3, "Stage Name": "map"}},
              task(4, 9_500, 10_500, 5 * 10**8, read=2 * 2**20)]
    folder = tmp_path / "eventlog_v2_local-1"
    folder.mkdir()
    lines = [json.dumps(e) + "\n" for e in events]
    (folder / "events_2_local-1").write_text("".join(lines[3:]))
    (folder / "events_1_local-1").write_text("".join(lines[:3]))
    tallies = stage_tallies(event_lines(app_log(str(tmp_path), "local-1")))
    rows = [t.row(2) for t in tallies]
    assert [(r["job"], r["stage"], r["name"], r["tasks"]) for r in rows] == [("full", 3, "map", 2), ("full", 4, "", 1)]
    assert rows[0]["span_s"] == 8.0 and rows[0]["idle_core_s"] == 2 * 8.0 - (8.0 + 2.0)
    assert rows[0]["task_cpu_s"] == 7.0 and rows[0]["gc_s"] == 0.2 and rows[0]["shuffle_write_mib"] == 2.0
    assert rows[0]["records_in"] == 10 and rows[0]["records_out"] == 14 and rows[0]["longest_task_s"] == 8.0
    assert rows[1]["idle_core_s"] == 1.0 and rows[1]["shuffle_read_mib"] == 2.0
