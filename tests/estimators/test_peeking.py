"""Looking at the experiment-to-date lift every day: fixed intervals against the anytime-valid bounds.

Setups (an invented listings marketplace, experiment ``tarnwick-slots``): six bidders per auction,
values U[0, 1], 1,200 auctions a day, arms drawn 50/50.

* Null: two against four identical slots. Both earn ``k (n - k) / (n + 1) = 8/7`` per auction
  (Krishna 2010, ch. 3: revenue equivalence), so the true lift is 0.
* A real 1 % lift: two slots against four slots weighted ``[1, 1, 1, 0.92]``. Revenue is linear in
  the position weights, so the second earns ``0.08 x 9/7 + 0.92 x 8/7 = 8.08/7``: lift ``+1 %``
  (checked against Myerson's formula by Gauss-Legendre quadrature, ``expected_revenue_per_auction``).
* Auction clusters: every bid's value drawn afresh; intervals clustered by auction. Bidder clusters:
  a pool of 5,000 bidders (the simulator's default pool and id rule) whose values are drawn once
  and persist across days; intervals clustered by bidder.
* Warm-up as today: the default ``warmup`` check fails on the first 3 days, which the analysis
  window leaves out; the looks start on the 4th day and look ``d`` combines ``d`` days.
* The anytime-valid bounds are tuned for 28 planned days (``DEFAULT_PLANNED_DAYS``).

Replicates and bands. "At most 5 %" is tested one-sided at the 1 % level: with R replicates the
observed rate of a procedure whose true rate is 5 % exceeds ``0.05 + 2.326 sqrt(0.05 x 0.95 / R)``
with probability 1 %; R = 200 gives the band 0.0859. The fixed interval over 10 daily looks
excludes a true zero about 20 % of the time (Gaussian random walk, tests/estimators/test_sequential.py),
so the band also shows that the test can fail. Median detection days: R = 100, enough to place a
median day to about +-1 day (binomial sd of the share below a day, 0.05).
"""

from __future__ import annotations

import datetime as dt
import math
import warnings

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import (
    EstimatorWarning, PreparedBids, combine_pieces, expected_revenue_per_auction, parse_experiments, stratum_pieces,
)
from counterbid.estimators.checks import warmup_check
from counterbid.estimators.peeking import (
    PeekingSetup, day_piece, detection_day, first_exclusion, look_path, peeking_study,
)
from counterbid.estimators.sequential import DEFAULT_PLANNED_DAYS, anytime_multiplier
from counterbid.estimators.window import analysis_window

VALUES = st.uniform()
N_BIDDERS, PER_DAY, POOL = 6, 1200, 5000
R_NULL, R_LIFT = 200, 100
BAND = 0.05 + st.norm.ppf(0.99) * math.sqrt(0.05 * 0.95 / R_NULL)
START = dt.date(2026, 5, 4)


def _experiment(treated_weights, treated="four_slots"):
    doc = {"experiments": [{"id": "tarnwick-slots", "control_arm": "two_slots", "start": START.isoformat(), "arms": [
        {"name": "two_slots", "share": 0.5, "position_weights": [1, 1]},
        {"name": treated, "share": 0.5, "position_weights": treated_weights}]}]}
    return parse_experiments(doc)["tarnwick-slots"]


NULL = _experiment([1, 1, 1, 1])
LIFT = _experiment([1, 1, 1, 0.92], treated="four_slots_short")


def _looks_after_warmup(exp, calendar_days):
    """Days the to-date numbers combine when the default warm-up check runs on each calendar day."""
    days = [START + dt.timedelta(days=k) for k in range(calendar_days)]
    failed = {d: [] if warmup_check(exp, d).passed else ["warmup"] for d in days}
    return analysis_window(days, exp, failed_checks=failed).used


def test_truths_by_closed_form_and_quadrature():
    two, four = (expected_revenue_per_auction(VALUES, w, N_BIDDERS) for w in ([1, 1], [1, 1, 1, 1]))
    assert two == pytest.approx(8 / 7, rel=1e-10) and four == pytest.approx(8 / 7, rel=1e-10)
    short = expected_revenue_per_auction(VALUES, [1, 1, 1, 0.92], N_BIDDERS)
    assert short == pytest.approx(8.08 / 7, rel=1e-10)
    assert short / two - 1 == pytest.approx(0.01, abs=1e-10)
    # warm-up as today: three days left out, so 63 calendar days give 60 looks
    used = _looks_after_warmup(NULL, 63)
    assert len(used) == 60 and used[0] == START + dt.timedelta(days=3)


