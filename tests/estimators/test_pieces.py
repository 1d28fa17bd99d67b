"""Strata as the unit of work: stratum pieces, their combination, shards and days.

What each test can catch:
* a split by number of bidders, each stratum estimated from its own log, combines to exactly what
  ``estimate_arms`` gives on the whole log (weights, the CR0/CR1 factors, bidder ids meeting across
  inputs, realized sufficient sums, the delta-method lift);
* hash shards of one stratum: the per-shard estimator's O(1/N_s) bias is negligible at 1e4 bids per
  shard, and the combined standard error matches the Monte Carlo spread (slow);
* days: the auction-weighted average of each day's pieces with variances adding (auction
  clustering) or bidder sums adding (bidder clustering); with bidders whose values persist across
  days only the latter covers (slow);
* the plain frames round trip exactly; ``shard_of`` is the md5 rule of hashlib and DuckDB.

Tolerances: exact identities to 1e-12 relative. Monte Carlo checks: the sample sd over R replicates
has relative sd about 1 / sqrt(2 (R - 1)) (Kendall & Stuart, normal theory), checks allow 3 of
those; coverage over R replicates has binomial sd sqrt(p (1 - p) / R), checks allow 3 sd. Truth is
Myerson's formula by quadrature (``expected_revenue_per_auction``; Myerson 1981).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    ArmEstimates,
    MAX_BIDS_PER_SHARD, PIECE_FRAMES, EstimatorWarning, InputError, PreparedBids, allocation_rule, combine_pieces,
    equilibrium_bid_function, estimate_arms, expected_revenue_per_auction, mixture_rule, n_shards, parse_experiments,
    pieces_from_frames, pieces_to_frames, shard_of, simulate_experiment, stratum_pieces,
)
from counterbid.estimators.study import simulate_prepared, study_experiment

pytestmark = pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")

VALUES = st.lognorm(0.5, scale=0.8)
Z95 = float(st.norm.ppf(0.975))
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


def _experiment(payment_rule="first_price", floor=None):
    raw = {"id": "quillfen-strata", "payment_rule": payment_rule, "control_arm": "control", "arms": [
        {"name": "control", "share": 0.6, "position_weights": [0.5, 0.3, 0.15]},
        {"name": "steep", "share": 0.25, "position_weights": [0.7, 0.2]},
        {"name": "deep", "share": 0.15, "position_weights": [0.4, 0.35, 0.3, 0.2]}]}
    if floor is not None:
        raw["floor"] = floor
    return parse_experiments({"experiments": [raw]})["quillfen-strata"]


def _same(got: ArmEstimates, want: ArmEstimates, rtol: float = 1e-12) -> None:
    columns = ["arm", "metric", "status", "n_auctions", "n_bids"]
    assert got.table[columns].equals(want.table[columns])
    np.testing.assert_allclose(got.table[NUMBERS].to_numpy(), want.table[NUMBERS].to_numpy(), rtol=rtol, atol=0)
    assert dataclasses.replace(got, table=None) == dataclasses.replace(want, table=None)


def _binomial_band(p: float, reps: int, k: float = 3.0) -> tuple[float, float]:
    sd = math.sqrt(p * (1 - p) / reps)
    return p - k * sd, p + k * sd


def _subset(data: PreparedBids, keep: np.ndarray) -> PreparedBids:
    """The bids of whole auctions ``keep`` selects, as their own input (auction codes renumbered)."""
    auction = np.unique(data.auction[keep], return_inverse=True)[1]
    return dataclasses.replace(data, bid=data.bid[keep], auction=auction, bidder=data.bidder[keep], arm=data.arm[keep],
                               position=data.position[keep], n_bidders=data.n_bidders[keep],
                               n_auctions=int(auction.max()) + 1)


# --------------------------------------------------------------------------------------------
# A split by number of bidders reproduces estimate_arms exactly.

@pytest.mark.parametrize("rule,floor,quality", [("first_price", None, False), ("gsp", 0.35, True)])
def test_strata_estimated_from_their_own_logs_combine_to_estimate_arms(rule, floor, quality):
    exp = _experiment(rule, floor)
    bids = simulate_experiment(VALUES, exp, n_bidders={3: 0.3, 5: 0.5, 8: 0.2}, n_auctions=3000, rng=4,
                               bidder_pool=400, payment_rule=rule, floor=floor,
                               quality=st.uniform(0.5, 0.9) if quality else None)
    # text bidder ids: each sub-log factorizes its own labels, so sums meet only through the ids themselves
    bids = bids.assign(bidder_id="qb-" + bids["bidder_id"].astype(str))
    size = bids.groupby("auction_id")["bid"].transform("size").to_numpy()
    for cluster in ("auction", "bidder"):
        want = estimate_arms(bids, exp, cluster=cluster)
        pieces = [p for n in (3, 5, 8) for p in stratum_pieces(bids[size == n], exp, cluster=cluster)]
        assert [p.n_bidders for p in pieces] == [3, 5, 8]
        assert (pieces[0].bidder_ids is None) == (cluster == "auction")
        _same(combine_pieces(pieces, exp, cluster=cluster), want)
        # a stratum's piece is a function of its own bids: the same from the whole log
        whole = stratum_pieces(bids, exp, cluster=cluster)
        for a, b in zip(pieces, whole):
            for name in ("estimate", "covariance", "realized_sum", "realized_squares", "arm_auctions"):
                np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-13, atol=0)
            assert a.flags == b.flags and a.n_auctions == b.n_auctions
            np.testing.assert_array_equal(a.floor_quantile, b.floor_quantile)  # NaN without a floor
    # auto: these bidders repeat, so auto is bidder clustering, in estimate_arms and in the combination
    auto = combine_pieces([p for n in (3, 5, 8) for p in stratum_pieces(bids[size == n], exp)], exp)
    assert auto.cluster == "bidder"
    _same(auto, estimate_arms(bids, exp))


def test_bidder_sums_meet_across_inputs_only_on_equal_ids():
    exp = _experiment()
    bids = simulate_experiment(VALUES, exp, n_bidders={3: 0.5, 5: 0.5}, n_auctions=2000, rng=8, bidder_pool=150)
    size = bids.groupby("auction_id")["bid"].transform("size").to_numpy()
    three, five = bids[size == 3], bids[size == 5]
    ids_as_text = five.assign(bidder_id=five["bidder_id"].astype(str))  # 7 and '7' are the same bidder
    met = combine_pieces(stratum_pieces(three, exp, cluster="bidder") + stratum_pieces(ids_as_text, exp, cluster="bidder"),
                         exp, cluster="bidder")
    _same(met, estimate_arms(bids, exp, cluster="bidder"))
    renamed = five.assign(bidder_id="other-" + five["bidder_id"].astype(str))  # disjoint bidders
    pieces = stratum_pieces(three, exp, cluster="bidder") + stratum_pieces(renamed, exp, cluster="bidder")
    apart = combine_pieces(pieces, exp, cluster="bidder").table.set_index(["arm", "metric"])
    # disjoint bidders: the strata's CR1 variances add, each factor B_s/(B_s-1) traded for G/(G-1), G = B_3 + B_5
    b = np.array([p.bidder_ids.size for p in pieces], dtype=float)
    pi = np.array([p.n_auctions for p in pieces], dtype=float) / sum(p.n_auctions for p in pieces)
    own = [combine_pieces([p], exp, cluster="bidder").table.set_index(["arm", "metric"]) for p in pieces]
    g = b.sum()
    assert g == len(set(three["bidder_id"])) + len(set(five["bidder_id"]))
    for key in [("control", "revenue_per_auction"), ("deep", "revenue_per_auction")]:
        want = g / (g - 1) * sum(p * p * o.loc[key, "std_error"] ** 2 * (bs - 1) / bs for p, o, bs in zip(pi, own, b))
        assert apart.loc[key, "std_error"] ** 2 == pytest.approx(want, rel=1e-12)
        assert apart.loc[key, "std_error"] != pytest.approx(met.table.set_index(["arm", "metric"]).loc[key, "std_error"],
                                                            rel=1e-6)


def test_combine_refuses_what_it_cannot_combine():
    exp = _experiment()
    bids = simulate_experiment(VALUES, exp, n_bidders=4, n_auctions=300, rng=1, bidder_pool=50)
    pieces = stratum_pieces(bids, exp, cluster="auction")
    with pytest.raises(InputError, match="no bidder sums"):
        combine_pieces(pieces, exp, cluster="bidder")
    with pytest.raises(InputError, match="the same stratum twice"):
        combine_pieces(pieces + pieces, exp)
    other = dataclasses.replace(exp, arms=exp.arms[:2], control_arm="control")
    with pytest.raises(InputError, match="other arms"):
        combine_pieces(pieces, other)
    with pytest.raises(InputError, match="no stratum pieces"):
        combine_pieces([], exp)
    with pytest.raises(InputError, match="`shard`"):
        stratum_pieces(bids, exp, shard=-1)


# --------------------------------------------------------------------------------------------
# Shards of one stratum.

def _sharded(data: PreparedBids, exp, k: int, **kw):
    shard = shard_of(data.auction, k)  # per bid, from its auction's id
    return [p for s in range(k) for p in stratum_pieces(_subset(data, shard == s), exp, shard=s, **kw)]


def test_shards_of_ten_thousand_bids_combine_to_the_unsharded_estimate():
    # Per-shard estimates carry the estimator's O(1/N_s) bias, k shards about k times the unsharded
    # one. Measured (lognormal values, 4 bidders, 200 replicates, 4 shards): the mean sharded minus
    # unsharded revenue is -0.135, -0.038, -0.018 standard errors at 250, 2 500 and 10 000 bids per
    # shard (Monte Carlo error 0.003, 0.001, 0.0005), the lift's -0.005 to -0.009. Here: 2 shards
    # of ~1e4 bids, 25 replicates; the bound 0.05 SE is 10 times the Monte Carlo error of the mean
    # difference (about 0.005 SE here) and well above the measured bias.
    exp = study_experiment(0.3)
    rng = np.random.default_rng(17)
    keys = [("treated", "revenue_per_auction"), ("control", "revenue_per_auction"), ("treated", "revenue_lift_vs_control")]
    diff, se, se_ratio = [], [], []
    for _ in range(25):
        data = simulate_prepared("lognormal", exp, n_bidders=4, n_auctions=5000, rng=rng)
        whole = combine_pieces(stratum_pieces(data, exp, cluster="auction"), exp, cluster="auction").table.set_index(["arm", "metric"])
        sharded_result = combine_pieces(_sharded(data, exp, 2, cluster="auction"), exp, cluster="auction")
        sharded = sharded_result.table.set_index(["arm", "metric"])
        diff.append([sharded.loc[k, "estimate"] - whole.loc[k, "estimate"] for k in keys])
        se.append([whole.loc[k, "std_error"] for k in keys])
        se_ratio.append([sharded.loc[k, "std_error"] / whole.loc[k, "std_error"] for k in keys])
        assert sharded_result.n_auctions == 5000 and sharded_result.strata == {4: 5000}
    diff, se, se_ratio = map(np.asarray, (diff, se, se_ratio))
    bias_in_se = np.abs(diff.mean(axis=0)) / se.mean(axis=0)
    assert (bias_in_se < 0.05).all(), bias_in_se
    assert (np.abs(diff).max(axis=0) < 0.3 * se.mean(axis=0)).all()  # no replicate far off either
    np.testing.assert_allclose(se_ratio.mean(axis=0), 1.0, atol=0.01)  # the same variance, added over shards


@pytest.mark.slow
def test_sharded_standard_errors_match_the_monte_carlo_spread():
    # 4 shards of ~2 500 bids; R = 200: SE / sd within 3 / sqrt(2 (R - 1)) = 0.15; coverage within
    # the binomial band; the lift's interval (delta method from the combined covariance) too.
    reps, n = 200, 4
    exp = study_experiment(0.3)
    truth = {a.name: expected_revenue_per_auction(VALUES, a.position_weights, n) for a in exp.arms}
    truth = {("treated", "revenue_per_auction"): truth["treated"], ("control", "revenue_per_auction"): truth["control"],
             ("treated", "revenue_lift_vs_control"): truth["treated"] / truth["control"] - 1}
    rng = np.random.default_rng(2027)
    est = {k: np.empty(reps) for k in truth}
    se = {k: np.empty(reps) for k in truth}
    for r in range(reps):
        data = simulate_prepared(VALUES, exp, n_bidders=n, n_auctions=2500, rng=rng)
        out = combine_pieces(_sharded(data, exp, 4, cluster="auction"), exp).table.set_index(["arm", "metric"])
        for k in truth:
            est[k][r], se[k][r] = out.loc[k, ["estimate", "std_error"]]
    rel = 3 / math.sqrt(2 * (reps - 1))
    lo, hi = _binomial_band(0.95, reps)
    for k in truth:
        ratio = se[k].mean() / est[k].std(ddof=1)
        coverage = float(np.mean(np.abs(est[k] - truth[k]) <= Z95 * se[k]))
        assert 1 - rel <= ratio <= 1 + rel, (k, ratio)
        assert lo <= coverage <= hi, (k, coverage)
        assert abs(est[k].mean() - truth[k]) < 3 * est[k].std(ddof=1) / math.sqrt(reps), k


# --------------------------------------------------------------------------------------------
# Days: bidders whose values persist across two days.

class TwoDays:
    """A pool of bidders with values drawn once; auctions of ``n`` drawn from the pool on each of two days."""

    def __init__(self, exp, *, n_bidders: int, auctions: tuple[int, int], pool: int):
        self.exp, self.n, self.auctions, self.pool = exp, n_bidders, auctions, pool
        rules = [allocation_rule(arm.weights_for(n_bidders), n_bidders) for arm in exp.arms]
        self.bid_of_quantile = equilibrium_bid_function(VALUES, mixture_rule(rules, exp.shares))
        self.weights = np.stack([np.asarray(arm.weights_for(n_bidders)) for arm in exp.arms])

    def draw(self, rng: np.random.Generator) -> list[PreparedBids]:
        n = self.n
        bid_of_bidder = self.bid_of_quantile(rng.random(self.pool))  # values persist over both days
        days = []
        for a in self.auctions:
            bidder = (rng.integers(0, self.pool, size=(a, 1)) + np.arange(n)[None, :]) % self.pool
            bids = bid_of_bidder[bidder]
            arm_of_auction = rng.choice(len(self.exp.arms), size=a, p=np.asarray(self.exp.shares))
            rank = np.empty((a, n), dtype=np.int64)
            np.put_along_axis(rank, np.argsort(-bids, axis=1, kind="stable"), np.arange(1, n + 1)[None, :], axis=1)
            arm = np.repeat(arm_of_auction, n)
            shown = self.weights[arm, rank.ravel() - 1] > 0
            days.append(PreparedBids(bid=bids.ravel(), auction=np.repeat(np.arange(a), n), bidder=bidder.ravel(),
                                     arm=arm, position=np.where(shown, rank.ravel(), 0), n_bidders=np.full(a * n, n),
                                     n_auctions=a, n_excluded_auctions=0, n_excluded_bids=0))
        return days


def _per_day_variances_added(day_pieces, exp, keys):
    """SE from each day's own bidder-clustered SE, added as if days were independent."""
    weights = np.array([sum(p.n_auctions for p in ps) for ps in day_pieces], dtype=float)
    weights /= weights.sum()
    outs = [combine_pieces(ps, exp, cluster="bidder").table.set_index(["arm", "metric"]) for ps in day_pieces]
    return {k: math.sqrt(sum(w * w * o.loc[k, "std_error"] ** 2 for w, o in zip(weights, outs))) for k in keys}


