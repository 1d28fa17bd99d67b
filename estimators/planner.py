"""Traffic-share planner: each arm's confidence-interval half-width after D days, for a range of shares.

The estimator is an L-statistic, so its variance scales as ``sigma^2(s) / N`` with ``N`` the number
of auctions and ``sigma^2(s)`` a per-auction variance that depends on the share design ``s``
(through the mixture bidders answer). The planner measures ``sigma(s)`` with the estimator's own
influence-function standard error on one simulated calibration experiment per share and scales it
to ``D x A`` auctions. Values come either from an assumed distribution or from a pilot partition's
bids (inverted to values with the two-step kernel method of :mod:`.two_step`); with a pilot, every
prediction is further rescaled by the ratio of the pilot's own standard error to the simulated one
at the pilot's shares, so the pilot's real spread anchors the plan.

Beside it, the informed-bidder A/B test's half-width: bidders told the arm, the arm's ``s x D x A`` auctions only.
"""

from __future__ import annotations

import dataclasses
import warnings
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from .allocation import allocation_rule, mixture_rule
from .arms import estimate_arms
from .bids import prepare_bids
from .errors import EstimatorWarning, InputError
from .sequential import anytime_multiplier
from .simulate import simulate_experiment
from .spec import Experiment
from .study import ordstat_revenue, simulate_prepared
from .two_step import pseudo_values

__all__ = ["DEFAULT_SHARES", "PLAN_COLUMNS", "SharePlan", "pilot_values", "plan_shares", "simulated_half_width",
           "with_treated_share"]

#: Shares of each non-control arm the planner tries by default.
DEFAULT_SHARES = (0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5)
#: Columns of :attr:`SharePlan.table`.
PLAN_COLUMNS = ("share", "arm", "metric", "half_width", "informed_ab_half_width", "auctions_in_arm", "n_auctions")
_METRICS = ("revenue_per_auction", "revenue_lift_vs_control")


@dataclasses.dataclass(frozen=True)
class SharePlan:
    """Predicted precision of an experiment for a range of shares.

    Attributes
    ----------
    table : pandas.DataFrame
        Columns ``share, arm, metric, half_width, informed_ab_half_width, auctions_in_arm,
        n_auctions``: one row per candidate share, non-control arm (and control) and metric
        (``revenue_per_auction``, ``revenue_lift_vs_control``). ``share`` is each non-control
        arm's share; control takes the rest.
    recommended_share : float or None
        Smallest candidate share at which every non-control arm's ``half_width`` of
        ``target_metric`` is at most ``target_half_width`` (None when none is, or no target).
    target_half_width : float or None
    target_metric : str
    n_auctions : int
        ``days x auctions_per_day``.
    confidence_level : float
    basis : str
        ``'pilot'`` (values inferred from pilot bids, rescaled by the pilot's own SE) or
        ``'assumed'`` (a value distribution given by the caller).
    pilot_scale : dict
        Per (arm, metric): pilot SE over simulated SE at the pilot's shares (empty when assumed).
    anytime : bool
        Half-widths are those of the anytime-valid bounds at the planned end (valid at every daily
        look), not of the fixed interval.
    """

    table: pd.DataFrame
    recommended_share: float | None
    target_half_width: float | None
    target_metric: str
    n_auctions: int
    confidence_level: float
    basis: str
    pilot_scale: Mapping[tuple[str, str], float]
    anytime: bool = False


def with_treated_share(experiment: Experiment, share: float) -> Experiment:
    """A copy where every non-control arm runs in ``share`` of auctions and control in the rest.

    Raises
    ------
    InputError
        When control would get no traffic.
    """
    k = len(experiment.arms) - 1
    control_share = 1.0 - k * share
    if not 0 < control_share < 1:
        raise InputError(f"share {share:g} for {k} non-control arm(s) leaves control {control_share:g}; must be in (0, 1)")
    arms = tuple(dataclasses.replace(a, share=control_share if a.name == experiment.control_arm else float(share))
                 for a in experiment.arms)
    return dataclasses.replace(experiment, arms=arms)