@pytest.mark.parametrize("pool", [None, 400], ids=["auction", "bidder"])
def test_daily_pieces_and_their_cumulative_combination_are_the_estimators(pool):
    """A day's piece equals ``stratum_pieces``; days 1..d combined equal ``combine_pieces`` (1e-12)."""
    setup = PeekingSetup(NULL, VALUES, N_BIDDERS, 300, pool)
    rng = np.random.default_rng(5)
    values = None if pool is None else rng.random(pool)
    mine, theirs = [], []
    for k in range(3):
        piece, bids, bidder = day_piece(setup, rng, values_of_pool=values)
        a, n = bids.shape
        prepared = PreparedBids(bid=bids.ravel(), auction=np.repeat(np.arange(a), n), bidder=bidder.ravel(),
                                arm=np.zeros(a * n, dtype=np.int64), position=np.zeros(a * n, dtype=np.int64),
                                n_bidders=np.full(a * n, n), n_auctions=a, n_excluded_auctions=0, n_excluded_bids=0)
        theirs += stratum_pieces(prepared, NULL, day=(START + dt.timedelta(days=k)).isoformat(), cluster=setup.cluster)
        mine.append(piece)
        np.testing.assert_allclose(piece.estimate, theirs[-1].estimate[[0, 1]], rtol=1e-12)
        np.testing.assert_allclose(piece.covariance, theirs[-1].covariance[np.ix_([0, 1], [0, 1])], rtol=1e-12)
    path = look_path(mine, cluster=setup.cluster)
    for d in (1, 3):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", EstimatorWarning)
            out = combine_pieces(theirs[:d], NULL, cluster=setup.cluster).table.set_index(["arm", "metric"])
        lift = out.loc[("four_slots", "revenue_lift_vs_control")]
        control = out.loc[("two_slots", "revenue_per_auction")]
        assert (path.lift[d - 1], path.lift_se[d - 1]) == pytest.approx((lift["estimate"], lift["std_error"]), rel=1e-12)
        assert (path.control[d - 1], path.control_se[d - 1]) == pytest.approx(
            (control["estimate"], control["std_error"]), rel=1e-12)


def _null_rates(pool, seed):
    out = peeking_study(PeekingSetup(NULL, VALUES, N_BIDDERS, PER_DAY, pool), looks=60, reps=R_NULL,
                        planned_days=DEFAULT_PLANNED_DAYS, seed=seed)
    rates = {}
    for looks in (1, 10, 30, 60):
        rates[looks] = (first_exclusion(out["lift"], out["lift_se"], out["z"], 0.0, looks).mean(),
                        first_exclusion(out["lift"], out["lift_se"], out["m"], 0.0, looks).mean())
    print(f"\npool {pool}: some look's 95 % lift interval excludes 0 (fixed, anytime) by looks:",
          {k: tuple(round(float(x), 3) for x in v) for k, v in rates.items()})
    return rates


@pytest.mark.slow
def test_anytime_bounds_keep_false_exclusions_under_5_percent_auction_clusters():
    rates = _null_rates(None, seed=31)
    for looks in (10, 30, 60):
        assert rates[looks][1] <= BAND, (looks, rates)
    assert rates[10][0] > BAND, rates  # the fixed interval looked at daily: measured 0.255 (0.170 at another seed)
    # one look: the fixed interval holds (measured 0.090 at this seed, 2.6 sd high; 0.052 pooled over 20 looks
    # x 150 replicates at another)
    assert abs(rates[1][0] - 0.05) <= 3 * math.sqrt(0.05 * 0.95 / R_NULL), rates


@pytest.mark.slow
def test_anytime_bounds_keep_false_exclusions_under_5_percent_persistent_bidders():
    # Looks are more correlated than independent increments (the pool's values persist): the
    # bounds stay valid, conservatively (docs/method.md, Slepian's inequality); the fixed interval's
    # rate grows more slowly than with auction clusters.
    rates = _null_rates(POOL, seed=37)
    for looks in (10, 30, 60):
        assert rates[looks][1] <= BAND, (looks, rates)


@pytest.mark.slow
def test_price_of_anytime_validity_width_and_detection_day():
    out = peeking_study(PeekingSetup(LIFT, VALUES, N_BIDDERS, PER_DAY), looks=60, reps=R_LIFT,
                        planned_days=DEFAULT_PLANNED_DAYS, seed=41)
    # widths on days 7, 14, 28 of the to-date numbers, relative to the fixed 95 % interval (same SE)
    ratio = out["m"][[6, 13, 27]] / out["z"]
    np.testing.assert_allclose(ratio, anytime_multiplier(np.array([7, 14, 28]) / 28) / st.norm.ppf(0.975), rtol=1e-12)
    np.testing.assert_allclose(ratio, [1.6588, 1.5708, 1.5486], atol=1e-4)
    fixed = detection_day(out["lift"], out["lift_se"], out["z"])
    anytime = detection_day(out["lift"], out["lift_se"], out["m"])
    print(f"\nreal +1 % lift: median detection day fixed {np.median(fixed)}, anytime {np.median(anytime)}; "
          f"never within 60 looks: fixed {np.isinf(fixed).mean():.3f}, anytime {np.isinf(anytime).mean():.3f}")
    assert np.isfinite(np.median(anytime)) and np.median(anytime) > np.median(fixed)
    assert (anytime >= fixed).all()  # wider bounds never detect earlier on the same path
