"""Bids far above the day's distribution, and whether they would carry the revenue estimate.

Two checks share one pass (docs/method.md, "Outlying bids"):

* ``outlying_bids`` (warning): per stratum (number of bidders), the robust z-score of each bid's
  log effective bid, ``z = (log b - median) / (1.4826 MAD)``; bids with ``z > max_robust_z`` are
  flagged, and the first ``max_rows`` of them are named in ``details``.
* ``dominant_bids`` (error): the share of each arm's revenue estimate that the flagged bids carry,
  computed with the estimator's own weights (each order statistic's weight
  ``n [Omega(i/N) - Omega((i-1)/N)]``); it fails when the flagged bids carry more than
  ``max_share`` of some arm's estimate, i.e. more than every other bid of the day together.

Pure numpy/scipy: the caller passes a bids frame (data contract) or ``PreparedBids``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from .allocation import allocation_rule, mixture_rule
from .order_weights import revenue_weights
from .payment_rules import Floor
from .spec import Experiment

__all__ = ["MAD_TO_SD", "OUTLIER_CHECKS", "outlier_fences", "outlying_bid_checks"]

#: The two checks :func:`outlying_bid_checks` returns, in order.
OUTLIER_CHECKS = ("outlying_bids", "dominant_bids")
#: ``1 / Phi^{-1}(3/4)``: the MAD of a normal sample times this estimates its standard deviation.
MAD_TO_SD = 1.482602218505602
#: ``Phi^{-1}(0.9) - Phi^{-1}(0.1)``: the 10-90 % range of a normal sample over this estimates its sd.
_DECILE_RANGE_TO_SD = 2.5631031310892007


def _result(name: str, cfg: Mapping[str, Any], passed: bool, observed, threshold, **details) -> tuple:
    """One outcome as ``(check, passed, observed, threshold, details)`` (``checks.py`` adds the severity)."""
    return name, bool(passed), observed, threshold, details


def _robust_scale(logs: np.ndarray, centre: float) -> float:
    """1.4826 x MAD of ``logs``; the 10-90 % range / 2.563 when more than half the bids are equal."""
    scale = MAD_TO_SD * float(np.median(np.abs(logs - centre)))
    if scale > 0:
        return scale
    lo, hi = np.quantile(logs, [0.1, 0.9])
    return float(hi - lo) / _DECILE_RANGE_TO_SD


def outlier_fences(strata: Mapping[int, np.ndarray], *, max_robust_z: float, min_bids: int) -> dict[int, dict]:
    """Per stratum, the median and robust scale of the log bids and the bid above which a bid is flagged.

    Parameters
    ----------
    strata : mapping of int to ndarray
        Sorted effective bids of each stratum (number of bidders).
    max_robust_z : float
        Bids whose log lies more than this many robust standard deviations above the median are
        flagged.
    min_bids : int
        Strata with fewer positive bids are not tested (no fence).

    Returns
    -------
    dict
        ``{n: {"median_log": m, "scale_log": s, "fence": exp(m + z s), "bids": N}}`` for the
        strata tested; ``fence`` is ``inf`` when the log bids have no spread.
    """
    out = {}
    for n, b in strata.items():
        positive = b[b > 0]  # a zero bid has no log; it cannot lie above the day's bids either
        if positive.size < max(int(min_bids), 1):
            continue
        logs = np.log(positive)
        centre = float(np.median(logs))
        scale = _robust_scale(logs, centre)
        fence = float(np.exp(centre + max_robust_z * scale)) if scale > 0 else np.inf
        out[int(n)] = {"median_log": centre, "scale_log": scale, "fence": fence, "bids": int(b.size)}
    return out


def _stratum_revenue_sums(b: np.ndarray, n: int, experiment: Experiment, first_flagged: int) -> tuple[np.ndarray, np.ndarray]:
    """Per arm, ``sum_i w_i b_(i)`` over the stratum and over its flagged (top) bids, ``w`` the estimator's weights."""
    rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
    mix = mixture_rule(rules, experiment.shares)
    floor, clamped = None, b
    if experiment.floor:
        below = int(np.searchsorted(b, experiment.floor, side="left"))  # as estimators/_floor.py counts q*
        floor = Floor(experiment.floor, below / b.size) if below < b.size else None
        clamped = np.maximum(b, experiment.floor)
    total, top = np.zeros(len(rules)), np.zeros(len(rules))
    for k, rule in enumerate(rules):
        weights = revenue_weights(rule, mix, b.size, payment_rule=experiment.payment_rule, floor=floor)
        inc = weights.increments(b.size)
        bottom = weights.bottom * clamped[0] if np.isfinite(weights.bottom) else 0.0  # the estimator's b_(1) g(0)
        total[k] = n * (float(inc @ clamped) - bottom)
        top[k] = n * float(inc[first_flagged:] @ clamped[first_flagged:])
    return total, top