def pilot_values(bids: pd.DataFrame, experiment: Experiment, *, source: str = "bids", bins: int = 200):
    """Value distribution inferred from a pilot's bids (two-step inversion, pooled over strata).

    Parameters
    ----------
    bids : pandas.DataFrame
        Bids data contract.
    experiment : Experiment
        The experiment the pilot ran (its shares define the mixture the bids answered).
    source : str
        Name of the input in error messages.
    bins : int
        Histogram bins of the returned distribution.

    Returns
    -------
    values : scipy.stats.rv_histogram
        Distribution of the pooled pseudo-values (boundary bids trimmed).
    strata : dict
        ``{n_bidders: share of auctions}`` of the pilot.

    References
    ----------
    .. [1] Guerre, E., Perrigne, I. & Vuong, Q. (2000). Optimal nonparametric estimation of
       first-price auctions. Econometrica 68(3), 525-574.
    """
    if experiment.payment_rule == "gsp" or experiment.floor:
        raise InputError(f"{source}: pilot values are inferred by the two-step kernel baseline, which covers "
                         f"first_price (and vcg, whose bids are values) without a floor; experiment {experiment.id!r} "
                         f"has payment_rule {experiment.payment_rule!r} and floor {experiment.floor!r}: plan without pilot bids")
    data = prepare_bids(bids, experiment, source=source)
    first = np.zeros(data.n_auctions, dtype=np.int64)
    first[data.auction] = data.n_bidders
    ns, counts = np.unique(first, return_counts=True)
    pooled = []
    for n in ns.tolist():
        rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
        sorted_bids = np.sort(data.bid[data.n_bidders == n])
        if experiment.payment_rule == "vcg":  # truthful prices: bids are values
            pooled.append(sorted_bids)
            continue
        pv = pseudo_values(sorted_bids, mixture_rule(rules, experiment.shares))
        pooled.append(pv.value)
    v = np.concatenate(pooled)
    v = v[np.isfinite(v) & (v >= 0)]
    if v.size < 50 or v.max() <= v.min():
        raise InputError(f"{source}: too few usable pilot bids to infer values ({v.size} after trimming; need 50)")
    values = stats.rv_histogram(np.histogram(v, bins=int(bins)), density=False)
    return values, {int(n): float(c) / float(counts.sum()) for n, c in zip(ns, counts)}


def _sigma(values, experiment: Experiment, n_bidders, n_auctions: int, rng) -> pd.DataFrame:
    """Per-auction standard deviation ``SE x sqrt(M)`` and estimate, from one simulated experiment."""
    # Calibration bids from the auction that runs: its payment rule and floor (quality factors do
    # not change revenue's sampling in the model, so none are simulated). The simulated auctions
    # come from one distribution: no segments.
    experiment = dataclasses.replace(experiment, segments=())
    bids = simulate_experiment(values, experiment, n_bidders=n_bidders, n_auctions=n_auctions, rng=rng,
                               payment_rule=experiment.payment_rule, floor=experiment.floor or None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)  # welfare's missing interval: not planned
        return _sigma_of(estimate_arms(bids, experiment, cluster="auction").table, n_auctions)


def _sigma_of(result: pd.DataFrame, n_auctions: int) -> pd.DataFrame:
    r = result[result["metric"].isin(_METRICS) & (result["arm"] != "_mixture") & result["segment"].isna()]  # pooled
    return r.assign(sigma=r["std_error"] * np.sqrt(n_auctions)).set_index(["arm", "metric"])[["estimate", "sigma"]]


