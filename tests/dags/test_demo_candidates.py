"""The demo's report ranks the demo spec's what-if layout as a candidate for the next experiment."""

from __future__ import annotations

import pytest

from counterbid.dags_example.demo import make_lake, rank_what_ifs


@pytest.mark.filterwarnings("ignore::counterbid.estimators.EstimatorWarning")
def test_demo_ranks_the_what_if_layout(tmp_path):
    make_lake(tmp_path, days=2, auctions_per_day=1500, bidders=5, seed=4, warmup_days=1)
    rankings = rank_what_ifs(tmp_path / "lake", days=14, lift_half_width=0.005)
    assert set(rankings) == {"featured-rows"}  # maker-spotlight lists no what-if layout
    ranking = rankings["featured-rows"]
    row = ranking.table.set_index("layout").loc["tall-header"]
    assert ranking.n_auctions == ranking.auctions_per_day == 1500  # the last day's bids and traffic
    assert row["origin"] == "spec" and row["status"] in {"ok", "any_share"} and row["revenue_per_auction"] > 0