def _flagged_rows(frame: pd.DataFrame, fences: Mapping[int, dict], max_rows: int) -> list[dict]:
    """The first ``max_rows`` rows of the caller's frame whose effective bid lies above its stratum's fence."""
    bid = pd.to_numeric(frame["bid"], errors="coerce").to_numpy(float)
    if "quality" in frame.columns:
        bid = bid * pd.to_numeric(frame["quality"], errors="coerce").to_numpy(float)
    n = frame.groupby("auction_id", observed=True, sort=False)["auction_id"].transform("size").to_numpy()
    by_stratum = pd.Series({k: f["fence"] for k, f in fences.items()}, dtype=float)
    fence = pd.Series(n).map(by_stratum).fillna(np.inf).to_numpy(float)  # no fence: never flagged
    with np.errstate(invalid="ignore"):
        hit = np.flatnonzero(bid > fence)
    rows = []
    for i in hit[:max_rows]:
        f = fences[int(n[i])]
        rows.append({"row": int(i), "auction_id": _plain(frame["auction_id"].iloc[i]),
                     "bidder_id": _plain(frame["bidder_id"].iloc[i]) if "bidder_id" in frame.columns else None,
                     "bid": float(frame["bid"].iloc[i]), "effective_bid": float(bid[i]), "n_bidders": int(n[i]),
                     "robust_z": float((np.log(bid[i]) - f["median_log"]) / f["scale_log"])})
    return rows


def _plain(x: Any) -> Any:
    return x.item() if isinstance(x, np.generic) else x if isinstance(x, (int, float)) else str(x)


