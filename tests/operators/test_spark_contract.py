"""The contract suite on Spark (`operators/spark_contract.py`) against the DuckDB route, on one lake partition.

Each case writes a real Parquet lake day, validates it through DuckDB (:func:`run_contract`) and
through Spark local mode (:func:`run_contract_on_spark`), and asks for the same checks failing with
the same counts: the two routes share one suite, so a rule that fires on one fires on the other.
"""

from __future__ import annotations

import subprocess
import sys

import duckdb
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

pytest.importorskip("pyspark")  # before any test imports Great Expectations: its Spark support is probed once

from counterbid.estimators import parse_experiments, simulate_experiment  # noqa: E402
from counterbid.operators.check_runner import _auction_counts  # noqa: E402
from counterbid.operators.contract import CONTRACT_CHECKS, run_contract  # noqa: E402
from counterbid.operators.spark_contract import (duckdb_type_name, lake_day_on_spark, run_contract_on_spark,  # noqa: E402
                                                  spark_auction_counts)

pytestmark = pytest.mark.spark

DAY = "2026-05-12"
SPEC = {
    "experiments": [
        {
            "id": "loom-ribbon",
            "control_arm": "wide-band",
            "floor": 0.02,
            "arms": [
                {"name": "wide-band", "share": 0.55, "position_weights": [0.40, 0.07, 0.02]},
                {"name": "twin-band", "share": 0.45, "position_weights": [0.24, 0.21, 0.09]},
            ],
        }
    ]
}
EXP = parse_experiments(SPEC)["loom-ribbon"]


@pytest.fixture(scope="module")
def clean() -> pd.DataFrame:
    bids = simulate_experiment(st.lognorm(0.6, scale=0.7), EXP, n_bidders=3, n_auctions=240, rng=11, ds=DAY)
    bids["bid"] = bids["bid"] + 0.03  # above the floor
    return bids.drop(columns=["value", "clicks", "ds"], errors="ignore")


def _lake(tmp_path, frame: pd.DataFrame) -> str:
    folder = tmp_path / "lake" / f"ds={DAY}"
    folder.mkdir(parents=True)
    frame.to_parquet(folder / "part-0.parquet", index=False)
    return str(tmp_path / "lake")


def _both(spark, tmp_path, frame: pd.DataFrame, **kw):
    """(DuckDB route's results, Spark route's results), each as {check: CheckResult}."""
    root = _lake(tmp_path, frame)
    con = duckdb.connect()
    con.execute(f"create view day_bids as select * from read_parquet('{root}/ds={DAY}/*.parquet')")
    local = {r.check: r for r in run_contract(con, "day_bids", EXP, **kw)}
    day = lake_day_on_spark(spark, root, experiment=EXP, ds=pd.Timestamp(DAY).date())
    on_spark = {r.check: r for r in run_contract_on_spark(spark, day, EXP, **kw)}
    return local, on_spark


def _failed(results):
    return sorted(name for name, r in results.items() if not r.passed)


def _same(local, on_spark):
    assert list(on_spark) == list(local)
    for name, r in local.items():
        s = on_spark[name]
        assert (s.passed, s.severity, s.observed, s.threshold) == (r.passed, r.severity, r.observed, r.threshold), name
        assert s.details.get("checked") == r.details.get("checked"), name


def _first_auction(frame):
    return frame["auction_id"] == frame["auction_id"].iloc[0]


def test_a_clean_day_passes_on_spark_as_on_duckdb(spark, tmp_path, clean):
    local, on_spark = _both(spark, tmp_path, clean)
    assert list(on_spark) == list(CONTRACT_CHECKS)
    assert _failed(on_spark) == []
    assert on_spark["contract_rank_by_bid"].details["checked"] == clean["auction_id"].nunique() == 240
    _same(local, on_spark)


def _other_arm(f):
    first = f.index[_first_auction(f)]
    other = "twin-band" if f.loc[first[0], "arm"] == "wide-band" else "wide-band"
    return f.assign(arm=f["arm"].where(f.index != first[-1], other))


def _outbid_the_top(f):
    first = f.index[_first_auction(f)]  # rows of the first auction, top position first
    return f.assign(bid=f["bid"].where(f.index != first[1], f.loc[first[0], "bid"] + 0.5))