def _iv(experiment, days, auctions_per_day, shares, target_half_width, target_metric, confidence_level,
        calibration_auctions):
    if not isinstance(experiment, Experiment):
        raise InputError("`experiment` must be an Experiment (see load_experiment)")
    if len(experiment.arms) < 2:
        raise InputError(f"experiment {experiment.id!r}: the planner needs a control and at least one other arm")
    for name, v, lo in (("days", days, 1), ("auctions_per_day", auctions_per_day, 2),
                        ("calibration_auctions", calibration_auctions, 100)):
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
            raise InputError(f"`{name}` must be an integer >= {lo}; got {v!r}")
    shares = [float(s) for s in shares]
    if not shares or any(not 0 < s < 1 for s in shares):
        raise InputError(f"`shares` must be a non-empty list of numbers in (0, 1); got {shares!r}")
    if target_half_width is not None and not (isinstance(target_half_width, (int, float)) and target_half_width > 0):
        raise InputError(f"`target_half_width` must be a number > 0; got {target_half_width!r}")
    if target_metric not in _METRICS:
        raise InputError(f"`target_metric` must be one of {', '.join(_METRICS)}; got {target_metric!r}")
    if not (isinstance(confidence_level, float) and 0 < confidence_level < 1):
        raise InputError(f"`confidence_level` must be in (0, 1); got {confidence_level!r}")
    k = len(experiment.arms) - 1
    usable = sorted(s for s in set(shares) if 0 < 1 - k * s < 1)
    if not usable:
        raise InputError(f"no share in {shares!r} leaves control any traffic with {k} non-control arm(s)")
    return usable


