"""What-if layouts: layouts that did not run, estimated from the bids placed against the mixture.

Sources named beside each check:
* Myerson, R. (1981), "Optimal auction design", Math. Oper. Res. 6(1), Lemma 3: revenue per bidder
  ``r (1-q*) y(q*) + int_{q*}^1 (1-q) F^-1(q) y'(q) dq`` whatever the payment rule (revenue
  equivalence), computed here by ``scipy.integrate.quad``;
* Krishna, V. (2010), Auction Theory, ch. 3: ``k`` identical slots, U[0, 1] values, revenue
  ``k (n-k) / (n+1)`` per auction.
The exact-grid tests feed the mixture's equilibrium bids at the quantiles ``(i - 1/2) / N`` (no
sampling error), so their tolerance is the grid's discretisation (observed below 1e-8 relative at
N = 100,000; 1e-6 leaves two orders of margin). Monte Carlo tolerances are derived where they appear.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from scipy import integrate

from counterbid.estimators import (
    InputError, allocation_rule, combine_pieces, equilibrium_bid_function, estimate_arms, mixture_rule,
    parse_experiments, pieces_from_frames, pieces_to_frames, simulate_experiment, stratum_pieces,
)
from counterbid.estimators.support import MIN_EFFECTIVE_BIDS, weights_bounded

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")

# An invented marketplace's three arms (five bidders per auction) and two layouts that never ran:
# one between the arms, one selling the fifth position, which no arm sells.
ARMS = {"ledger": ([0.5, 0.3, 0.15], 0.6), "spire": ([0.7, 0.2], 0.2), "terrace": ([0.4, 0.35, 0.3, 0.2], 0.2)}
LAYOUTS = {"between": [0.55, 0.28, 0.12], "fifth-slot": [0.45, 0.35, 0.3, 0.25, 0.2]}
VALUES = st.beta(2.0, 5.0, scale=3.0)
N_BIDDERS = 5


def experiment(payment_rule="first_price", floor=None, arms=ARMS, layouts=LAYOUTS):
    raw = {"id": "kelpmarket", "payment_rule": payment_rule, "control_arm": next(iter(arms)),
           "arms": [{"name": k, "share": s, "position_weights": w} for k, (w, s) in arms.items()],
           "what_if": [{"name": k, "position_weights": w} for k, w in layouts.items()]}
    if floor is not None:
        raw["floor"] = floor
    return parse_experiments({"experiments": [raw]})["kelpmarket"]


def myerson_quad(values, weights, n, floor=None):
    """n [r (1-q*) y(q*) + int_{q*}^1 (1-q) F^-1(q) y'(q) dq] by scipy.integrate.quad (Myerson 1981)."""
    y = allocation_rule(weights, n)
    r, qs = (0.0, 0.0) if floor is None else (floor, float(values.cdf(floor)))
    val, _ = integrate.quad(lambda q: (1 - q) * values.ppf(q) * float(y.derivative(q)), qs, 1, limit=400,
                            epsabs=1e-12)
    return n * (r * (1 - qs) * float(y.value(qs)) + val)


def grid_bids(payment_rule, floor, total=100_000):
    """The mixture's equilibrium bids at the quantile grid; sub-floor bidders bid their (sub-floor) values."""
    mix = mixture_rule([allocation_rule(w, N_BIDDERS) for w, _ in ARMS.values()], [s for _, s in ARMS.values()])
    q = (np.arange(total) + 0.5) / total
    bids = equilibrium_bid_function(VALUES, mix, payment_rule=payment_rule, floor=floor)(q)
    if floor is not None:
        bids = np.where(q < VALUES.cdf(floor), VALUES.ppf(q), bids)
    return pd.DataFrame({"auction_id": np.arange(total) % (total // N_BIDDERS), "bidder_id": np.arange(total),
                         "bid": bids, "arm": "ledger", "position": pd.NA})


# --- the spec ----------------------------------------------------------------------------------------

def raw_spec(**what_if):
    return {"experiments": [{"id": "e", "arms": [{"name": "a", "share": 1.0, "position_weights": [1.0, 0.5]}],
                             "what_if": [{"name": "w", "position_weights": [1.0, 0.2], **what_if}]}]}


def test_spec_reads_what_if_layouts():
    exp = experiment()
    assert exp.target_names == ("ledger", "spire", "terrace", "between", "fifth-slot")
    assert exp.what_if[1].weights_for(6) == (0.45, 0.35, 0.3, 0.25, 0.2, 0.0)
    assert parse_experiments(raw_spec())["e"].what_if[0].position_weights == (1.0, 0.2)


@pytest.mark.parametrize("change,message", [
    ({"name": "a"}, r"what_if\[0\]: name 'a' is already an arm's"),
    ({"position_weights": "measured"}, r"what_if\[0\] \(w\): position_weights cannot be 'measured'"),
    ({"share": 0.1}, r"what_if\[0\] \(w\): a what-if layout did not run and has no 'share'"),
    ({"position_weights": [0.2, 0.5]}, r"what_if\[0\] \(w\) position_weights: weights must be non-increasing"),
    ({"name": "_mixture"}, r"what_if\[0\]: 'name' must be 1-128 characters"),
    ({"clicks": 3}, r"what_if\[0\] \(w\): unknown key 'clicks'"),
])
def test_spec_refuses_bad_what_if(change, message):
    with pytest.raises(InputError, match=message):
        parse_experiments(raw_spec(**change), source="spec.yaml")


def test_spec_refuses_duplicate_what_if_names():
    doc = raw_spec()
    doc["experiments"][0]["what_if"].append({"name": "w", "position_weights": [1.0]})
    with pytest.raises(InputError, match=r"what_if\[1\]: duplicate what-if name 'w'"):
        parse_experiments(doc)


# --- against Myerson's formula (quad), every payment rule, with and without a floor ----------------

@pytest.mark.parametrize("payment_rule", ["first_price", "gsp", "vcg"])
@pytest.mark.parametrize("with_floor", [False, True])
def test_what_if_revenue_on_exact_grid_matches_quad(payment_rule, with_floor):
    floor = float(VALUES.ppf(0.3)) if with_floor else None
    exp = experiment(payment_rule, floor)
    out = estimate_arms(grid_bids(payment_rule, floor), exp).table.set_index(["arm", "metric"])
    for name, weights in LAYOUTS.items():
        row = out.loc[(name, "revenue_per_auction")]
        assert row["estimate"] == pytest.approx(myerson_quad(VALUES, weights, N_BIDDERS, floor), rel=1e-6), name
        assert row["what_if"] and row["status"] == "ok"
        assert np.isfinite(row["effective_share"]) and row["effective_share"] > 0
    # Under truthful prices the weights do not depend on the mixture: every layout's effective share is 1.
    if payment_rule == "vcg":
        np.testing.assert_allclose(out.loc[list(LAYOUTS), "effective_share"], 1.0, rtol=1e-9)


def test_what_if_rows_beside_the_arms():
    values = st.uniform(0, 1)
    exp = experiment(layouts={"two-equal": [1.0, 1.0], "between": LAYOUTS["between"]})
    bids = simulate_experiment(values, exp, n_bidders=N_BIDDERS, n_auctions=8000, rng=4)
    table = estimate_arms(bids, exp).table
    rows = table[table["what_if"]]
    assert set(rows["arm"]) == {"two-equal", "between"}
    assert set(rows["metric"]) == {"revenue_per_auction", "welfare_per_auction", "revenue_lift_vs_control"}
    assert not table.loc[~table["what_if"], "effective_share"].notna().any()
    rev = rows.set_index(["arm", "metric"])
    # Krishna 2010, ch. 3: two identical slots of five bidders earn 2 x 3 / 6 = 1.0 per auction.
    two = rev.loc[("two-equal", "revenue_per_auction")]
    assert abs(two["estimate"] - 1.0) < 3 * two["std_error"]
    lift = rev.loc[("two-equal", "revenue_lift_vs_control"), "estimate"]
    arms = table.query("metric == 'revenue_per_auction'").set_index("arm")["estimate"]
    assert lift == pytest.approx(arms["two-equal"] / arms["ledger"] - 1, rel=1e-12)


def test_what_if_equal_to_the_mixture_is_the_mixture():
    # The mixture's own position weights (0.6 x ledger + 0.2 x spire + 0.2 x terrace) as a what-if:
    # the estimator is linear in the target, so the numbers are the _mixture row's, effective share 1.
    mixed = list(np.array([0.6, 0.2, 0.2]) @ np.array([w + [0.0] * (4 - len(w)) for w, _ in ARMS.values()]))
    exp = experiment(layouts={"as-run": mixed})
    bids = simulate_experiment(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=3000, rng=8)
    rev = estimate_arms(bids, exp).rows("revenue_per_auction")
    assert rev.loc["as-run", "estimate"] == pytest.approx(rev.loc["_mixture", "estimate"], rel=1e-9)
    assert rev.loc["as-run", "std_error"] == pytest.approx(rev.loc["_mixture", "std_error"], rel=1e-6)
    assert rev.loc["as-run", "effective_share"] == pytest.approx(1.0, rel=1e-9)


# --- support: the flagged cases ----------------------------------------------------------------------

IDENTICAL = {"pair": ([1.0, 1.0], 0.5), "trio": ([1.0, 1.0, 1.0], 0.5)}


@pytest.mark.parametrize("payment_rule", ["first_price", "gsp"])
def test_layout_with_unbounded_weights_gets_no_number(payment_rule):
    # Every arm sells identical top slots, so the mixture's top two positions weigh the same and
    # x'(1) = 0, while the layout's steeper top has y'(1) > 0: y'/x' is unbounded at the top.
    exp = experiment(payment_rule, arms=IDENTICAL, layouts={"steep-top": [1.0, 0.5], "flat": [1.0, 1.0]})
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=N_BIDDERS, n_auctions=3000, rng=1,
                               payment_rule=payment_rule)
    table = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    steep = table.loc["steep-top"]
    assert (steep["status"] == "thin_support").all()
    assert steep[["estimate", "std_error", "effective_share"]].isna().all().all()
    flat = table.loc[("flat", "revenue_per_auction")]
    assert flat["status"] == "ok"
    if payment_rule == "first_price":  # gsp with identical slots need not have an equilibrium (docs/method.md)
        assert abs(flat["estimate"] - 2 * 3 / 6) < 3 * flat["std_error"]  # Krishna 2010, ch. 3


def test_truthful_prices_support_every_layout():
    # Under VCG bids are values: the same layout the pay-your-bid mixture cannot support is estimated.
    exp = experiment("vcg", arms=IDENTICAL, layouts={"steep-top": [1.0, 0.5]})
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=N_BIDDERS, n_auctions=3000, rng=1,
                               payment_rule="vcg")
    row = estimate_arms(bids, exp).rows("revenue_per_auction").loc["steep-top"]
    # 0.5 x one slot + 0.5 x two slots: 0.5 x 4/6 + 0.5 x 1 (Krishna 2010, ch. 2-3)
    assert row["status"] == "ok" and abs(row["estimate"] - (0.5 * 4 / 6 + 0.5)) < 3 * row["std_error"]


