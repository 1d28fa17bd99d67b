"""Write a simulated bid lake (and click log) for the demo and the pipeline tests.

Built on :func:`counterbid.estimators.simulate_experiment`; nothing here estimates anything.
"""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import pandas as pd

from counterbid.estimators import Experiment, simulate_experiment, simulate_segmented_experiment

__all__ = ["click_log", "write_bid_lake"]


def _write_atomic(frame: pd.DataFrame, target: Path) -> None:
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    frame.to_parquet(tmp, index=False)
    os.replace(tmp, target)


def click_log(bids: pd.DataFrame) -> pd.DataFrame:
    """Impressions and clicks per (experiment, arm, position) of a simulated bid log."""
    shown = bids[bids["position"].notna()]
    out = (
        shown.groupby(["experiment_id", "arm", "position"], observed=True)
        .agg(impressions=("clicks", "size"), clicks=("clicks", "sum"))
        .reset_index()
    )
    out["position"] = out["position"].astype("int32")
    out["impressions"] = out["impressions"].astype("int64")
    out["clicks"] = out["clicks"].astype("int64")
    return out


def write_bid_lake(
    root: str | Path,
    experiments: Iterable[Experiment],
    *,
    start: dt.date,
    days: int,
    auctions_per_day: int,
    n_bidders=6,
    values=None,
    seed: int = 0,
    warmup_days: int = 0,
    clicks_root: str | Path | None = None,
    progress=None,
    segments=None,
) -> list[Path]:
    """Simulate ``days`` days of bids and write ``root/ds=YYYY-MM-DD/<experiment>.parquet``.

    Parameters
    ----------
    root : path
        Lake root (created).
    experiments : iterable of Experiment
        Each is simulated on the days it is active.
    start : datetime.date
    days, auctions_per_day : int
    n_bidders : int or mapping of int to float
        Bidders per auction (see ``simulate_experiment``).
    values : scipy.stats frozen distribution, optional
        Values per click; default lognormal(0.5, scale 0.8).
    seed : int
    warmup_days : int
        On the first ``warmup_days`` days bidders still bid as if only the control arm ran
        (``belief_shares`` on control): a market that has not adapted to the experiment yet.
    clicks_root : path, optional
        Also write the click log ``clicks_root/ds=.../<experiment>.parquet`` with columns
        ``experiment_id, arm, position, impressions, clicks``.
    progress : callable, optional
        Called with one line of text per written file.
    segments : mapping of str to SimulatedSegment, optional
        For experiments that declare ``segments``: each segment's values, bidder counts and share
        of auctions, written to the experiment's first segment column
        (:func:`~counterbid.estimators.simulate_segmented_experiment`; ``values`` and
        ``n_bidders`` are then not used for them).

    Returns
    -------
    list of Path
        The bid files written.
    """
    import scipy.stats as st

    values = st.lognorm(0.5, scale=0.8) if values is None else values
    rng = np.random.default_rng(seed)
    root = Path(root)
    written: list[Path] = []
    next_id = 0
    experiments = list(experiments)
    for d in range(int(days)):
        day = start + dt.timedelta(days=d)
        for exp in experiments:
            if not exp.is_active(day):
                continue
            beliefs = None
            if d < warmup_days:
                beliefs = [1.0 if a.name == exp.control_arm else 0.0 for a in exp.arms]
            if segments and exp.segments:
                frame = simulate_segmented_experiment(segments, exp, n_auctions=auctions_per_day, rng=rng,
                                                      column=exp.segments[0], belief_shares=beliefs, ds=day,
                                                      first_auction_id=next_id)
            else:
                frame = simulate_experiment(values, exp, n_bidders=n_bidders, n_auctions=auctions_per_day, rng=rng,
                                            belief_shares=beliefs, ds=day, first_auction_id=next_id)
            next_id += int(auctions_per_day)
            target = root / f"ds={day.isoformat()}" / f"{exp.id}.parquet"
            _write_atomic(frame.drop(columns=["ds"]), target)
            written.append(target)
            if clicks_root is not None:
                _write_atomic(click_log(frame), Path(clicks_root) / f"ds={day.isoformat()}" / f"{exp.id}.parquet")
            if progress is not None:
                progress(f"{day} {exp.id}: {len(frame)} bids{' (bidders not yet adapted)' if beliefs else ''}")
    return written
