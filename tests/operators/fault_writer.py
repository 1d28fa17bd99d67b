"""A results-database writer in its own process, for the fault tests (``python fault_writer.py ...``).

``write DB EXPERIMENT DAY ROWS RUN_ID [MARKER]``
    One :meth:`ResultsHook.replace_partition` of ``ROWS`` estimate rows. With ``MARKER``, the file
    is created the moment the transaction has deleted the old rows and starts inserting.
``days DB EXPERIMENT FIRST_DAY N_DAYS ROUNDS ROWS [PAUSE]``
    Rewrite ``N_DAYS`` days ``ROUNDS`` times over (a backfill loop), one transaction per day,
    ``PAUSE`` seconds apart (default 0; tasks of a real backfill are seconds apart).
``partition DB STAGING EXPERIMENT DAY [MARKER]``
    The pipeline's write step (:func:`counterbid.operators.partition.write_partition`) of a day the
    test staged and estimated, leaving the staging folder in place. With ``MARKER``, the file is
    created when the *second* results table's insert is about to run (the first table's rows are
    replaced, the second's deleted: mid-write) and the writer then waits inside its transaction
    until ``MARKER.release`` exists (at most 120 s), so the test can kill it or cut its connection
    there. A PostgreSQL session's backend pid is written into the marker.
``contend DB EXPERIMENT DAY ROWS RUN_ID GATE [NAME]``
    Like ``write``, but first builds its rows, creates ``GATE/NAME.ready`` (NAME defaults to
    EXPERIMENT, so writers of one experiment can share a gate) and waits for
    ``GATE/go``, so that several writers start their transactions together. Prints one JSON line:
    how many times DuckDB refused it the file lock (``lock_errors``) and the monotonic-clock
    window of its replace (``started``, ``committed``; one clock for all processes on Linux).
"""

from __future__ import annotations

import datetime as dt
import json
import sys
import time
from pathlib import Path

import duckdb

import pandas as pd
import pyarrow as pa

from counterbid.operators.hooks import ResultsHook, is_lock_error

POSITIONS = 3


def partition_tables(experiment_id: str, day: dt.date, rows: int, run_id: str) -> dict[str, pa.Table]:
    """Rows for every results table of one (experiment, day); values derived from the row number."""
    now = pd.Timestamp.now(tz="UTC")
    k = pd.RangeIndex(rows)
    estimates = pd.DataFrame({
        "experiment_id": experiment_id, "ds": day, "arm": [f"arm{i:07d}" for i in k], "metric": "revenue_per_auction",
        "estimate": k / 7.0, "std_error": 0.01, "ci_low": k / 7.0 - 0.02, "ci_high": k / 7.0 + 0.02,
        "n_auctions": 1000, "n_bids": 4000, "status": "ok", "confidence_level": 0.95, "cluster": "auction", "payment_rule": "first_price", "floor": 0.0,
        "method_version": "ordstat-1", "run_id": run_id,
        "computed_at": now, "what_if": False, "effective_share": float("nan"),
        "segment": None})
    to_date = estimates.assign(first_ds=day - dt.timedelta(days=3), days_used=f"{day - dt.timedelta(days=3)}..{day}",
                               days_left_out="", n_days_used=4, n_days_left_out=0,
                               anytime_low=k / 7.0 - 0.03, anytime_high=k / 7.0 + 0.03, anytime_horizon_auctions=28000)
    weights = pd.DataFrame({
        "experiment_id": experiment_id, "ds": day, "arm": "arm0000000", "position": range(1, POSITIONS + 1),
        "weight": [0.4, 0.2, 0.1], "source": "spec", "impressions": None, "clicks": None, "first_click_ds": None,
        "run_id": run_id, "computed_at": now})
    weights = weights.astype({"impressions": "Int64", "clicks": "Int64", "first_click_ds": "datetime64[ns]"})
    return {name: pa.Table.from_pandas(frame, preserve_index=False)
            for name, frame in (("arm_estimates", estimates), ("arm_estimates_to_date", to_date), ("position_weights", weights))}