def test_weights_bounded_reads_both_ends():
    n = 4
    rule = lambda w: allocation_rule(w, n)  # noqa: E731
    assert weights_bounded(rule([1.0, 0.5]), rule([1.0, 1.0]), "first_price") is False  # top: x'(1) = 0
    assert weights_bounded(rule([1.0, 0.5, 0.3, 0.1]), rule([1.0, 0.5, 0.2]), "first_price")  # x(0) = 0
    # bottom: every position sold, the bottom two alike (x(0) > 0, x'(0) = 0), the layout's differ
    assert weights_bounded(rule([1.0, 0.5, 0.3, 0.1]), rule([1.0, 0.5, 0.3, 0.3]), "first_price") is False
    assert weights_bounded(rule([1.0, 0.5]), rule([1.0, 1.0]), "vcg")


def test_too_few_effective_bids_gets_no_number():
    # Arms sell three gently falling slots; the layout's steep second slot leans on the top bids:
    # its effective share is about 0.25 (measured at 3000 auctions), so 60 auctions (300 bids)
    # give about 75 effective bids, below MIN_EFFECTIVE_BIDS = 100; 3000 auctions give ~3700.
    exp = experiment(arms={"gentle": ([1.0, 0.9, 0.8], 1.0)}, layouts={"steep": [1.0, 0.3]})
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=N_BIDDERS, n_auctions=3000, rng=2)
    many = estimate_arms(bids, exp).rows("revenue_per_auction").loc["steep"]
    assert many["status"] == "ok" and many["effective_share"] * 15000 > MIN_EFFECTIVE_BIDS
    few = estimate_arms(bids[bids["auction_id"] < 60], exp).rows("revenue_per_auction").loc["steep"]
    assert few["effective_share"] * 300 < MIN_EFFECTIVE_BIDS
    assert "thin_support" in few["status"] and np.isnan(few["estimate"])