def test_days_combine_as_the_auction_weighted_average_of_each_day():
    exp = study_experiment(0.3)
    days = TwoDays(exp, n_bidders=4, auctions=(900, 1500), pool=120).draw(np.random.default_rng(3))
    pieces = [stratum_pieces(d, exp, day=f"2026-03-0{i + 2}", cluster="bidder") for i, d in enumerate(days)]
    m = np.array([d.n_auctions for d in days], dtype=float)
    pi = m / m.sum()
    per_day = [combine_pieces(ps, exp, cluster="auction").table.set_index(["arm", "metric"]) for ps in pieces]
    both_result = combine_pieces(pieces[0] + pieces[1], exp, cluster="auction")
    both = both_result.table.set_index(["arm", "metric"])
    for k in [("control", "revenue_per_auction"), ("treated", "revenue_per_auction"), ("_mixture", "revenue_per_auction"),
              ("control", "welfare_per_auction")]:
        assert both.loc[k, "estimate"] == pytest.approx(sum(p * o.loc[k, "estimate"] for p, o in zip(pi, per_day)),
                                                        rel=1e-12)
    # the realized per-arm average pools the arm's own auctions (weights: the arm's auctions per day)
    k = ("treated", "realized_revenue_per_auction")
    arm_auctions = np.array([o.loc[k, "n_auctions"] for o in per_day], dtype=float)
    assert both.loc[k, "estimate"] == pytest.approx(
        sum(a * o.loc[k, "estimate"] for a, o in zip(arm_auctions, per_day)) / arm_auctions.sum(), rel=1e-12)
    for k in [("control", "revenue_per_auction"), ("treated", "revenue_per_auction")]:
        # auction clustering: CR1 variances add, each day's factor G_d/(G_d-1) traded for the pooled M/(M-1)
        cr0 = sum(p * p * o.loc[k, "std_error"] ** 2 * (g - 1) / g for p, o, g in zip(pi, per_day, m))
        assert both.loc[k, "std_error"] ** 2 == pytest.approx(m.sum() / (m.sum() - 1) * cr0, rel=1e-12)
    assert both_result.n_auctions == 2400 and both_result.strata == {4: 2400}
    bidder_result = combine_pieces(pieces[0] + pieces[1], exp)
    bidder = bidder_result.table.set_index(["arm", "metric"])
    assert bidder_result.cluster == "bidder"
    added = _per_day_variances_added(pieces, exp, [("control", "revenue_per_auction")])
    assert bidder.loc[("control", "revenue_per_auction"), "std_error"] > 1.2 * added[("control", "revenue_per_auction")]


