"""``counterbid plan --lift-half-width``: candidate layouts ranked by revenue and by the share each needs."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path


def _given_layouts(args: argparse.Namespace, arm_names):
    """The ``--layout NAME=W1,W2`` options and the ``--layouts-file`` list, validated as a spec's what_if list."""
    import yaml

    from counterbid.estimators.errors import InputError
    from counterbid.estimators.spec import parse_what_ifs

    raw = []
    for text in args.layout:
        name, sep, weights = text.partition("=")
        try:
            numbers = [float(w) for w in weights.split(",")] if sep else None
        except ValueError:
            numbers = None
        if numbers is None:
            raise InputError(f"--layout {text!r}: expected NAME=W1,W2,... (position weights, top first)")
        raw.append({"name": name.strip(), "position_weights": numbers})
    given = list(parse_what_ifs(raw, arm_names, source="--layout")) if raw else []
    if args.layouts_file:
        path = Path(args.layouts_file)
        try:
            listed = yaml.safe_load(path.read_text(encoding="utf-8"))
        except OSError as exc:
            raise InputError(f"{path}: cannot read the layouts file ({exc.strerror or exc})") from None
        except (yaml.YAMLError, UnicodeDecodeError):
            raise InputError(f"{path}: the layouts file is not YAML text") from None
        from_file = parse_what_ifs(listed, arm_names, source=str(path))
        clash = {w.name for w in given} & {w.name for w in from_file}
        if clash:
            raise InputError(f"{path}: layout {sorted(clash)[0]!r} is also given by --layout")
        given += list(from_file)
    return given


def run_ranking(args: argparse.Namespace) -> int:
    from counterbid.cli.estimate import _choose_experiment
    from counterbid.estimators import BID_COLUMNS
    from counterbid.estimators.candidates import RANKING_STATUSES, rank_candidates
    from counterbid.estimators.errors import InputError
    from counterbid.readers.bid_log import read_bids

    if args.lift_half_width is None:
        raise InputError("--layout and --layouts-file rank candidate layouts: give --lift-half-width H too")
    if not args.bids:
        raise InputError("--lift-half-width ranks candidate layouts from the bids of a running experiment: give --bids")
    bids = read_bids(args.bids, columns=["experiment_id", *BID_COLUMNS])
    experiment = _choose_experiment(args.experiment, args.experiment_id, bids)
    given = _given_layouts(args, experiment.arm_names)
    ranking = rank_candidates(bids, experiment, given, days=args.days, auctions_per_day=args.auctions_per_day,
                              target_half_width=args.lift_half_width, confidence_level=float(args.level),
                              source=str(args.bids))
    table = ranking.table
    if args.output_format == "json":
        print(json.dumps({"experiment_id": ranking.experiment_id, "control_arm": ranking.control_arm,
                          "lift_half_width": ranking.target_half_width, "days": ranking.days,
                          "auctions_per_day": ranking.auctions_per_day, "confidence_level": ranking.confidence_level,
                          "bids_auctions": ranking.n_auctions,
                          "candidates": json.loads(table.to_json(orient="records"))}, indent=2))
        return 0
    if args.output_format == "csv":
        sys.stdout.write(table.to_csv(index=False))
        return 0
    print(f"experiment {ranking.experiment_id}: candidate layouts from {ranking.n_auctions} auctions of {args.bids}, "
          f"ranked by revenue per auction ({int(round(args.level * 100))}% intervals, clustered by auction) and by the "
          f"share each needs beside {ranking.control_arm} to settle its lift to +-{ranking.target_half_width:g} in "
          f"{ranking.days} days x {ranking.auctions_per_day} auctions")
    print(table.to_string(index=False, float_format=lambda x: f"{x:.4g}", na_rep="-"))
    for status in dict.fromkeys(table["status"]):
        print(f"  {status}: {RANKING_STATUSES[status]}")
    print("Each revenue is a what-if estimate: it assumes bidders would respond to the layout as they would if it ran."
          " The needed share reads the lift's spread off the bids that ran (docs/method.md, 'The next experiment').")
    return 0
