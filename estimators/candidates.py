"""The next experiment: candidate layouts ranked by estimated revenue and by the share each would need.

Given the bids of a running experiment (or a pilot), every candidate layout is estimated as a
what-if layout (``docs/method.md``, "Layouts that did not run"): revenue per auction and lift over
control with influence-function intervals, and its support. Then, for each supported candidate,
the traffic share ``s`` it would need if it ran as an arm beside control (control at ``1 - s``) to
settle its lift to a stated half width in ``D`` days: the lift's influence-function variance is
recomputed with both layouts' weights against the mixture that experiment would run,
``x_s = (1 - s) x_c + s y``, on the observed bids, and scaled to ``D x A`` auctions
(``docs/method.md``, "The next experiment: the share a candidate needs").

References
----------
.. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
.. [2] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from collections.abc import Sequence

import numpy as np
import pandas as pd
from scipy import optimize, stats

from ._validate import check_confidence_level, check_count, check_experiment
from .allocation import allocation_rule, mixture_rule
from .arms import estimate_arms
from .bids import PreparedBids, prepare_bids, sorted_with_order
from .errors import EstimatorWarning, InputError
from .spec import Experiment, WhatIf
from .order_weights import revenue_weights
from .stratum import estimate_stratum, floor_step, table_weights, unit_exponent

__all__ = ["MAX_SHARE", "MIN_SHARE", "RANKING_COLUMNS", "RANKING_STATUSES", "CandidateRanking", "LiftSpread",
           "lift_spread", "rank_candidates"]

#: The share search runs over ``[MIN_SHARE, MAX_SHARE]``: a candidate that settles at ``MIN_SHARE``
#: gets it (status ``any_share``), one that does not settle at any share gets none (``out_of_reach``).
MIN_SHARE = 0.001
MAX_SHARE = 0.999
#: Shares tried before the first one that settles is refined (log-spaced: small shares matter most).
_GRID = np.geomspace(MIN_SHARE, MAX_SHARE, 19)
#: Columns of :attr:`CandidateRanking.table`, one row per candidate, best revenue first.
RANKING_COLUMNS = ("layout", "origin", "revenue_rank", "revenue_per_auction", "revenue_low", "revenue_high",
                   "lift_vs_control", "lift_low", "lift_high", "effective_share", "needed_share", "share_rank",
                   "status")
#: What a candidate's ``status`` says.
RANKING_STATUSES = {
    "ok": "needed_share is the smallest share that settles the lift to the stated half width",
    "any_share": f"the lift settles even at {MIN_SHARE:g}, the smallest share searched",
    "out_of_reach": "no share in (0, 1) settles the lift to the stated half width in the stated days",
    "thin_support": "the bids say too little about the layout (docs/method.md, 'Layouts that did not run'): "
                    "no estimate and no share",
}


@dataclasses.dataclass(frozen=True)
class CandidateRanking:
    """Candidate layouts ranked for the next experiment.

    Attributes
    ----------
    table : pandas.DataFrame
        :data:`RANKING_COLUMNS`. ``revenue_rank`` orders by estimated revenue (1 = highest),
        ``share_rank`` by needed share (1 = smallest); both null for ``thin_support``, and
        ``share_rank`` null for ``out_of_reach``. ``origin`` is ``spec`` (the spec's ``what_if``
        list) or ``given`` (passed by the caller).
    experiment_id, control_arm : str
    target_half_width : float
        Wanted half width of the lift over control (a ratio: 0.02 is two percentage points).
    days, auctions_per_day : int
    confidence_level : float
    n_auctions : int
        Auctions of the bids the ranking rests on.
    """

    table: pd.DataFrame
    experiment_id: str
    control_arm: str
    target_half_width: float
    days: int
    auctions_per_day: int
    confidence_level: float
    n_auctions: int


@dataclasses.dataclass(frozen=True)
class _Stratum:
    """One stratum's bids sorted once: bidders per auction, share of auctions, bids and their auctions."""

    n: int
    share_of_auctions: float
    sorted_bids: np.ndarray
    auction: np.ndarray


@dataclasses.dataclass(frozen=True)
class LiftSpread:
    """Per-auction spread of a candidate's lift over control if it ran beside control at some share.

    ``sigma(share)`` is ``sqrt(M Var)`` with ``Var`` the auction-clustered influence-function
    variance of the lift on the ``M`` auctions of the bids; the half width after ``T`` auctions
    is ``z sigma / sqrt(T)``. Built by :func:`lift_spread`.
    """

    experiment: Experiment
    candidate: WhatIf
    revenue: float
    control_revenue: float
    n_auctions: int
    exponent: int
    strata: tuple[_Stratum, ...]

    def sigma(self, share: float) -> float:
        """Per-auction standard deviation of the lift with the candidate at ``share``, control at ``1 - share``."""
        if isinstance(share, bool) or not isinstance(share, (int, float)) or not 0 < share < 1:
            raise InputError(f"share must be a number in (0, 1); got {share!r}")
        return _lift_sigma(self, float(share))