def outlying_bid_checks(strata: Mapping[int, np.ndarray], experiment: Experiment, cfgs: Mapping[str, Mapping[str, Any]], *,
                        frame: pd.DataFrame | None = None, day_flagged: pd.DataFrame | None = None,
                        day_bids: Mapping[int, int] | None = None) -> list:
    """The ``outlying_bids`` and ``dominant_bids`` results of one day.

    Parameters
    ----------
    strata : mapping of int to ndarray
        The day's validated effective bids per stratum (number of bidders), sorted
        (single-bidder auctions left out).
    experiment : Experiment
    cfgs : mapping
        Full check configuration (``check_config``): reads ``outlying_bids`` (``max_robust_z``,
        ``min_bids``, ``max_rows``) and ``dominant_bids`` (``max_share``).
    frame : pandas.DataFrame, optional
        The bids frame ``strata`` were prepared from; when given, the flagged bids are named by its
        row number, ``auction_id`` and ``bidder_id``.
    day_flagged : pandas.DataFrame, optional
        When ``strata`` are a sample of the day (one shard): the whole day's bids above the fences
        this function computes from the sample (:func:`outlier_fences`; columns ``n_bidders``,
        ``auction_id``, ``bidder_id``, ``bid``, ``effective_bid``), found by the caller over every
        shard. They replace the sample's own flagged bids, and their share is computed with the
        whole day's weights (``day_bids``) against the sample's other bids.
    day_bids : mapping of int to int, optional
        Bids of each stratum over the whole day; required with ``day_flagged``.

    Returns
    -------
    list of tuple
        ``(check, passed, observed, threshold, details)`` per check, which ``checks.py`` turns into
        ``CheckResult`` rows. ``outlying_bids``: observed is the largest robust z (over strata), threshold
        ``max_robust_z``; details name the flagged bids. ``dominant_bids``: observed is the
        largest share (over arms) of the day's revenue estimate the flagged bids carry,
        threshold ``max_share``; details give the share per arm.

    Notes
    -----
    The revenue estimate is a weighted sum of order statistics, so a bid ``c`` times larger than
    the others moves it by about ``n omega(1) c / N`` typical bids (docs/method.md, "Outlying
    bids"): whether a flagged bid matters depends on ``N`` and the weights, which is why the error
    is decided on the share it carries, computed with the estimator's own weights, not on ``z``.

    References
    ----------
    .. [1] Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation.
       JASA 88(424), 1273-1283 (the MAD and its consistency factor 1.4826).
    .. [2] Serfling, R. J. (1980). Approximation Theorems of Mathematical Statistics, ch. 8
       (L-statistics).
    """
    out_cfg, dom_cfg = cfgs["outlying_bids"], cfgs["dominant_bids"]
    fences = outlier_fences(strata, max_robust_z=out_cfg["max_robust_z"], min_bids=out_cfg["min_bids"])
    if not fences:
        note = "no stratum has enough positive bids"
        return [_result("outlying_bids", out_cfg, True, None, out_cfg["max_robust_z"], note=note),
                _result("dominant_bids", dom_cfg, True, None, dom_cfg["max_share"], note=note)]
    flagged, worst_z = {}, -np.inf
    for n, f in fences.items():
        b = strata[n]
        first = int(np.searchsorted(b, f["fence"], side="right"))
        flagged[n] = first
        if f["scale_log"] > 0 and b[-1] > 0:
            worst_z = max(worst_z, (np.log(b[-1]) - f["median_log"]) / f["scale_log"])
    count = {n: int(strata[n].size - k) for n, k in flagged.items() if strata[n].size > k}
    stats = {n: {"median": float(np.exp(f["median_log"])), "scale_log": f["scale_log"], "fence": f["fence"]}
             for n, f in fences.items()}
    if day_flagged is not None:
        return _whole_day(strata, fences, flagged, day_flagged, day_bids, stats, experiment, out_cfg, dom_cfg)
    rows = []
    if count and frame is not None:
        rows = _flagged_rows(frame, fences, int(out_cfg["max_rows"]))
    elif count:
        rows = [{"effective_bid": float(x), "n_bidders": n} for n in count for x in strata[n][flagged[n]:]]
        rows = rows[: int(out_cfg["max_rows"])]
    z = float(worst_z) if np.isfinite(worst_z) else None
    out = _result("outlying_bids", out_cfg, not count, z, out_cfg["max_robust_z"], flagged_by_bidders=count,
                  flagged_bids=rows, log_bid_by_bidders=stats)
    return [out, _dominance(strata, flagged, count, rows, experiment, dom_cfg)]


def _dominance(strata, flagged, count, rows, experiment: Experiment, cfg):
    if not count:
        return _result("dominant_bids", cfg, True, 0.0, cfg["max_share"], note="no outlying bids")
    top_bid = max(float(b[-1]) for b in strata.values())
    total, top = np.zeros(len(experiment.arms)), np.zeros(len(experiment.arms))
    for n, b in strata.items():
        scaled = b / top_bid  # the shares do not depend on the unit; this keeps every sum finite
        stratum_total, stratum_top = _stratum_revenue_sums(scaled, n, experiment, flagged.get(n, b.size))
        auctions = b.size / n
        total += auctions * stratum_total
        top += auctions * stratum_top
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(total > 0, top / total, np.where(top > 0, 1.0, 0.0))
    by_arm = {a.name: float(s) for a, s in zip(experiment.arms, share)}
    observed = float(np.max(share))
    return _result("dominant_bids", cfg, observed <= cfg["max_share"], observed, cfg["max_share"],
                   share_of_revenue_by_arm=by_arm, flagged_by_bidders=count, flagged_bids=rows)