# --- pieces: combine, frames ---------------------------------------------------------------------------

def test_pieces_by_day_and_frames_keep_what_ifs():
    exp = experiment()
    bids = simulate_experiment(VALUES, exp, n_bidders={4: 0.5, 5: 0.5}, n_auctions=4000, rng=6)
    whole = estimate_arms(bids, exp, cluster="auction").table
    half = bids["auction_id"] % 2
    pieces = [p for d, part in bids.groupby(half) for p in
              stratum_pieces(part, exp, day=f"2026-05-0{d + 1}", cluster="auction")]
    back = pieces_from_frames(pieces_to_frames(pieces))
    assert all(a.equals(b) for a, b in zip(pieces, back))
    frames = pieces_to_frames(pieces)["arms"]
    assert frames.loc[frames["what_if"], "arm"].unique().tolist() == list(LAYOUTS)
    combined = combine_pieces(back, exp, cluster="auction").table
    cols = ["estimate", "std_error", "effective_share"]
    wi = combined[combined["what_if"]].set_index(["arm", "metric"])[cols]
    ref = whole[whole["what_if"]].set_index(["arm", "metric"])[cols]
    # Same auctions, split in two days: estimates differ only by the strata's own weights; the
    # what-if rows are in place and finite, and within a standard error of the single input's.
    assert wi.index.equals(ref.index)
    rev = wi.xs("revenue_per_auction", level="metric")
    ref_rev = ref.xs("revenue_per_auction", level="metric")
    assert (abs(rev["estimate"] - ref_rev["estimate"]) < ref_rev["std_error"]).all()


