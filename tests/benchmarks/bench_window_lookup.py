"""The running window's lookup and delete on a DuckDB results file, measured (not a test).

Against a results file holding a stored window (copied first: the delete runs and is rolled back,
but DuckDB may checkpoint on close), one day's distinct bidder ids (from a lake day's Parquet) are
looked up (``bidder_window_totals_select_incoming``) and deleted
(``results_delete_bidder_window_totals_incoming``, rolled back), each in a child process of its
own: CPU s (user + sys) and peak RSS from ``os.wait4``, the statement's own CPU and wall time, the
DuckDB memory it leaves held (``duckdb_memory()``) and whether it spilled. ``none`` is a child
that reads today's ids and opens the file but runs nothing (its peak RSS is the others' base).
The lookup runs with the connection's ``memory_limit`` (``uncapped``, as before
:mod:`counterbid.operators.lookup_memory`) and with the cap that module sets (``capped``), and
with ``--no-temp`` DuckDB has no temporary directory to spill to (it fails instead). ``--split B``
adds ``buckets-B-hash`` and ``buckets-B-key``: the same rows looked up in ``B`` buckets, as the
daily update splits a larger day (:mod:`counterbid.operators.window_buckets`), by the id's hash
(before) or by the top bits of its integer key (now), one capped lookup per bucket on one
connection (CPU and rows summed). ``--reorder ROWS`` first rewrites the copy's stored totals in
the order daily inserts in key-range bucket order leave them
(``sql/bench_reorder_window_totals.sql``), so the key buckets' lookups can skip row groups.

Usage: python tests/benchmarks/bench_window_lookup.py RESULTS.duckdb TODAY.parquet [--experiment bench] [--no-temp]
       [--split 4] [--reorder 1000000]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

VARIANTS = ("none", "lookup-uncapped", "lookup-capped", "delete")


def _today(parquet: Path, experiment: str):
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    ids = pc.unique(pq.read_table(parquet, columns=["bidder_id"]).column("bidder_id")).cast(pa.string())
    n = len(ids)
    return pa.table({"experiment_id": pa.array([experiment] * n, pa.string()), "segment": pa.nulls(n, pa.string()),
                     "bidder_key": pa.nulls(n, pa.int64()), "bidder_id": ids,
                     "sums": pa.nulls(n, pa.list_(pa.float64()))})


def _by_bucket(s, today, n_buckets: int, experiment: str, rule: str) -> int:
    """Rows found by one lookup per bucket of ``today`` (``rule``: ``key``, the daily update's top bits of
    the integer key; ``hash``, the 64-bit FNV-1a hash of the id text it used before)."""
    import pyarrow as pa

    from counterbid.estimators.keyed_gram import bucket_of
    from counterbid.operators.window_keys import key_buckets, window_keys
    from counterbid.readers.id_hashes import fnv1a_64

    bits = (n_buckets - 1).bit_length()
    ids = today.column("bidder_id")
    bucket = key_buckets(window_keys(ids), bits) if rule == "key" else bucket_of(fnv1a_64(ids), bits)
    s.con.unregister("incoming")
    found = 0
    for b in range(n_buckets):
        s.con.register("incoming", today.filter(pa.array(bucket == b)))
        found += s.fetch_arrow("bidder_window_totals_select_incoming", {"experiment_id": experiment}).num_rows
        s.con.unregister("incoming")
    s.con.register("incoming", today)
    return found


def child(variant: str, results: Path, parquet: Path, experiment: str, no_temp: bool) -> dict:  # noqa: C901
    from counterbid.operators import hooks
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.lookup_memory import lookup_memory_mib
    from counterbid.operators.results_schema import WINDOW_TABLES

    today = _today(parquet, experiment)
    hook = ResultsHook(database=results)
    cap = lookup_memory_mib(today.num_rows, today.column("bidder_id").nbytes, limit_mib=hook.memory_limit_mib)
    if variant.startswith("buckets-"):  # the cap of one bucket's rows
        n = int(variant.split("-")[1])
        cap = lookup_memory_mib(-(-today.num_rows // n), -(-today.column("bidder_id").nbytes // n),
                                limit_mib=hook.memory_limit_mib)
    memory = hook.memory_limit_mib if variant in ("none", "lookup-uncapped", "delete") else cap
    if no_temp:  # the same connection settings, with nowhere to spill to
        import duckdb

        hooks._open_duckdb = lambda path, read_only, mib, threads: duckdb.connect(
            path, read_only=read_only, config={"memory_limit": f"{int(mib)}MiB", "threads": int(threads),
                                               "temp_directory": ""})
    out = {"variant": variant, "today": today.num_rows, "memory_limit_mib": memory, "cap_mib": cap}
    with hook.session(read_only=not variant.startswith("delete"), memory_mib=memory) as s:
        r0, w0 = resource.getrusage(resource.RUSAGE_SELF), time.perf_counter()
        with s.incoming(WINDOW_TABLES[-1], today):
            if variant.startswith("buckets-"):
                out["rows"] = _by_bucket(s, today, int(variant.split("-")[1]), experiment, variant.split("-")[2])
            elif variant.startswith("lookup"):
                out["rows"] = s.fetch_arrow("bidder_window_totals_select_incoming", {"experiment_id": experiment}).num_rows
            elif variant == "delete":
                s.con.execute("begin transaction")
                out["rows"] = s.execute("results_delete_bidder_window_totals_incoming",
                                        {"experiment_id": experiment}).fetchall()[0][0]
        held = s.con.execute("select coalesce(sum(memory_usage_bytes), 0) / 2**20 from duckdb_memory()").fetchall()[0][0]
        temp = s.con.execute("select coalesce(sum(size), 0) / 2**20 from duckdb_temporary_files()").fetchall()[0][0]
        if variant == "delete":
            s.con.execute("rollback")
        r1 = resource.getrusage(resource.RUSAGE_SELF)
    return out | {"statement_cpu": r1.ru_utime - r0.ru_utime + r1.ru_stime - r0.ru_stime,
                  "statement_wall": time.perf_counter() - w0, "duckdb_held_mib": held, "temp_mib": temp}


def _reorder(copy: Path, n_buckets: int, rows_per_day: int) -> None:
    from counterbid.operators.hooks import ResultsHook

    hook = ResultsHook(database=copy)
    with hook.session() as s:
        s.execute("bench_reorder_window_totals", {"rows_per_day": int(rows_per_day),
                                                  "bits": (int(n_buckets) - 1).bit_length()})
        s.con.execute("checkpoint")


def run_child(argv: list[str]) -> dict:
    with tempfile.TemporaryFile("w+") as out:
        proc = subprocess.Popen(argv, stdout=out, text=True)
        _, status, usage = os.wait4(proc.pid, 0)
        out.seek(0)
        text = out.read()
    if status != 0:
        return {"variant": argv[-1], "failed": True}
    return json.loads(text.strip().splitlines()[-1]) | {"rss_mib": usage.ru_maxrss / 1024,
                                                        "cpu": usage.ru_utime + usage.ru_stime}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("results", type=Path)
    ap.add_argument("today", type=Path)
    ap.add_argument("--experiment", default="bench")
    ap.add_argument("--no-temp", action="store_true")
    ap.add_argument("--split", type=int, default=None, help="also look today's rows up in this many buckets (power of 2)")
    ap.add_argument("--reorder", type=int, default=None, metavar="ROWS_PER_DAY",
                    help="first rewrite the copy's stored totals as daily inserts in key-range bucket order leave "
                         "them (runs of this many rows, each in --split buckets)")
    ap.add_argument("--child", default=None)
    args = ap.parse_args()
    if args.child == "reorder":
        _reorder(args.results, args.split, args.reorder)
        return
    if args.child:
        print(json.dumps(child(args.child, args.results, args.today, args.experiment, args.no_temp)))
        return
    from counterbid.operators.window_buckets import WINDOW_BUCKET_ROWS, bucket_bits

    work = Path(tempfile.mkdtemp(prefix="counterbid-lookup-"))
    try:
        copy = work / "results.duckdb"
        shutil.copyfile(args.results, copy)
        me = [sys.executable, str(Path(__file__).resolve()), str(copy), str(args.today), "--experiment", args.experiment,
              *(["--no-temp"] if args.no_temp else []), "--child"]
        print(f"results file {args.results} ({args.results.stat().st_size / 2**20:.0f} MiB); today {args.today}")
        print("| variant | today's rows | buckets | memory_limit MiB | rows found/deleted | statement CPU s | "
              "statement wall s | child CPU s | child peak RSS MiB | DuckDB held MiB | spilled MiB | load avg |")
        print("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|")
        if args.reorder:  # in a child of its own: a child's peak RSS starts from its parent's at the fork
            subprocess.run([sys.executable, str(Path(__file__).resolve()), str(copy), str(args.today), "--split",
                            str(args.split), "--reorder", str(args.reorder), "--child", "reorder"], check=True)
        split = [f"buckets-{args.split}-{rule}" for rule in ("hash", "key")] if args.split else []
        for variant in [*VARIANTS, *split]:
            r = run_child([*me, variant])
            if r.get("failed"):
                print(f"| {variant} | failed (see stderr) |")
                continue
            buckets = int(variant.split("-")[1]) if variant.startswith("buckets-") else \
                2 ** bucket_bits(r["today"], WINDOW_BUCKET_ROWS)
            print(f"| {variant} | {r['today']} | {buckets} | {r['memory_limit_mib']} | {r.get('rows', '-')} | "
                  f"{r['statement_cpu']:.2f} | {r['statement_wall']:.2f} | {r['cpu']:.2f} | {r['rss_mib']:.0f} | "
                  f"{r['duckdb_held_mib']:.0f} | {r['temp_mib']:.0f} | {os.getloadavg()[0]:.2f} |", flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
