"""The per-arm estimator written the obvious way in pandas: the peer a user would otherwise write.

Same math as :func:`counterbid.estimators.estimate_arms` (same weight functions, same influence
function, same cluster-robust variance), but organised the way a newcomer writes it: the bids are
sorted again for every arm and metric, realized revenue is a Python loop over rows, the cluster
sums are a ``groupby`` per (arm, metric) and the variance is a Python sum over clusters. Only the
benchmark uses it; ``test_plain_pandas_peer.py`` checks that it agrees with ``estimate_arms``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from counterbid.estimators import Experiment, allocation_rule, mixture_rule, revenue_weights, welfare_weights


def _l_statistic(sorted_bids: pd.Series, inc: np.ndarray, top: float, bottom: float, n: int):
    b = sorted_bids.to_numpy()
    inc = n * inc
    est = float((sorted_bids * inc).sum()) + n * top * b[-1] - n * bottom * b[0]
    big_n = len(b)
    density = 0.5 * big_n * (inc[:-1] + inc[1:])
    a = pd.Series(np.diff(b) * density)
    centre = float((a * (np.arange(1, big_n) / big_n)).sum())
    tail = a[::-1].cumsum()[::-1].to_list() + [0.0]
    return est, centre - np.asarray(tail)


def plain_pandas_estimate(bids: pd.DataFrame, experiment: Experiment, *, confidence_level: float = 0.95) -> pd.DataFrame:
    """Revenue, welfare and realized per-arm average per arm (clustered by auction), the slow obvious way."""
    df = bids[bids["experiment_id"] == experiment.id] if "experiment_id" in bids else bids
    df = df[["auction_id", "arm", "bid", "position"]].copy()
    df["n_bidders"] = df.groupby("auction_id")["bid"].transform("size")
    df = df[df["n_bidders"] > 1]
    total_auctions = df["auction_id"].nunique()
    z = stats.norm.ppf(0.5 + confidence_level / 2)
    shares = np.array(experiment.shares)
    results = {}
    for arm_index, arm in enumerate(list(experiment.arms) + [None]):
        for metric in ("revenue_per_auction", "welfare_per_auction"):
            if arm is None and metric == "welfare_per_auction":
                continue
            estimate = 0.0
            sums = pd.Series(0.0, index=pd.Index(sorted(df["auction_id"].unique())))
            for n, stratum in df.groupby("n_bidders"):
                pi = stratum["auction_id"].nunique() / total_auctions
                rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
                mix = mixture_rule(rules, shares)
                target = mix if arm is None else rules[arm_index]
                s = stratum.sort_values("bid", kind="stable")  # sorted again for every arm and metric
                w = (revenue_weights if metric == "revenue_per_auction" else welfare_weights)(target, mix, len(s))
                est, infl = _l_statistic(s["bid"], w.increments(len(s)), w.top, w.bottom, n)
                estimate += pi * est
                per_auction = pd.Series(infl * pi / len(s), index=s["auction_id"].to_numpy()).groupby(level=0).sum()
                sums = sums.add(per_auction, fill_value=0.0)
            g = len(sums)
            var = g / (g - 1) * sum(v * v for v in sums)  # a Python loop over clusters
            se = float(np.sqrt(var))
            results[("_mixture" if arm is None else arm.name, metric)] = (estimate, se)

    # realized per-arm average: realized revenue row by row, then one mean per arm over its own auctions.
    lookup = {a.name: a.position_weights for a in experiment.arms}
    realized = []
    for arm_name, bid, pos in zip(df["arm"], df["bid"], df["position"]):
        w = lookup[arm_name]
        realized.append(bid * w[int(pos) - 1] if pd.notna(pos) and int(pos) <= len(w) else 0.0)
    df["realized"] = realized
    per_auction = df.groupby(["arm", "auction_id"])["realized"].sum().reset_index()
    for arm_name, group in per_auction.groupby("arm"):
        results[(arm_name, "realized_revenue_per_auction")] = (float(group["realized"].mean()),
                                                            float(group["realized"].std(ddof=1) / np.sqrt(len(group))))
    rows = [(arm, metric, est, se, est - z * se, est + z * se) for (arm, metric), (est, se) in results.items()]
    return pd.DataFrame(rows, columns=["arm", "metric", "estimate", "std_error", "ci_low", "ci_high"])
