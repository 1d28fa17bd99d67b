"""Segments: auctions estimated per (n, segment) stratum, per-segment rows and auction-weighted pooled rows.

References checked against (outside the project):

* Myerson, R. (1981). Optimal auction design. Math. Oper. Res. 6(1), Lemma 3: expected revenue
  of an allocation rule ``y`` with ``n`` symmetric bidders is ``n int_0^1 (1 - q) F^{-1}(q) y'(q) dq``
  (quantile form as in Krishna 2010, Auction Theory, ch. 5), integrated here by scipy.integrate.quad;
* the pooled estimand (docs/method.md, "Segments"): the auction-weighted average of each
  segment's counterfactual, ``sum_s (M_s / M) R_s``.
"""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from numpy.polynomial import Polynomial
from scipy import integrate
from scipy.special import comb

from counterbid.estimators import (
    EstimatorWarning,
    InputError,
    SimulatedSegment,
    combine_pieces,
    estimate_arms,
    parse_experiments,
    prepare_bids,
    simulate_segmented_experiment,
    stratum_pieces,
)

WEIGHTS = {"shelf": [0.31, 0.17, 0.06, 0.02], "spotlight": [0.42, 0.09]}


def _experiment(segments=("aisle",), shares=(0.75, 0.25)):
    arms = [{"name": name, "share": s, "position_weights": w} for (name, w), s in zip(WEIGHTS.items(), shares)]
    doc = {"experiments": [{"id": "pantry", "control_arm": "shelf", "arms": arms}]}
    if segments is not None:
        doc["experiments"][0]["segments"] = segments if isinstance(segments, str) else list(segments)
    return parse_experiments(doc)["pantry"]


#: Two segments that differ in the scale and shape of values and in the number of bidders.
SEGMENTS = {
    "bulk": SimulatedSegment(st.beta(2.0, 5.0, scale=3.0), 4, 0.55),
    "fresh": SimulatedSegment(st.lognorm(0.5, scale=2.0), {4: 0.5, 6: 0.5}, 0.45),
}


@functools.lru_cache(maxsize=None)
def segment_truth(segment: str, arm: str, n: int) -> float:
    """Revenue per auction of ``arm`` in a stratum of ``n`` bidders of ``segment``, by quadrature."""
    return quad_revenue(SEGMENTS[segment].values, WEIGHTS[arm], n)


def quad_revenue(values, weights, n):
    """Myerson's revenue per auction by quad (see the module docstring)."""
    q = Polynomial([0, 1])
    y = sum((w * comb(n - 1, k - 1) * (1 - q) ** (k - 1) * q ** (n - k) for k, w in enumerate(weights[:n], 1)),
            Polynomial([0.0]))
    dy = y.deriv()
    val, _ = integrate.quad(lambda u: (1 - u) * values.ppf(u) * dy(u), 0, 1, limit=200, epsabs=1e-12)
    return n * val


def _auctions_by_stratum(bids):
    per = bids.groupby("auction_id").agg(aisle=("aisle", "first"), n=("bid", "size"))
    return per.groupby(["aisle", "n"]).size()


def _truths(bids, arm):
    """Per segment and pooled: the auction-weighted truth of the log's own stratum counts."""
    counts = _auctions_by_stratum(bids)
    ref = {(s, n): segment_truth(s, arm, int(n)) for s, n in counts.index}
    per_segment = {s: sum(counts[(s, n)] * ref[(s, n)] for n in counts[s].index) / counts[s].sum()
                   for s in counts.index.get_level_values(0).unique()}
    pooled = sum(counts[k] * ref[k] for k in counts.index) / counts.sum()
    return per_segment, pooled


def _log(n_auctions, rng, **options):
    bids = simulate_segmented_experiment(SEGMENTS, _experiment(), n_auctions=n_auctions, rng=rng, column="aisle",
                                         **options)
    return bids


# --- the spec and the reader's input ------------------------------------------------------------------


def test_spec_reads_segments_and_refuses_bad_lists():
    assert _experiment().segments == ("aisle",)
    assert _experiment(segments=None).segments == ()
    for bad, words in ((["aisle", "aisle"], "listed twice"), (["bid"], "data contract"), ("aisle", "must be a list"),
                       ([3], "column name")):
        with pytest.raises(InputError, match=words):
            _experiment(segments=bad)