def plan_shares(
    experiment: Experiment,
    *,
    days: int,
    auctions_per_day: int,
    bids: pd.DataFrame | None = None,
    values=None,
    n_bidders: int | Mapping[int, float] | None = None,
    shares: Sequence[float] = DEFAULT_SHARES,
    target_half_width: float | None = None,
    target_metric: str = "revenue_per_auction",
    confidence_level: float = 0.95,
    calibration_auctions: int = 20_000,
    rng: np.random.Generator | int | None = 0,
    source: str = "bids",
    anytime: bool = False,
) -> SharePlan:
    """Predict each arm's confidence-interval half-width after ``days`` days, for a range of shares.

    Parameters
    ----------
    experiment : Experiment
        Arms and position weights; with ``bids``, also the shares the pilot ran.
    days, auctions_per_day : int
        Planned duration and traffic; the plan is for ``days x auctions_per_day`` auctions.
    bids : pandas.DataFrame, optional
        A pilot partition's bids (data contract). Values and the number of bidders are inferred
        from it. Either ``bids`` or ``values`` and ``n_bidders``.
    values : scipy.stats frozen continuous distribution, optional
        Assumed value distribution per click when there is no pilot.
    n_bidders : int or mapping, optional
        Bidders per auction (or ``{n: probability}``) when there is no pilot.
    shares : sequence of float
        Candidate shares of each non-control arm (control gets the rest).
    target_half_width : float, optional
        Wanted half-width of ``target_metric`` for every non-control arm.
    target_metric : {'revenue_per_auction', 'revenue_lift_vs_control'}
    confidence_level : float
    calibration_auctions : int
        Auctions of each simulated calibration experiment.
    rng : numpy Generator or int, optional
        Seed of the calibration simulations (default 0: plans are reproducible).
    source : str
        Name of the pilot in error messages.
    anytime : bool
        Plan for the anytime-valid bounds of the experiment to date at the planned end (the
        ``days x auctions_per_day`` auctions they are tuned for) instead of the fixed interval:
        every half-width uses :func:`~.sequential.anytime_multiplier` at ratio 1 (3.035 standard
        errors at 95 %) in place of ``z`` (1.960), so it is 1.55 times wider at 95 %.

    Returns
    -------
    SharePlan

    Notes
    -----
    ``half_width(s) = z * sigma(s) / sqrt(D A)`` with ``sigma(s) = SE_M(s) sqrt(M)`` from the
    estimator's influence-function SE on ``M`` simulated auctions at share ``s``. With a pilot of
    ``N_0`` auctions at shares ``s_0``, ``sigma(s)`` is multiplied by
    ``SE_pilot sqrt(N_0) / sigma_sim(s_0)`` per arm and metric. The informed-bidder A/B test's revenue
    half-width is ``z * sigma_1 / sqrt(s D A)`` with ``sigma_1`` from a one-arm experiment
    (bidders told the arm); its lift uses independent arms (delta method). The predictions
    assume the estimator's model (symmetric independent private values, equilibrium against the
    designed shares, known position weights) and that traffic and bidders per auction stay as in
    the pilot or the assumption; they ignore day-to-day drift and sample-ratio mismatch. Standard
    errors are clustered by auction throughout (``sigma`` is a per-auction spread): when bidders'
    values persist across auctions, the bidder-clustered intervals that :func:`~.arms.estimate_arms`
    reports by default are wider than planned here and do not shrink like ``1/sqrt(D A)``.

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2
       (variance of L-statistics).

    Examples
    --------
    >>> import scipy.stats as st
    >>> from counterbid.estimators import parse_experiments
    >>> exp = parse_experiments({"experiments": [{"id": "e", "control_arm": "c", "arms": [
    ...     {"name": "c", "share": 0.9, "position_weights": [0.31, 0.17, 0.06]},
    ...     {"name": "t", "share": 0.1, "position_weights": [0.36, 0.12, 0.05]}]}]})["e"]
    >>> plan = plan_shares(exp, days=7, auctions_per_day=5000, values=st.lognorm(0.5, scale=0.8),
    ...                    n_bidders=4, shares=(0.05, 0.2), calibration_auctions=2000)
    >>> sorted(plan.table["share"].unique().tolist())
    [0.05, 0.2]
    """
    if experiment.scale_covariates:  # its calibration logs carry no covariates, and pilot values would pool them
        raise InputError(f"experiment {experiment.id!r} declares scale_covariates "
                         f"({', '.join(experiment.scale_covariates)}): the planner does not model them; plan with a "
                         "spec without them (its precision then ignores the covariates' share of the spread)")
    usable = _iv(experiment, days, auctions_per_day, shares, target_half_width, target_metric, confidence_level,
                 calibration_auctions)
    rng = np.random.default_rng(rng)
    total = int(days) * int(auctions_per_day)
    if not isinstance(anytime, bool):
        raise InputError(f"`anytime` must be True or False; got {anytime!r}")
    z = float(anytime_multiplier(1.0, confidence_level=confidence_level)) if anytime \
        else float(stats.norm.ppf(0.5 + confidence_level / 2))
    m = int(calibration_auctions)
    scale: dict[tuple[str, str], float] = {}
    if bids is not None:
        if values is not None or n_bidders is not None:
            raise InputError("pass either pilot `bids` or an assumed `values` distribution with `n_bidders`, not both")
        values, n_bidders = pilot_values(bids, experiment, source=source)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", EstimatorWarning)
            pilot = estimate_arms(bids, experiment, confidence_level=confidence_level, cluster="auction", source=source)
        observed = _sigma_of(pilot.table, pilot.n_auctions)
        simulated = _sigma(values, experiment, n_bidders, m, rng)
        scale = {key: float(observed.loc[key, "sigma"] / simulated.loc[key, "sigma"])
                 for key in observed.index if np.isfinite(observed.loc[key, "sigma"]) and simulated.loc[key, "sigma"] > 0}
        basis = "pilot"
    else:
        if values is None or n_bidders is None:
            raise InputError("without pilot `bids` the planner needs an assumed `values` distribution and `n_bidders`")
        if not (hasattr(values, "ppf") and hasattr(values, "cdf")):
            raise InputError("`values` must be a frozen scipy.stats continuous distribution (with .ppf)")
        basis = "assumed"

    # Informed-bidder A/B test: each arm alone, bidders told the arm.
    alone = {}
    for a in experiment.arms:
        one = dataclasses.replace(experiment, arms=(dataclasses.replace(a, share=1.0),), control_arm=a.name)
        s1 = _sigma(values, one, n_bidders, m, rng)
        alone[a.name] = (float(s1.loc[(a.name, "revenue_per_auction"), "estimate"]),
                         float(s1.loc[(a.name, "revenue_per_auction"), "sigma"]))

    rows = []
    control = experiment.control_arm
    for s in usable:
        exp_s = with_treated_share(experiment, s)
        sig = _sigma(values, exp_s, n_bidders, m, rng)
        for a in exp_s.arms:
            n_arm = a.share * total
            t_a, s1_a = alone[a.name]
            t_c, s1_c = alone[control]
            for metric in _METRICS:
                if metric == "revenue_lift_vs_control" and a.name == control:
                    continue
                sigma = float(sig.loc[(a.name, metric), "sigma"]) * scale.get((a.name, metric), 1.0)
                if metric == "revenue_per_auction":
                    informed = z * s1_a * scale.get((a.name, metric), 1.0) / np.sqrt(n_arm)
                else:
                    n_c = exp_s.arm(control).share * total
                    informed = z * np.sqrt(s1_a**2 / n_arm / t_c**2 + t_a**2 * s1_c**2 / n_c / t_c**4) \
                        * scale.get((a.name, metric), 1.0)
                rows.append((s, a.name, metric, z * sigma / np.sqrt(total), float(informed), int(round(n_arm)), total))
    table = pd.DataFrame(rows, columns=list(PLAN_COLUMNS))

    recommended = None
    if target_half_width is not None:
        t = table[(table["metric"] == target_metric) & (table["arm"] != control)]
        worst = t.groupby("share")["half_width"].max()
        ok = worst[worst <= target_half_width]
        recommended = float(ok.index.min()) if len(ok) else None
    return SharePlan(table=table, recommended_share=recommended, target_half_width=target_half_width,
                     target_metric=target_metric, n_auctions=total, confidence_level=confidence_level,
                     basis=basis, pilot_scale=scale, anytime=anytime)


