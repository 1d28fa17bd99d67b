"""Monte Carlo validation of the per-arm revenue estimator (pure functions; seeded).

Two designs, both on a two-arm experiment (``control`` and ``treated`` position weights below)
with a fixed number ``n`` of bidders per auction and values from three distributions:

* **size study** (:func:`size_study`): treated share 0.5, ``N`` bids from 10 to 1e5. Bias, RMSE,
  ``RMSE * sqrt(N)`` (flat in ``N`` for a root-N estimator), mean standard error and coverage of
  the 95 % interval of the order-statistic estimator, and bias/RMSE of the two-step baseline.
* **share study** (:func:`share_study`): a fixed number of auctions, treated share from 0.5 down to
  0.01. The treated arm's revenue by the estimator (all auctions' bids), by the **informed-bidder A/B test**
  (bidders told the arm: they bid against the treated arm alone and only its ``s * A`` auctions are
  used, estimated as a one-arm experiment) and by the **realized per-arm average**: realized revenue
  over the treated arm's own auctions (biased: bidders answered the mixture).

Truth is Myerson's formula by quadrature (:func:`~.simulate.expected_revenue_per_auction`).
Every cell has its own seed (``SeedSequence([seed, cell])``), so results do not depend on the
order or the number of worker processes.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from ._realized import realized_averages
from .allocation import AllocationRule, allocation_rule, mixture_rule
from .bids import PreparedBids, sorted_with_order
from .errors import InputError
from .order_weights import revenue_weights
from .payment_rules import Floor, check_payment_rule
from .simulate import BidFunction, equilibrium_bid_function, expected_revenue_per_auction, floor_quantile
from .spec import Experiment, parse_experiments
from .stratum import FloorStep, MetricWeights, estimate_stratum, floor_step
from .two_step import pseudo_value_revenue, pseudo_values

__all__ = [
    "CONTROL_WEIGHTS",
    "TREATED_WEIGHTS",
    "VALUE_DISTRIBUTIONS",
    "OrdstatResult",
    "coverage_table",
    "ordstat_revenue",
    "share_study",
    "simulate_prepared",
    "size_study",
    "check_auction",
    "study_experiment",
    "two_step_applies",
]

#: Value distributions per click used by the study, the simulator's command line and the planner
#: (frozen scipy.stats objects): uniform on [0, 1] (so ``v(q) = q``, the closed forms of
#: ``docs/method.md`` apply), Beta(2, 5) scaled to [0, 3], log-normal with sigma 0.5 and median 0.8.
VALUE_DISTRIBUTIONS = {
    "uniform": stats.uniform(0, 1),
    "beta": stats.beta(2, 5, scale=3),
    "lognormal": stats.lognorm(0.5, scale=0.8),
}
#: Position weights of the study's two arms (a four-slot row; the treated arm favours the top).
CONTROL_WEIGHTS = (0.31, 0.17, 0.06, 0.02)
TREATED_WEIGHTS = (0.36, 0.12, 0.05, 0.02)
_Z95 = float(stats.norm.ppf(0.975))


def study_experiment(share: float, *, arms: Sequence[str] = ("control", "treated"), payment_rule: str = "first_price",
                     floor: float | None = None) -> Experiment:
    """The study's experiment: ``treated`` in a share ``share`` of auctions, ``control`` in the rest.

    With ``arms=("treated",)`` a one-arm experiment (the informed-bidder A/B test's view of the treated arm).
    ``payment_rule`` and ``floor`` (per click, value units; ``None``: no floor) are the auction's.
    """
    if not (isinstance(share, (int, float)) and 0 < share <= 1):
        raise InputError(f"`share` must be in (0, 1]; got {share!r}")
    spec = {"control": (1.0 - share, CONTROL_WEIGHTS), "treated": (share, TREATED_WEIGHTS)}
    if len(arms) == 1:
        spec = {arms[0]: (1.0, spec[arms[0]][1])}
    doc = {"experiments": [{"id": "study", "control_arm": arms[0], "payment_rule": payment_rule,
                            "arms": [{"name": a, "share": s, "position_weights": list(w)}
                                     for a, (s, w) in spec.items()]}]}
    if floor is not None:
        doc["experiments"][0]["floor"] = floor
    return parse_experiments(doc)["study"]


# --------------------------------------------------------------------------------------------
# Fast simulation: the same equilibrium as simulate_experiment, straight into PreparedBids.


_BID_FUNCTIONS: dict[tuple, tuple[object, BidFunction]] = {}


def _bid_function(values, belief_weights: tuple[float, ...], payment_rule: str = "first_price",
                  floor: float | None = None) -> BidFunction:
    """Cached equilibrium bid function per (distribution, mixture weights, payment rule, floor)."""
    key = (values if isinstance(values, str) else id(values), belief_weights, payment_rule, floor)
    hit = _BID_FUNCTIONS.get(key)
    if hit is not None and (isinstance(values, str) or hit[0] is values):
        return hit[1]
    dist = VALUE_DISTRIBUTIONS[values] if isinstance(values, str) else values
    options = {} if payment_rule == "first_price" and floor is None else {"payment_rule": payment_rule, "floor": floor}
    fn = equilibrium_bid_function(dist, allocation_rule(belief_weights, len(belief_weights)), **options)
    if len(_BID_FUNCTIONS) > 512:
        _BID_FUNCTIONS.clear()
    _BID_FUNCTIONS[key] = (values, fn)  # keeps the distribution alive, so its id stays unique
    return fn


def _belief_weights(experiment: Experiment, n: int, belief_shares: Sequence[float] | None) -> tuple[float, ...]:
    rules = [allocation_rule(a.weights_for(n), n) for a in experiment.arms]
    shares = experiment.shares if belief_shares is None else belief_shares
    return tuple(float(w) for w in mixture_rule(rules, shares).position_weights)


def simulate_prepared(
    values,
    experiment: Experiment,
    *,
    n_bidders: int,
    n_auctions: int,
    rng: np.random.Generator,
    belief_shares: Sequence[float] | None = None,
) -> PreparedBids:
    """Equilibrium bids of one simulated experiment as :class:`~.arms.PreparedBids` (fast path).

    Same model as :func:`~.simulate.simulate_experiment` (bids answer the mixture of the designed
    shares, or of ``belief_shares``; the arm is drawn per auction; the auction is the experiment's
    ``payment_rule`` and ``floor``), without building a DataFrame; bid functions are cached per
    distribution, mixture, payment rule and floor. ``vcg`` bids are the values. With a floor,
    bidders whose value lies below it submit their value and are logged unshown (position 0),
    as :func:`~.simulate.simulate_experiment` logs them.

    Parameters
    ----------
    values : str or scipy.stats frozen continuous distribution
        A key of :data:`VALUE_DISTRIBUTIONS` or a distribution of values per click.
    experiment : Experiment
    n_bidders : int
        Bidders per auction (>= 2).
    n_auctions : int
        >= 1.
    rng : numpy.random.Generator
    belief_shares : sequence of float, optional
        Shares bidders best-respond to (default: the designed shares).

    Returns
    -------
    PreparedBids
        ``position`` is the rank (1 = top) where the arm shows it (an eligible bid at a position
        of positive weight), else 0.
    """
    if isinstance(values, str):
        if values not in VALUE_DISTRIBUTIONS:
            raise InputError(f"`values` must be one of {', '.join(VALUE_DISTRIBUTIONS)} or a distribution; got {values!r}")
    elif not (hasattr(values, "ppf") and hasattr(values, "cdf")):
        raise InputError("`values` must be a frozen scipy.stats continuous distribution (with .ppf)")
    n, a = int(n_bidders), int(n_auctions)
    if n < 2 or a < 1:
        raise InputError(f"`n_bidders` must be >= 2 and `n_auctions` >= 1; got {n_bidders!r}, {n_auctions!r}")
    rule = experiment.payment_rule
    floor = float(experiment.floor) if experiment.floor else None
    bid_fn = _bid_function(values, _belief_weights(experiment, n, belief_shares), rule, floor)
    shares = np.asarray(experiment.shares, dtype=float)
    arm_of_auction = rng.choice(shares.size, size=a, p=shares / shares.sum())
    quantile = rng.random((a, n))
    eligible = None
    if rule == "first_price" and floor is None:
        bids = bid_fn(quantile)
    else:
        dist = VALUE_DISTRIBUTIONS[values] if isinstance(values, str) else values
        value = dist.ppf(quantile)
        bids = value if rule == "vcg" else bid_fn(quantile)
        if floor is not None:
            eligible = quantile >= floor_quantile(dist, floor)
            bids = np.where(eligible, bids, value)  # sub-floor bidders submit their value
    rank = np.empty((a, n), dtype=np.int64)
    np.put_along_axis(rank, np.argsort(-bids, axis=1), np.arange(1, n + 1)[None, :], axis=1)
    weights = np.stack([np.asarray(arm.weights_for(n)) for arm in experiment.arms])
    arm = np.repeat(arm_of_auction, n)
    shown = weights[arm, rank.ravel() - 1] > 0
    if eligible is not None:
        shown &= eligible.ravel()
    return PreparedBids(
        bid=bids.ravel(),
        auction=np.repeat(np.arange(a, dtype=np.int64), n),
        bidder=np.arange(a * n, dtype=np.int64),
        arm=arm.astype(np.int64),
        position=np.where(shown, rank.ravel(), 0),
        n_bidders=np.full(a * n, n, dtype=np.int64),
        n_auctions=a,
        n_excluded_auctions=0,
        n_excluded_bids=0,
    )


# --------------------------------------------------------------------------------------------
# Fast estimation: the estimator's weights computed once per cell, applied to every replicate.


@dataclass(frozen=True)
class OrdstatResult:
    """Per-arm revenue per auction from one stratum, with auction-clustered standard errors.

    Attributes
    ----------
    estimate, std_error : ndarray
        One entry per target rule.
    """

    estimate: np.ndarray
    std_error: np.ndarray

    def confidence_interval(self, *, confidence_level: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
        z = float(stats.norm.ppf(0.5 + confidence_level / 2))
        return self.estimate - z * self.std_error, self.estimate + z * self.std_error


@functools.lru_cache(maxsize=512)
def _increments(target: tuple[float, ...], mixture: tuple[float, ...], n_bids: int,
                payment_rule: str = "first_price") -> tuple[np.ndarray, float, float]:
    """Increments, ``top`` and ``bottom`` of the no-floor weights (a floor leaves the increments as they are)."""
    w = revenue_weights(AllocationRule(np.array(target)), AllocationRule(np.array(mixture)), n_bids,
                        payment_rule=payment_rule)
    return w.increments(n_bids), float(w.top), float(w.bottom)


def _cached_weights(target: AllocationRule, mixture: AllocationRule, n_bids: int, payment_rule: str,
                    floor: Floor | None) -> MetricWeights:
    """A target's revenue weights for the kernel, the increments cached per (target, mixture, N, rule).

    With a floor only the floor's two terms depend on the replicate (through ``q*``); the
    increments are the no-floor ones and the floor's term replaces the bottom bid's.
    """
    n = mixture.n_bidders
    inc, top, bottom = _increments(tuple(target.position_weights.tolist()), tuple(mixture.position_weights.tolist()),
                                   n_bids, payment_rule)
    increments = functools.partial(_scaled_slice, inc, n)
    if floor is None:
        return MetricWeights(increments, top, bottom)
    ww = revenue_weights(target, mixture, n_bids, payment_rule=payment_rule, floor=floor)
    return MetricWeights(increments, top, 0.0, float(ww.floor_term), float(ww.floor_slope))


def _scaled_slice(inc: np.ndarray, n: int, lo: int, hi: int) -> np.ndarray:
    return n * inc[lo:hi]


def ordstat_revenue(
    data: PreparedBids,
    targets: Sequence[AllocationRule],
    mixture: AllocationRule,
    *,
    payment_rule: str = "first_price",
    floor: float | None = None,
) -> OrdstatResult:
    """The weighted order-statistic revenue estimate of each target arm, one stratum.

    The estimator's own kernel (:func:`~.stratum.estimate_stratum`, what ``estimate_arms`` runs
    per stratum; the tests check they agree), with the weights' increments cached across
    replicates of equal size. With a floor, the floor step is the kernel's
    (:func:`~.stratum.floor_step`): ``q*`` is the share of sub-floor bids, the sorted bids are
    clamped at the floor, the floor's boundary term is added and its influence term (``q*`` is
    estimated) enters the standard error.

    Parameters
    ----------
    data : PreparedBids
        Bids of auctions with ``mixture.n_bidders`` bidders each.
    targets : sequence of AllocationRule
        Arms whose revenue per auction is wanted.
    mixture : AllocationRule
        The rule the bids answered.
    payment_rule : {'first_price', 'gsp', 'vcg'}
        Payment rule of the auctions that ran.
    floor : float, optional
        Floor per click in bid units (``None`` or 0: no floor).

    Returns
    -------
    OrdstatResult
        NaN for every arm when every bid lies below the floor. Standard errors clustered by
        auction, with the factor ``G / (G - 1)``.

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    .. [2] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
    """
    check_payment_rule(payment_rule)
    if floor is not None and not (isinstance(floor, (int, float)) and math.isfinite(floor) and floor >= 0):
        raise InputError(f"`floor` must be a finite number >= 0; got {floor!r}")
    n = mixture.n_bidders
    if np.any(data.n_bidders != n):
        raise InputError(f"every auction must have {n} bidders for ordstat_revenue")
    order, b = sorted_with_order(data.bid)  # the stable order
    cl = data.auction[order]
    big_n, g = b.size, data.n_auctions
    step = floor_step(b, float(floor)) if floor else FloorStep(None, 0)
    if floor and step.floor is None:  # every bid below the floor: no number (estimate_arms refuses such an input)
        return OrdstatResult(np.full(len(targets), np.nan), np.full(len(targets), np.nan))
    weights = [_cached_weights(t, mixture, big_n, payment_rule, step.floor) for t in targets]
    se = np.empty(len(targets))

    def std_error(k: int, influence: np.ndarray) -> None:
        sums = np.bincount(cl, weights=influence, minlength=g)
        se[k] = math.sqrt(g / (g - 1) * float(sums @ sums)) if g > 1 else np.nan

    est = estimate_stratum(b, n, weights, [], step, on_influence=std_error)
    return OrdstatResult(est, se)


# --------------------------------------------------------------------------------------------
# Cells and tables.


def _rng(seed: int, cell: Iterable[int]) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed), *[int(c) for c in cell]]))


def _summary(estimates: np.ndarray, truth: float, std_errors: np.ndarray | None = None) -> dict:
    ok = np.isfinite(estimates)
    e = estimates[ok]
    r = e.size
    err = e - truth
    out = {
        "runs": r,
        "failed_runs": int(estimates.size - r),
        "truth": truth,
        "bias": float(err.mean()) if r else np.nan,
        "bias_se": float(err.std(ddof=1) / math.sqrt(r)) if r > 1 else np.nan,
        "rmse": float(math.sqrt(np.mean(err**2))) if r else np.nan,
        "sd": float(e.std(ddof=1)) if r > 1 else np.nan,
    }
    if std_errors is not None:
        s = std_errors[ok]
        good = np.isfinite(s)
        out["mean_se"] = float(s[good].mean()) if good.any() else np.nan
        out["coverage"] = float(np.mean(np.abs(err[good]) <= _Z95 * s[good])) if good.any() else np.nan
        out["coverage_runs"] = int(np.count_nonzero(good))
    else:
        out.update(mean_se=np.nan, coverage=np.nan, coverage_runs=0)
    return out


def _check_grid(name: str, values: Sequence, *, lo: float, hi: float, integer: bool = False) -> list:
    vals = list(values)
    if not vals:
        raise InputError(f"`{name}` must not be empty")
    for v in vals:
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not (lo <= v <= hi):
            raise InputError(f"`{name}` entries must be numbers in [{lo}, {hi}]; got {v!r}")
        if integer and int(v) != v:
            raise InputError(f"`{name}` entries must be integers; got {v!r}")
    return [int(v) for v in vals] if integer else [float(v) for v in vals]


def two_step_applies(payment_rule: str, floor: float | None) -> bool:
    """Whether the two-step kernel baseline models this auction (pay-your-bid, no floor).

    Parameters
    ----------
    payment_rule : str
    floor : float or None

    Returns
    -------
    bool
        True for ``first_price`` without a floor (``None`` or 0).
    """
    return payment_rule == "first_price" and not floor


def check_auction(payment_rule: str, floor: float | None, names: Sequence[str]) -> dict:
    """The study's ``payment_rule`` and ``floor`` (``None`` for no floor), validated against the distributions.

    Parameters
    ----------
    payment_rule : {'first_price', 'gsp', 'vcg'}
    floor : float or None
        Per click, value units; 0 or ``None``: no floor. It must lie below the top of each
        distribution's support (else no bid would be eligible).
    names : sequence of str
        Keys of :data:`VALUE_DISTRIBUTIONS`.

    Returns
    -------
    dict
        ``{"payment_rule": ..., "floor": float or None}``, the keyword arguments of the cells.
    """
    check_payment_rule(payment_rule)
    if floor is None or (not isinstance(floor, bool) and isinstance(floor, (int, float)) and floor == 0):
        return {"payment_rule": payment_rule, "floor": None}
    if isinstance(floor, bool) or not isinstance(floor, (int, float)) or not (math.isfinite(floor) and floor > 0):
        raise InputError(f"`floor` must be a finite number >= 0 (value units); got {floor!r}")
    for d in names:
        if not VALUE_DISTRIBUTIONS[d].cdf(float(floor)) < 1.0:
            raise InputError(f"`floor` {float(floor):g} lies above every {d} value (F(floor) = 1): "
                             "no bid would be eligible")
    return {"payment_rule": payment_rule, "floor": float(floor)}


def _check_names(names: Sequence[str]) -> list[str]:
    names = list(names)
    bad = [d for d in names if d not in VALUE_DISTRIBUTIONS]
    if bad or not names:
        raise InputError(f"`distributions` must be among {', '.join(VALUE_DISTRIBUTIONS)}; got {bad or names!r}")
    return names


def size_cell(values_name: str, n: int, n_bids: int, *, share: float, reps: int, seed: int,
              two_step: bool = True, two_step_reps: int | None = None, payment_rule: str = "first_price",
              floor: float | None = None) -> list[dict]:
    """One (distribution, n, N) cell of :func:`size_study`: summary rows per method and arm.

    The two-step baseline is pay-your-bid without a floor: it runs only for that auction.
    """
    exp = study_experiment(share, payment_rule=payment_rule, floor=floor)
    two_step = two_step and two_step_applies(payment_rule, floor)
    rules = [allocation_rule(a.weights_for(n), n) for a in exp.arms]
    mix = mixture_rule(rules, exp.shares)
    n_auctions = max(2, int(n_bids) // n)
    rng = _rng(seed, (1, list(VALUE_DISTRIBUTIONS).index(values_name), n, n_bids))
    est = np.full((reps, 2), np.nan)
    se = np.full((reps, 2), np.nan)
    ts = np.full((reps, 2), np.nan)
    for r in range(reps):
        data = simulate_prepared(values_name, exp, n_bidders=n, n_auctions=n_auctions, rng=rng)
        res = ordstat_revenue(data, rules, mix, payment_rule=payment_rule, floor=floor)
        est[r], se[r] = res.estimate, res.std_error
        if two_step and (two_step_reps is None or r < two_step_reps):
            pv = pseudo_values(np.sort(data.bid), mix)
            ts[r] = [pseudo_value_revenue(pv, rule, n) for rule in rules]
    rows = []
    values = VALUE_DISTRIBUTIONS[values_name]
    for k, arm in enumerate(exp.arms):
        truth = expected_revenue_per_auction(values, arm.position_weights, n, floor=floor)
        base = {"distribution": values_name, "n_bidders": n, "n_bids": int(n_bids), "n_bids_used": n_auctions * n,
                "n_auctions": n_auctions,
                "share": arm.share, "arm": arm.name}
        rows.append({**base, "method": "ordstat", **_summary(est[:, k], truth, se[:, k])})
        if two_step:
            k_ts = reps if two_step_reps is None else min(reps, two_step_reps)
            rows.append({**base, "method": "two_step", **_summary(ts[:k_ts, k], truth)})
    return rows


def share_cell(values_name: str, n: int, share: float, *, n_auctions: int, reps: int, seed: int,
               payment_rule: str = "first_price", floor: float | None = None) -> list[dict]:
    """One (distribution, n, share) cell of :func:`share_study`: rows for the treated arm.

    The informed-bidder A/B test's auctions run under the same payment rule and floor.
    """
    auction = {"payment_rule": payment_rule, "floor": floor}
    exp = study_experiment(share, **auction)
    one = study_experiment(1.0, arms=("treated",), **auction)
    rules = [allocation_rule(a.weights_for(n), n) for a in exp.arms]
    mix = mixture_rule(rules, exp.shares)
    treated_rule = rules[1]
    ab_auctions = max(2, int(round(share * n_auctions)))
    rng = _rng(seed, (2, list(VALUE_DISTRIBUTIONS).index(values_name), n, int(round(share * 1e6)), n_auctions))
    out = {m: (np.full(reps, np.nan), np.full(reps, np.nan)) for m in ("ordstat", "informed_ab", "realized_average")}
    for r in range(reps):
        data = simulate_prepared(values_name, exp, n_bidders=n, n_auctions=n_auctions, rng=rng)
        res = ordstat_revenue(data, [treated_rule], mix, **auction)
        out["ordstat"][0][r], out["ordstat"][1][r] = res.estimate[0], res.std_error[0]
        out["realized_average"][0][r] = realized_averages(data, exp).mean[1]
        ab = simulate_prepared(values_name, one, n_bidders=n, n_auctions=ab_auctions, rng=rng)
        res_ab = ordstat_revenue(ab, [treated_rule], treated_rule, **auction)
        out["informed_ab"][0][r], out["informed_ab"][1][r] = res_ab.estimate[0], res_ab.std_error[0]
    truth = expected_revenue_per_auction(VALUE_DISTRIBUTIONS[values_name], TREATED_WEIGHTS, n, floor=floor)
    rows = []
    for method, (e, s) in out.items():
        used = ab_auctions if method == "informed_ab" else n_auctions
        rows.append({"distribution": values_name, "n_bidders": n, "share": share, "n_auctions": n_auctions,
                     "auctions_used": used if method != "realized_average" else None, "arm": "treated", "method": method,
                     **_summary(e, truth, None if method == "realized_average" else s)})
    return rows


def _run(cells: list[tuple], jobs: int) -> list[dict]:
    if jobs <= 1:
        return [row for fn, args, kw in cells for row in fn(*args, **kw)]
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(max_workers=jobs) as pool:
        futures = [pool.submit(fn, *args, **kw) for fn, args, kw in cells]
        return [row for f in futures for row in f.result()]


def size_study(
    *,
    distributions: Sequence[str] = tuple(VALUE_DISTRIBUTIONS),
    bidders: Sequence[int] = (2, 3, 5, 10),
    sizes: Sequence[int] = (10, 100, 1000, 10_000, 100_000),
    share: float = 0.5,
    reps: int = 200,
    seed: int = 0,
    two_step: bool = True,
    two_step_reps: int | None = None,
    jobs: int = 1,
    payment_rule: str = "first_price",
    floor: float | None = None,
) -> pd.DataFrame:
    """Bias, RMSE, RMSE x sqrt(N) and 95 % coverage by number of bids ``N``.

    Parameters
    ----------
    distributions : sequence of str
        Keys of :data:`VALUE_DISTRIBUTIONS`.
    bidders : sequence of int
        Bidders per auction (>= 2).
    sizes : sequence of int
        Bids per simulated experiment; auctions are ``max(2, N // n)``.
    share : float
        Treated arm's share.
    reps : int
        Replicates per cell (>= 2).
    seed : int
    two_step : bool
        Also run the two-step baseline (only under ``first_price`` without a floor, the auction it
        models; see :func:`two_step_applies`).
    two_step_reps : int, optional
        Run it on the first this many replicates only (default: all; it is the slow part).
    jobs : int
        Worker processes (results do not depend on it).
    payment_rule : {'first_price', 'gsp', 'vcg'}
        Payment rule of the simulated auctions (equilibrium bids, estimator weights).
    floor : float, optional
        Floor per click shared by the arms, in value units (``None`` or 0: no floor); it must lie
        below the top of every distribution's support. Truth is Myerson's formula with the floor.

    Returns
    -------
    pandas.DataFrame
        One row per (distribution, n_bidders, n_bids, arm, method) with ``n_bids_used`` (whole
        auctions), ``truth, bias, bias_se, rmse, rmse_sqrt_n`` (with ``N = n_bids_used``), ``sd,
        mean_se, coverage, runs, failed_runs``; ``method`` is ``ordstat`` (the estimator) or
        ``two_step``.
    """
    names = _check_names(distributions)
    ns = _check_grid("bidders", bidders, lo=2, hi=1000, integer=True)
    sz = _check_grid("sizes", sizes, lo=2, hi=1e8, integer=True)
    reps = _check_grid("reps", [reps], lo=2, hi=1e7, integer=True)[0]
    if two_step_reps is not None:
        two_step_reps = _check_grid("two_step_reps", [two_step_reps], lo=2, hi=1e7, integer=True)[0]
    auction = check_auction(payment_rule, floor, names)
    cells = [(size_cell, (d, n, s), {"share": float(share), "reps": reps, "seed": seed, "two_step": two_step,
                                     "two_step_reps": two_step_reps, **auction})
             for d in names for n in ns for s in sz]
    out = pd.DataFrame(_run(cells, jobs))
    out.insert(out.columns.get_loc("rmse") + 1, "rmse_sqrt_n", out["rmse"] * np.sqrt(out["n_bids_used"]))
    return out


def share_study(
    *,
    distributions: Sequence[str] = tuple(VALUE_DISTRIBUTIONS),
    bidders: Sequence[int] = (2, 3, 5, 10),
    shares: Sequence[float] = (0.5, 0.2, 0.1, 0.05, 0.02, 0.01),
    n_auctions: int = 10_000,
    reps: int = 200,
    seed: int = 0,
    jobs: int = 1,
    payment_rule: str = "first_price",
    floor: float | None = None,
) -> pd.DataFrame:
    """RMSE of the treated arm's revenue as its share falls: estimator, informed-bidder A/B test, realized per-arm average.

    Parameters
    ----------
    distributions, bidders, reps, seed, jobs, payment_rule, floor
        As for :func:`size_study` (the informed-bidder A/B test runs the same auction).
    shares : sequence of float
        Treated shares in (0, 1).
    n_auctions : int
        Auctions per simulated experiment; the informed-bidder A/B test uses ``round(share * n_auctions)``
        auctions of bidders who know they face the treated arm.

    Returns
    -------
    pandas.DataFrame
        One row per (distribution, n_bidders, share, method) with the columns of
        :func:`size_study` and ``rmse_vs_informed`` (RMSE over the informed-bidder A/B test's RMSE);
        ``method`` is ``ordstat``, ``informed_ab`` or ``realized_average``.
    """
    names = _check_names(distributions)
    ns = _check_grid("bidders", bidders, lo=2, hi=1000, integer=True)
    sh = _check_grid("shares", shares, lo=1e-6, hi=1 - 1e-9)
    a = _check_grid("n_auctions", [n_auctions], lo=2, hi=1e8, integer=True)[0]
    reps = _check_grid("reps", [reps], lo=2, hi=1e7, integer=True)[0]
    auction = check_auction(payment_rule, floor, names)
    cells = [(share_cell, (d, n, s), {"n_auctions": a, "reps": reps, "seed": seed, **auction})
             for d in names for n in ns for s in sh]
    out = pd.DataFrame(_run(cells, jobs))
    informed = out[out["method"] == "informed_ab"].set_index(["distribution", "n_bidders", "share"])["rmse"]
    key = pd.MultiIndex.from_frame(out[["distribution", "n_bidders", "share"]])
    out["rmse_vs_informed"] = out["rmse"].to_numpy() / informed.reindex(key).to_numpy()
    return out


def coverage_table(size: pd.DataFrame, share: pd.DataFrame | None = None, *, confidence_level: float = 0.95) -> pd.DataFrame:
    """Coverage of the estimator's 95 % intervals with a Clopper-Pearson interval per cell.

    Parameters
    ----------
    size : pandas.DataFrame
        From :func:`size_study`.
    share : pandas.DataFrame, optional
        From :func:`share_study` (its ``ordstat`` and ``informed_ab`` rows).
    confidence_level : float
        Level of the Clopper-Pearson interval around each coverage estimate.

    Returns
    -------
    pandas.DataFrame
        Columns ``design, distribution, n_bidders, n_bids, share, arm, method, coverage,
        coverage_low, coverage_high, runs``.
    """
    parts = []
    s = size[size["method"] == "ordstat"].assign(design="size")
    parts.append(s)
    if share is not None:
        t = share[share["method"].isin(["ordstat", "informed_ab"])].assign(design="share")
        t = t.assign(n_bids=t["n_auctions"] * t["n_bidders"])
        parts.append(t)
    df = pd.concat(parts, ignore_index=True)
    lo, hi = [], []
    for cov, runs in zip(df["coverage"], df["coverage_runs"]):
        if runs and np.isfinite(cov):
            ci = stats.binomtest(int(round(cov * runs)), int(runs)).proportion_ci(confidence_level, method="exact")
            lo.append(ci.low)
            hi.append(ci.high)
        else:
            lo.append(np.nan)
            hi.append(np.nan)
    df["coverage_low"], df["coverage_high"] = lo, hi
    cols = ["design", "distribution", "n_bidders", "n_bids", "share", "arm", "method", "coverage",
            "coverage_low", "coverage_high", "coverage_runs"]
    return df[cols].rename(columns={"coverage_runs": "runs"}).reset_index(drop=True)