def test_a_segment_that_changes_within_an_auction_is_refused_naming_the_auction():
    bids = _log(200, 1)
    row = int(np.flatnonzero(bids["auction_id"] == 17)[1])
    bids.loc[row, "aisle"] = "fresh" if bids.loc[row, "aisle"] == "bulk" else "bulk"
    with pytest.raises(InputError, match=rf"auction 17 has two values of segment column 'aisle'.*row {row}"):
        prepare_bids(bids, _experiment(), source="day.parquet")


def test_missing_or_fractional_segment_columns_are_refused():
    bids = _log(200, 2)
    with pytest.raises(InputError, match="segment column 'aisle' of experiment 'pantry' is missing"):
        prepare_bids(bids.drop(columns="aisle"), _experiment())
    bids["aisle"] = 0.5
    with pytest.raises(InputError, match="segment column 'aisle' row 0 is 0.5"):
        prepare_bids(bids, _experiment())


def test_null_boolean_and_integer_values_are_labelled_segments():
    bids = _log(3000, 3)
    auction_segment = {"bulk": None, "fresh": True}
    flag = pd.array([auction_segment[s] for s in bids["aisle"]], dtype="boolean")
    exp = _experiment(segments=("express", "lane"))
    prepared = prepare_bids(bids.assign(express=flag, lane=np.int16(7)), exp)
    assert prepared.segment_names == ("(null)|7", "true|7")
    out = estimate_arms(bids.assign(express=flag, lane=np.int16(7)), exp)
    assert set(out.table["segment"].dropna()) == {"(null)|7", "true|7"}


# --- numbers ------------------------------------------------------------------------------------------


def test_segment_rows_are_the_segment_estimated_alone():
    """A segment's rows are a function of its own auctions: the same as estimating its rows without segments."""
    bids = _log(6000, 4, bidder_pool=600)
    for cluster in ("auction", "bidder"):
        out = estimate_arms(bids, _experiment(), cluster=cluster)
        for name in SEGMENTS:
            alone = estimate_arms(bids[bids["aisle"] == name], _experiment(segments=None), cluster=cluster).table
            mine = out.table[out.table["segment"] == name].reset_index(drop=True)
            cols = ["estimate", "std_error", "ci_low", "ci_high"]
            np.testing.assert_allclose(mine[cols].to_numpy(float), alone[cols].to_numpy(float), rtol=1e-12)
            assert mine["status"].tolist() == alone["status"].tolist()
    assert out.segments == {n: int(bids[bids["aisle"] == n]["auction_id"].nunique()) for n in SEGMENTS}


def test_per_segment_and_pooled_revenue_match_quadrature_and_pooling_without_segments_does_not():
    """Every revenue row within 4 standard errors of its quadrature truth (8 rows: a false failure
    has probability about 8 x 6e-5); the estimator's own bias (order 1/N, N > 10^4 bids a stratum)
    is far below one SE here. Without the segment declaration the same log's pooled inversion
    reads the spread between segments as competition and misses by many SEs."""
    bids = _log(40_000, 5)
    out = estimate_arms(bids, _experiment(), cluster="auction")
    plain = estimate_arms(bids, _experiment(segments=None), cluster="auction")
    misses = []
    for arm in WEIGHTS:
        per_segment, pooled = _truths(bids, arm)
        seg = out.segment_rows("revenue_per_auction")
        for name, truth in per_segment.items():
            row = seg.loc[(name, arm)]
            assert abs(row["estimate"] - truth) < 4 * row["std_error"], (name, arm, row["estimate"], truth)
        row = out.rows("revenue_per_auction").loc[arm]
        assert abs(row["estimate"] - pooled) < 4 * row["std_error"], (arm, row["estimate"], pooled)
        wrong = plain.rows("revenue_per_auction").loc[arm]
        misses.append(abs(wrong["estimate"] - pooled) / wrong["std_error"])
    assert max(misses) > 10, misses


