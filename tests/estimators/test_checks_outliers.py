"""Bids far above the day's distribution: ``outlying_bids`` (warning) and ``dominant_bids`` (error).

The scenario that motivated them: one bid of 1e300 among 12,000 bids near 1 gives a revenue
estimate near 1e296 per auction, every row with status ``ok``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import EstimatorWarning, InputError, estimate_arms, parse_experiments, prepare_bids, simulate_experiment
from counterbid.estimators.checks import DEFAULT_CHECKS, STATISTICAL_CHECKS, equilibrium_checks
from counterbid.estimators.outlying_bids import MAD_TO_SD, outlier_fences

DAY = "2026-05-20"
# An invented listings page: a four-row strip against a strip whose top row is taller.
SPEC = {"experiments": [{"id": "strip-rows", "control_arm": "even", "start": "2026-05-01", "arms": [
    {"name": "even", "share": 0.7, "position_weights": [0.31, 0.17, 0.06, 0.02]},
    {"name": "tall-top", "share": 0.3, "position_weights": [0.36, 0.12, 0.05, 0.02]}]}]}
EXP = parse_experiments(SPEC)["strip-rows"]
ROW = 1234


@pytest.fixture(scope="module")
def day():
    """12,000 equilibrium bids near 1 (values log-normal, sigma 0.25), four bidders per auction."""
    return simulate_experiment(st.lognorm(0.25, scale=1.0), EXP, n_bidders=4, n_auctions=3000, rng=5, ds=DAY)


def _checks(bids, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        return {r.check: r for r in equilibrium_checks(bids, EXP, ds=DAY, **kw)}


def _revenue(bids):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        out = estimate_arms(bids, EXP).to_frame()
    rev = out[out["metric"] == "revenue_per_auction"].set_index("arm")
    return rev["estimate"], rev["status"]


def test_both_checks_are_registered_with_their_defaults():
    assert STATISTICAL_CHECKS.index("outlying_bids") < STATISTICAL_CHECKS.index("dominant_bids")
    assert DEFAULT_CHECKS["outlying_bids"]["severity"] == "warning"
    assert DEFAULT_CHECKS["dominant_bids"]["severity"] == "error"


def test_one_huge_bid_is_named_and_stops_the_day(day):
    bad = day.copy()
    bad.loc[ROW, "bid"] = 1e300
    estimate, status = _revenue(bad)
    # what the estimator alone says: a number of order 1e296 with status ok (the reason for the checks)
    assert (estimate > 1e295).all() and (status == "ok").all()
    found = _checks(bad)
    out, dom = found["outlying_bids"], found["dominant_bids"]
    assert not out.passed and out.severity == "warning"
    assert [r["row"] for r in out.details["flagged_bids"]] == [ROW]
    flagged = out.details["flagged_bids"][0]
    assert flagged["bid"] == 1e300 and flagged["auction_id"] == bad.loc[ROW, "auction_id"]
    assert flagged["bidder_id"] == bad.loc[ROW, "bidder_id"]
    assert not dom.passed and dom.severity == "error"
    assert dom.observed > 0.999  # the one bid carries the whole estimate
    assert [r["row"] for r in dom.details["flagged_bids"]] == [ROW]  # the error line names the row too


def test_a_clean_equilibrium_day_stays_quiet(day):
    found = _checks(day)
    assert found["outlying_bids"].passed and found["dominant_bids"].passed
    assert found["outlying_bids"].details["flagged_bids"] == []
    # the largest robust z of 12,000 log-normal bids: a normal maximum of ~4, far below the default 8
    assert found["outlying_bids"].observed < 5


def test_a_flagged_bid_that_does_not_dominate_only_warns_and_its_share_matches_the_estimator(day):
    # A bid 200 times the median: far outside (z ~ 15), yet one of 12,000 bids with weight ~ n omega(1) / N.
    median = float(np.median(day["bid"]))
    big = day.copy()
    big.loc[ROW, "bid"] = 200 * median
    found = _checks(big)
    assert not found["outlying_bids"].passed and found["dominant_bids"].passed
    share = found["dominant_bids"].details["share_of_revenue_by_arm"]
    # Outside the check: the estimate is linear in the sorted bids, so halving the top bid (still the
    # top) lowers each arm's revenue by half its contribution: share = 2 (R(b) - R(b/2)) / R(b).
    half = day.copy()
    half.loc[ROW, "bid"] = 100 * median
    full, _ = _revenue(big)
    halved, _ = _revenue(half)
    for arm in EXP.arm_names:
        want = 2 * (full[arm] - halved[arm]) / full[arm]
        assert share[arm] == pytest.approx(want, rel=1e-6), arm
    assert 0.01 < max(share.values()) < 0.5


def test_thresholds_come_from_the_spec_and_are_validated(day):
    big = day.copy()
    big.loc[ROW, "bid"] = 200 * float(np.median(day["bid"]))
    strict = _checks(big, config={"dominant_bids": {"max_share": 0.01}})
    assert not strict["dominant_bids"].passed
    loose = _checks(big, config={"outlying_bids": {"max_robust_z": 40}})
    assert loose["outlying_bids"].passed and loose["dominant_bids"].passed
    with pytest.raises(InputError, match=r"outlying_bids\.max_robust_z: must be a finite number"):
        parse_experiments({"experiments": [{**SPEC["experiments"][0], "checks": {"outlying_bids": {"max_robust_z": "x"}}}]})


def test_robust_scale_is_the_normal_sd_and_survives_bunched_bids():
    rng = np.random.default_rng(3)
    logs = rng.normal(0.0, 0.7, 200_000)
    fence = outlier_fences({3: np.sort(np.exp(logs))}, max_robust_z=8.0, min_bids=20)[3]
    # 1.4826 MAD estimates the normal sd; its sd at n = 200,000 is about 1.17 sd / sqrt(n) ~ 0.002
    # (Rousseeuw & Croux 1993, efficiency 37 %): 0.01 is five of them.
    assert fence["scale_log"] == pytest.approx(0.7, abs=0.01)
    assert MAD_TO_SD == pytest.approx(1 / st.norm.ppf(0.75), rel=1e-12)
    bunched = np.sort(np.r_[np.full(700, 2.0), np.exp(rng.normal(0.0, 0.5, 300))])  # MAD = 0
    f = outlier_fences({4: bunched}, max_robust_z=8.0, min_bids=20)[4]
    assert f["scale_log"] > 0 and np.isfinite(f["fence"])


def test_prepared_bids_name_the_bid_values(day):
    bad = day.copy()
    bad.loc[ROW, "bid"] = 1e300
    found = {r.check: r for r in equilibrium_checks(prepare_bids(bad, EXP), EXP, ds=DAY)}
    assert found["outlying_bids"].details["flagged_bids"] == [{"effective_bid": 1e300, "n_bidders": 4}]