@pytest.mark.parametrize(
    ("mutate", "expected"),
    [
        (lambda f: f.assign(bid=f["bid"].mask(_first_auction(f))), "contract_bids_valid"),  # null bids
        (lambda f: f.assign(bid=np.where(_first_auction(f), -0.4, f["bid"])), "contract_bids_valid"),
        (lambda f: f.assign(bid=np.where(_first_auction(f), 0.01, f["bid"])), "contract_bids_valid"),  # shown, below floor
        (lambda f: f.assign(bidder_id=f["bidder_id"].astype("Int64").mask(_first_auction(f))), "contract_keys_not_null"),
        (lambda f: f.assign(arm=np.where(_first_auction(f), "phantom-band", f["arm"])), "contract_arm_in_spec"),
        (lambda f: f.assign(bidder_id=f["bidder_id"].where(f.index != f.index[1], f["bidder_id"].iloc[0])),
         "contract_bidder_unique"),
        (_other_arm, "contract_one_arm"),
        (_outbid_the_top, "contract_rank_by_bid"),
        (lambda f: f.assign(quality=np.where(_first_auction(f), 0.0, 1.25)), "contract_bids_valid"),
    ],
    ids=["null-bid", "negative-bid", "shown-below-floor", "null-bidder", "arm-not-in-spec", "bidder-twice",
         "two-arms", "outbid-at-a-worse-position", "zero-quality"],
)
def test_a_broken_contract_fails_with_the_duckdb_check_names(spark, tmp_path, clean, mutate, expected):
    local, on_spark = _both(spark, tmp_path, mutate(clean.copy()))
    assert expected in _failed(on_spark)
    assert _failed(on_spark) == _failed(local)
    _same(local, on_spark)
    r = on_spark[expected]
    assert r.observed >= 1 and r.threshold == 0 and r.details["unit"] == "auctions"
    examples = [x for failure in r.details["failures"] for x in failure["examples"]]
    assert examples and examples[0]["auction_id"] == int(clean["auction_id"].iloc[0])


def test_schema_failures_stop_before_the_aggregates(spark, tmp_path, clean):
    local, on_spark = _both(spark, tmp_path, clean.drop(columns=["position"]))
    assert _failed(on_spark) == _failed(local) == ["contract_columns", "contract_types"]
    assert "contract_rank_by_bid" not in on_spark
    _same(local, on_spark)
    local, on_spark = _both(spark, tmp_path / "typed", clean.assign(bid=clean["bid"].map(lambda b: f"{b:.4f}")))
    assert _failed(on_spark) == _failed(local) == ["contract_types"]
    assert on_spark["contract_types"].details["failures"][0]["column"] == "bid"


def test_thresholds_from_the_config_apply_on_spark(spark, tmp_path, clean):
    local, on_spark = _both(spark, tmp_path, clean, config={"contract": {"max_bidders": 2}})
    assert _failed(on_spark) == _failed(local) == ["contract_bidders_per_auction"]
    _same(local, on_spark)


def test_auction_counts_on_spark_equal_the_duckdb_counts(spark, tmp_path, clean):
    # uneven auction sizes: drop the last bid of every third auction
    ids = clean["auction_id"].drop_duplicates().iloc[::3]
    last = clean[clean["auction_id"].isin(ids)].groupby("auction_id").tail(1).index
    frame = clean.drop(index=last)
    root = _lake(tmp_path, frame)
    con = duckdb.connect()
    con.execute(f"create view day_bids as select * from read_parquet('{root}/ds={DAY}/*.parquet')")
    expected = _auction_counts(con, ["day_bids"])
    day = lake_day_on_spark(spark, root, experiment=EXP, ds=pd.Timestamp(DAY).date())
    counts = spark_auction_counts(spark, day)
    assert set(counts["n_bidders"]) == {2, 3}
    pd.testing.assert_frame_equal(counts, expected.astype(counts.dtypes.to_dict()), check_dtype=True)


def test_great_expectations_without_spark_support_is_one_clear_line(java_home):
    # GE probes for pyspark once, when it is imported: imported without it, its Spark source cannot work
    code = ("import sys; sys.modules['pyspark'] = None\n"
            "import great_expectations\n"
            "del sys.modules['pyspark']\n"
            "from counterbid.estimators.errors import InputError\n"
            "from counterbid.operators.spark_contract import _gx_with_spark\n"
            "try:\n    _gx_with_spark()\nexcept InputError as exc:\n    print(exc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out.startswith("the contract on Spark needs Great Expectations imported after pyspark")


@pytest.mark.parametrize(("spark_type", "duckdb_type"), [
    ("string", "VARCHAR"), ("double", "DOUBLE"), ("bigint", "BIGINT"), ("int", "INTEGER"),
    ("decimal(18,0)", "DECIMAL(18,0)"), ("timestamp_ntz", "TIMESTAMP"), ("array<int>", "ARRAY<INT>"),
])
def test_spark_types_read_as_duckdb_type_names(spark_type, duckdb_type):
    assert duckdb_type_name(spark_type) == duckdb_type