def lift_spread(bids: pd.DataFrame | PreparedBids, experiment: Experiment, candidate: WhatIf, *, revenue: float,
                control_revenue: float, source: str = "bids") -> LiftSpread:
    """The lift's per-auction spread as a function of the share the candidate would run at.

    Parameters
    ----------
    bids : pandas.DataFrame or PreparedBids
        The bids of the running experiment (data contract).
    experiment : Experiment
        The experiment that ran (its control arm, payment rule and floor are used).
    candidate : WhatIf
        The layout that would run beside control.
    revenue, control_revenue : float
        The candidate's and control's revenue per auction (the what-if and control estimates):
        the delta method's denominators.
    source : str
        Name of the bids in error messages.

    Returns
    -------
    LiftSpread

    References
    ----------
    .. [1] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    """
    check_experiment(experiment)
    if not isinstance(candidate, WhatIf):
        raise InputError(f"`candidate` must be a WhatIf (name, position_weights); got {candidate!r}")
    if not (math.isfinite(control_revenue) and control_revenue > 0 and math.isfinite(revenue)):
        raise InputError(f"{source}: the lift's spread needs finite revenues and control's > 0; got "
                         f"{revenue!r} and {control_revenue!r}")
    data = bids if isinstance(bids, PreparedBids) else prepare_bids(bids, experiment, source=source)
    exponent = unit_exponent(float(data.bid.max()))
    first = np.zeros(data.n_auctions, dtype=np.int64)
    first[data.auction] = data.n_bidders
    strata = []
    for n in np.unique(first).tolist():
        rows = np.flatnonzero(data.n_bidders == n)
        order, sorted_bids = sorted_with_order(np.ldexp(data.bid[rows], -exponent))
        strata.append(_Stratum(int(n), float(np.count_nonzero(first == n)) / data.n_auctions, sorted_bids,
                               data.auction[rows][order].astype(np.intp, copy=False)))
    return LiftSpread(experiment, candidate, float(revenue), float(control_revenue), int(data.n_auctions), exponent,
                      tuple(strata))


def _lift_sigma(spread: LiftSpread, share: float) -> float:
    """``sqrt(M sum_t L_t^2)``, ``L_t = pi_n (S_y,t / T_c - T_y S_c,t / T_c^2)`` over auctions ``t`` (CR0)."""
    exp = spread.experiment
    control = exp.arm(exp.control_arm)
    t_y, t_c = math.ldexp(spread.revenue, -spread.exponent), math.ldexp(spread.control_revenue, -spread.exponent)
    sign = (1.0 / t_c, -t_y / t_c**2)
    floor_value = math.ldexp(float(exp.floor or 0.0), -spread.exponent)
    total = 0.0
    for st in spread.strata:
        y = allocation_rule(spread.candidate.weights_for(st.n), st.n)
        c = allocation_rule(control.weights_for(st.n), st.n)
        sorted_bids = st.sorted_bids.copy()  # the floor step clamps in place
        floor = floor_step(sorted_bids, floor_value)
        mixture = mixture_rule([y, c], [share, 1.0 - share])
        revenue = [revenue_weights(r, mixture, sorted_bids.size, payment_rule=exp.payment_rule, floor=floor.floor)
                   for r in (y, c)]
        weights, _ = table_weights(revenue, [], st.n, sorted_bids.size)
        lift = np.zeros(spread.n_auctions)

        def keep(k: int, influence: np.ndarray) -> None:
            lift[:] += sign[k] * np.bincount(st.auction, weights=influence, minlength=spread.n_auctions)

        estimate_stratum(sorted_bids, st.n, weights, [], floor, on_influence=keep)
        total += st.share_of_auctions**2 * float(lift @ lift)
    return math.sqrt(total * spread.n_auctions)


def _needed_share(spread: LiftSpread, limit: float) -> tuple[float, str]:
    """The smallest share whose per-auction spread is at most ``limit`` (grid, then ``brentq``)."""
    sigmas = [spread.sigma(float(s)) for s in _GRID]
    if sigmas[0] <= limit:
        return MIN_SHARE, "any_share"
    hit = next((k for k, s in enumerate(sigmas) if s <= limit), None)
    if hit is None:
        return float("nan"), "out_of_reach"
    root = optimize.brentq(lambda s: spread.sigma(s) - limit, float(_GRID[hit - 1]), float(_GRID[hit]),
                           xtol=1e-5, rtol=1e-4)
    return float(root), "ok"


def _candidates(experiment: Experiment, given: Sequence[WhatIf]) -> tuple[tuple[WhatIf, ...], dict[str, str]]:
    """The spec's what-if layouts, then the given ones; names must be distinct from each other and the arms'."""
    origin = {w.name: "spec" for w in experiment.what_if}
    for w in given:
        if not isinstance(w, WhatIf):
            raise InputError(f"a candidate layout must be a WhatIf (name, position_weights); got {w!r}")
        if w.name in experiment.arm_names:
            raise InputError(f"candidate {w.name!r}: name is already an arm's of experiment {experiment.id!r}")
        if w.name in origin:
            raise InputError(f"candidate {w.name!r}: name given twice (the spec's what_if list and the candidates)")
        origin[w.name] = "given"
    layouts = tuple(experiment.what_if) + tuple(given)
    if not layouts:
        raise InputError(f"experiment {experiment.id!r}: no candidate layouts (list them under what_if in the spec "
                         "or give them)")
    return layouts, origin