def _day_rows(day_flagged: pd.DataFrame, fences: Mapping[int, dict], max_rows: int) -> list[dict]:
    """The first ``max_rows`` of the whole day's flagged bids, named by auction and bidder."""
    rows = []
    for r in day_flagged.head(max_rows).itertuples(index=False):
        f = fences[int(r.n_bidders)]
        rows.append({"auction_id": _plain(r.auction_id), "bidder_id": _plain(r.bidder_id), "bid": float(r.bid),
                     "effective_bid": float(r.effective_bid), "n_bidders": int(r.n_bidders),
                     "robust_z": float((np.log(r.effective_bid) - f["median_log"]) / f["scale_log"])})
    return rows


def _whole_day(strata, fences, flagged, day_flagged, day_bids, stats, experiment: Experiment, out_cfg, dom_cfg):
    """Both results when the sample's fences were applied to the whole day (``day_flagged``)."""
    if day_bids is None:
        raise ValueError("outlying_bid_checks: `day_bids` is required with `day_flagged`")
    top = {int(n): np.sort(g["effective_bid"].to_numpy(float)) for n, g in day_flagged.groupby("n_bidders")}
    count = {n: int(b.size) for n, b in top.items()}
    zs = [(np.log(b[-1]) - fences[n]["median_log"]) / fences[n]["scale_log"] for n, b in top.items()
          if fences[n]["scale_log"] > 0]
    sample_top = [(np.log(b[-1]) - fences[n]["median_log"]) / fences[n]["scale_log"] for n, b in strata.items()
                  if n in fences and fences[n]["scale_log"] > 0 and b[-1] > 0]
    z = max(zs + sample_top) if zs + sample_top else None
    rows = _day_rows(day_flagged, fences, int(out_cfg["max_rows"]))
    out = _result("outlying_bids", out_cfg, not count, z, out_cfg["max_robust_z"], flagged_by_bidders=count,
                  flagged_bids=rows, log_bid_by_bidders=stats, scope="fences from the sample, bids of the whole day")
    if not count:
        return [out, _result("dominant_bids", dom_cfg, True, 0.0, dom_cfg["max_share"], note="no outlying bids")]
    scale = max(max(float(b[-1]) for b in strata.values()), max(float(b[-1]) for b in top.values()))
    total, carried = np.zeros(len(experiment.arms)), np.zeros(len(experiment.arms))
    for n in sorted(set(strata) | set(top)):
        big_n = int(day_bids.get(n, 0))
        if big_n == 0:
            continue
        auctions = big_n / n
        clean = 0.0
        if n in strata:  # the sample's other bids estimate the rest of the stratum's revenue
            b = strata[n][: flagged.get(n, strata[n].size)] / scale
            if b.size:
                clean, _ = _stratum_revenue_sums(b, n, experiment, b.size)
        high = _top_contributions(top.get(n, np.zeros(0)) / scale, n, big_n, experiment)
        total += auctions * (clean + high)
        carried += auctions * high
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(total > 0, carried / total, np.where(carried > 0, 1.0, 0.0))
    by_arm = {a.name: float(s) for a, s in zip(experiment.arms, share)}
    observed = float(np.max(share))
    return [out, _result("dominant_bids", dom_cfg, observed <= dom_cfg["max_share"], observed, dom_cfg["max_share"],
                         share_of_revenue_by_arm=by_arm, flagged_by_bidders=count, flagged_bids=rows)]


def _top_contributions(top_sorted: np.ndarray, n: int, big_n: int, experiment: Experiment) -> np.ndarray:
    """Per arm, ``n sum_j w_(N-j) b_j`` of a stratum's top ``k`` bids at the whole day's size ``N``."""
    k = top_sorted.size
    if k == 0:
        return np.zeros(len(experiment.arms))
    rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
    mix = mixture_rule(rules, experiment.shares)
    q = np.arange(big_n - k, big_n + 1) / big_n  # the ranks the top k bids hold in the whole day
    out = np.zeros(len(rules))
    for i, rule in enumerate(rules):
        weights = revenue_weights(rule, mix, big_n, payment_rule=experiment.payment_rule)
        cum = weights.values[big_n - k:] if weights.grid.size == big_n + 1 else weights.at(q)
        out[i] = n * float(np.diff(cum) @ top_sorted)
    return out
