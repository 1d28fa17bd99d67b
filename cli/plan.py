"""``counterbid plan``: predicted interval half-widths per share after D days, and the smallest share that suffices.

With ``--lift-half-width`` it ranks candidate layouts instead (the spec's ``what_if`` list, ``--layout``
and ``--layouts-file``): by their estimated revenue from the ``--bids`` of the running experiment, and by the
share each would need beside control to settle its lift to that half width in ``--days`` days.
"""

from __future__ import annotations

import argparse
import json
import sys

# Same names and parameters as ``counterbid simulate --values``.
ASSUMED = {"lognorm": "lognormal", "uniform": "uniform", "beta": "beta"}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--experiment", required=True, metavar="PATH", help="experiment spec (YAML)")
    p.add_argument("--experiment-id", metavar="ID", help="which experiment of the spec (needed when it holds several)")
    p.add_argument("--bids", metavar="PATH", help="pilot bids (Parquet file or folder) run at the spec's shares")
    p.add_argument("--days", type=int, required=True, help="planned number of days")
    p.add_argument("--auctions-per-day", type=int, required=True, help="auctions per day of the experiment's traffic")
    p.add_argument("--target-half-width", type=float, metavar="H", help="wanted half-width for every non-control arm")
    p.add_argument("--target-metric", choices=("revenue_per_auction", "revenue_lift_vs_control"),
                   default="revenue_per_auction", help="metric the target applies to")
    p.add_argument("--shares", type=float, nargs="+", metavar="S", help="candidate shares of each non-control arm")
    p.add_argument("--values", choices=tuple(ASSUMED), default="lognorm",
                   help="assumed value distribution when there is no pilot (as in `counterbid simulate`)")
    p.add_argument("--bidders", type=int, default=5, help="bidders per auction when there is no pilot")
    p.add_argument("--level", type=float, default=0.95, help="confidence level (default 0.95)")
    p.add_argument("--calibration-auctions", type=int, default=20_000, help="auctions per calibration simulation")
    p.add_argument("--anytime-valid", action="store_true", dest="anytime",
                   help="plan for the anytime-valid bounds of the experiment to date at the planned end (valid when "
                        "the results are looked at every day) instead of the fixed interval of one planned look")
    p.add_argument("--lift-half-width", type=float, metavar="H",
                   help="rank candidate layouts (the spec's what_if list, --layout, --layouts-file) by estimated revenue "
                        "from --bids and by the share each needs beside control to settle its lift to +-H (a ratio: "
                        "0.01 is one percentage point) in --days days; replaces the share plan of the arms")
    p.add_argument("--layout", action="append", default=[], metavar="NAME=W1,W2,...",
                   help="a candidate layout: its name and position weights, top first (repeatable)")
    p.add_argument("--layouts-file", metavar="PATH",
                   help="YAML list of candidate layouts, each {name, position_weights} as in a spec's what_if list")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--format", choices=("table", "json", "csv"), default="table", dest="output_format")


def run(args: argparse.Namespace) -> int:
    from counterbid.cli.estimate import _choose_experiment
    from counterbid.readers.bid_log import read_bids
    from counterbid.estimators import BID_COLUMNS, load_experiments
    from counterbid.estimators.errors import InputError
    from counterbid.estimators.planner import DEFAULT_SHARES, plan_shares
    from counterbid.estimators.study import VALUE_DISTRIBUTIONS

    if not 0 < args.level < 1:
        raise InputError(f"--level must be in (0, 1); got {args.level}")
    if args.lift_half_width is not None or args.layout or args.layouts_file:
        from counterbid.cli.plan_layouts import run_ranking

        return run_ranking(args)
    # every experiment's segment columns too: a segmented pilot is estimated per segment (its pooled rows plan)
    segment_columns = sorted({c for e in load_experiments(args.experiment).values() for c in e.segments})
    bids = read_bids(args.bids, columns=["experiment_id", *BID_COLUMNS, *segment_columns]) if args.bids else None
    import pandas as pd

    experiment = _choose_experiment(args.experiment, args.experiment_id, bids if bids is not None else pd.DataFrame())
    common = dict(days=args.days, auctions_per_day=args.auctions_per_day,
                  shares=tuple(args.shares) if args.shares else DEFAULT_SHARES,
                  target_half_width=args.target_half_width, target_metric=args.target_metric,
                  confidence_level=float(args.level), calibration_auctions=args.calibration_auctions, rng=args.seed,
                  anytime=args.anytime)
    if bids is not None:
        plan = plan_shares(experiment, bids=bids, source=str(args.bids), **common)
        basis = f"pilot bids {args.bids} (values inferred by kernel inversion, scaled by the pilot's own standard errors)"
    else:
        if args.bidders < 2:
            raise InputError(f"--bidders must be >= 2; got {args.bidders}")
        plan = plan_shares(experiment, values=VALUE_DISTRIBUTIONS[ASSUMED[args.values]], n_bidders=args.bidders, **common)
        basis = f"assumed {args.values} values, {args.bidders} bidders per auction"
    table = plan.table
    if args.output_format == "json":
        print(json.dumps({"experiment_id": experiment.id, "basis": plan.basis, "n_auctions": plan.n_auctions,
                          "confidence_level": plan.confidence_level, "anytime_valid": plan.anytime,
                          "target_metric": plan.target_metric,
                          "target_half_width": plan.target_half_width, "recommended_share": plan.recommended_share,
                          "rows": json.loads(table.to_json(orient="records"))}, indent=2))
        return 0
    if args.output_format == "csv":
        sys.stdout.write(table.to_csv(index=False))
        return 0
    print(f"experiment {experiment.id}: {args.days} days x {args.auctions_per_day} auctions = {plan.n_auctions} auctions; "
          f"{int(args.level * 100)}% half-widths "
          f"{'of the anytime-valid bounds at the planned end (valid at every daily look) ' if plan.anytime else ''}"
          f"from {basis}")
    print(table.to_string(index=False, float_format=lambda x: f"{x:.4g}"))
    if plan.target_half_width is not None:
        if plan.recommended_share is None:
            print(f"no candidate share reaches half-width {plan.target_half_width:g} of {plan.target_metric} "
                  f"for every non-control arm in {args.days} days")
        else:
            print(f"recommended share: {plan.recommended_share:g} per non-control arm (smallest candidate with "
                  f"{plan.target_metric} half-width <= {plan.target_half_width:g})")
    print("Assumes symmetric bidders in equilibrium against the planned shares, known position weights, and traffic"
          " and bidders per auction as in the pilot or the assumption; informed_ab_half_width is an A/B test whose"
          " bidders know the arm and which uses only that arm's auctions.")
    return 0