def _two_day_coverage(reps: int, seed: int):
    exp = study_experiment(0.3)
    sim = TwoDays(exp, n_bidders=4, auctions=(1000, 1000), pool=200)
    truth = {a.name: expected_revenue_per_auction(VALUES, a.position_weights, 4) for a in exp.arms}
    truth = {("control", "revenue_per_auction"): truth["control"], ("treated", "revenue_per_auction"): truth["treated"],
             ("treated", "revenue_lift_vs_control"): truth["treated"] / truth["control"] - 1}
    rng = np.random.default_rng(seed)
    est, se_bidder, se_added = ({k: np.empty(reps) for k in truth} for _ in range(3))
    for r in range(reps):
        days = sim.draw(rng)
        pieces = [stratum_pieces(d, exp, day=f"2026-03-0{i + 2}", cluster="bidder") for i, d in enumerate(days)]
        out = combine_pieces(pieces[0] + pieces[1], exp, cluster="bidder").table.set_index(["arm", "metric"])
        added = _per_day_variances_added(pieces, exp, list(truth))
        for k in truth:
            est[k][r], se_bidder[k][r] = out.loc[k, ["estimate", "std_error"]]
            se_added[k][r] = added[k]
    cover = {name: {k: float(np.mean(np.abs(est[k] - truth[k]) <= Z95 * se[k])) for k in truth}
             for name, se in (("bidder", se_bidder), ("added", se_added))}
    ratio = {k: se_bidder[k].mean() / est[k].std(ddof=1) for k in truth}
    return cover, ratio, {k: se_bidder[k].mean() / se_added[k].mean() for k in truth}


