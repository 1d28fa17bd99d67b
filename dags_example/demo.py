"""The demo of ``make demo``: an invented marketplace's bid log, then the report.

``python -m counterbid.dags_example.demo lake --out demo_output`` writes 14 days of bids of the
Quillfen experiments in ``experiments.yaml`` (about 200k bids a day; bidders not yet adapted on
the first two days). ``counterbid backfill`` then runs the daily pipeline over them, and
``python -m counterbid.dags_example.demo report --out demo_output`` prints the experiment-to-date
table and writes ``demo_output/report/index.html``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
import time
from pathlib import Path

import pandas as pd

HERE = Path(__file__).resolve().parent
START = dt.date(2026, 3, 2)


def shop_kinds(bidders: int) -> dict:
    """The two kinds of shop of the maker spotlight (``segments: [shop_kind]``): their own values and bidders.

    Potters bid for fewer, dearer clicks than weavers; estimated pooled, the spread between the
    kinds would read as competition within an auction (docs/method.md, "Segments").
    """
    import scipy.stats as st

    from counterbid.estimators import SimulatedSegment

    return {"weavers": SimulatedSegment(st.lognorm(0.5, scale=0.8), bidders, 0.6),
            "potters": SimulatedSegment(st.lognorm(0.35, scale=1.4), max(2, bidders - 2), 0.4)}


def make_lake(out: Path, *, days: int, auctions_per_day: int, bidders: int, seed: int, warmup_days: int) -> None:
    from counterbid.dags_example.lake import write_bid_lake
    from counterbid.estimators import load_experiments

    experiments = load_experiments(HERE / "experiments.yaml")
    started = time.perf_counter()
    print(f"simulating {days} days of Quillfen bids ({len(experiments)} experiments, {auctions_per_day} auctions "
          f"per experiment per day, {bidders} bidders; first {warmup_days} days not yet adapted)", file=sys.stderr, flush=True)
    write_bid_lake(out / "lake", experiments.values(), start=START, days=days, auctions_per_day=auctions_per_day,
                   n_bidders=bidders, seed=seed, warmup_days=warmup_days, segments=shop_kinds(bidders),
                   progress=lambda line: print("  " + line, file=sys.stderr, flush=True))
    print(f"bid lake written to {out / 'lake'} in {time.perf_counter() - started:.1f}s", file=sys.stderr, flush=True)


def rank_what_ifs(lake: Path, *, days: int = 14, lift_half_width: float = 0.005) -> dict:
    """Each experiment with what-if layouts: its candidates ranked from the lake's last day of its bids, for
    ``days`` more days at that day's traffic (the report's "Candidates for the next experiment")."""
    from counterbid.estimators import BID_COLUMNS, load_experiments
    from counterbid.estimators.candidates import rank_candidates
    from counterbid.readers.bid_log import read_bids

    rankings = {}
    for exp in load_experiments(HERE / "experiments.yaml").values():
        files = sorted(lake.glob(f"ds=*/{exp.id}.parquet"))
        if exp.what_if and files:
            bids = read_bids(files[-1], columns=["experiment_id", *BID_COLUMNS])
            rankings[exp.id] = rank_candidates(bids, exp, days=days, auctions_per_day=int(bids["auction_id"].nunique()),
                                               target_half_width=lift_half_width, source=str(files[-1]))
    return rankings


def make_report(out: Path, results: str | None = None) -> None:
    from counterbid.operators.hooks import ResultsHook
    from counterbid.operators.report import cumulative_table, format_cumulative, write_report

    hook = ResultsHook(database=results or out / "results.duckdb")
    table = cumulative_table(hook)
    # each experiment's line of the table states the level and clustering its intervals used
    print("\nExperiment to date (the days of the analysis window, each estimated alone, combined by auctions):\n")
    print(format_cumulative(table))
    print("\nDays flagged by the data checks (estimates of those days carry the status flag 'warning'):")
    for exp_id in sorted(set(table["experiment_id"])):
        days = hook.fetch_df("report_day_check_status", {"experiment_id": exp_id})
        flagged = days[days["worst_status"] != "passed"]
        listed = ", ".join(f"{pd.Timestamp(d).date()} {s}" for d, s in zip(flagged["ds"], flagged["worst_status"]))
        print(f"  {exp_id}: {listed or 'none'}")
    page = write_report(hook, out / "report", candidates=rank_what_ifs(out / "lake"))
    print(f"\nreport: {page}")


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m counterbid.dags_example.demo")
    p.add_argument("step", choices=("lake", "report"))
    p.add_argument("--out", default="demo_output", type=Path)
    p.add_argument("--results", metavar="DB", help="report step: results DuckDB file or postgresql:// URL "
                   "(default OUT/results.duckdb)")
    p.add_argument("--days", type=int, default=14)
    p.add_argument("--auctions-per-day", type=int, default=17000)
    p.add_argument("--bidders", type=int, default=6)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--warmup-days", type=int, default=2)
    args = p.parse_args(argv)
    if args.step == "lake":
        make_lake(args.out, days=args.days, auctions_per_day=args.auctions_per_day, bidders=args.bidders,
                  seed=args.seed, warmup_days=args.warmup_days)
    else:
        make_report(args.out, args.results)
    return 0


if __name__ == "__main__":
    sys.exit(main())