def test_old_frames_without_what_if_columns_read_as_arms():
    exp = experiment(layouts={})
    bids = simulate_experiment(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=500, rng=3)
    pieces = stratum_pieces(bids, exp)
    frames = pieces_to_frames(pieces)
    frames["arms"] = frames["arms"].drop(columns=["what_if", "own_variance"])
    assert all(a.equals(b) for a, b in zip(pieces, pieces_from_frames(frames)))


# --- coverage of what-if intervals ------------------------------------------------------------------------

@pytest.mark.slow
@pytest.mark.parametrize("payment_rule,with_floor", [("first_price", False), ("gsp", True)])
def test_what_if_standard_error_and_coverage_match_monte_carlo(payment_rule, with_floor):
    # 200 replications of 3000 auctions (five bidders) cut from one simulated log. The Monte Carlo
    # spread's own relative error is ~1/sqrt(2 x 199) = 5 %, so SE / spread within 15 % is three of
    # those; the coverage of nominal 95 % intervals has a binomial sd of sqrt(0.95 x 0.05 / 200) =
    # 1.5 points, so it must lie in [90.4 %, 99.6 %] (three sd).
    reps, size = 200, 3000
    floor = float(VALUES.ppf(0.3)) if with_floor else None
    exp = experiment(payment_rule, floor)
    log = simulate_experiment(VALUES, exp, n_bidders=N_BIDDERS, n_auctions=reps * size, rng=29,
                              payment_rule=payment_rule, floor=floor)
    truth = np.array([myerson_quad(VALUES, w, N_BIDDERS, floor) for w in LAYOUTS.values()])
    chunk = log["auction_id"].to_numpy() // size
    est, se = [], []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for _, part in log.groupby(chunk, sort=False):
            rev = estimate_arms(part, exp, cluster="auction").rows("revenue_per_auction").loc[list(LAYOUTS)]
            est.append(rev["estimate"].to_numpy())
            se.append(rev["std_error"].to_numpy())
    est, se = np.array(est), np.array(se)
    ratio = se.mean(axis=0) / est.std(axis=0, ddof=1)
    coverage = (np.abs(est - truth) <= 1.959964 * se).mean(axis=0)
    print(f"{payment_rule} floor={with_floor}: SE/spread {dict(zip(LAYOUTS, ratio.round(3)))}, "
          f"coverage {dict(zip(LAYOUTS, coverage))}")
    assert np.all(np.abs(ratio - 1) < 0.15), ratio
    assert np.all((coverage >= 0.904) & (coverage <= 0.996)), coverage