def test_a_thin_segment_keeps_few_bids_and_the_others_do_not():
    bids = _log(8000, 6)
    thin_ids = bids.loc[bids["aisle"] == "fresh", "auction_id"].unique()[:10]
    bids = bids[(bids["aisle"] == "bulk") | bids["auction_id"].isin(thin_ids)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        out = estimate_arms(bids, _experiment(), cluster="auction")
    revenue = out.table[out.table["metric"] == "revenue_per_auction"]
    assert revenue.loc[revenue["segment"] == "fresh", "status"].str.contains("few_bids").all()
    assert not revenue.loc[revenue["segment"] == "bulk", "status"].str.contains("few_bids").any()
    assert revenue.loc[revenue["segment"].isna(), "status"].str.contains("few_bids").all()


def test_pieces_of_segmented_and_plain_strata_do_not_combine():
    bids = _log(2000, 7)
    pieces = stratum_pieces(bids, _experiment(), day="2026-05-01")
    assert {p.key.segment for p in pieces} == {"bulk", "fresh"}
    plain = stratum_pieces(bids, _experiment(segments=None), day="2026-05-02")
    with pytest.raises(InputError, match="has no segment while others have one"):
        combine_pieces(pieces + plain, _experiment())


# --- intervals ----------------------------------------------------------------------------------------

#: Replicates of the coverage study: the relative standard deviation of a Monte Carlo spread
#: from R replicates is about 1 / sqrt(2 (R - 1)) = 0.05 at R = 200, so SE / spread within
#: [0.8, 1.25] is a 4-sigma band; coverage of nominal 95 % has binomial sd 1.5 %, so [0.9, 0.99].
REPLICATES = 200
AUCTIONS = 3000


@pytest.mark.slow
def test_pooled_and_per_segment_intervals_cover_for_auction_and_bidder_clustering():
    """Replicates are disjoint random blocks of one long simulated log (auctions are independent draws);
    each replicate's truth uses its own segment and stratum counts (the estimand is conditional
    on them). Bidders repeat (a pool of 300 ids) so bidder clustering has clusters to sum."""
    exp = _experiment()
    big = _log(REPLICATES * AUCTIONS, 8, bidder_pool=300)
    ids = big["auction_id"].to_numpy()  # consecutive within each segment: blocks of a random relabelling
    block = np.random.default_rng(80).permutation(int(ids.max()) + 1)[ids] // AUCTIONS
    errors = {c: {} for c in ("auction", "bidder")}
    ses = {c: {} for c in ("auction", "bidder")}
    targets = [("shelf", None), ("spotlight", None), ("shelf", "bulk"), ("spotlight", "fresh")]
    truths = {}
    for _, bids in big.groupby(block, sort=True):
        for arm in WEIGHTS:
            per_segment, pooled = _truths(bids, arm)
            truths[(arm, None)] = pooled
            truths.update({(arm, s): v for s, v in per_segment.items()})
        pieces = stratum_pieces(bids, exp, cluster="bidder")
        for cluster in errors:
            t = combine_pieces(pieces, exp, cluster=cluster).table
            t = t[t["metric"] == "revenue_per_auction"]
            for arm, seg in targets:
                row = t[(t["arm"] == arm) & (t["segment"].isna() if seg is None else t["segment"] == seg)].iloc[0]
                errors[cluster].setdefault((arm, seg), []).append(row["estimate"] - truths[(arm, seg)])
                ses[cluster].setdefault((arm, seg), []).append(row["std_error"])
    for cluster in errors:
        for key in targets:
            e, s = np.array(errors[cluster][key]), np.array(ses[cluster][key])
            ratio = float(np.mean(s) / np.std(e, ddof=1))
            coverage = float(np.mean(np.abs(e) <= 1.959964 * s))
            print(f"{cluster} {key}: SE/spread {ratio:.3f}, coverage {coverage:.3f}")
            assert 0.8 <= ratio <= 1.25, (cluster, key, ratio)
            assert 0.90 <= coverage <= 0.99, (cluster, key, coverage)


def test_segmented_pieces_round_trip_through_frames():
    from counterbid.estimators import pieces_from_frames, pieces_to_frames

    bids = _log(2000, 9, bidder_pool=200)
    pieces = stratum_pieces(bids, _experiment(), day="2026-05-03", cluster="bidder")
    frames = pieces_to_frames(pieces)
    assert all(set(frames[name]["segment"]) == {"bulk", "fresh"} for name in frames)
    back = pieces_from_frames(frames)
    assert len(back) == len(pieces) and all(a.equals(b) for a, b in zip(pieces, back))
    old = {name: f.drop(columns="segment") for name, f in pieces_to_frames(
        stratum_pieces(bids, _experiment(segments=None), day="2026-05-03")).items()}
    assert {p.key.segment for p in pieces_from_frames(old)} == {None}


def test_the_dependence_check_strata_by_segment_once_segments_are_declared():
    """Two segments of very different value scales sharing 4-bidder auctions: pooled, the bids of one
    auction move together and the check fails naming the remedy; declared, each (n, segment)
    stratum is a draw from one distribution and the check passes."""
    from counterbid.estimators.checks import auction_dependence_check

    bids = _log(20_000, 10)
    pooled = auction_dependence_check(bids, _experiment(segments=None))
    declared = auction_dependence_check(bids, _experiment())
    assert not pooled.passed and "segments" in pooled.details["remedy"]
    assert declared.passed, declared.details
    assert set(declared.details["by_bidders_and_segment"]) == {"4 bidders in bulk", "4 bidders in fresh",
                                                               "6 bidders in fresh"}


def test_the_planner_plans_on_the_pooled_rows_of_a_segmented_pilot():
    """A segmented pilot plans on its pooled rows: one finite plan row per (share, arm, metric). The
    planner reconstructs one value distribution from the pooled bids, which overstates the spread
    of segmented auctions; its calibration scale (the pilot's pooled SE over the simulated one)
    carries the difference: measured 0.49-0.86 here, below 1."""
    from counterbid.estimators.planner import plan_shares

    exp = _experiment(shares=(0.5, 0.5))
    pilot = _log(4000, 11)
    plan = plan_shares(exp, days=10, auctions_per_day=4000, bids=pilot, shares=(0.5,), calibration_auctions=4000)
    rows = plan.table
    assert not rows.duplicated(subset=[c for c in rows.columns if c in ("share", "arm", "metric")]).any()
    assert len(rows) > 0 and np.isfinite(rows.select_dtypes("number").to_numpy(float)).all()
    assert plan.basis == "pilot" and all(0 < v < 1 for v in plan.pilot_scale.values()), plan.pilot_scale


def test_a_what_if_layout_gets_per_segment_rows_equal_to_the_segment_estimated_alone():
    """The what-if layout's rows of a segment, effective share included, are the segment's own estimate."""
    bids = _log(6000, 10)
    doc = {"experiments": [{"id": "pantry", "control_arm": "shelf", "segments": ["aisle"], "arms": [
        {"name": n, "share": s, "position_weights": w} for (n, w), s in zip(WEIGHTS.items(), (0.75, 0.25))],
        "what_if": [{"name": "lean", "position_weights": [0.36, 0.12, 0.04]}]}]}
    exp = parse_experiments(doc)["pantry"]
    plain = parse_experiments({"experiments": [{**doc["experiments"][0], "segments": []}]})["pantry"]
    out = estimate_arms(bids, exp).table
    for name in SEGMENTS:
        mine = out[(out["segment"] == name) & out["what_if"]].reset_index(drop=True)
        alone = estimate_arms(bids[bids["aisle"] == name], plain).table
        alone = alone[alone["what_if"]].reset_index(drop=True)
        assert len(mine) == len(alone) > 0 and set(mine["arm"]) == {"lean"}
        cols = ["estimate", "std_error", "effective_share"]
        np.testing.assert_allclose(mine[cols].to_numpy(float), alone[cols].to_numpy(float), rtol=1e-12)
    pooled = out[out["segment"].isna() & out["what_if"]]
    assert (pooled["metric"] == "revenue_per_auction").any() and np.isfinite(pooled["estimate"]).all()


def test_running_bidder_totals_per_segment_give_the_rows_of_the_bidder_sums():
    """combine_pieces with a BidderGram per segment equals combining the pieces' own bidder sums (1e-12)."""
    from counterbid.estimators import bidder_totals, gram_of

    exp = _experiment()
    pieces = stratum_pieces(_log(4000, 11, bidder_pool=300), exp, day="2026-05-04", cluster="bidder")
    direct = combine_pieces(pieces, exp, cluster="bidder").table
    grams = {name: gram_of(bidder_totals([p for p in pieces if p.key.segment == name])) for name in SEGMENTS}
    light = [p.without_bidder_sums() for p in pieces]
    via = combine_pieces(light, exp, cluster="bidder", bidder_gram=gram_of(bidder_totals(pieces)),
                         segment_grams=grams).table
    cols = ["estimate", "std_error", "ci_low", "ci_high"]
    np.testing.assert_allclose(via[cols].to_numpy(float), direct[cols].to_numpy(float), rtol=1e-12)
    with pytest.raises(InputError, match="segment 'fresh' has neither bidder totals nor bidder sums"):
        combine_pieces(light, exp, cluster="bidder", bidder_gram=gram_of(bidder_totals(pieces)),
                       segment_grams={"bulk": grams["bulk"]})