class _MarkingHook(ResultsHook):
    """Touches ``marker`` when the first insert statement is fetched: the old rows are deleted."""

    def __init__(self, *, marker: Path, **kwargs) -> None:
        super().__init__(**kwargs)
        self.marker = marker

    def sql(self, name: str, **identifiers: str) -> str:
        if name.startswith("results_insert_") and not self.marker.exists():
            self.marker.write_text("inside the transaction\n")
        return super().sql(name, **identifiers)


class _HoldingHook(ResultsHook):
    """Creates ``marker`` before the second insert statement and waits inside the transaction for its release."""

    def __init__(self, *, marker: Path, **kwargs) -> None:
        super().__init__(**kwargs)
        self.marker = marker
        self.inserts = 0
        self.backend_pid = None

    def session(self, *, read_only: bool = False, **options):
        import contextlib

        @contextlib.contextmanager
        def opened():
            with super(_HoldingHook, self).session(read_only=read_only, **options) as s:
                if s.dialect == "postgres" and not read_only:
                    self.backend_pid = s.con.info.backend_pid
                yield s

        return opened()

    def sql(self, name: str, **identifiers: str) -> str:
        if name.startswith("results_insert_"):
            self.inserts += 1
            if self.inserts == 2:
                self.marker.write_text(f"{self.backend_pid or ''}\n")
                release, deadline = self.marker.with_name(self.marker.name + ".release"), time.monotonic() + 120
                while not release.exists():
                    if time.monotonic() > deadline:
                        raise SystemExit("not released within 120 s")
                    time.sleep(0.01)
        return super().sql(name, **identifiers)


class _CountingHook(ResultsHook):
    """Counts every lock error the hook's retry loop absorbs (each one is a refused attempt)."""

    lock_errors = 0

    def _retry_on_lock(self, action, *, what: str):
        def counted():
            try:
                return action()
            except duckdb.Error as exc:
                if is_lock_error(exc):
                    self.lock_errors += 1
                raise

        return super()._retry_on_lock(counted, what=what)


def main(argv: list[str]) -> int:
    command, db, experiment_id = argv[:3]  # db: a DuckDB path or a postgresql:// URL
    if command == "write":
        day, rows, run_id = dt.date.fromisoformat(argv[3]), int(argv[4]), argv[5]
        hook = _MarkingHook(database=db, marker=Path(argv[6])) if len(argv) > 6 else ResultsHook(database=db)
        hook.replace_partition(experiment_id=experiment_id, ds=day, tables=partition_tables(experiment_id, day, rows, run_id))
        return 0
    if command == "partition":
        from counterbid.operators.partition import write_partition

        staging, experiment_id, day = argv[2], argv[3], dt.date.fromisoformat(argv[4])
        hook = _HoldingHook(database=db, marker=Path(argv[5])) if len(argv) > 5 else ResultsHook(database=db)
        print(json.dumps(write_partition(hook, experiment_id=experiment_id, ds=day, staging_root=staging, cleanup=False)))
        return 0
    if command == "contend":
        day, rows, run_id, gate = dt.date.fromisoformat(argv[3]), int(argv[4]), argv[5], Path(argv[6])
        name = argv[7] if len(argv) > 7 else experiment_id
        hook = _CountingHook(database=db, lock_timeout=240)
        tables = partition_tables(experiment_id, day, rows, run_id)
        (gate / f"{name}.ready").write_text("ready\n")
        deadline = time.monotonic() + 240
        while not (gate / "go").exists():
            if time.monotonic() > deadline:
                raise SystemExit("no go signal within 240 s")
            time.sleep(0.002)
        started = time.monotonic()
        hook.replace_partition(experiment_id=experiment_id, ds=day, tables=tables)
        print(json.dumps({"lock_errors": hook.lock_errors, "started": started, "committed": time.monotonic()}))
        return 0
    if command == "days":
        first, n_days, rounds, rows = dt.date.fromisoformat(argv[3]), int(argv[4]), int(argv[5]), int(argv[6])
        pause = float(argv[7]) if len(argv) > 7 else 0.0
        hook = ResultsHook(database=db)
        for r in range(rounds):
            for d in range(n_days):
                if r or d:
                    time.sleep(pause)
                day = first + dt.timedelta(days=d)
                hook.replace_partition(experiment_id=experiment_id, ds=day,
                                       tables=partition_tables(experiment_id, day, rows, f"round-{r}"))
        return 0
    raise SystemExit(f"unknown command {command!r}")


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