def test_persistent_bidders_across_days_need_their_sums_added():
    # 30 replicates keep this to seconds: the SE of the combined bidder sums matches the spread
    # (within 3 / sqrt(2 * 29) = 0.39) while adding per-day variances is about 1/sqrt(2) too small.
    cover, ratio, widen = _two_day_coverage(reps=30, seed=5)
    for k in ratio:
        assert 0.61 <= ratio[k] <= 1.39, (k, ratio[k])
    for k in [("control", "revenue_per_auction"), ("treated", "revenue_per_auction")]:
        assert widen[k] > 1.2, (k, widen[k])


@pytest.mark.slow
def test_persistent_bidders_across_days_coverage():
    reps = 300
    cover, ratio, widen = _two_day_coverage(reps=reps, seed=11)
    lo, hi = _binomial_band(0.95, reps)  # [0.912, 0.988]
    rel = 3 / math.sqrt(2 * (reps - 1))
    for k in ratio:
        assert lo <= cover["bidder"][k] <= hi, (k, cover)
        assert 1 - rel <= ratio[k] <= 1 + rel, (k, ratio)
    for k in [("control", "revenue_per_auction"), ("treated", "revenue_per_auction")]:
        assert cover["added"][k] < lo, (k, cover)  # adding per-day variances under-covers


