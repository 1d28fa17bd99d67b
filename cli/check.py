"""``counterbid check``: the data checks of a bid log, one table row per check (and day)."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys

EXIT_ERROR_CHECK = 1


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--bids", required=True, metavar="PATH", help="Parquet file or folder of the bid log")
    p.add_argument("--experiment", required=True, metavar="PATH", help="experiment spec (YAML)")
    p.add_argument("--experiment-id", metavar="ID", help="which experiment of the spec (needed when it holds several)")
    p.add_argument("--ds", metavar="YYYY-MM-DD",
                   help="check this day only (earlier days of the log serve as trailing days); the day of "
                        "all bids when they have no ds column (default then: today, UTC)")
    p.add_argument("--format", choices=("table", "json", "csv"), default="table", dest="output_format")


def _days(bids, fallback: dt.date | None):
    import pandas as pd

    from counterbid.estimators.errors import InputError

    if "ds" in bids.columns:
        try:
            days = pd.to_datetime(bids["ds"].astype("string"), format="ISO8601").dt.date
        except (ValueError, TypeError):
            raise InputError("column 'ds' must hold dates YYYY-MM-DD") from None
        if days.isna().any():
            raise InputError(f"column 'ds' row {int(days.isna().to_numpy().argmax())} is null")
        return days
    day = dt.datetime.now(dt.timezone.utc).date() if fallback is None else fallback
    return pd.Series([day] * len(bids), index=bids.index)


def run(args: argparse.Namespace) -> int:
    import duckdb
    import pandas as pd

    from counterbid.cli.estimate import _choose_experiment
    from counterbid.estimators import parse_day
    from counterbid.readers.bid_log import read_bids
    from counterbid.estimators.checks import results_frame, worst_failure
    from counterbid.estimators.errors import InputError
    from counterbid.operators.check_runner import run_checks

    only_day = None if args.ds is None else parse_day(args.ds, what="--ds")
    bids = read_bids(args.bids)
    experiment = _choose_experiment(args.experiment, args.experiment_id, bids)
    if "experiment_id" in bids.columns:
        bids = bids.loc[(bids["experiment_id"].astype("string") == experiment.id).fillna(False).to_numpy(bool)]
    bids = bids.assign(ds=_days(bids, only_day)) if len(bids) else bids
    if len(bids) == 0:
        raise InputError(f"{args.bids}: no bids for experiment {experiment.id!r}")
    for col in bids.columns:  # Parquet dictionary columns come back as categoricals
        if isinstance(bids[col].dtype, pd.CategoricalDtype):
            bids[col] = bids[col].astype(bids[col].cat.categories.dtype)
    con = duckdb.connect()
    frames, worst = [], None
    history = bids.drop(columns=[c for c in ("value", "clicks") if c in bids.columns])
    con.register("trailing_bids", history)
    days = sorted(bids["ds"].unique())
    if only_day is not None:
        if only_day not in days:
            raise InputError(f"{args.bids}: no bids of experiment {experiment.id!r} on {only_day}")
        days = [only_day]
    for day in days:
        con.register("day_bids", bids.loc[(bids["ds"] == day).to_numpy()].drop(columns=["ds"]))
        results = run_checks(con, "day_bids", experiment, ds=day, history_relation="trailing_bids")
        con.unregister("day_bids")
        frame = results_frame(results)
        frame.insert(0, "ds", day.isoformat())
        frames.append(frame)
        w = worst_failure(results)
        if w == "error" or (w == "warning" and worst is None):
            worst = w
    table = pd.concat(frames, ignore_index=True)
    if args.output_format == "json":
        payload = {"experiment_id": experiment.id, "worst": worst, "rows": json.loads(table.to_json(orient="records"))}
        print(json.dumps(payload, indent=2))
    elif args.output_format == "csv":
        out = table.assign(details=table["details"].map(lambda d: json.dumps(d, sort_keys=True, default=str)))
        sys.stdout.write(out.to_csv(index=False))
    else:
        shown = table.drop(columns=["details"]).assign(passed=table["passed"].map({True: "yes", False: "NO"}))
        print(f"experiment {experiment.id}: {len(frames)} day(s), "
              f"{int((~table['passed']).sum())} failed check(s), worst: {worst or 'none'}")
        print(shown.to_string(index=False, float_format=lambda x: f"{x:.4g}", na_rep="-"))
    return EXIT_ERROR_CHECK if worst == "error" else 0
