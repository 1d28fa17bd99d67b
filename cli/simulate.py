"""``counterbid simulate``: an equilibrium bid log for an experiment spec (Hive-partitioned Parquet)."""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path

DISTRIBUTIONS = ("lognorm", "uniform", "beta")


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--experiment", required=True, metavar="PATH", help="experiment spec (YAML)")
    p.add_argument("--experiment-id", metavar="ID", help="simulate one experiment (default: all in the spec)")
    p.add_argument("--out", required=True, metavar="DIR", help="lake root; writes DIR/ds=YYYY-MM-DD/<experiment>.parquet")
    p.add_argument("--start", default="2026-01-05", help="first day (YYYY-MM-DD)")
    p.add_argument("--days", type=int, default=1, help="number of days")
    p.add_argument("--auctions-per-day", type=int, default=20000)
    p.add_argument("--bidders", type=int, default=5, help="bidders per auction")
    p.add_argument("--values", choices=DISTRIBUTIONS, default="lognorm", help="value distribution per click: lognorm (sigma 0.5, median 0.8), uniform on [0, 1], "
                        "beta (Beta(2, 5) scaled to [0, 3])")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--quality", nargs=2, type=float, metavar=("LOW", "HIGH"),
                   help="draw a quality factor per bid, uniform on [LOW, HIGH] (> 0), and log it in a 'quality' "
                        "column; auctions then rank by bid x quality. The payment rule and the floor come from the spec")
    p.add_argument("--segment", action="append", metavar="LABEL:VALUES:BIDDERS:SHARE",
                   help="a segment of the marketplace with its own value distribution (one of "
                        f"{', '.join(DISTRIBUTIONS)}), bidders per auction and share of auctions, e.g. "
                        "'bulk:beta:4:0.6'; repeat for each segment. Written to the experiment's one segment column "
                        "(the spec's `segments:`), which every simulated experiment must declare")
    p.add_argument("--scale-covariate", action="append", default=[], metavar="NAME:GAMMA:SD",
                   help="an auction-level column NAME drawn from Normal(0, SD) per auction; every value and bid of "
                        "the auction is multiplied by exp(GAMMA x NAME). Repeatable. Refused with a floor")
    p.add_argument("--hidden-scale-sd", type=float, default=0.0, metavar="SIGMA",
                   help="log-sd of an auction-level factor exp(SIGMA e - SIGMA^2/2) that scales every value and bid "
                        "of the auction and is not logged (default 0: none). Refused with a floor")


def _distribution(name: str):
    """The study's distribution of that name (``lognorm`` is the study's ``lognormal``)."""
    from counterbid.estimators.study import VALUE_DISTRIBUTIONS

    return VALUE_DISTRIBUTIONS[{"lognorm": "lognormal"}.get(name, name)]


def _segments(texts: list[str]):
    """``--segment`` options as {label: SimulatedSegment}; one line naming the bad option."""
    from counterbid.estimators import SimulatedSegment
    from counterbid.estimators.errors import InputError

    out = {}
    for text in texts:
        parts = text.split(":")
        if len(parts) != 4 or not parts[0] or parts[1] not in DISTRIBUTIONS:
            raise InputError(f"--segment {text!r}: expected LABEL:VALUES:BIDDERS:SHARE with VALUES one of "
                             f"{', '.join(DISTRIBUTIONS)} (e.g. 'bulk:beta:4:0.6')")
        try:
            bidders, share = int(parts[2]), float(parts[3])
        except ValueError:
            bidders, share = 0, float("nan")
        if bidders < 2 or not share > 0 or share == float("inf"):
            raise InputError(f"--segment {text!r}: BIDDERS must be a whole number >= 2 and SHARE a number > 0")
        if parts[0] in out:
            raise InputError(f"--segment {text!r}: segment {parts[0]!r} is given twice")
        out[parts[0]] = SimulatedSegment(_distribution(parts[1]), bidders, share)
    return out


def _segment_column(exp, segments) -> str | None:
    """The log column the segments go to: the experiment's one segment column (``None``: not segmented)."""
    from counterbid.estimators.errors import InputError

    if not segments and not exp.segments:
        return None
    if not segments:
        raise InputError(f"experiment {exp.id!r} declares segments ({', '.join(exp.segments)}): give them with --segment")
    if len(exp.segments) != 1:
        raise InputError(f"experiment {exp.id!r}: --segment simulates one segment column; the spec declares "
                         f"{len(exp.segments)} ({', '.join(exp.segments) or 'none'})")
    return exp.segments[0]


def _scale_covariates(items: list[str]) -> dict:
    """``--scale-covariate NAME:GAMMA:SD`` options as ``{name: (gamma, Normal(0, sd))}``; one line for a bad one."""
    import math
    import re

    import scipy.stats as st

    from counterbid.estimators.errors import InputError

    out = {}
    for item in items:
        parts = item.split(":")
        try:
            name, gamma, sd = parts[0], float(parts[1]), float(parts[2])
            ok = len(parts) == 3 and sd > 0 and math.isfinite(gamma) and math.isfinite(sd)
        except (IndexError, ValueError):
            ok = False
        if not ok or not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,62}", parts[0]) or parts[0] in out:
            raise InputError(f"--scale-covariate {item!r}: expected NAME:GAMMA:SD with a distinct column name, a "
                             "finite GAMMA and SD > 0")
        out[name] = (gamma, st.norm(0.0, sd))
    return out


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from counterbid.estimators import load_experiments, parse_day, simulate_experiment, simulate_segmented_experiment
    from counterbid.estimators.errors import InputError

    experiments = load_experiments(args.experiment)
    if args.experiment_id is not None:
        if args.experiment_id not in experiments:
            raise InputError(f"{args.experiment}: no experiment with id {args.experiment_id!r}")
        experiments = {args.experiment_id: experiments[args.experiment_id]}
    start = parse_day(args.start, what="--start")
    rng = np.random.default_rng(args.seed)
    values = _distribution(args.values)
    quality = None
    if args.quality is not None:
        import scipy.stats as st

        low, high = args.quality
        if not 0 < low <= high:
            raise InputError(f"--quality must satisfy 0 < LOW <= HIGH; got {low:g} {high:g}")
        quality = st.uniform(low, high - low)
    segments = _segments(args.segment or [])
    columns = {exp.id: _segment_column(exp, segments) for exp in experiments.values()}  # refused before writing
    covariates = _scale_covariates(args.scale_covariate)
    root = Path(args.out)
    next_id = 0
    for d in range(args.days):
        day = start + dt.timedelta(days=d)
        part = root / f"ds={day.isoformat()}"
        part.mkdir(parents=True, exist_ok=True)
        for exp in experiments.values():
            options = dict(rng=rng, ds=day, first_auction_id=next_id, payment_rule=exp.payment_rule,
                           floor=exp.floor or None, quality=quality, scale_covariates=covariates,
                           unobserved_scale_sd=args.hidden_scale_sd)
            if columns[exp.id] is None:
                frame = simulate_experiment(values, exp, n_bidders=args.bidders, n_auctions=args.auctions_per_day,
                                            **options)
            else:
                frame = simulate_segmented_experiment(segments, exp, n_auctions=args.auctions_per_day,
                                                      column=columns[exp.id], **options)
            next_id += args.auctions_per_day
            target = part / f"{exp.id}.parquet"
            tmp = target.with_suffix(".parquet.tmp")
            frame.drop(columns=["ds"]).to_parquet(tmp, index=False)
            tmp.replace(target)
            print(f"wrote {len(frame)} bids to {target}", file=sys.stderr)
    return 0
