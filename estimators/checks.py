"""Data and equilibrium checks: outcomes as data.

Every check returns a :class:`CheckResult`; a failed ``error`` check stops the estimates of that
(experiment, day), a failed ``warning`` check marks them. The statistical checks live here (pure
numpy/scipy); the Great Expectations contract suite and the DuckDB aggregates live in
``counterbid.operators``.

Thresholds come from :data:`DEFAULT_CHECKS`, overridden by the experiment spec's ``checks:``
section and then by an explicit ``config`` mapping (see :func:`check_config`).
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy import interpolate, special, stats

from .allocation import allocation_rule, mixture_rule
from .bids import PreparedBids, prepare_bids
from .check_settings import DEFAULT_CHECKS, SEVERITIES, check_config
from .dependence import auction_dependence
from .scale_covariates import homogenized_bids
from .errors import InputError
from .spec import Experiment, parse_day

__all__ = [
    "AuctionCounts",
    "CheckResult",
    "DEFAULT_CHECKS",
    "DEPENDENCE_REMEDY",
    "InferredValues",
    "BID_QUANTILES",
    "SEVERITIES",
    "STATISTICAL_CHECKS",
    "auction_counts",
    "auction_dependence_check",
    "bid_quantile_summary",
    "check_config",
    "drift_check",
    "equilibrium_checks",
    "failure_summary",
    "inferred_values",
    "minimum_sample_checks",
    "monotone_values_check",
    "results_frame",
    "sample_ratio_check",
    "shading_check",
    "warmup_check",
    "worst_failure",
]

@dataclass(frozen=True)
class CheckResult:
    """Outcome of one check on one (experiment, day).

    Attributes
    ----------
    check : str
        Check name (stable: it is a key of the ``data_checks`` table).
    severity : {'warning', 'error'}
    passed : bool
    observed : float or None
        The statistic the check measured (a p-value, a share, a count).
    threshold : float or None
        The bound it was compared with.
    details : dict
        JSON-serialisable context (first offending rows, per-arm counts, ...).
    """

    check: str
    severity: str
    passed: bool
    observed: float | None = None
    threshold: float | None = None
    details: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.severity not in SEVERITIES:
            raise ValueError(f"`severity` must be one of {SEVERITIES}; got {self.severity!r}")

    def describe(self) -> str:
        """One line: ``name: observed X vs threshold Y``."""
        obs = "n/a" if self.observed is None else f"{self.observed:.6g}"
        thr = "n/a" if self.threshold is None else f"{self.threshold:.6g}"
        state = "passed" if self.passed else "FAILED"
        return f"{self.check} [{self.severity}] {state}: observed {obs} vs threshold {thr}"


def worst_failure(results: Iterable[CheckResult]) -> str | None:
    """The most severe failed severity among ``results`` (``None`` when all passed)."""
    worst = None
    for r in results:
        if not r.passed and (worst is None or SEVERITIES.index(r.severity) > SEVERITIES.index(worst)):
            worst = r.severity
    return worst


# ---------------------------------------------------------------------------------------------
# Thresholds
# ---------------------------------------------------------------------------------------------

#: Names of the checks :func:`equilibrium_checks` returns, in order.
STATISTICAL_CHECKS = (
    "sample_ratio",
    "min_auctions_per_arm",
    "min_auctions_per_stratum",
    "monotone_values",
    "shading",
    "drift",
    "auction_dependence",
    "outlying_bids",
    "dominant_bids",
    "warmup",
)


def _config(config: Mapping[str, Any] | None, experiment: Experiment | None) -> dict[str, dict[str, Any]]:
    """Full thresholds: defaults <- experiment.checks <- config (already-merged configs pass)."""
    if config is not None and set(config) == set(DEFAULT_CHECKS) and all(
        set(config[g]) == set(DEFAULT_CHECKS[g]) for g in DEFAULT_CHECKS
    ):
        return {k: dict(v) for k, v in config.items()}
    spec = experiment.checks if experiment is not None else None
    where = f"experiment {experiment.id!r} checks" if experiment is not None else "checks"
    return check_config(spec, config, source=where)


# ---------------------------------------------------------------------------------------------
# Helpers over validated bids
# ---------------------------------------------------------------------------------------------


def _prepared(bids, experiment: Experiment, source: str):
    if isinstance(bids, PreparedBids):
        return bids
    return prepare_bids(bids, experiment, source=source)


def _auction_table(data) -> tuple[np.ndarray, np.ndarray]:
    """Arm index and number of bidders of each auction."""
    arm = np.zeros(data.n_auctions, dtype=np.int64)
    arm[data.auction] = data.arm
    n = np.zeros(data.n_auctions, dtype=np.int64)
    n[data.auction] = data.n_bidders
    return arm, n


@dataclass(frozen=True, eq=False)
class AuctionCounts:
    """Auctions of one day per arm and number of bidders: all the counting checks read.

    Attributes
    ----------
    n_bidders : ndarray of int64
        The day's strata (numbers of bidders, each >= 2), ascending.
    auctions : ndarray of int64, shape (arms, strata)
        Auctions per arm (in the experiment's arm order) and stratum.
    day_bids : int
        Every bid of the day, single-bidder auctions included.

    Notes
    -----
    Built from bids (:func:`auction_counts`) or from per-(arm, number of bidders) aggregates
    computed elsewhere, e.g. by a database over the whole day (:meth:`from_frame`), so that
    :func:`sample_ratio_check` and :func:`minimum_sample_checks` stay exact on a day too large to
    load. Auctions with a single bidder are left out, as :func:`~counterbid.estimators.prepare_bids`
    leaves them out.
    """

    n_bidders: np.ndarray
    auctions: np.ndarray
    day_bids: int

    @property
    def per_arm(self) -> np.ndarray:
        """Auctions per arm (experiment order)."""
        return self.auctions.sum(axis=1)

    @property
    def per_stratum(self) -> np.ndarray:
        """Auctions per number of bidders (order of :attr:`n_bidders`)."""
        return self.auctions.sum(axis=0)

    @classmethod
    def from_frame(cls, frame: pd.DataFrame, experiment: Experiment, *, source: str = "auction counts") -> "AuctionCounts":
        """Counts from one row per (arm, number of bidders) with its auctions.

        Parameters
        ----------
        frame : pandas.DataFrame
            Columns ``arm`` (name), ``n_bidders`` (bids per auction, 1 included) and
            ``n_auctions``; an (arm, n_bidders) pair may repeat (rows are summed).
        experiment : Experiment
        source : str
            Name of the input in error messages.

        Returns
        -------
        AuctionCounts

        Raises
        ------
        InputError
            A missing column, an arm not in the spec, or a negative or missing count (the
            message names the row).
        """
        missing = [c for c in ("arm", "n_bidders", "n_auctions") if c not in frame.columns]
        if missing:
            raise InputError(f"{source}: column {missing[0]!r} is missing (required: arm, n_bidders, n_auctions)")
        index = {name: k for k, name in enumerate(experiment.arm_names)}
        arms = [None if pd.isna(a) else str(a) for a in frame["arm"]]
        for i, a in enumerate(arms):
            if a not in index:
                raise InputError(f"{source}: unknown arm {a!r} at row {i} (experiment {experiment.id!r} has arms: "
                                 f"{', '.join(experiment.arm_names)})")
        n = pd.to_numeric(frame["n_bidders"], errors="coerce").to_numpy(float)
        m = pd.to_numeric(frame["n_auctions"], errors="coerce").to_numpy(float)
        for what, values in (("n_bidders", n), ("n_auctions", m)):
            bad = np.flatnonzero(~np.isfinite(values) | (values < 0) | (values != np.round(values)))
            if bad.size:
                raise InputError(f"{source}: column {what!r} row {int(bad[0])} is not a count: "
                                 f"{frame[what].iloc[int(bad[0])]}")
        n, m = n.astype(np.int64), m.astype(np.int64)
        day_bids = int(np.sum(n * m))
        keep = (n >= 2) & (m > 0)
        if not keep.any():  # as prepare_bids refuses such a day
            raise InputError(f"{source}: no auction of experiment {experiment.id!r} has two or more bidders")
        strata = np.unique(n[keep])
        table = np.zeros((len(experiment.arms), strata.size), dtype=np.int64)
        np.add.at(table, (np.array([index[a] for a in arms], dtype=np.int64)[keep], np.searchsorted(strata, n[keep])),
                  m[keep])
        return cls(n_bidders=strata, auctions=table, day_bids=day_bids)


def auction_counts(bids, experiment: Experiment, *, source: str = "bids") -> AuctionCounts:
    """Auctions per arm and number of bidders of a bids frame (or :class:`PreparedBids`).

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
    experiment : Experiment
    source : str

    Returns
    -------
    AuctionCounts
    """
    data = _prepared(bids, experiment, source)
    arm, n = _auction_table(data)
    strata = np.unique(n)
    table = np.zeros((len(experiment.arms), strata.size), dtype=np.int64)
    np.add.at(table, (arm, np.searchsorted(strata, n)), 1)
    return AuctionCounts(n_bidders=strata, auctions=table, day_bids=int(data.bid.size + data.n_excluded_bids))


def _counts(bids, experiment: Experiment, source: str) -> AuctionCounts:
    return bids if isinstance(bids, AuctionCounts) else auction_counts(bids, experiment, source=source)


def _result(name: str, cfg: Mapping[str, Any], passed: bool, observed, threshold, **details) -> CheckResult:
    obs = None if observed is None or not np.isfinite(observed) else float(observed)
    thr = None if threshold is None else float(threshold)
    return CheckResult(name, cfg["severity"], bool(passed), obs, thr, _jsonable(details))


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, (_dt.date,)):
        return obj.isoformat()
    return obj


# ---------------------------------------------------------------------------------------------
# Experiment checks
# ---------------------------------------------------------------------------------------------


def sample_ratio_check(bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                       source: str = "bids") -> CheckResult:
    """Sample-ratio mismatch: auctions per arm against the designed shares.

    Parameters
    ----------
    bids : pandas.DataFrame, PreparedBids or AuctionCounts
        The day's bids (data contract), the output of :func:`prepare_bids`, or the day's
        auctions per arm and number of bidders (:class:`AuctionCounts`; same result).
    experiment : Experiment
    config : mapping, optional
        Threshold overrides (``{"sample_ratio": {"alpha": ...}}``).
    source : str
        Name of the input in error messages.

    Returns
    -------
    CheckResult
        ``observed`` is the p-value of Pearson's chi-square test (``k - 1`` degrees of freedom),
        ``threshold`` is ``alpha``; ``details`` holds observed and expected auctions per arm.

    Notes
    -----
    The arm is drawn per auction with the designed shares, so auction counts per arm are
    multinomial; a small p-value means assignment or logging lost auctions of some arm, and
    every per-arm comparison is then suspect. ``alpha = 0.001`` is common practice for this test.

    References
    ----------
    .. [1] Pearson, K. (1900). On the criterion that a given system of deviations ... Phil. Mag. 50.
    .. [2] ``scipy.stats.chisquare``.
    """
    cfg = _config(config, experiment)["sample_ratio"]
    observed = _counts(bids, experiment, source).per_arm.astype(float)
    shares = np.asarray(experiment.shares, dtype=float)
    expected = shares / shares.sum() * observed.sum()
    counts = {a.name: int(c) for a, c in zip(experiment.arms, observed)}
    exp_counts = {a.name: float(e) for a, e in zip(experiment.arms, expected)}
    if len(experiment.arms) < 2:
        return _result("sample_ratio", cfg, True, None, cfg["alpha"], auctions=counts, note="single arm")
    res = stats.chisquare(observed, expected)
    p = float(res.pvalue)
    return _result("sample_ratio", cfg, p >= cfg["alpha"], p, cfg["alpha"],
                   statistic=float(res.statistic), auctions=counts, expected=exp_counts)


def minimum_sample_checks(bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                          source: str = "bids") -> list[CheckResult]:
    """Minimum auctions per arm and per stratum of bidder counts.

    Parameters
    ----------
    bids : pandas.DataFrame, PreparedBids or AuctionCounts
        The day's bids, or its auctions per arm and number of bidders (same result).
    experiment : Experiment
    config : mapping, optional
    source : str

    Returns
    -------
    list of CheckResult
        ``min_auctions_per_arm`` (observed: the smallest arm's auctions) and
        ``min_auctions_per_stratum`` (observed: the smallest stratum's auctions), each with the
        counts in ``details``.

    Notes
    -----
    The counterfactual estimate of every arm uses all bids, but the realized per-arm average, the
    sample-ratio test and the position-weight measurement use each arm's own auctions; each
    stratum (number of bidders) is inverted on its own bids. Common practice thresholds.
    """
    cfgs = _config(config, experiment)
    table = _counts(bids, experiment, source)
    per_arm = table.per_arm
    arm_cfg = cfgs["min_auctions_per_arm"]
    smallest = int(per_arm.min())
    out = [_result("min_auctions_per_arm", arm_cfg, smallest >= arm_cfg["min_auctions"], smallest,
                   arm_cfg["min_auctions"], auctions={a.name: int(c) for a, c in zip(experiment.arms, per_arm)})]
    strata, counts = table.n_bidders, table.per_stratum
    st_cfg = cfgs["min_auctions_per_stratum"]
    low = {int(k): int(c) for k, c in zip(strata, counts) if c < st_cfg["min_auctions"]}
    out.append(_result("min_auctions_per_stratum", st_cfg, not low, int(counts.min()), st_cfg["min_auctions"],
                       auctions_by_bidders={int(k): int(c) for k, c in zip(strata, counts)}, below=low))
    return out


def warmup_check(experiment: Experiment, ds, *, config: Mapping[str, Any] | None = None) -> CheckResult:
    """Flag days inside the warm-up window after the experiment starts or its shares change.

    Parameters
    ----------
    experiment : Experiment
        ``start`` and the ``warmup.changed_on`` dates of its ``checks`` are the change days.
    ds : date-like
        The day checked.
    config : mapping, optional
        ``{"warmup": {"days": ..., "changed_on": [...]}}``.

    Returns
    -------
    CheckResult
        ``observed`` is the number of days since the last change on or before ``ds`` (``None``
        when none is known), ``threshold`` the warm-up length; fails while observed < days.

    Notes
    -----
    Bidders learn a new mixture by bidding against it; until they have, the bids are not an
    equilibrium for the designed shares and the counterfactual estimates are biased. How long
    that takes depends on the market (common practice: a few days).
    """
    cfg = _config(config, experiment)["warmup"]
    day = parse_day(ds)
    changes = sorted({d for d in [experiment.start, *cfg["changed_on"]] if d is not None and d <= day})
    if not changes:
        return _result("warmup", cfg, True, None, cfg["days"], note="no start or share change on or before ds")
    last = changes[-1]
    since = (day - last).days
    return _result("warmup", cfg, since >= cfg["days"], since, cfg["days"], last_change=last,
                   warmup_ends=last + _dt.timedelta(days=int(cfg["days"])))


# ---------------------------------------------------------------------------------------------
# Equilibrium checks
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class InferredValues:
    """Smoothed bid quantile function and the values it implies, on a quantile grid.

    Attributes
    ----------
    n_bidders : int
    n_bids : int
    q : ndarray
        Quantile grid.
    bid : ndarray
        Smoothed bid quantile function ``b(q)``.
    slope : ndarray
        Its derivative ``b'(q)``.
    value : ndarray
        Implied value ``v = p'/x'`` for the mixture ``x`` by the payment rule that ran:
        ``b + b' x / x'`` (``first_price``), ``b`` (``vcg``), or ``[b D - sum_k W_k c_k (k-1)
        (1-q)^(k-2) B_k] / x'`` (``gsp``; docs/method.md, "The three inversions and their weights").
    """

    n_bidders: int
    n_bids: int
    q: np.ndarray
    bid: np.ndarray
    slope: np.ndarray
    value: np.ndarray


#: Most order statistics the quantile-function spline is fitted to; a larger stratum is thinned
#: to every k-th sorted bid (at most 16 interior knots: a million points pin them down).
_FIT_POINTS = 2**20


def inferred_values(sorted_bids: np.ndarray, experiment: Experiment, n_bidders: int, *, knots: int = 16,
                    grid: int = 200, q_low: float = 0.05, q_high: float = 0.95) -> InferredValues:
    """Invert the first-order condition of the mixture on a smoothed bid quantile function.

    Parameters
    ----------
    sorted_bids : ndarray
        Bids of one stratum (auctions with ``n_bidders`` bids), sorted ascending.
    experiment : Experiment
        Arms and designed shares: the mixture ``x`` bidders answer.
    n_bidders : int
    knots : int, optional
        Most interior knots (equally spaced in ``q``) of the least-squares cubic spline fitted to
        the empirical quantile function. A stratum of ``N`` bids gets ``min(knots, (N/10)^(1/3))``
        (at least 2): the variance of the spline's derivative grows like ``k^3 / N`` with ``k``
        knots, so this keeps it at about a tenth whatever the day's size.
    grid : int, optional
        Grid points on ``[q_low, q_high]``.
    q_low, q_high : float, optional
        Trimmed ends: near ``q = 0`` and ``q = 1`` the spline's derivative is poorly determined.

    Returns
    -------
    InferredValues

    Notes
    -----
    ``b`` is ``scipy.interpolate.make_lsq_spline`` of the sorted bids on plotting positions
    ``(i - 1/2)/N`` (beyond ``2**20`` bids, of every k-th of them); ``b'`` is its derivative;
    ``v = b + b' x / x'`` (docs/method.md, "Equilibrium under pay-your-bid per click"). Where the
    mixture is flat (``x' = 0``) the value is not identified and set to NaN.

    References
    ----------
    .. [1] Guerre, E., Perrigne, I., Vuong, Q. (2000). Optimal nonparametric estimation of
       first-price auctions. Econometrica 68(3), 525-574 (the inversion, with trimmed ends).
    .. [2] Krishna, V. (2010). Auction Theory, 2nd ed., ch. 2.
    """
    b = np.asarray(sorted_bids, dtype=float)
    big_n = b.size
    if big_n < 8:
        raise InputError(f"inferred_values: need at least 8 bids in the stratum of {n_bidders} bidders; got {big_n}")
    if not 0 <= q_low < q_high <= 1:
        raise InputError(f"`q_low` and `q_high` must satisfy 0 <= q_low < q_high <= 1; got {q_low}, {q_high}")
    rule = experiment.payment_rule
    floor = float(experiment.floor or 0.0)
    # With a floor only the eligible bids (q > q*) answer the mixture; the sub-floor ones are values.
    n_below = int(np.searchsorted(b, floor, side="left")) if floor > 0 else 0
    if big_n - n_below < 8:
        raise InputError(f"inferred_values: need at least 8 bids at or above the floor in the stratum of "
                         f"{n_bidders} bidders; got {big_n - n_below}")
    q_star = n_below / big_n
    clamped = np.maximum(b, floor) if floor > 0 else b
    pos = (np.arange(big_n) + 0.5) / big_n
    fit_pos, fit_b = pos[n_below:], b[n_below:]
    k_inner = int(max(2, min(int(knots), math.floor((0.1 * fit_b.size) ** (1 / 3)))))
    if fit_b.size > _FIT_POINTS:  # every k-th order statistic: the same quantile function, thinned
        step = -(-fit_b.size // _FIT_POINTS)
        fit_pos, fit_b = fit_pos[step // 2::step], fit_b[step // 2::step]
    inner = np.linspace(q_star, 1.0, k_inner + 2)[1:-1]
    t = np.r_[[q_star] * 4, inner, [1.0] * 4]
    spline = interpolate.make_lsq_spline(fit_pos, fit_b, t, k=3)
    span = 1.0 - q_star  # the trimmed ends, as shares of the eligible range
    q = np.linspace(q_star + span * q_low, q_star + span * q_high, int(grid))
    bq = spline(q)
    slope = spline.derivative()(q)
    rules = [allocation_rule(a.weights_for(n_bidders), n_bidders) for a in experiment.arms]
    mix = mixture_rule(rules, experiment.shares)
    x, dx = mix.value(q), mix.derivative(q)
    with np.errstate(divide="ignore", invalid="ignore"):
        if rule == "vcg":  # truthful prices: bids are values (Vickrey 1961)
            value = bq.copy()
        elif rule == "gsp":
            value = np.where(dx > 0, _gsp_marginal_payment(clamped, q, bq, mix, floor) / dx, np.nan)
        else:
            value = np.where(dx > 0, bq + slope * x / dx, np.nan)
    return InferredValues(int(n_bidders), big_n, q, bq, slope, value)


def _gsp_marginal_payment(clamped: np.ndarray, q: np.ndarray, bq: np.ndarray, mix, floor: float) -> np.ndarray:
    """``p'(q)`` of the next-price auction from the empirical quantile function of the clamped bids.

    ``p'(q) = b(q) D(q) - sum_{k>=2} W_k c_k (k-1) (1-q)^(k-2) B_k(q)`` with ``D(q) = sum_{k<n} W_k
    c_k (n-k) (1-q)^(k-1) q^(n-k-1)``, ``B_k(q) = (n-k) int_0^q max(b, r) s^(n-k-1) ds`` (exact on the
    empirical quantile function, a cumulative sum over the sorted bids) and ``B_n = r``; ``b(q)``
    is the fitted quantile function ``bq``. No derivative of the bids enters (Gomes & Sweeney 2014
    payment; docs/method.md).
    """
    n = mix.n_bidders
    big_w = mix.position_weights
    big_n = clamped.size
    if big_n > _FIT_POINTS:  # thinned like the fit: every k-th order statistic stands for its block
        step = -(-big_n // _FIT_POINTS)
        clamped = clamped[step // 2::step]
        big_n = clamped.size
    u = np.arange(big_n + 1) / big_n
    c = special.comb(n - 1, np.arange(n))
    d = np.zeros_like(q)
    lower = np.zeros_like(q)
    for k in range(1, n + 1):
        m = n - k
        if k < n:
            d += big_w[k - 1] * c[k - 1] * m * (1 - q) ** (k - 1) * q ** (m - 1)
        if k < 2:
            continue
        if m == 0:
            running = np.full_like(q, floor)
        else:
            cells = np.diff(u**m)  # m int s^(m-1) over each bid's quantile cell
            running = np.interp(q, u, np.r_[0.0, np.cumsum(clamped * cells)])
        lower += big_w[k - 1] * c[k - 1] * (k - 1) * (1 - q) ** (k - 2) * running
    return bq * d - lower


def _strata_bids(data) -> dict[int, np.ndarray]:
    out = {}
    for n in np.unique(data.n_bidders):
        out[int(n)] = np.sort(data.bid if data.n_bidders.min() == data.n_bidders.max() else data.bid[data.n_bidders == n])
    return out


def _inversions(data, experiment: Experiment, cfg: Mapping[str, Any]) -> tuple[list[InferredValues], dict[int, int]]:
    fits, skipped = [], {}
    floor = float(experiment.floor or 0.0)
    for n, b in _strata_bids(data).items():
        if b.size < cfg["min_bids"]:
            skipped[n] = int(b.size)
            continue
        eligible = b.size - int(np.searchsorted(b, floor, side="left")) if floor > 0 else b.size
        if eligible < 8:  # (almost) every bid below the floor: no values to infer (docs/method.md)
            skipped[n] = int(eligible)
            continue
        fits.append(inferred_values(b, experiment, n, knots=cfg["knots"], grid=cfg["grid"],
                                    q_low=cfg["q_low"], q_high=cfg["q_high"]))
    return fits, skipped


def monotone_values_check(bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                          source: str = "bids") -> CheckResult:
    """The values implied by the bids must be non-decreasing in the bidder's quantile.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
    experiment : Experiment
    config : mapping, optional
        ``{"monotone_values": {"max_falling_share", "tolerance", "knots", "grid", "q_low", "q_high",
        "min_bids"}}``.
    source : str

    Returns
    -------
    CheckResult
        ``observed`` is the largest (over strata) share of the grid where the implied value has
        fallen: it lies below its running maximum by more than ``tolerance`` times the range of
        the implied values (so sampling wiggles of the spline do not count); ``threshold`` is
        ``max_falling_share``. Strata with fewer than ``min_bids`` bids, or fewer than 8 at or
        above the floor, are skipped (listed in ``details``).

    Notes
    -----
    Equilibrium bids of symmetric bidders with increasing values invert to an increasing
    ``v(q) = b + b' x / x'``. A falling stretch means the bids are not such an equilibrium for
    the designed mixture: bunching at a round bid, a bid cap, or bidders answering another
    rule. The estimates then rest on a failed assumption.

    References
    ----------
    .. [1] Guerre, Perrigne, Vuong (2000), Econometrica 68(3), sec. 3 (monotonicity of the
       inverse bid function as a testable restriction).
    """
    cfg = _config(config, experiment)["monotone_values"]
    data = _prepared(bids, experiment, source)
    return _monotone_values_result(*_inversions(data, experiment, cfg), cfg)


def _monotone_values_result(fits: list[InferredValues], skipped: dict[int, int], cfg: Mapping[str, Any]) -> CheckResult:
    if not fits:
        return _result("monotone_values", cfg, True, None, cfg["max_falling_share"], skipped_strata=skipped,
                       note="no stratum has enough bids")
    per, worst_q = {}, {}
    for f in fits:
        v = f.value[np.isfinite(f.value)]
        if v.size < 2:
            per[f.n_bidders] = 0.0
            continue
        # Fallen: below the running maximum by more than `tolerance` of the implied values' range.
        drop = np.maximum.accumulate(v) - v
        fallen = drop > cfg["tolerance"] * (v.max() - v.min())
        per[f.n_bidders] = float(fallen.mean())
        if fallen.any():
            worst_q[f.n_bidders] = float(f.q[np.isfinite(f.value)][int(np.argmax(drop))])
    observed = max(per.values())
    return _result("monotone_values", cfg, observed <= cfg["max_falling_share"], observed, cfg["max_falling_share"],
                   falling_share_by_bidders=per, steepest_fall_at_quantile=worst_q, skipped_strata=skipped)


def shading_check(bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                  source: str = "bids") -> CheckResult:
    """Implied value / bid ratios must lie within configured bounds.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
    experiment : Experiment
    config : mapping, optional
        ``{"shading": {"min_ratio", "max_ratio", "max_outside_share"}}``; the grid and the
        smoothing are those of ``monotone_values``.
    source : str

    Returns
    -------
    CheckResult
        ``observed`` is the largest (over strata) share of the grid where ``v(q) / b(q)`` lies
        outside ``[min_ratio, max_ratio]``; ``threshold`` is ``max_outside_share``. ``details``
        holds the smallest and largest ratio per stratum.

    Notes
    -----
    A pay-your-bid bidder never bids above its value (ratio >= 1). Where every bidder is shown
    (``x(0) > 0``) low bidders shade heavily in equilibrium (ratios of 30 at ``q = 0.05`` with two
    bidders), hence the loose default upper bound. A larger ratio means the bids barely respond
    to position (gaps in the bid distribution, position weights that do not
    match the ones bidders face, or bids in the wrong unit).
    """
    cfgs = _config(config, experiment)
    data = _prepared(bids, experiment, source)
    return _shading_result(*_inversions(data, experiment, cfgs["monotone_values"]), cfgs["shading"])


def _shading_result(fits: list[InferredValues], skipped: dict[int, int], cfg: Mapping[str, Any]) -> CheckResult:
    if not fits:
        return _result("shading", cfg, True, None, cfg["max_outside_share"], skipped_strata=skipped,
                       note="no stratum has enough bids")
    per, lo, hi = {}, {}, {}
    for f in fits:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = f.value / f.bid
        ok = np.isfinite(ratio)
        if not ok.any():
            per[f.n_bidders] = 0.0
            continue
        r = ratio[ok]
        per[f.n_bidders] = float(np.mean((r < cfg["min_ratio"]) | (r > cfg["max_ratio"])))
        lo[f.n_bidders], hi[f.n_bidders] = float(r.min()), float(r.max())
    observed = max(per.values())
    return _result("shading", cfg, observed <= cfg["max_outside_share"], observed, cfg["max_outside_share"],
                   outside_share_by_bidders=per, min_ratio_by_bidders=lo, max_ratio_by_bidders=hi,
                   bounds=[cfg["min_ratio"], cfg["max_ratio"]], skipped_strata=skipped)


#: Quantiles per (day, number of bidders) kept for the drift check: probabilities k / 256.
BID_QUANTILES = 257
#: Columns of a bid-quantile summary (:func:`bid_quantile_summary`).
_SUMMARY_COLUMNS = ("n_bidders", "n_bids", "quantile_index", "probability", "bid")


def bid_quantile_summary(bids, experiment: Experiment, *, n_quantiles: int = BID_QUANTILES,
                         source: str = "bids") -> pd.DataFrame:
    """A compact summary of one day's bids: ``n_quantiles`` quantiles per number of bidders.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
        One day's bids (effective bids ``bid x quality`` when the log has quality factors;
        single-bidder auctions left out, as in every check).
    experiment : Experiment
    n_quantiles : int, optional
        Quantiles at probabilities ``k / (n_quantiles - 1)``, ``k = 0 .. n_quantiles - 1``
        (minimum and maximum included); default :data:`BID_QUANTILES`.
    source : str

    Returns
    -------
    pandas.DataFrame
        One row per (``n_bidders``, ``quantile_index``) with ``n_bids`` (the stratum's bids),
        ``probability`` and ``bid`` (numpy's default linear interpolation between order
        statistics, Hyndman & Fan's type 7).

    Notes
    -----
    The drift check compares a day's bids with the trailing days' summaries
    (:func:`drift_check`), so the pipeline keeps this per day instead of the bids themselves.

    References
    ----------
    .. [1] Hyndman, R. J. and Fan, Y. (1996). Sample quantiles in statistical packages.
       The American Statistician 50(4), 361-365.
    """
    if isinstance(n_quantiles, bool) or not isinstance(n_quantiles, (int, np.integer)) or n_quantiles < 2:
        raise InputError(f"`n_quantiles` must be an integer >= 2; got {n_quantiles!r}")
    data = _prepared(bids, experiment, source)
    probs = np.linspace(0.0, 1.0, int(n_quantiles))
    frames = []
    for n, b in _strata_bids(data).items():
        frames.append(pd.DataFrame({
            "n_bidders": np.full(probs.size, n, dtype=np.int64), "n_bids": np.full(probs.size, b.size, dtype=np.int64),
            "quantile_index": np.arange(probs.size, dtype=np.int64), "probability": probs,
            "bid": np.quantile(b, probs)}))
    if not frames:
        return pd.DataFrame({c: pd.Series(dtype="int64" if c in ("n_bidders", "n_bids", "quantile_index") else "float64")
                             for c in _SUMMARY_COLUMNS})
    return pd.concat(frames, ignore_index=True)


def _summary_strata(summary: pd.DataFrame, source: str) -> dict[int, list[tuple[int, np.ndarray, np.ndarray]]]:
    """(bids, quantile probabilities, quantile bids) per day of each stratum of a summary frame."""
    missing = [c for c in ("n_bidders", "n_bids", "probability", "bid") if c not in summary.columns]
    if missing:
        raise InputError(f"{source}: bid-quantile summary lacks column {missing[0]!r}")
    keys = ["n_bidders"] + (["ds"] if "ds" in summary.columns else [])
    out: dict[int, list] = {}
    for key, rows in summary.groupby(keys, sort=True):
        n = int(key[0] if isinstance(key, tuple) else key)
        rows = rows.sort_values("probability")
        out.setdefault(n, []).append((int(rows["n_bids"].iloc[0]), rows["probability"].to_numpy(float),
                                      rows["bid"].to_numpy(float)))
    return out


def _pooled_cdf(days: list[tuple[int, np.ndarray, np.ndarray]], x: np.ndarray) -> np.ndarray:
    """Bid-weighted mixture of the days' distribution functions, each linear between its quantiles."""
    total = sum(m for m, _, _ in days)
    out = np.zeros(x.size)
    for m, probs, q in days:
        out += (m / total) * np.interp(x, q, probs, left=0.0, right=1.0)
    return out


def drift_check(bids, experiment: Experiment, history=None, *, config: Mapping[str, Any] | None = None,
                source: str = "bids") -> CheckResult:
    """Kolmogorov-Smirnov test of today's bids against the trailing days' bid-quantile summaries.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
        Today's bids.
    experiment : Experiment
    history : pandas.DataFrame or PreparedBids, optional
        The trailing days (the caller selects the window, ``drift.trailing_days``): either their
        bid-quantile summaries (:func:`bid_quantile_summary` rows, with a ``ds`` column when they
        span several days; what the pipeline stores) or their bids, which are summarised first.
        Without it the check passes with ``observed = None``.
    config : mapping, optional
        ``{"drift": {"alpha", "min_bids"}}``.
    source : str

    Returns
    -------
    CheckResult
        ``observed`` is the Bonferroni-adjusted smallest p-value over strata present on both
        sides with at least ``min_bids`` bids; ``threshold`` is ``alpha``; ``details`` holds the
        KS distance and p-value per stratum.

    Notes
    -----
    The bid distribution depends on the number of bidders, so each stratum is compared with
    itself. In a settled market the daily bid distribution is stable; a shift flags bidders
    still adapting (after a launch or a share change) or a change in the market.

    The trailing days' distribution function is the bid-weighted mixture of each day's
    summary, linear between its 257 quantiles: within ``1 / 256`` of the pooled empirical
    distribution function of those days' bids. The distance ``D`` is the largest gap between it
    and today's empirical distribution function, and its p-value the two-sample Kolmogorov
    distribution at the effective size ``n m / (n + m)`` (``scipy.stats.kstwo``, as
    ``scipy.stats.ks_2samp``'s asymptotic method), ``n`` today's bids and ``m`` the trailing
    days'. The test treats bids as independent draws (true of the simulator; real bidders
    repeat across days, which makes it liberal).

    References
    ----------
    .. [1] Smirnov, N. (1948). Table for estimating the goodness of fit of empirical
       distributions. Ann. Math. Stat. 19(2). ``scipy.stats.kstwo``.
    """
    cfg = _config(config, experiment)["drift"]
    if history is None:
        return _result("drift", cfg, True, None, cfg["alpha"], note="no trailing days")
    data = _prepared(bids, experiment, source)
    if not (isinstance(history, pd.DataFrame) and "probability" in history.columns):
        try:
            past = _prepared(history, experiment, f"{source} (trailing days)")
        except InputError as exc:
            if "no bids for experiment" in str(exc) or "single bidder" in str(exc):
                return _result("drift", cfg, True, None, cfg["alpha"], note="no trailing days")
            raise
        history = bid_quantile_summary(past, experiment)
    if history.empty:
        return _result("drift", cfg, True, None, cfg["alpha"], note="no trailing days")
    now_s, past_s = _strata_bids(data), _summary_strata(history, f"{source} (trailing days)")
    tests = {}
    for n, b in now_s.items():
        days = past_s.get(n)
        m = 0 if days is None else sum(k for k, _, _ in days)
        if days is None or b.size < cfg["min_bids"] or m < cfg["min_bids"]:
            continue
        past_cdf = _pooled_cdf(days, b)  # b is sorted
        above = np.searchsorted(b, b, side="right") / b.size  # today's distribution function at b
        below = np.searchsorted(b, b, side="left") / b.size  # ... just below b
        d = float(max(np.max(above - past_cdf), np.max(past_cdf - below), 0.0))
        effective = b.size * m / (b.size + m)
        p = float(stats.kstwo.sf(d, max(1, round(effective))))
        tests[n] = {"statistic": d, "pvalue": p, "bids": int(b.size), "trailing_bids": int(m),
                    "trailing_days": len(days)}
    if not tests:
        return _result("drift", cfg, True, None, cfg["alpha"], note="no stratum with enough bids on both sides")
    p = min(1.0, min(t["pvalue"] for t in tests.values()) * len(tests))
    return _result("drift", cfg, p >= cfg["alpha"], p, cfg["alpha"], by_bidders=tests)


#: What the ``auction_dependence`` check's failure asks for (the spec keys that model auctions that differ).
DEPENDENCE_REMEDY = ("declare segments (`segments:`) or scale covariates (`scale_covariates:`) in the experiment "
                     "spec: the bids of one auction move together, so auctions differ in a way the spec does not model")


def auction_dependence_check(bids, experiment: Experiment, *, config: Mapping[str, Any] | None = None,
                             source: str = "bids") -> CheckResult:
    """Bids of one auction must be independent: intra-auction correlation of rank normal scores.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
    experiment : Experiment
    config : mapping, optional
        ``{"auction_dependence": {"alpha", "min_correlation", "error_correlation"}}``.
    source : str

    Returns
    -------
    CheckResult
        ``observed`` is the pooled correlation ``r`` (:func:`~counterbid.estimators.dependence.
        auction_dependence`, strata by number of bidders and, when the experiment declares
        segments, by segment; on homogenised bids,
        :func:`~counterbid.estimators.scale_covariates.homogenized_bids`, when the spec declares
        ``scale_covariates``), ``threshold`` is ``min_correlation``.
        Fails when ``r`` minus its null mean exceeds ``min_correlation`` and its one-sided p-value
        is below ``alpha``; the severity is ``error`` when it also exceeds ``error_correlation``.
        ``details`` hold ``z``, the p-value, the standard error, each stratum's ``r``
        (``by_bidders``; ``by_bidders_and_segment`` keyed ``'4 bidders in bulk'`` when segmented)
        and, on failure, the remedy (:data:`DEPENDENCE_REMEDY`).

    Notes
    -----
    Under the model the bids of one auction are independent draws from the stratum's bid
    distribution; auctions pooled from segments that differ, or an auction-level factor scaling
    every value, make them move together and bias every arm's estimate upwards (the spread
    between auctions read as competition within one). The thresholds come from the bias that
    correlation implied on simulated equilibrium logs (docs/method.md, "Auctions that differ: the
    dependence check").
    """
    cfg = _config(config, experiment)["auction_dependence"]
    data = _prepared(bids, experiment, source)
    stratum, name_of = _dependence_strata(data)
    bid = data.bid
    if data.covariates is not None:  # what the spec models is taken out first: per-stratum homogenised bids
        bid = homogenized_bids(data.bid, data.covariates, stratum, source=source)
    dep = auction_dependence(bid, data.auction, stratum)
    per = {name_of(s.key): {"correlation": s.correlation, "standard_error": s.standard_error,
                            "auctions": s.n_auctions} for s in dep.strata}
    excess = dep.excess
    passed = not (dep.p_value < cfg["alpha"] and excess > cfg["min_correlation"])
    if not passed and excess > cfg["error_correlation"]:
        cfg = {**cfg, "severity": "error"}
    extra = {} if passed else {"remedy": DEPENDENCE_REMEDY}
    return _result("auction_dependence", cfg, passed, dep.correlation, cfg["min_correlation"], z=dep.z,
                   p_value=dep.p_value, standard_error=dep.standard_error, null_mean=dep.null_mean,
                   error_correlation=cfg["error_correlation"],
                   **{"by_bidders" if data.segment is None else "by_bidders_and_segment": per}, **extra)


def _dependence_strata(data) -> tuple[np.ndarray, Any]:
    """The dependence check's stratum of every bid -- its number of bidders, and its segment when the
    experiment declares segments -- and how a stratum key reads in the details."""
    if data.segment is None:
        return data.n_bidders, int
    m = max(len(data.segment_names), 1)
    stratum = data.n_bidders.astype(np.int64) * m + data.segment
    return stratum, lambda k: f"{int(k) // m} bidders in {data.segment_names[int(k) % m]}"


def equilibrium_checks(bids, experiment: Experiment, *, ds=None, history=None,
                       config: Mapping[str, Any] | None = None, source: str = "bids",
                       counts: AuctionCounts | None = None,
                       sample: Mapping[str, Any] | None = None, outliers=None) -> list[CheckResult]:
    """Every statistical check of one (experiment, day), in :data:`STATISTICAL_CHECKS` order.

    Parameters
    ----------
    bids : pandas.DataFrame
        The day's bids (data contract; validated by :func:`prepare_bids`, which raises
        :class:`InputError` on a broken contract).
    experiment : Experiment
    ds : date-like, optional
        The day; needed for ``warmup`` (skipped when ``None``).
    history : pandas.DataFrame, optional
        Earlier days for ``drift``: their bid-quantile summaries (:func:`bid_quantile_summary`
        rows with a ``ds`` column) or their bids; when it has a ``ds`` column and ``ds`` is given,
        only the ``drift.trailing_days`` days before ``ds`` are used.
    config : mapping, optional
        Threshold overrides on top of ``experiment.checks``.
    source : str
    counts : AuctionCounts, optional
        The whole day's auctions per arm and number of bidders, when ``bids`` holds a sample of
        the day's auctions: ``sample_ratio`` and the minimum-sample checks then read these
        (exact for the day) and the distribution checks (``monotone_values``, ``shading``,
        ``drift``) read ``bids``. Default: counted from ``bids``.
    sample : mapping, optional
        What ``bids`` is a sample of (e.g. ``{"shard": 0, "shards": 3, "bids_used": ...,
        "day_bids": ...}``), recorded as ``details["sample"]`` of each distribution check.
    outliers : callable, optional
        When ``bids`` is a sample: ``outliers({n_bidders: fence})`` returns the whole day's bids
        above the sample's outlier fences (a frame with ``n_bidders, auction_id, bidder_id, bid,
        effective_bid``), so ``outlying_bids`` and ``dominant_bids`` see every shard.

    Returns
    -------
    list of CheckResult
    """
    cfg = _config(config, experiment)
    data = _prepared(bids, experiment, source)
    if isinstance(history, pd.DataFrame) and ds is not None and "ds" in history.columns:
        day = pd.Timestamp(parse_day(ds))
        hist_days = pd.to_datetime(history["ds"])
        window = (hist_days < day) & (hist_days >= day - pd.Timedelta(days=int(cfg["drift"]["trailing_days"])))
        history = history.loc[window.to_numpy()] if window.any() else None
    if counts is not None and not isinstance(counts, AuctionCounts):
        raise InputError("`counts` must be AuctionCounts (see AuctionCounts.from_frame)")
    whole_day = counts if counts is not None else auction_counts(data, experiment)
    out = [sample_ratio_check(whole_day, experiment, config=cfg)]
    out += minimum_sample_checks(whole_day, experiment, config=cfg)
    fits, skipped = _inversions(data, experiment, cfg["monotone_values"])  # shared by both checks
    spread = [_monotone_values_result(fits, skipped, cfg["monotone_values"]), _shading_result(fits, skipped, cfg["shading"]),
              drift_check(data, experiment, history, config=cfg, source=source),
              auction_dependence_check(data, experiment, config=cfg, source=source)]
    if sample is not None:  # the distribution checks ran on a sample of the day's auctions: say which
        note = _jsonable(dict(sample))
        spread = [replace(r, details={**r.details, "sample": note}) for r in spread]
    out += spread
    out += _outlier_results(data, experiment, cfg, bids if isinstance(bids, pd.DataFrame) else None, sample,
                            outliers, counts)
    if ds is not None:
        out.append(warmup_check(experiment, ds, config=cfg))
    return out


def _outlier_results(data, experiment: Experiment, cfg, frame, sample, outliers, counts) -> list[CheckResult]:
    """``outlying_bids`` and ``dominant_bids`` (estimators/outlying_bids.py), noting the sample they read.

    ``outliers``, when given, is a callable taking the sample's fences (``{n: fence}``) and
    returning the whole day's bids above them (the caller scans every shard); ``counts`` then
    gives the whole day's strata sizes.
    """
    from .outlying_bids import outlier_fences, outlying_bid_checks

    strata = _strata_bids(data)
    day_flagged = day_bids = None
    if outliers is not None:
        own = cfg["outlying_bids"]
        fences = outlier_fences(strata, max_robust_z=own["max_robust_z"], min_bids=own["min_bids"])
        day_flagged = outliers({n: f["fence"] for n, f in fences.items()})
        if counts is None:
            counts = auction_counts(data, experiment)
        day_bids = {int(n): int(a) * int(n) for n, a in zip(counts.n_bidders, counts.per_stratum)}
    raw = outlying_bid_checks(strata, experiment, cfg, frame=frame, day_flagged=day_flagged, day_bids=day_bids)
    out = [_result(name, cfg[name], passed, observed, threshold, **details)
           for name, passed, observed, threshold, details in raw]
    if sample is not None:
        note = _jsonable(dict(sample))
        out = [replace(r, details={**r.details, "sample": note}) for r in out]
    return out


def failure_summary(results: Iterable[CheckResult], *, experiment_id: str, ds=None) -> str:
    """Compact text of the failed checks: experiment, day, each failure with observed vs threshold.

    Parameters
    ----------
    results : iterable of CheckResult
    experiment_id : str
    ds : date-like, optional

    Returns
    -------
    str
        First line ``<experiment> <day>: <k> of <n> checks failed (worst: <severity>)``, then one
        line per failed check (errors first); ``... all <n> checks passed`` when none failed.
    """
    results = list(results)
    failed = sorted((r for r in results if not r.passed), key=lambda r: (-SEVERITIES.index(r.severity), r.check))
    day = "" if ds is None else f" {parse_day(ds).isoformat()}"
    if not failed:
        return f"{experiment_id}{day}: all {len(results)} checks passed"
    lines = [f"{experiment_id}{day}: {len(failed)} of {len(results)} checks failed (worst: {worst_failure(failed)})"]
    lines += [f"  {r.describe()}" for r in failed]
    return "\n".join(lines)


def results_frame(results: Iterable[CheckResult]) -> pd.DataFrame:
    """Check results as a DataFrame with columns ``check, severity, passed, observed, threshold, details``."""
    rows = [(r.check, r.severity, r.passed, r.observed, r.threshold, dict(r.details)) for r in results]
    return pd.DataFrame(rows, columns=["check", "severity", "passed", "observed", "threshold", "details"])
