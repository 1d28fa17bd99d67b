"""Scale covariates on the Spark engine: the covariate columns travel to the workers, numbers equal the local engine's.

Both engines run the same pure stratum estimator on the same shards in the same row order, so the
frames agree to rounding (1e-9 relative, as in tests/readers/test_spark_shards.py).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import scipy.stats as st

from counterbid.estimators import EstimatorWarning, parse_experiments, simulate_experiment
from counterbid.estimators.errors import InputError
from counterbid.readers.engines import SparkEngine, estimate_bid_log

pytestmark = pytest.mark.spark

ARMS = [{"name": "low", "share": 0.6, "position_weights": [0.35, 0.15, 0.05]},
        {"name": "tall", "share": 0.4, "position_weights": [0.30, 0.20, 0.10]}]
EXPERIMENTS = parse_experiments({"experiments": [
    {"id": "kiosks", "control_arm": "low", "arms": ARMS, "scale_covariates": ["footfall", "shelf_age"]},
    {"id": "kiosks-plain", "control_arm": "low", "arms": ARMS},
]})


def _estimate(path, experiment, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        return estimate_bid_log(str(path), EXPERIMENTS[experiment], **kw)


def test_scale_covariates_on_both_engines(spark, tmp_path):
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), EXPERIMENTS["kiosks-plain"], n_bidders={3: 0.6, 4: 0.4},
                               n_auctions=1500, rng=17, bidder_pool=800,
                               scale_covariates={"footfall": (0.8, st.norm(0, 0.5)),
                                                 "shelf_age": (-0.2, st.uniform(0, 2))})
    path = tmp_path / "kiosks.parquet"
    bids.assign(experiment_id="kiosks").to_parquet(path, index=False)
    local = _estimate(path, "kiosks", max_bids_per_shard=1500, cluster="bidder")
    on_spark = _estimate(path, "kiosks", engine=SparkEngine(spark), max_bids_per_shard=1500, cluster="bidder")
    assert local.shards == on_spark.shards == 4
    a, b = local.table, on_spark.table
    assert b["arm"].tolist() == a["arm"].tolist() and b["metric"].tolist() == a["metric"].tolist()
    for name in ("estimate", "std_error", "ci_low", "ci_high"):
        x, y = a[name].to_numpy(float), b[name].to_numpy(float)
        np.testing.assert_array_equal(np.isnan(x), np.isnan(y))
        np.testing.assert_allclose(y[~np.isnan(y)], x[~np.isnan(x)], rtol=1e-9, atol=0, err_msg=name)
    # the covariates were used (not dropped on the way): the homogenised estimate differs from the pooled one
    plain_path = tmp_path / "kiosks-plain.parquet"
    bids.assign(experiment_id="kiosks-plain").to_parquet(plain_path, index=False)
    plain = _estimate(plain_path, "kiosks-plain", max_bids_per_shard=1500, cluster="bidder").table
    rev = a["metric"] == "revenue_lift_vs_control"
    assert abs(a.loc[rev, "estimate"].iloc[0] - plain.loc[rev, "estimate"].iloc[0]) > 0.01


def test_a_covariate_varying_within_an_auction_gives_the_local_line_on_spark(spark, tmp_path):
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), EXPERIMENTS["kiosks-plain"], n_bidders=3,
                               n_auctions=200, rng=18, scale_covariates={"footfall": (0.8, st.norm(0, 0.5))})
    bids["shelf_age"] = 1.0
    bids.loc[4, "shelf_age"] = 2.0  # row 4: the second auction's second bid
    path = tmp_path / "uneven.parquet"
    bids.assign(experiment_id="kiosks").to_parquet(path, index=False)
    messages = []
    for engine in (None, SparkEngine(spark)):
        with pytest.raises(InputError) as info:
            _estimate(path, "kiosks", engine=engine)
        messages.append(str(info.value))
    assert messages[0] == messages[1] and "two values of scale covariate column 'shelf_age'" in messages[0], messages
