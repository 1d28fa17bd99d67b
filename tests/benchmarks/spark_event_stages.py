"""Spark's own account of a run, stage by stage, from its event log (not a test).

Spark writes one JSON event per line when ``spark.eventLog.enabled`` is set; this module reads
that file after the session stopped and sums, per Spark stage, what its tasks report: run time,
CPU time of the task threads, JVM GC time, shuffle bytes written and read, records in and out,
and the stage's span from its first task's launch to its last task's end. ``idle_core_s`` is
``cores * span - busy``: the task slots left unused while the stage ran (a straggler, fewer tasks
than cores). Each stage is named by the description of the job that ran it
(``SparkContext.setJobDescription``), so a benchmark can tie Spark's stages to its own.

Python workers are separate processes: their CPU is not in Spark's task metrics (measure it with
the process tree, as ``bench_spark_stages.py`` does).

Usage: python tests/benchmarks/spark_event_stages.py EVENT_LOG_FILE_OR_FOLDER [--cores 2]
"""

from __future__ import annotations

import argparse
import json
from dataclasses import dataclass, field


@dataclass
class StageTally:
    """Sums over one Spark stage's finished tasks (seconds, bytes, records)."""

    job: str
    stage: int
    name: str = ""
    tasks: int = 0
    run_s: float = 0.0
    cpu_s: float = 0.0
    gc_s: float = 0.0
    busy_s: float = 0.0
    shuffle_write_bytes: int = 0
    shuffle_read_bytes: int = 0
    records_in: int = 0
    records_out: int = 0
    first_launch: float = float("inf")
    last_finish: float = 0.0
    durations: list[float] = field(default_factory=list)

    @property
    def span_s(self) -> float:
        return max(0.0, self.last_finish - self.first_launch)

    def row(self, cores: int) -> dict:
        return {"job": self.job, "stage": self.stage, "name": self.name[:40], "tasks": self.tasks,
                "span_s": round(self.span_s, 2), "run_s": round(self.run_s, 2), "task_cpu_s": round(self.cpu_s, 2),
                "gc_s": round(self.gc_s, 2), "idle_core_s": round(cores * self.span_s - self.busy_s, 2),
                "longest_task_s": round(max(self.durations, default=0.0), 2),
                "shuffle_write_mib": round(self.shuffle_write_bytes / 2**20, 1),
                "shuffle_read_mib": round(self.shuffle_read_bytes / 2**20, 1),
                "records_in": self.records_in, "records_out": self.records_out}


def stage_tallies(lines) -> list[StageTally]:
    """Every Spark stage of an event log (its lines, JSON), with its tasks' sums, in order of stage id."""
    job_of_stage: dict[int, str] = {}
    tallies: dict[int, StageTally] = {}
    for line in lines:
        event = json.loads(line)
        kind = event.get("Event")
        if kind == "SparkListenerJobStart":
            name = (event.get("Properties") or {}).get("spark.job.description") or f"job {event['Job ID']}"
            for stage in event.get("Stage IDs", []):
                job_of_stage[stage] = name
        elif kind == "SparkListenerStageCompleted":
            info = event["Stage Info"]
            tally = tallies.setdefault(info["Stage ID"], StageTally(job_of_stage.get(info["Stage ID"], "?"),
                                                                   info["Stage ID"]))
            tally.name = info.get("Stage Name", "")
        elif kind == "SparkListenerTaskEnd":
            stage = event["Stage ID"]
            tally = tallies.setdefault(stage, StageTally(job_of_stage.get(stage, "?"), stage))
            info, metrics = event["Task Info"], event.get("Task Metrics") or {}
            launch, finish = info["Launch Time"] / 1e3, info["Finish Time"] / 1e3
            tally.tasks += 1
            tally.first_launch, tally.last_finish = min(tally.first_launch, launch), max(tally.last_finish, finish)
            tally.busy_s += finish - launch
            tally.durations.append(finish - launch)
            tally.run_s += metrics.get("Executor Run Time", 0) / 1e3
            tally.cpu_s += metrics.get("Executor CPU Time", 0) / 1e9
            tally.gc_s += metrics.get("JVM GC Time", 0) / 1e3
            write = metrics.get("Shuffle Write Metrics") or {}
            read = metrics.get("Shuffle Read Metrics") or {}
            tally.shuffle_write_bytes += write.get("Shuffle Bytes Written", 0)
            tally.shuffle_read_bytes += read.get("Remote Bytes Read", 0) + read.get("Local Bytes Read", 0)
            tally.records_in += (metrics.get("Input Metrics") or {}).get("Records Read", 0) + read.get(
                "Total Records Read", 0)
            tally.records_out += write.get("Shuffle Records Written", 0)
    return [tallies[k] for k in sorted(tallies)]


def event_lines(path: str):
    """The lines of an event log: one file, or a rolling log's folder (``eventlog_v2_<app>``, its
    ``events_<n>_<app>`` files in order of ``n``)."""
    import os
    import re

    if os.path.isdir(path):
        files = sorted((f for f in os.listdir(path) if f.startswith("events_")),
                       key=lambda f: int(re.match(r"events_([0-9]+)_", f).group(1)))
        paths = [os.path.join(path, f) for f in files]
    else:
        paths = [path]
    for name in paths:
        with open(name) as f:
            yield from f


def app_log(folder: str, app: str) -> str:
    """The event log of application ``app`` under ``folder`` (rolling or one file)."""
    import os

    rolling = os.path.join(folder, f"eventlog_v2_{app}")
    return rolling if os.path.isdir(rolling) else os.path.join(folder, app)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("event_log")
    p.add_argument("--cores", type=int, default=2)
    args = p.parse_args(argv)
    for tally in stage_tallies(event_lines(args.event_log)):
        print(json.dumps(tally.row(args.cores)))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