# --------------------------------------------------------------------------------------------
# Plain frames and shards.

def test_pieces_round_trip_through_plain_frames_exactly():
    exp = _experiment("gsp", 0.35)
    bids = simulate_experiment(VALUES, exp, n_bidders={3: 0.5, 6: 0.5}, n_auctions=800, rng=9, bidder_pool=90,
                               payment_rule="gsp", floor=0.35)
    bids = bids.assign(bidder_id="qb-" + bids["bidder_id"].astype(str))
    size = bids.groupby("auction_id")["bid"].transform("size").to_numpy()
    flat = bids[size == 3].assign(bid=0.5)  # every bid equal: a degenerate stratum
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        pieces = (stratum_pieces(bids, exp, day="2026-03-02", cluster="bidder")
                  + stratum_pieces(flat, exp, day="2026-03-03", shard=2, cluster="bidder")
                  + stratum_pieces(bids, exp, cluster="auction", shard=1))
    assert "degenerate" in pieces[2].flags  # the equal bids of day 2
    frames = pieces_to_frames(pieces)
    assert tuple(frames) == PIECE_FRAMES
    for frame in frames.values():
        for column, dtype in frame.dtypes.items():
            assert dtype.kind in "ifb" or pd.api.types.is_string_dtype(dtype), (column, dtype)
    back = pieces_from_frames({k: v.sample(frac=1.0, random_state=0) if k != "strata" else v for k, v in frames.items()})
    assert len(back) == len(pieces)
    for a, b in zip(pieces, back):
        assert a.equals(b), a.key
        assert b.bidder_ids is None or b.bidder_ids.dtype == object
    # bidders come back shuffled here, so the sums over bidders add in another order: equal to rounding
    _same(combine_pieces(back[:2], exp, cluster="bidder"), combine_pieces(pieces[:2], exp, cluster="bidder"), rtol=1e-14)
    assert pieces_to_frames(pieces[:1])["strata"].equals(frames["strata"].iloc[[0]])
    assert pieces_from_frames(pieces_to_frames(pieces[:1]))[0].equals(pieces[0])
    with pytest.raises(InputError, match="frame 'bidder_sums' is missing"):
        pieces_from_frames({k: v for k, v in frames.items() if k != "bidder_sums"})


