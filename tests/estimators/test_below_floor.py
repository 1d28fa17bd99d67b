"""A stratum or shard none of whose bids reaches the floor (docs/method.md, "A stratum with no bid at the floor").

Such a stratum has ``q* = 1``: its revenue and welfare are 0 and every bid's influence is 0. The
pieces write exact zeros without building weights; the plain formula beside that shortcut is the
kernel itself run with ``Floor(r, 1)`` (``estimate_stratum``), which must give 0 to rounding.

In a combination the stratum keeps its auctions in ``M`` and its bidders in ``B``. So a day in
which the shard ``s`` holds no eligible bid satisfies, against the combination of the other shards
alone (``M_r`` auctions, ``B_r`` bidders; ``c(G) = G/(G-1)``):

    T = (M_r/M) T_rest,   Var T = c(G)/c(G_r) (M_r/M)^2 Var T_rest,   lift = lift_rest,
    se(lift) = sqrt(c(G)/c(G_r)) se(lift_rest),

with ``G`` the auctions (auction clustering) or the distinct bidders (bidder clustering), and the
realized per-arm average ``R_rest,k / A_k`` (the sub-floor auctions earn nothing). These are the
combination formulas of docs/method.md, not the code's, so the checks can fail; they hold to
rounding (1e-12 relative).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    InputError, allocation_rule, bidder_totals, combine_pieces, estimate_arms, gram_of, parse_experiments, shard_of,
    simulate_experiment, stratum_pieces,
)
from counterbid.estimators.allocation import mixture_rule
from counterbid.estimators.payment_rules import Floor
from counterbid.estimators.stratum import FloorStep, estimate_stratum, floor_step, stratum_weights, table_weights

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")

FLOOR = 0.35
ARMS = {"lantern": ([0.45, 0.25, 0.1], 0.65), "beacon": ([0.6, 0.15], 0.35)}
RULES = ["first_price", "gsp", "vcg"]
REV = "revenue_per_auction"


def _experiment(rule="gsp", floor=FLOOR, segments=None):
    raw = {"id": "tidewick", "payment_rule": rule, "control_arm": "lantern", "floor": floor,
           "arms": [{"name": k, "share": s, "position_weights": w} for k, (w, s) in ARMS.items()]}
    if segments:
        raw["segments"] = list(segments)
    return parse_experiments({"experiments": [raw]})["tidewick"]


def _log(rule="gsp", n_auctions=2400, rng=17, **kw):
    exp = _experiment(rule)
    bids = simulate_experiment(st.lognorm(0.6, scale=0.7), exp, n_bidders={3: 0.5, 5: 0.5}, n_auctions=n_auctions,
                               rng=rng, payment_rule=rule, floor=FLOOR, bidder_pool=900, **kw)
    return exp, bids


def _sink(bids: pd.DataFrame, rows: np.ndarray) -> pd.DataFrame:
    """The bids of ``rows`` moved below the floor (and unshown, as the log convention says)."""
    out = bids.copy()
    out.loc[rows, "bid"] = FLOOR * (0.2 + 0.7 * np.linspace(0.0, 1.0, int(rows.sum())))
    out.loc[rows, "position"] = np.nan
    return out


def _cr(g: int) -> float:
    return g / (g - 1)


@pytest.mark.parametrize("rule", RULES)
@pytest.mark.parametrize("n", [2, 3, 5])
def test_the_kernel_at_q_one_gives_the_zeros_the_pieces_write(rule, n):
    weights = [allocation_rule(w[: n - 1], n) for w, _ in ARMS.values()]
    mixture = mixture_rule(weights, [s for _, s in ARMS.values()])
    rng = np.random.default_rng(n)
    sorted_bids = np.sort(rng.uniform(0.05, FLOOR * 0.99, 3000 * n))
    step = floor_step(sorted_bids, FLOOR)  # clamps in place: every bid becomes the floor
    assert step.floor is None and step.n_below == sorted_bids.size and np.all(sorted_bids == FLOOR)
    at_one = FloorStep(Floor(FLOOR, 1.0), sorted_bids.size)
    revenue, welfare = stratum_weights(weights, mixture, sorted_bids.size, payment_rule=rule, floor=at_one.floor)
    rev_w, wel_w = table_weights(revenue, welfare, n, sorted_bids.size)
    largest = []
    plain = estimate_stratum(sorted_bids, n, rev_w, wel_w, at_one,
                             on_influence=lambda k, v: largest.append(float(np.abs(v).max())))
    assert np.all(np.abs(plain[np.isfinite(plain)]) <= 1e-12 * FLOOR * n), plain
    assert np.isfinite(plain[: len(weights)]).all() and max(largest) <= 1e-12 * FLOOR * n
    assert any(w.floor_slope != 0 for w in rev_w)  # the slope is not 0: (1{b<r} - q*) = 0 is what removes it

    exp = _experiment(rule)
    auctions = 3000
    log = pd.DataFrame({"auction_id": np.repeat(np.arange(auctions), n), "bidder_id": np.arange(auctions * n) % 700,
                        "arm": np.where(np.repeat(np.arange(auctions), n) % 3 == 0, "beacon", "lantern"),
                        "bid": rng.uniform(0.05, FLOOR * 0.99, auctions * n), "position": np.nan})
    (piece,) = stratum_pieces(log, exp, cluster="bidder")
    assert piece.below_floor and piece.floor_quantile == 1.0 and "degenerate" not in piece.flags
    assert np.array_equal(piece.estimate, np.zeros_like(piece.estimate))  # exact zeros, welfare included
    finite = np.isfinite(plain)  # revenue then welfare of each arm; the piece adds the mixture's revenue
    np.testing.assert_allclose(piece.estimate[:-1][finite], plain[finite], rtol=0, atol=1e-12)
    revenue_cols = [0, 1, len(piece.labels) - 1]
    assert np.array_equal(piece.covariance[np.ix_(revenue_cols, revenue_cols)], np.zeros((3, 3)))
    assert np.array_equal(piece.bidder_sums, np.zeros_like(piece.bidder_sums)) and piece.bidder_ids.size == 700
    assert np.array_equal(piece.realized_sum, np.zeros(2))  # nobody eligible: nobody shown, nobody pays


@pytest.mark.parametrize("cluster", ["auction", "bidder"])
@pytest.mark.parametrize("rule", RULES)
def test_a_shard_below_the_floor_keeps_its_auctions_at_zero(rule, cluster):
    exp, bids = _log(rule)
    shard = shard_of(bids["auction_id"], 3)
    day = _sink(bids, shard == 1)
    pieces = [p for k in range(3) for p in stratum_pieces(day[shard == k], exp, shard=k, cluster=cluster)]
    assert [p.below_floor for p in pieces] == [False, False, True, True, False, False]
    rest = [p for p in pieces if not p.below_floor]
    whole = combine_pieces(pieces, exp, cluster=cluster).table.set_index(["arm", "metric"])
    alone = combine_pieces(rest, exp, cluster=cluster).table.set_index(["arm", "metric"])
    m, m_r = sum(p.n_auctions for p in pieces), sum(p.n_auctions for p in rest)
    if cluster == "auction":
        g, g_r = m, m_r
    else:
        g, g_r = day["bidder_id"].nunique(), day.loc[shard != 1, "bidder_id"].nunique()
        assert g > g_r  # some bidders bid only in the sunk shard: they count, with zero sums
        gram = gram_of(bidder_totals(pieces))  # the running totals of the experiment to date count them too
        assert gram.n_bidders == g
        by_gram = combine_pieces(pieces, exp, cluster=cluster, bidder_gram=gram).table.set_index(["arm", "metric"])
        np.testing.assert_allclose(by_gram["std_error"].to_numpy(float), whole["std_error"].to_numpy(float),
                                   rtol=1e-12)
    ratio = m_r / m
    for arm in ["lantern", "beacon", "_mixture"]:
        got, want = whole.loc[(arm, REV)], alone.loc[(arm, REV)]
        np.testing.assert_allclose(got["estimate"], ratio * want["estimate"], rtol=1e-12)
        np.testing.assert_allclose(got["std_error"], ratio * np.sqrt(_cr(g) / _cr(g_r)) * want["std_error"],
                                   rtol=1e-12)
        assert got["n_auctions"] == m and got["status"] == "ok"
    for arm in ["lantern", "beacon"]:
        np.testing.assert_allclose(whole.loc[(arm, "welfare_per_auction"), "estimate"],
                                   ratio * alone.loc[(arm, "welfare_per_auction"), "estimate"], rtol=1e-12)
        arm_auctions = sum(int(p.arm_auctions[exp.arm_names.index(arm)]) for p in pieces)
        rest_auctions = sum(int(p.arm_auctions[exp.arm_names.index(arm)]) for p in rest)
        np.testing.assert_allclose(whole.loc[(arm, "realized_revenue_per_auction"), "estimate"],
                                   alone.loc[(arm, "realized_revenue_per_auction"), "estimate"] * rest_auctions
                                   / arm_auctions, rtol=1e-12)
    lift, lift_rest = whole.loc[("beacon", "revenue_lift_vs_control")], alone.loc[("beacon", "revenue_lift_vs_control")]
    np.testing.assert_allclose(lift["estimate"], lift_rest["estimate"], rtol=1e-12)
    np.testing.assert_allclose(lift["std_error"], np.sqrt(_cr(g) / _cr(g_r)) * lift_rest["std_error"], rtol=1e-12)


def test_a_stratum_below_the_floor_inside_an_input():
    """The 3-bidder auctions all sub-floor: ``estimate_arms`` equals the 5-bidder stratum scaled by its share."""
    exp, bids = _log("first_price")
    n = bids.groupby("auction_id")["bid"].transform("size").to_numpy()
    day = _sink(bids, n == 3)
    pieces = stratum_pieces(day, exp, cluster="auction")
    assert [(p.n_bidders, p.below_floor) for p in pieces] == [(3, True), (5, False)]
    whole = estimate_arms(day, exp, cluster="auction").table.set_index(["arm", "metric"])
    five = combine_pieces(pieces[1:], exp, cluster="auction").table.set_index(["arm", "metric"])
    ratio = pieces[1].n_auctions / (pieces[0].n_auctions + pieces[1].n_auctions)
    m, m_r = pieces[0].n_auctions + pieces[1].n_auctions, pieces[1].n_auctions
    for arm in ["lantern", "beacon", "_mixture"]:
        np.testing.assert_allclose(whole.loc[(arm, REV), "estimate"], ratio * five.loc[(arm, REV), "estimate"],
                                   rtol=1e-12)
        np.testing.assert_allclose(whole.loc[(arm, REV), "std_error"],
                                   ratio * np.sqrt(_cr(m) / _cr(m_r)) * five.loc[(arm, REV), "std_error"], rtol=1e-12)
    assert np.isfinite(whole["estimate"].drop(index=[("_mixture", "realized_revenue_per_auction")])).all()


@pytest.mark.parametrize("quality", [False, True])
def test_a_day_with_no_bid_at_the_floor_is_one_line_naming_experiment_day_and_floor(quality):
    exp, bids = _log("vcg", n_auctions=600, quality=st.uniform(0.5, 0.5) if quality else None)
    high = dataclasses.replace(exp, floor=50.0)
    unshown = bids.assign(position=np.nan)
    what = r"effective bid \(bid x quality\)" if quality else "bid"
    shard = shard_of(bids["auction_id"], 2)
    pieces = [p for k in range(2) for p in stratum_pieces(unshown[shard == k], high, shard=k, day="2026-05-14")]
    assert all(p.below_floor for p in pieces)
    line = rf"^bids: the floor 50.0 lies above every {what} of experiment 'tidewick' on 2026-05-14 \(largest "
    with pytest.raises(InputError, match=line) as err:
        combine_pieces(pieces, high)
    assert "\n" not in str(err.value) and f"{len(bids)} bids" in str(err.value)
    with pytest.raises(InputError, match=rf"^log\.parquet: the floor 50.0 lies above every {what} of experiment "
                                         r"'tidewick' \(largest"):
        estimate_arms(unshown, high, source="log.parquet")


def test_a_segment_below_the_floor_has_zero_revenue_and_no_interval():
    exp = _experiment("gsp", segments=["quay"])
    _, bids = _log("gsp")
    shard = shard_of(bids["auction_id"], 4)
    bids["quay"] = np.where(shard == 0, "ebb", "flood")
    day = _sink(bids, shard == 0)
    out = estimate_arms(day, exp, cluster="auction").table.set_index(["segment", "arm", "metric"])
    ebb = out.loc["ebb"]
    for arm in ["lantern", "beacon", "_mixture"]:
        assert ebb.loc[(arm, REV), "estimate"] == 0.0 and np.isnan(ebb.loc[(arm, REV), "std_error"])
        assert "no_interval" in ebb.loc[(arm, REV), "status"]
        assert np.isfinite(out.loc[("flood", arm, REV), "std_error"])
    assert np.isnan(ebb.loc[("beacon", "revenue_lift_vs_control"), "estimate"])
    pooled = out[out.index.get_level_values(0).isna()] if out.index.get_level_values(0).isna().any() else None
    assert pooled is not None and np.isfinite(pooled["std_error"].to_numpy(float)[:1]).all()


def test_the_equilibrium_checks_skip_a_stratum_below_the_floor():
    """The value inversion needs eligible bids: a stratum without them is listed as skipped, not a failure."""
    from counterbid.estimators.checks import monotone_values_check, shading_check

    exp, bids = _log("first_price", n_auctions=1600)
    n = bids.groupby("auction_id")["bid"].transform("size").to_numpy()
    day = _sink(bids, n == 3)
    assert (n == 3).sum() >= 1000  # the stratum is large enough to be checked, were its bids eligible
    for check in (monotone_values_check, shading_check):
        result = check(day, exp)
        assert result.details["skipped_strata"] == {"3": 0}, result.details  # JSON-ready keys
        assert result.observed is not None  # the 5-bidder stratum was checked
