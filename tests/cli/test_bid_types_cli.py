"""Every numeric Parquet type of ``bid`` gives the float64 file's numbers; ``position`` must be an integer type.

Through ``counterbid estimate`` and ``counterbid check`` on real Parquet files. "The same numbers":
the float64 file holds the same values as the typed file (cents as decimals, or whole numbers for
the integer types), so every estimate must agree to 1e-12 relative (Arrow's decimal-to-double cast
may be one ulp off the nearest double, ~1e-16). A float32 file cannot hold the cents exactly: its
numbers are those of the float64 file holding the float32 values widened (widening is exact), to
1e-12, and within 1e-6 of the exact cents' numbers (float32 keeps 24 bits, ~6e-8 relative per bid).
"""

from __future__ import annotations

import decimal
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main
from counterbid.estimators import parse_experiments, simulate_experiment

SPEC = {"experiments": [{"id": "tiles", "control_arm": "plain", "arms": [
    {"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
    {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}

#: (label, Arrow type, whole numbers?) -- whole-number types hold bids in cents, the others in units.
BID_TYPES = [
    ("float32", pa.float32(), False),
    ("int32", pa.int32(), True),
    ("int64", pa.int64(), True),
    ("decimal(9,2)", pa.decimal128(9, 2), False),
    ("decimal(18,6)", pa.decimal128(18, 6), False),
    ("decimal(38,10)", pa.decimal128(38, 10), False),
    ("decimal(12,0)", pa.decimal128(12, 0), True),
]


@pytest.fixture(scope="module")
def base(tmp_path_factory):
    folder = tmp_path_factory.mktemp("bid_types")
    (folder / "spec.yaml").write_text(yaml.safe_dump(SPEC))
    exp = parse_experiments(SPEC)["tiles"]
    frame = simulate_experiment(st.uniform(0, 1), exp, n_bidders=4, n_auctions=600, rng=5, ds="2026-03-02")
    table = pa.Table.from_pandas(frame.drop(columns=["value", "clicks"]), preserve_index=False)
    cents = np.round(frame["bid"].to_numpy() * 100).astype(np.int64)
    return folder, table, cents


def _with_bid(table: pa.Table, bid: pa.Array) -> pa.Table:
    return table.set_column(table.schema.get_field_index("bid"), "bid", bid)


def _typed_bid(cents: np.ndarray, arrow_type: pa.DataType, whole: bool) -> tuple[pa.Array, np.ndarray]:
    """The bids in ``arrow_type`` and, as float64, the values that type holds."""
    if pa.types.is_decimal(arrow_type):
        scale = arrow_type.scale
        values = [decimal.Decimal(int(c)) if whole else decimal.Decimal(int(c)).scaleb(-2) for c in cents]
        return pa.array([v.quantize(decimal.Decimal(1).scaleb(-scale)) for v in values], arrow_type), \
            np.array([float(v) for v in values])
    if pa.types.is_integer(arrow_type):
        return pa.array(cents, arrow_type), cents.astype(float)
    exact = cents / 100.0
    return pa.array(exact.astype(np.float32), pa.float32()), exact.astype(np.float32).astype(np.float64)


def _estimate(path, spec, capsys) -> list[dict]:
    code = main(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json"])
    out, err = capsys.readouterr()
    assert code == 0, err
    return json.loads(out)["rows"]


def _same_rows(got: list[dict], want: list[dict], rtol: float) -> None:
    assert [(r["arm"], r["metric"]) for r in got] == [(r["arm"], r["metric"]) for r in want]
    for g, w in zip(got, want):
        assert (g["n_auctions"], g["n_bids"]) == (w["n_auctions"], w["n_bids"])
        for field in ("estimate", "std_error", "ci_low", "ci_high"):
            if w[field] is None:
                assert g[field] is None
            else:
                np.testing.assert_allclose(g[field], w[field], rtol=rtol, atol=1e-300, err_msg=f"{g['arm']} {g['metric']} {field}")


@pytest.mark.parametrize(("label", "arrow_type", "whole"), BID_TYPES, ids=[t[0] for t in BID_TYPES])
def test_estimate_gives_the_float64_numbers(base, capsys, label, arrow_type, whole):
    folder, table, cents = base
    bid, held = _typed_bid(cents, arrow_type, whole)
    typed, reference = folder / f"bid_{label}.parquet", folder / f"bid_{label}_as_float64.parquet"
    pq.write_table(_with_bid(table, bid), typed)
    pq.write_table(_with_bid(table, pa.array(held, pa.float64())), reference)
    assert pq.read_schema(typed).field("bid").type == arrow_type
    _same_rows(_estimate(typed, folder / "spec.yaml", capsys), _estimate(reference, folder / "spec.yaml", capsys), 1e-12)
    if label == "float32":  # and close to the exact cents: float32 rounds each bid by <= 2**-24 relative
        exact = folder / "bid_exact_cents.parquet"
        pq.write_table(_with_bid(table, pa.array(cents / 100.0)), exact)
        _same_rows(_estimate(typed, folder / "spec.yaml", capsys), _estimate(exact, folder / "spec.yaml", capsys), 1e-6)


@pytest.mark.parametrize(("label", "arrow_type", "whole"), [t for t in BID_TYPES if t[0] in ("int32", "decimal(9,2)", "decimal(38,10)")],
                         ids=["int32", "decimal(9,2)", "decimal(38,10)"])
def test_check_gives_the_float64_outcomes(base, capsys, label, arrow_type, whole):
    folder, table, cents = base
    bid, held = _typed_bid(cents, arrow_type, whole)
    typed, reference = folder / f"check_{label}.parquet", folder / f"check_{label}_as_float64.parquet"
    pq.write_table(_with_bid(table, bid), typed)
    pq.write_table(_with_bid(table, pa.array(held, pa.float64())), reference)
    outcomes = []
    for path in (typed, reference):
        code = main(["check", "--bids", str(path), "--experiment", str(folder / "spec.yaml"), "--format", "json"])
        out, err = capsys.readouterr()
        assert code == 0, err
        outcomes.append(json.loads(out)["rows"])
    got, want = outcomes
    assert [(r["check"], r["passed"]) for r in got] == [(r["check"], r["passed"]) for r in want]
    assert not [r for r in got if r["check"].startswith("contract_") and not r["passed"]]
    for g, w in zip(got, want):
        if w["observed"] is not None:
            np.testing.assert_allclose(g["observed"], w["observed"], rtol=1e-12, err_msg=g["check"])


def _refused(argv, capsys, pattern):
    code = main(argv)
    out, err = capsys.readouterr()
    lines = err.strip().splitlines()
    assert code == 2 and out == ""
    assert len(lines) == 1 and lines[0].startswith("counterbid: error:"), err
    assert pattern in lines[0], lines[0]


@pytest.mark.parametrize("arrow_type", [pa.float64(), pa.float32(), pa.decimal128(12, 2), pa.string()],
                         ids=["float64", "float32", "decimal(12,2)", "string"])
def test_position_of_a_non_integer_type_is_one_clear_error(base, capsys, arrow_type):
    folder, table, _ = base
    position = table.column("position").cast(arrow_type)
    path = folder / f"position_{arrow_type}.parquet"
    pq.write_table(table.set_column(table.schema.get_field_index("position"), "position", position), path)
    for command in ("estimate", "check"):
        _refused([command, "--bids", str(path), "--experiment", str(folder / "spec.yaml")], capsys,
                 f"column 'position' has type {arrow_type}; the bids data contract needs an integer type")


def test_position_as_decimal_of_scale_zero_is_an_integer(base, capsys):
    folder, table, _ = base
    i = table.schema.get_field_index("position")
    typed, reference = folder / "position_decimal.parquet", folder / "position_int.parquet"
    pq.write_table(table.set_column(i, "position", table.column("position").cast(pa.decimal128(10, 0))), typed)
    pq.write_table(table, reference)
    _same_rows(_estimate(typed, folder / "spec.yaml", capsys), _estimate(reference, folder / "spec.yaml", capsys), 0)


def test_128_bit_ids_within_int64_are_integers_and_beyond_are_one_clear_error(base, capsys):
    folder, table, _ = base
    wide = pa.decimal128(38, 0)  # how a 128-bit integer (DuckDB HUGEINT) reaches Arrow and Parquet
    i, j = table.schema.get_field_index("auction_id"), table.schema.get_field_index("bidder_id")
    shifted = table.set_column(i, "auction_id", pa.array(table.column("auction_id").to_numpy() + 2**62))
    typed = shifted.set_column(i, "auction_id", shifted.column("auction_id").cast(wide))
    typed = typed.set_column(j, "bidder_id", typed.column("bidder_id").cast(wide))
    pq.write_table(typed, folder / "ids128.parquet")
    pq.write_table(shifted, folder / "ids64.parquet")
    _same_rows(_estimate(folder / "ids128.parquet", folder / "spec.yaml", capsys),
               _estimate(folder / "ids64.parquet", folder / "spec.yaml", capsys), 0)
    too_big = [decimal.Decimal(int(a)) for a in shifted.column("auction_id").to_numpy()]
    too_big[7] = decimal.Decimal(2**64 + 5)
    pq.write_table(typed.set_column(i, "auction_id", pa.array(too_big, wide)), folder / "ids_beyond.parquet")
    for command in ("estimate", "check"):
        _refused([command, "--bids", str(folder / "ids_beyond.parquet"), "--experiment", str(folder / "spec.yaml")],
                 capsys, f"column 'auction_id' row 7 is {2**64 + 5}, outside the int64 range")
