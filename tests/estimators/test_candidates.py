"""The next experiment: candidate layouts ranked by revenue and by the share each needs to settle its lift.

The needed share rests on the lift's influence-function variance with both layouts' weights
against the mixture ``x_s = (1 - s) x_c + s y`` of the experiment that would run
(docs/method.md, "The next experiment: the share a candidate needs"). It is checked against
simulation: experiments run at the proposed share for D days, in equilibrium against ``x_s``,
whose lift estimates spread by the stated half width (1.96 x their standard deviation).
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import InputError, WhatIf, allocation_rule, mixture_rule, parse_experiments
from counterbid.estimators import simulate_experiment
from counterbid.estimators.candidates import MIN_SHARE, RANKING_COLUMNS, lift_spread, rank_candidates
from counterbid.estimators.study import ordstat_revenue, simulate_prepared

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")

# An invented marketplace: control sells three identical top tiles and a small fourth; the arm
# beside it has a steep top. The candidate "tilted" has a steep top too, so against control alone
# its weights are unbounded (a point mass on the top bid, docs/method.md "When the weights exist"):
# the share it runs at decides how precisely its lift is known.
CONTROL = [0.3, 0.3, 0.3, 0.1]
STEEP = [0.5, 0.2, 0.05]
TILTED = [0.45, 0.25, 0.1]
VALUES = st.beta(2.0, 5.0, scale=3.0)
N_BIDDERS = 5


def experiment(arms, what_if=(), payment_rule="first_price"):
    raw = {"id": "tilepond", "control_arm": "tiles", "payment_rule": payment_rule,
           "arms": [{"name": k, "share": s, "position_weights": w} for k, (w, s) in arms.items()],
           "what_if": [{"name": k, "position_weights": w} for k, w in what_if]}
    return parse_experiments({"experiments": [raw]})["tilepond"]


def running(what_if=(("tilted", TILTED),), payment_rule="first_price"):
    return experiment({"tiles": (CONTROL, 0.9), "steep": (STEEP, 0.1)}, what_if, payment_rule)


@pytest.fixture(scope="module")
def pilot_bids():
    return simulate_experiment(VALUES, running(), n_bidders=N_BIDDERS, n_auctions=6000, rng=11)


def test_ranking_orders_by_revenue_and_by_share(pilot_bids):
    """Columns, ranks by revenue (highest first) and by needed share, and each candidate's origin."""
    extra = [WhatIf("flat-five", (0.2, 0.2, 0.2, 0.2, 0.2)), WhatIf("same-as-control", tuple(CONTROL))]
    r = rank_candidates(pilot_bids, running(), extra, days=5, auctions_per_day=2000, target_half_width=0.01)
    t = r.table
    assert tuple(t.columns) == RANKING_COLUMNS
    assert list(t["revenue_rank"]) == sorted(t["revenue_rank"])  # rows in revenue order
    assert t["revenue_per_auction"].is_monotonic_decreasing
    assert dict(zip(t["layout"], t["origin"])) == {"tilted": "spec", "flat-five": "given", "same-as-control": "given"}
    # control's own layout: its lift over control is 0 with zero spread on the same bids, any share settles it
    same = t.set_index("layout").loc["same-as-control"]
    assert same["lift_vs_control"] == pytest.approx(0.0, abs=1e-12) and same["status"] == "any_share"
    assert same["needed_share"] == MIN_SHARE and same["share_rank"] == 1
    ok = t[t["status"].isin(["ok", "any_share"])]
    assert (ok.sort_values("share_rank")["needed_share"].diff().dropna() >= 0).all()
    assert r.n_auctions == 6000 and r.control_arm == "tiles"


def test_spread_falls_with_share_when_control_alone_does_not_support(pilot_bids):
    """Against control alone the candidate's weights are unbounded, so its lift's spread must fall
    as its share grows (the weights near the top are bounded by 1 / s); a layout close to control
    (bounded against it: it sells the same top tiles) barely depends on the share."""
    exp = running()
    tilted = lift_spread(pilot_bids, exp, WhatIf("tilted", tuple(TILTED)), revenue=0.63, control_revenue=0.49)
    sig = [tilted.sigma(s) for s in (0.005, 0.05, 0.5)]
    assert sig[0] > 1.3 * sig[1] > 1.3 * 1.2 * sig[2]
    near = lift_spread(pilot_bids, exp, WhatIf("near", (0.3, 0.3, 0.3, 0.05)), revenue=0.48, control_revenue=0.49)
    assert near.sigma(0.005) / near.sigma(0.5) < 1.2 < sig[0] / sig[2]


def test_vcg_spread_does_not_depend_on_share():
    """Under vcg bids are values and the weights do not involve the mixture (docs/method.md), so the
    lift's spread is the same at every share, to rounding."""
    exp = running(payment_rule="vcg")
    bids = simulate_experiment(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=2000, rng=3, payment_rule="vcg")
    spread = lift_spread(bids, exp, WhatIf("tilted", tuple(TILTED)), revenue=0.6, control_revenue=0.5)
    assert spread.sigma(0.01) == pytest.approx(spread.sigma(0.7), rel=1e-9)