def simulated_half_width(
    values,
    experiment: Experiment,
    *,
    n_bidders,
    n_auctions: int,
    reps: int,
    rng: np.random.Generator | int | None = None,
    confidence_level: float = 0.95,
) -> pd.DataFrame:
    """Half-width ``z x SD`` of the estimates over ``reps`` simulated experiments (validates a plan).

    The simulated auctions and the estimator follow the experiment's ``payment_rule`` and ``floor``.

    Parameters
    ----------
    values : scipy.stats frozen continuous distribution
    experiment : Experiment
    n_bidders : int
        Bidders per auction (one stratum).
    n_auctions : int
    reps : int
        Simulated experiments (>= 2).
    rng : numpy Generator or int, optional
    confidence_level : float

    Returns
    -------
    pandas.DataFrame
        Columns ``arm, metric, simulated_half_width, mean_reported_half_width`` (the mean of the
        estimator's own half-widths; revenue only), ``reps``.
    """
    if isinstance(reps, bool) or not isinstance(reps, (int, np.integer)) or reps < 2:
        raise InputError(f"`reps` must be an integer >= 2; got {reps!r}")
    if isinstance(n_bidders, bool) or not isinstance(n_bidders, (int, np.integer)) or n_bidders < 2:
        raise InputError(f"`n_bidders` must be an integer >= 2; got {n_bidders!r}")
    rng = np.random.default_rng(rng)
    z = float(stats.norm.ppf(0.5 + confidence_level / 2))
    n = int(n_bidders)
    rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
    mix = mixture_rule(rules, experiment.shares)
    control = experiment.arm_names.index(experiment.control_arm)
    est = np.empty((int(reps), len(rules)))
    se = np.empty((int(reps), len(rules)))
    for r in range(int(reps)):
        data = simulate_prepared(values, experiment, n_bidders=n, n_auctions=int(n_auctions), rng=rng)
        res = ordstat_revenue(data, rules, mix, payment_rule=experiment.payment_rule, floor=experiment.floor or None)
        est[r], se[r] = res.estimate, res.std_error
    rows = []
    for k, a in enumerate(experiment.arms):
        rows.append((a.name, "revenue_per_auction", z * est[:, k].std(ddof=1), z * se[:, k].mean(), int(reps)))
        if k != control:
            lift = est[:, k] / est[:, control] - 1.0
            rows.append((a.name, "revenue_lift_vs_control", z * lift.std(ddof=1), np.nan, int(reps)))
    return pd.DataFrame(rows, columns=["arm", "metric", "simulated_half_width", "mean_reported_half_width", "reps"])
