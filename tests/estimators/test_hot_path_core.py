"""The estimator's blocked hot path against direct, unblocked evaluations of the same formulas.

References: the influence function of an L-statistic, Serfling (1980), *Approximation Theorems of
Mathematical Statistics*, section 8.2; cubic-spline evaluation, ``scipy.interpolate.CubicSpline``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from scipy.interpolate import CubicSpline

from counterbid.estimators import (
    InputError, allocation_rule, estimate_arms, mixture_rule, parse_experiments, prepare_bids, revenue_weights,
    simulate_experiment, welfare_weights,
)
from counterbid.estimators import bids as bids_module
from counterbid.estimators._lstatistic import l_statistic
from counterbid.estimators.stratum import table_weights
from counterbid.estimators.order_weights import WeightTable

ARMS = [[0.31, 0.17, 0.06, 0.02], [0.29, 0.22, 0.15, 0.02], [0.29, 0.19, 0.10, 0.05, 0.02]]
SHARES = [0.8, 0.1, 0.1]


def _experiment():
    return parse_experiments({"experiments": [{"id": "e", "control_arm": "a0", "arms": [
        {"name": f"a{k}", "share": s, "position_weights": w} for k, (s, w) in enumerate(zip(SHARES, ARMS))]}]})["e"]


def _weights(n, big_n):
    rules = [allocation_rule(w, n) for w in ARMS]
    mix = mixture_rule(rules, SHARES)
    return [revenue_weights(r, mix, big_n) for r in rules] + [welfare_weights(r, mix, big_n) for r in rules]


@pytest.mark.parametrize("big_n", [16_384, 40_001, 2**20 + 3])
def test_weight_table_is_scipy_cubic_spline(big_n):
    ws = _weights(5, big_n)
    table = WeightTable(ws, big_n)
    metric, _ = table_weights(ws, [], 5, big_n)  # the kernel's increments, from the same table
    grid = np.arange(big_n + 1) / big_n
    for k, w in enumerate(ws):
        reference = CubicSpline(w.grid, w.values)  # what CumulativeWeights.at evaluates
        for lo, hi in [(0, 999), (big_n // 3, big_n // 3 + 70_000), (big_n - 5, big_n), (17, 17)]:
            hi = min(hi, big_n)
            np.testing.assert_allclose(table.block(k, lo, hi), reference(grid[lo:hi + 1]), rtol=0, atol=1e-15)


def test_weight_table_uses_exact_values_on_the_exact_grid():
    ws = _weights(4, 1000)
    table = WeightTable(ws, 1000)
    assert table.exact
    np.testing.assert_array_equal(table.block(2, 10, 20), ws[2].values[10:21])


def _direct_influence(sorted_bids, increments):
    """Serfling (1980) sec. 8.2, written out: IF_i = sum_j a_j j/N - sum_{j >= i} a_j."""
    big_n = sorted_bids.size
    a = 0.5 * big_n * (increments[:-1] + increments[1:]) * np.diff(sorted_bids)
    centre = float(a @ (np.arange(1, big_n) / big_n))
    tail = np.concatenate([np.cumsum(a[::-1])[::-1], [0.0]])
    return centre - tail


@pytest.mark.parametrize("big_n", [5_000, 20_000, 50_001])
def test_blocked_l_statistic_matches_the_direct_formula(big_n, monkeypatch):
    rng = np.random.default_rng(big_n)
    sorted_bids = np.sort(rng.lognormal(-0.3, 0.5, big_n))
    ws = _weights(5, big_n)
    table = WeightTable(ws, big_n)
    metric, _ = table_weights(ws, [], 5, big_n)  # the kernel's increments, from the same table
    grid = np.arange(big_n + 1) / big_n
    for k, w in enumerate(ws):
        if not np.isfinite(w.top):
            continue
        influence = np.empty(big_n)
        est = l_statistic(metric[k].increments, sorted_bids, influence, block=1_024)  # many blocks, ragged last one
        inc = 5 * np.diff(w.values if table.exact else CubicSpline(w.grid, w.values)(grid))
        assert est == pytest.approx(float(sorted_bids @ inc), rel=1e-12)
        np.testing.assert_allclose(influence, _direct_influence(sorted_bids, inc), rtol=1e-9, atol=1e-12)
        # the estimate-only pass (welfare) gives the same number
        assert l_statistic(metric[k].increments, sorted_bids, None, block=1_024) == pytest.approx(est, rel=1e-13)


def test_mixture_row_is_the_direct_l_statistic_of_the_mixture_rule():
    # The _mixture revenue row comes from linearity (shares x arms); compute it head-on instead.
    exp = _experiment()
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=5, n_auctions=30_000, rng=3)
    out = estimate_arms(bids, exp).table.set_index(["arm", "metric"])
    b = np.sort(bids["bid"].to_numpy())
    rules = [allocation_rule(w, 5) for w in ARMS]
    mix = mixture_rule(rules, SHARES)
    w = revenue_weights(mix, mix, b.size)
    inc = 5 * np.diff(CubicSpline(w.grid, w.values)(np.arange(b.size + 1) / b.size))
    direct = float(b @ inc) - 5 * w.bottom * b[0]
    assert out.loc[("_mixture", "revenue_per_auction"), "estimate"] == pytest.approx(direct, rel=1e-10)


def test_prepared_bids_and_categorical_columns_give_the_same_rows():
    exp = _experiment()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=5_000, rng=5)
    plain = estimate_arms(bids, exp)
    categorical = bids.assign(arm=bids["arm"].astype("category"), experiment_id=pd.Categorical(["e"] * len(bids)))
    pd.testing.assert_frame_equal(estimate_arms(categorical, exp).table, plain.table)
    pd.testing.assert_frame_equal(estimate_arms(prepare_bids(bids, exp), exp).table, plain.table)
    # categories in another order than the spec's, and one category no row uses
    shuffled = bids.assign(arm=pd.Categorical(bids["arm"], categories=["zz_unused", "a2", "a0", "a1"]))
    pd.testing.assert_frame_equal(estimate_arms(shuffled, exp).table, plain.table)


@pytest.mark.parametrize("neighbour_max_run", [0, 16], ids=["sorted-blocks", "neighbours"])
def test_duplicate_bidder_is_found_across_check_blocks(monkeypatch, neighbour_max_run):
    monkeypatch.setattr(bids_module, "_PAIR_BLOCK", 1_000)
    monkeypatch.setattr(bids_module, "_NEIGHBOUR_CHECK_MAX_RUN", neighbour_max_run)
    exp = _experiment()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=3, n_auctions=2_000, rng=7)
    estimate_arms(bids, exp)  # clean: passes block by block
    dup = pd.concat([bids.iloc[:4_500], bids.iloc[[4_499]], bids.iloc[4_500:]], ignore_index=True)
    with pytest.raises(InputError, match=r"bids twice in auction .*rows 4499 and 4500"):
        estimate_arms(dup, exp)


def _repeats_by_sort(auction: np.ndarray, bidder: np.ndarray) -> bool:
    """The plain check: an (auction, bidder) pair that occurs twice, by one sort of every packed pair."""
    pair = np.sort(auction.astype(np.int64) * (int(bidder.max()) + 1) + bidder)
    return bool((pair[1:] == pair[:-1]).any())


@pytest.mark.parametrize("seed", range(6))
def test_neighbour_duplicate_check_is_the_sort_of_every_pair(seed):
    """Runs of 1..12 bids; bidders from pools of many sizes, so that some logs repeat a bidder in a run
    and some do not."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, 13, size=400)
    auction = np.repeat(np.arange(sizes.size), sizes)
    found = []
    for trial in range(40):
        bidder = rng.integers(0, int(10 ** rng.uniform(2, 6)), size=auction.size)  # pools of 100 to 1M bidders
        longest = int(sizes.max())
        expected = _repeats_by_sort(auction, bidder)
        assert bids_module._repeats_within_runs(auction, bidder, longest) == expected
        found.append(expected)
    assert any(found) and not all(found)  # both outcomes were exercised


def test_neighbour_check_names_the_same_rows_as_the_sorted_check(monkeypatch):
    exp = _experiment()
    bids = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=3_000, rng=11)
    # the bidder of row 1 again at row 3: same auction, two rows apart
    dup = bids.copy()
    dup.loc[3, "bidder_id"] = dup.loc[1, "bidder_id"]
    messages = []
    for max_run in (0, 16):
        monkeypatch.setattr(bids_module, "_NEIGHBOUR_CHECK_MAX_RUN", max_run)
        with pytest.raises(InputError, match=r"bids twice in auction .*rows 1 and 3") as caught:
            prepare_bids(dup, exp)
        messages.append(str(caught.value))
    assert messages[0] == messages[1]