def test_shard_of_is_the_md5_rule_of_hashlib_and_duckdb():
    def reference(i) -> int:  # the rule, written out with hashlib (RFC 1321)
        return int(hashlib.md5(str(i).encode("utf-8")).hexdigest()[:8], 16)

    ints = [0, 1, 42, 2**40 + 7, -5]
    texts = ["qa-17", "quillfen-auction-000123", "ß-auction"]
    np.testing.assert_array_equal(shard_of(np.array(ints, dtype=np.int64), 7), [reference(i) % 7 for i in ints])
    np.testing.assert_array_equal(shard_of(pd.Series(texts, dtype="category"), 5), [reference(t) % 5 for t in texts])
    np.testing.assert_array_equal(shard_of(ints, 7), shard_of(pd.Series(ints), 7))
    np.testing.assert_array_equal(shard_of(["42", 42], 1000), [reference(42) % 1000] * 2)  # an id meets its text
    assert reference(42) == 0xa1d0c6e8  # md5("42") = a1d0c6e83f027327d8461063f4ac58a6 (hashlib, recorded)
    duckdb = pytest.importorskip("duckdb")
    con = duckdb.connect()
    for ids, kind in ((ints, "bigint"), (texts, "varchar")):
        got = con.execute(f"select ('0x' || left(md5(cast(cast(x as {kind}) as varchar)), 8))::ubigint % 11 "
                          "from unnest($ids) as t(x)", {"ids": ids}).fetchall()
        assert [g[0] for g in got] == list(shard_of(ids, 11)), kind
    # spread: 20 000 ids over 8 shards pass a chi-square test of equal counts (alpha 0.001)
    counts = np.bincount(shard_of(np.arange(20_000), 8), minlength=8)
    assert st.chisquare(counts).pvalue > 0.001


def test_n_shards():
    assert MAX_BIDS_PER_SHARD == 4_000_000
    assert [n_shards(b) for b in (0, 1, 4_000_000, 4_000_001, 30_000_000)] == [1, 1, 1, 2, 8]
    assert n_shards(10, 3) == 4
    with pytest.raises(InputError, match="max_bids_per_shard"):
        n_shards(10, 0)
    with pytest.raises(InputError, match="n_shards"):
        shard_of([1, 2], 0)