def test_thin_support_gets_no_number_and_no_share():
    """Every arm sells identical top tiles; a steeper top is unbounded against the mixture that ran:
    status thin_support, no estimate, no share, no ranks (docs/method.md, 'When the weights exist')."""
    exp = experiment({"tiles": (CONTROL, 0.7), "wide": ([0.25, 0.25, 0.25, 0.2], 0.3)}, [("tilted", TILTED)])
    bids = simulate_experiment(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=3000, rng=5)
    r = rank_candidates(bids, exp, [WhatIf("flatter", (0.28, 0.28, 0.28, 0.15))], days=7, auctions_per_day=1000,
                        target_half_width=0.02)
    row = r.table.set_index("layout").loc["tilted"]
    assert row["status"] == "thin_support"
    assert math.isnan(row["revenue_per_auction"]) and math.isnan(row["needed_share"])
    assert row[["revenue_rank", "share_rank"]].isna().all()
    assert r.table.iloc[0]["layout"] == "flatter"  # ranked rows first, thin ones last


def test_out_of_reach(pilot_bids):
    """A half width no share reaches in one day of 100 auctions: no share, status out_of_reach."""
    r = rank_candidates(pilot_bids, running(), days=1, auctions_per_day=100, target_half_width=1e-4)
    row = r.table.iloc[0]
    assert row["status"] == "out_of_reach" and math.isnan(row["needed_share"]) and pd.isna(row["share_rank"])


@pytest.mark.parametrize("kwargs, message", [
    (dict(target_half_width=0), "`target_half_width` must be a number > 0; got 0"),
    (dict(days=0), "`days` must be an integer >= 1; got 0"),
    (dict(candidates=[WhatIf("steep", (0.5,))]), "candidate 'steep': name is already an arm's"),
    (dict(candidates=[WhatIf("tilted", (0.5,))]), "candidate 'tilted': name given twice"),
])
def test_bad_arguments_one_line(pilot_bids, kwargs, message):
    args = dict(days=3, auctions_per_day=1000, target_half_width=0.02) | kwargs
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace(")", r"\)")):
        rank_candidates(pilot_bids, running(), **args)


def test_scale_covariates_refused(pilot_bids):
    import dataclasses

    exp = dataclasses.replace(running(), scale_covariates=("demand_index",))
    with pytest.raises(InputError, match="declares scale_covariates \\(demand_index\\): the candidate ranking does not"):
        rank_candidates(pilot_bids, exp, days=3, auctions_per_day=1000, target_half_width=0.02)


def test_no_candidates_refused(pilot_bids):
    with pytest.raises(InputError, match="no candidate layouts"):
        rank_candidates(pilot_bids, running(what_if=()), days=3, auctions_per_day=1000, target_half_width=0.02)


# Simulation check. R replicate experiments of D x A auctions at the proposed share: the sample sd
# of R lift estimates has relative error 1/sqrt(2 (R - 1)) (normal theory) = 3.2 % at R = 500. The
# prediction carries the pilot's own sampling error (20,000 auctions: the needed share moved
# by 2.3 % over three pilot seeds, sigma by less; 3 % is used) and the plug-in's approximation (observed bids
# in place of bids against x_s: within 3 % at shares 0.1 and 0.2 in this design, measured against
# R = 200 simulations; 3 % is used; it reads 12 % low at 0.4 and 48 % high at 0.005, so the design's
# target is chosen to need a share near 0.13). Tolerance: three combined standard deviations = 15.9 %.
REPS = 500
SIM_REL = 1 / math.sqrt(2 * (REPS - 1))
TOL = 3 * math.sqrt(SIM_REL**2 + 0.03**2 + 0.03**2)
DAYS, PER_DAY = 7, 1000


def realized_half_width(share, reps, rng):
    """1.96 x the sd of the lift over ``reps`` experiments running the candidate at ``share`` beside control."""
    exp = experiment({"tiles": (CONTROL, 1 - share), "tilted": (TILTED, share)})
    rules = [allocation_rule(TILTED, N_BIDDERS), allocation_rule(CONTROL, N_BIDDERS)]
    mix = mixture_rule(rules, [share, 1 - share])
    lift = np.empty(reps)
    for r in range(reps):
        data = simulate_prepared(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=DAYS * PER_DAY, rng=rng)
        est = ordstat_revenue(data, rules, mix).estimate
        lift[r] = est[0] / est[1] - 1
    return 1.959964 * lift.std(ddof=1)


@pytest.mark.slow
@pytest.mark.timeout(900)
def test_needed_share_settles_the_lift_in_simulation():
    """Simulate the next experiment at the proposed share for D days: the realized half width is the
    stated one within the tolerance above (measured: 1.029 x, at share 0.130). At an eighth of that
    share it is wider than at the share itself by more than three sds of the two Monte Carlo ratios
    (measured: 1.32 x), so the share the planner proposes matters."""
    bids = simulate_experiment(VALUES, running(), n_bidders=N_BIDDERS, n_auctions=20_000, rng=21)
    target = 0.0066
    r = rank_candidates(bids, running(), days=DAYS, auctions_per_day=PER_DAY, target_half_width=target)
    row = r.table.iloc[0]
    assert row["status"] == "ok", row
    share = float(row["needed_share"])
    assert 0.05 < share < 0.5  # an interior share: the check means something
    rng = np.random.default_rng(2024)
    realized = realized_half_width(share, REPS, rng)
    assert realized / target == pytest.approx(1.0, abs=TOL), (share, realized)
    narrow = realized_half_width(share / 8, REPS // 2, rng)
    assert narrow / realized > 1 + 3 * math.hypot(SIM_REL, 1 / math.sqrt(2 * (REPS // 2 - 1))), (share / 8, narrow)