def rank_candidates(
    bids: pd.DataFrame,
    experiment: Experiment,
    candidates: Sequence[WhatIf] = (),
    *,
    days: int,
    auctions_per_day: int,
    target_half_width: float,
    confidence_level: float = 0.95,
    source: str = "bids",
) -> CandidateRanking:
    """Rank candidate layouts by estimated revenue and by the share each would need to settle its lift.

    Parameters
    ----------
    bids : pandas.DataFrame
        Bids of the running experiment or a pilot (data contract), placed against its mixture.
    experiment : Experiment
        The experiment that ran; its ``what_if`` layouts are candidates.
    candidates : sequence of WhatIf, optional
        More candidate layouts (names distinct from the arms' and the spec's what-if layouts).
    days, auctions_per_day : int
        Duration and traffic of the next experiment: ``D x A`` auctions.
    target_half_width : float
        Wanted half width of the candidate's lift over control, a ratio (> 0).
    confidence_level : float
    source : str
        Name of the bids in error messages.

    Returns
    -------
    CandidateRanking

    Notes
    -----
    Intervals are clustered by auction (the planner's unit, as in :func:`~.planner.plan_shares`).
    The needed share is the smallest ``s`` in ``[MIN_SHARE, MAX_SHARE]`` with
    ``z sigma(s) / sqrt(D A) <= target_half_width`` (:class:`LiftSpread`); ``sigma(s)`` uses the
    observed bids in place of the bids bidders would place against ``x_s`` (not observed), the same
    approximation as the effective share's.

    References
    ----------
    .. [1] Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), 58-73.
    .. [2] Serfling, R. (1980). Approximation Theorems of Mathematical Statistics, Wiley, sec. 8.2.
    """
    check_experiment(experiment)
    days, per_day = check_count("days", days, 1), check_count("auctions_per_day", auctions_per_day, 1)
    level = check_confidence_level(confidence_level)
    if isinstance(target_half_width, bool) or not isinstance(target_half_width, (int, float)) \
            or not 0 < target_half_width < math.inf:
        raise InputError(f"`target_half_width` must be a number > 0; got {target_half_width!r}")
    if experiment.scale_covariates:  # the lift's spread is read off raw bids, not homogenised ones
        raise InputError(f"experiment {experiment.id!r} declares scale_covariates "
                         f"({', '.join(experiment.scale_covariates)}): the candidate ranking does not model them; rank "
                         "with a spec without them")
    layouts, origin = _candidates(experiment, candidates)
    full = dataclasses.replace(experiment, what_if=layouts)
    data = prepare_bids(bids, full, source=source)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)  # welfare's missing interval: not ranked
        rows = estimate_arms(data, full, confidence_level=level, cluster="auction", source=source).table
    rows = rows.set_index(["arm", "metric"])
    control_revenue = float(rows.loc[(experiment.control_arm, "revenue_per_auction"), "estimate"])
    limit = float(target_half_width) * math.sqrt(days * per_day) / float(stats.norm.ppf(0.5 + level / 2))
    out = []
    for w in layouts:
        rev, lift = rows.loc[(w.name, "revenue_per_auction")], rows.loc[(w.name, "revenue_lift_vs_control")]
        thin = "thin_support" in str(rev["status"]) or not np.isfinite(rev["estimate"])
        share, status = float("nan"), "thin_support"
        if not thin:
            spread = lift_spread(data, full, w, revenue=float(rev["estimate"]), control_revenue=control_revenue,
                                 source=source)
            share, status = _needed_share(spread, limit)
        out.append((w.name, origin[w.name], rev["estimate"], rev["ci_low"], rev["ci_high"], lift["estimate"],
                    lift["ci_low"], lift["ci_high"], rev["effective_share"], share, status))
    return CandidateRanking(_ranked(out), experiment.id, experiment.control_arm, float(target_half_width), days,
                            per_day, level, int(data.n_auctions))


def _ranked(out: list[tuple]) -> pd.DataFrame:
    cols = ["layout", "origin", "revenue_per_auction", "revenue_low", "revenue_high", "lift_vs_control", "lift_low",
            "lift_high", "effective_share", "needed_share", "status"]
    frame = pd.DataFrame(out, columns=cols)
    for c in cols[2:-1]:
        frame[c] = frame[c].astype(float)
    frame["revenue_rank"] = frame["revenue_per_auction"].rank(ascending=False, method="min").astype("Int64")
    frame["share_rank"] = frame["needed_share"].rank(ascending=True, method="min").astype("Int64")
    frame = frame.sort_values(["revenue_rank", "layout"], na_position="last", kind="stable").reset_index(drop=True)
    return frame[list(RANKING_COLUMNS)]
