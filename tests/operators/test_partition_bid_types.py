"""Every numeric type of ``bid`` through the pipeline's steps (stage, checks incl. the contract suite,
estimate) gives the float64 partition's numbers; 128-bit ids pass within int64 and fail the gate beyond.

Real Parquet lake files and DuckDB staging. The float64 lake holds the same values as the typed one,
so estimates agree to 1e-12 relative (decimal-to-double casts may be one ulp off, ~1e-16); the
float32 lake is compared with the float64 lake holding the float32 values widened (exact).
"""

from __future__ import annotations

import datetime as dt
import decimal

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.operators import partition
from counterbid.operators.staging import StagedPartition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook

DAY = dt.date(2026, 3, 2)
SPEC = {"experiments": [{"id": "tiles", "control_arm": "plain", "start": "2026-03-02", "arms": [
    {"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}
BID_TYPES = [("float32", pa.float32(), False), ("int32", pa.int32(), True), ("int64", pa.int64(), True),
             ("decimal(9,2)", pa.decimal128(9, 2), False), ("decimal(38,10)", pa.decimal128(38, 10), False)]


@pytest.fixture(scope="module")
def day_table():
    exp = parse_experiments(SPEC)["tiles"]
    frame = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=800, rng=3, ds=DAY)
    table = pa.Table.from_pandas(frame.drop(columns=["value", "clicks"]), preserve_index=False)
    table = table.set_column(table.schema.get_field_index("ds"), "ds", pa.array([DAY] * table.num_rows, pa.date32()))
    return exp, table, np.round(frame["bid"].to_numpy() * 100).astype(np.int64)


def _with(table, name, array):
    return table.set_column(table.schema.get_field_index(name), name, array)


def _typed(cents, arrow_type, whole):
    if pa.types.is_decimal(arrow_type):
        values = [decimal.Decimal(int(c)) if whole else decimal.Decimal(int(c)).scaleb(-2) for c in cents]
        return pa.array(values, arrow_type), np.array([float(v) for v in values])
    if pa.types.is_integer(arrow_type):
        return pa.array(cents, arrow_type), cents.astype(float)
    f32 = (cents / 100.0).astype(np.float32)
    return pa.array(f32), f32.astype(np.float64)


def _run(tmp_path, name, exp, table):
    """Stage, check and estimate one day; the checks and the day's estimates."""
    lake = tmp_path / name / "bids" / f"ds={DAY}"
    lake.mkdir(parents=True)
    pq.write_table(table.drop(["ds"]), lake / "tiles.parquet")
    hook = ResultsHook(database=tmp_path / name / "results.duckdb", lock_timeout=5)
    stage = tmp_path / name / "stage"
    partition.stage_partition(LakeHook(), lake_root=lake.parent, experiment=exp, ds=DAY, staging_root=stage)
    staged = StagedPartition.at(stage, "tiles", DAY)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAY)
    if partition.record_checks(staged, results) == "error":
        return results, None
    partition.estimate_partition(hook, experiment=exp, ds=DAY, staging_root=stage, run_id="types")
    return results, pq.read_table(staged.estimates_day).to_pandas()


@pytest.mark.parametrize(("label", "arrow_type", "whole"), BID_TYPES, ids=[t[0] for t in BID_TYPES])
def test_pipeline_steps_give_the_float64_numbers(tmp_path, day_table, label, arrow_type, whole):
    exp, table, cents = day_table
    bid, held = _typed(cents, arrow_type, whole)
    checks, got = _run(tmp_path, "typed", exp, _with(table, "bid", bid))
    ref_checks, want = _run(tmp_path, "reference", exp, _with(table, "bid", pa.array(held)))
    failed = [(r.check, r.details) for r in checks if not r.passed and r.severity == "error"]
    assert not failed
    assert [(r.check, r.passed) for r in checks] == [(r.check, r.passed) for r in ref_checks]
    assert any(r.check == "contract_types" and r.passed for r in checks)  # the contract suite ran and agreed
    assert got is not None and len(got) == len(want)
    for field in ("estimate", "std_error", "ci_low", "ci_high"):
        np.testing.assert_allclose(got[field].to_numpy(float), want[field].to_numpy(float), rtol=1e-12, err_msg=field)


def test_128_bit_ids_pass_within_int64_and_fail_the_gate_beyond(tmp_path, day_table):
    exp, table, _ = day_table
    wide = pa.decimal128(38, 0)
    ids = table.column("auction_id").to_numpy() + 2**62
    checks, got = _run(tmp_path, "wide", exp, _with(table, "auction_id", pa.array(ids).cast(wide)))
    _, want = _run(tmp_path, "narrow", exp, _with(table, "auction_id", pa.array(ids)))
    assert [r for r in checks if r.check == "schema_range_auction_id"][0].passed
    np.testing.assert_array_equal(got["estimate"].to_numpy(), want["estimate"].to_numpy())
    beyond = [decimal.Decimal(int(v)) for v in ids]
    beyond[5] = decimal.Decimal(2**64 + 5)
    checks, got = _run(tmp_path, "beyond", exp, _with(table, "auction_id", pa.array(beyond, wide)))
    (gate,) = [r for r in checks if r.check == "schema_range_auction_id"]
    assert got is None and not gate.passed and gate.observed == 1.0 and gate.details["example"] == str(2**64 + 5)


@pytest.mark.parametrize("arrow_type", [pa.float64(), pa.decimal128(12, 2)], ids=["float64", "decimal(12,2)"])
def test_position_of_a_non_integer_type_fails_the_gate(tmp_path, day_table, arrow_type):
    exp, table, _ = day_table
    checks, got = _run(tmp_path, "pos", exp, _with(table, "position", table.column("position").cast(arrow_type)))
    (gate,) = [r for r in checks if r.check == "schema_column_position"]
    assert got is None and not gate.passed and gate.details["kind"] == "integer"
