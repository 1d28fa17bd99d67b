"""Measured position weights: weighted isotonic regression of click rates (pure function)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import LinearConstraint, isotonic_regression, minimize

from counterbid.estimators import InputError, measured_position_weights, parse_experiments

EXP = parse_experiments({"experiments": [{"id": "m", "control_arm": "a", "arms": [
    {"name": "a", "share": 0.4, "position_weights": "measured"},
    {"name": "c", "share": 0.3, "position_weights": "measured"},
    {"name": "b", "share": 0.3, "position_weights": [0.3]}]}]})["m"]


def _clicks(arm, positions, impressions, clicks):
    return pd.DataFrame({"arm": arm, "position": positions, "impressions": impressions, "clicks": clicks})


def test_hand_checked_pooling_and_gap():
    clicks = pd.concat([
        # rates 0.40, 0.10, 0.15 (position 5 follows a gap): 0.10 < 0.15 breaks the order, so
        # positions 2 and 3 pool to (10 + 45) / (100 + 300) = 0.1375 (worked by hand)
        _clicks("a", [1, 2, 3, 5], [100, 100, 300, 50], [40, 10, 45, 1]),
        # rates 0.1, 0.2, 0.3 rise throughout: all pool to 60 / 300 = 0.2; the unshown 4th is dropped
        _clicks("c", [3, 1, 2, 4], [100, 100, 100, 0], [30, 10, 20, 0]),
        _clicks("b", [1], [10], [3]),  # an arm with spec weights: ignored
    ], ignore_index=True)
    out = measured_position_weights(clicks, EXP)
    assert list(out.columns) == ["arm", "position", "weight", "impressions", "clicks"]
    a, c = out[out["arm"] == "a"], out[out["arm"] == "c"]
    assert a["position"].tolist() == [1, 2, 3] and a["impressions"].tolist() == [100, 100, 300]
    assert a["weight"].tolist() == pytest.approx([0.4, 0.1375, 0.1375], rel=1e-15)
    assert c["position"].tolist() == [1, 2, 3] and c["clicks"].tolist() == [10, 20, 30]
    assert c["weight"].tolist() == pytest.approx([0.2, 0.2, 0.2], rel=1e-15)
    assert set(out["arm"]) == {"a", "c"}


def test_equals_scipy_isotonic_regression_and_the_constrained_least_squares_fit():
    rng = np.random.default_rng(4)
    impressions = rng.integers(50, 5000, size=6)
    clicks = rng.binomial(impressions, [0.3, 0.12, 0.14, 0.05, 0.06, 0.01])
    frame = pd.concat([_clicks("a", np.arange(1, 7), impressions, clicks), _clicks("c", [1], [10], [1])])
    got = measured_position_weights(frame, EXP).query("arm == 'a'")["weight"].to_numpy()
    rate = clicks / impressions
    want = isotonic_regression(rate, weights=impressions.astype(float), increasing=False).x
    np.testing.assert_array_equal(got, want)
    # independent check: minimise sum n_k (r_k - w_k)^2 subject to w_k >= w_{k+1} (SLSQP)
    diff = np.eye(6)[:-1] - np.eye(6, k=1)[:-1]
    scale = impressions / impressions.sum()
    res = minimize(lambda w: np.sum(scale * (rate - w) ** 2), x0=np.full(6, rate.mean()), method="SLSQP",
                   jac=lambda w: -2 * scale * (rate - w), constraints=[LinearConstraint(diff, 0, np.inf)],
                   options={"ftol": 1e-14, "maxiter": 500})
    assert res.success
    np.testing.assert_allclose(got, res.x, atol=1e-6)  # SLSQP's own convergence tolerance, not ours
    assert np.all(np.diff(got) <= 0)


def test_no_measured_arms_gives_an_empty_frame():
    plain = parse_experiments({"experiments": [{"id": "p", "arms": [
        {"name": "x", "share": 1.0, "position_weights": [0.5]}]}]})["p"]
    out = measured_position_weights(_clicks("x", [1], [10], [2]), plain)
    assert out.empty and list(out.columns) == ["arm", "position", "weight", "impressions", "clicks"]


@pytest.mark.parametrize("frame, message", [
    (_clicks("a", [1], [10], [2]).drop(columns=["clicks"]), "column 'clicks' is missing"),
    (_clicks("a", [1, 2], [10, None], [2, 1]), "column 'impressions' row 1 is null"),
    (_clicks("a", [1, 2], [10, 10], [2, 1.5]), "column 'clicks' row 1 must be a whole number"),
    (_clicks("a", [1, 2], [10, 10], [2, -1]), "column 'clicks' row 1 must be a whole number >= 0"),
    (_clicks("a", [0, 1], [10, 10], [2, 1]), "column 'position' row 0 is below 1"),
    (_clicks("a", [1, 2], [10, 10], [2, 11]), "row 1 has more clicks than impressions"),
    (_clicks("a", [1, 1], [10, 10], [2, 1]), "arm 'a' position 1 appears twice"),
    (_clicks("a", [2, 3], [10, 10], [2, 1]), "no clicks for experiment 'm' arm 'a'"),  # position 1 never shown
    (_clicks("a", [1, 2], [10, 10], [0, 0]), "no clicks for experiment 'm' arm 'a'"),
])
def test_bad_click_counts_name_the_column_row_or_arm(frame, message):
    frame = pd.concat([frame, _clicks("c", [1], [10], [1])], ignore_index=True) if "clicks" in frame else frame
    with pytest.raises(InputError, match=message) as info:
        measured_position_weights(frame, EXP, source="clicks.parquet")
    assert str(info.value).startswith("clicks.parquet: ")
