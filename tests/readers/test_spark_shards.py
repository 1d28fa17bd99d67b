"""The Spark engine (`readers/spark_shards.py`) against the local engine (`readers/shards.py`).

Both engines split a log into the same shards (the md5 hash of the auction id), read each shard's
rows in the same order and run the same pure stratum estimator on them, so their frames agree to
rounding: the only difference allowed is the order in which floating-point sums meet (the frames
came out bit-identical in every scenario here; 1e-9 relative leaves room for workers that sum in
another order and is still far below any estimate's standard error). Bad input must give the
local engine's own one line. Every test here starts Spark jobs (seconds each): keep them few.
"""

from __future__ import annotations

import decimal
import warnings

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import (
    ArmEstimates, EstimatorWarning, combine_pieces, parse_experiments, shard_of, simulate_experiment, stratum_pieces,
)
from counterbid.estimators.errors import InputError
from counterbid.readers.engines import SparkEngine, estimate_bid_log
from counterbid.readers.spark_shards import _read_parquet, _with_shards

pytestmark = pytest.mark.spark

SPEC = {"experiments": [
    {"id": "racks", "control_arm": "low", "arms": [
        {"name": "low", "share": 0.6, "position_weights": [0.35, 0.15, 0.05]},
        {"name": "tall", "share": 0.4, "position_weights": [0.30, 0.20, 0.10]},
    ]},
    {"id": "racks-gsp", "control_arm": "low", "payment_rule": "gsp", "floor": 0.4, "arms": [
        {"name": "low", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
        {"name": "steep", "share": 0.3, "position_weights": [0.6, 0.1]},
    ]},
    {"id": "racks-aisles", "control_arm": "low", "segments": ["aisle", "express"], "arms": [
        {"name": "low", "share": 0.6, "position_weights": [0.35, 0.15, 0.05]},
        {"name": "tall", "share": 0.4, "position_weights": [0.30, 0.20, 0.10]},
    ]},
    {"id": "racks-what-if", "control_arm": "low", "payment_rule": "gsp", "floor": 0.4, "arms": [
        {"name": "low", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
        {"name": "steep", "share": 0.3, "position_weights": [0.6, 0.1]},
    ], "what_if": [{"name": "middling", "position_weights": [0.5, 0.15, 0.05]},
                   {"name": "deeper", "position_weights": [0.4, 0.2, 0.1, 0.05]}]},
]}
EXPERIMENTS = parse_experiments(SPEC)
RTOL = 1e-9


def _log(n_auctions=1500, *, rng=4, n_bidders=None, bidder_pool=5000, experiment="racks", **kw) -> pd.DataFrame:
    exp = EXPERIMENTS[experiment]
    return simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders=n_bidders or {3: 0.6, 4: 0.4},
                               n_auctions=n_auctions, rng=rng, bidder_pool=bidder_pool, **kw)


def _both(spark, path, experiment="racks", **kw):
    """(local estimates, local warnings, spark estimates, spark warnings) of one input."""
    exp = EXPERIMENTS[experiment]
    with warnings.catch_warnings(record=True) as local_caught:
        warnings.simplefilter("always")
        local = estimate_bid_log(path, exp, **kw)
    with warnings.catch_warnings(record=True) as spark_caught:
        warnings.simplefilter("always")
        on_spark = estimate_bid_log(str(path), exp, engine=SparkEngine(spark), **kw)
    said = [[str(w.message) for w in caught if issubclass(w.category, EstimatorWarning)]
            for caught in (local_caught, spark_caught)]
    # nothing else reaches the caller either (PySpark's notice about pandas versions is silenced)
    assert [str(w.message) for w in spark_caught if not issubclass(w.category, EstimatorWarning)] == []
    return local, said[0], on_spark, said[1]


def _same_frames(local_result: ArmEstimates, spark_result: ArmEstimates, scenario: str) -> float:
    """Assert equal text columns and numbers to RTOL; the largest relative difference (printed for the record)."""
    local, on_spark = local_result.table, spark_result.table
    assert list(on_spark.columns) == list(local.columns)
    assert len(on_spark) == len(local) > 0
    numeric = local.select_dtypes("number").columns
    for name in local.columns.difference(numeric):
        assert on_spark[name].astype(str).tolist() == local[name].astype(str).tolist(), name
    largest = 0.0
    for name in numeric:
        a, b = local[name].to_numpy(float), on_spark[name].to_numpy(float)
        np.testing.assert_array_equal(np.isnan(a), np.isnan(b), err_msg=name)
        a, b = a[~np.isnan(a)], b[~np.isnan(b)]
        np.testing.assert_allclose(b, a, rtol=RTOL, atol=0, err_msg=name)
        scale = np.where(a == 0, 1.0, np.abs(a))
        largest = max(largest, float(np.max(np.abs(a - b) / scale, initial=0.0)))
    for key in ("cluster", "n_auctions", "n_bids", "n_excluded_auctions", "shards", "payment_rule", "floor", "quality",
                "strata", "confidence_level", "method_version", "segments"):
        assert getattr(spark_result, key) == getattr(local_result, key), key
    assert spark_result.engine == "spark" and local_result.engine == "local"
    print(f"\n[spark vs local] {scenario}: largest relative difference {largest:.3g}")
    return largest


def test_text_ids_repeating_bidders_and_many_shards(spark, tmp_path):
    bids = _log(n_bidders={3: 0.97, 6: 0.03}, bidder_pool=150)  # bidders meet again across auctions and shards
    bids["auction_id"] = "lot-" + bids["auction_id"].astype(str)
    bids["bidder_id"] = "vendor-" + bids["bidder_id"].astype(str)
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)  # `ds` as pandas' nanosecond timestamps, which Spark refuses by default
    local, local_said, on_spark, spark_said = _both(spark, path, max_bids_per_shard=1200)
    assert local.shards == 4
    assert local.cluster == "bidder"  # auto -> bidder: ids repeat across auctions
    _same_frames(local, on_spark, "text ids, bidders repeating, 4 shards")
    # the six-bidder stratum is small in every shard: the workers' warning reaches the driver, word for word
    assert spark_said == local_said and any("few_bids" in s and "shard 3" in s for s in spark_said)

    # the shard column itself, computed by the module's statement: the estimators' shard_of, row by row
    read = _read_parquet(spark, str(path), source=str(path), view="counterbid_test_bids")
    sharded = _with_shards(spark, read, shards=4, source=str(path)).select("auction_id", "shard", "bid_order")
    got = sharded.toArrow().to_pandas().sort_values("bid_order")
    assert got["bid_order"].tolist() == list(range(len(bids)))  # one file: the read order is the row number
    np.testing.assert_array_equal(got["shard"].to_numpy(), shard_of(bids["auction_id"], 4))
    assert got["auction_id"].tolist() == bids["auction_id"].tolist()


def _hive_folder(tmp_path, bids: pd.DataFrame, bid_type: pa.DataType | None = None):
    """``bids`` as ``ds=<day>/part-<k>.parquet``, three files of unequal size per day.

    Spark plans the biggest file first; the read order (and so every row number) must still be
    the paths' order, the local engine's.
    """
    folder = tmp_path / "log"
    bids = bids.drop(columns=["ds"])
    days = ["2026-03-02", "2026-03-03"]
    cuts = np.cumsum([0, 0.12, 0.2, 0.18, 0.07, 0.25, 0.18]) * len(bids)  # whole auctions need not be in one file
    k = 0
    for day in days:
        (folder / f"ds={day}").mkdir(parents=True)
        for part in range(3):
            rows = bids.iloc[int(cuts[k]):int(cuts[k + 1])]
            table = pa.Table.from_pandas(rows, preserve_index=False)
            if bid_type is not None:
                table = table.set_column(table.schema.get_field_index("bid"), "bid",
                                         pa.array([decimal.Decimal(f"{b:.6f}") for b in rows["bid"]], bid_type))
            pq.write_table(table, folder / f"ds={day}" / f"part-{part}.parquet")
            k += 1
    return folder


def test_segments_of_text_and_nullable_boolean_columns_in_many_shards(spark, tmp_path):
    """Strata by (n, segment) on Spark's workers: the local engine's rows, per segment and pooled."""
    from counterbid.estimators import SimulatedSegment, simulate_segmented_experiment

    segments = {"bulk": SimulatedSegment(st.beta(2.0, 5.0, scale=3.0), {3: 0.6, 4: 0.4}, 0.5),
                "fresh": SimulatedSegment(st.lognorm(0.5, scale=2.0), 4, 0.5)}
    bids = simulate_segmented_experiment(segments, EXPERIMENTS["racks-aisles"], n_auctions=2000, rng=12,
                                         column="aisle", bidder_pool=300)
    express = (bids["auction_id"] % 3).map({0: True, 1: False, 2: None})  # constant within an auction
    bids["express"] = pd.array(express, dtype="boolean")
    path = tmp_path / "aisles.parquet"
    bids.to_parquet(path, index=False)
    local, local_said, on_spark, spark_said = _both(spark, path, experiment="racks-aisles", max_bids_per_shard=2500)
    assert local.shards >= 3 and set(local.segments) == {"bulk|(null)", "bulk|false", "bulk|true", "fresh|(null)",
                                                         "fresh|false", "fresh|true"}
    _same_frames(local, on_spark, "two segment columns (text, nullable boolean), 6 segments, several shards")
    assert spark_said == local_said


def test_hive_folder_of_several_files_with_decimal_bids(spark, tmp_path):
    bids = _log(2000, rng=7)
    folder = _hive_folder(tmp_path, bids, pa.decimal128(12, 6))
    local, local_said, on_spark, spark_said = _both(spark, folder, max_bids_per_shard=2500)
    assert local.shards == 3
    _same_frames(local, on_spark, "Hive folder, 6 files, decimal bids, 3 shards")
    assert spark_said == local_said


def test_gsp_with_a_floor_and_quality(spark, tmp_path):
    bids = _log(1500, rng=11, experiment="racks-gsp", quality=st.uniform(0.6, 0.8))
    assert bids["position"].isna().any()  # some bids under the floor
    path = tmp_path / "gsp.parquet"
    bids.to_parquet(path, index=False)
    local, local_said, on_spark, spark_said = _both(spark, path, "racks-gsp", max_bids_per_shard=3000)
    assert local.shards == 2 and local.quality and local.floor == 0.4
    _same_frames(local, on_spark, "gsp, floor 0.4, quality, 2 shards")
    assert spark_said == local_said


def test_what_if_layouts_on_both_engines(spark, tmp_path):
    bids = _log(1500, rng=13, experiment="racks-what-if")
    path = tmp_path / "what_if.parquet"
    bids.to_parquet(path, index=False)
    local, _, on_spark, _ = _both(spark, path, "racks-what-if", max_bids_per_shard=3000, cluster="bidder")
    assert local.shards == 2
    assert set(on_spark.table.loc[on_spark.table["what_if"], "arm"]) == {"middling", "deeper"}
    assert on_spark.table.loc[on_spark.table["what_if"], "effective_share"].notna().all()
    _same_frames(local, on_spark, "what-if layouts, gsp, floor 0.4, bidder clustering, 2 shards")


def _local_and_spark_errors(spark, path, **kw) -> tuple[str, str]:
    exp = EXPERIMENTS["racks"]
    with pytest.raises(InputError) as local:
        estimate_bid_log(path, exp, **kw)
    with pytest.raises(InputError) as on_spark:
        estimate_bid_log(str(path), exp, engine=SparkEngine(spark), **kw)
    return str(local.value), str(on_spark.value)


def _later_shard_row(bids: pd.DataFrame, n_shards: int) -> tuple[int, int]:
    """A row of a shard other than 0, in the middle of it, and that shard."""
    shard = shard_of(bids["auction_id"], n_shards)
    k = int(shard.max())
    return int(np.flatnonzero(shard == k)[shard.tolist().count(k) // 2]), k


@pytest.mark.parametrize("kind", ["negative bid", "NaN bid", "duplicate bidder", "unknown arm", "null arm",
                                  "no arm column", "position as text", "negative bid, one shard of three holds every auction"])
def test_bad_rows_give_the_local_line(spark, tmp_path, kind):
    bids = _log(1000, rng=3)
    row, k = _later_shard_row(bids, 3)
    if kind.startswith("negative bid, one shard"):
        bids = bids[shard_of(bids["auction_id"], 3) == k].reset_index(drop=True)
        bids.loc[len(bids) // 2, "bid"] = -0.25
        path = tmp_path / "one_shard.parquet"
        bids.to_parquet(path, index=False)
        # 3 shards by size, one of them holding bids: the local engine names no shard, nor may Spark
        local, on_spark = _local_and_spark_errors(spark, path, max_bids_per_shard=len(bids) // 3 + 1)
        assert on_spark == local and on_spark.startswith(f"{path}: column 'bid' row ")
        return
    if kind == "negative bid":
        bids.loc[row, "bid"] = -0.25
    elif kind == "NaN bid":
        bids.loc[row, "bid"] = np.nan
    elif kind == "duplicate bidder":
        same = bids.index[(bids["auction_id"] == bids.loc[row, "auction_id"]) & (bids.index != row)][0]
        bids.loc[row, "bidder_id"] = bids.loc[same, "bidder_id"]
    elif kind == "unknown arm":
        bids.loc[bids["auction_id"] == bids.loc[row, "auction_id"], "arm"] = "sideways"
    elif kind == "null arm":  # neither a listed arm name nor an unlisted text: no code and no text on Spark
        bids["arm"] = bids["arm"].astype(object)
        bids.loc[row, "arm"] = None
    elif kind == "no arm column":
        bids = bids.drop(columns=["arm"])
    elif kind == "position as text":
        bids["position"] = bids["position"].astype("string")
    path = tmp_path / "bad.parquet"
    bids.to_parquet(path, index=False)
    local, on_spark = _local_and_spark_errors(spark, path, max_bids_per_shard=1200)
    assert on_spark == local
    assert "\n" not in on_spark
    if kind in ("negative bid", "NaN bid", "duplicate bidder"):
        assert on_spark.startswith(f"{path} (shard {k}): ") and k > 0


@pytest.mark.parametrize("max_bids", [None, 1500])  # read by pyarrow (one shard) and by DuckDB (3 shards) locally
def test_a_bad_row_in_a_later_file_is_numbered_in_read_order(spark, tmp_path, max_bids):
    bids = _log(1200, rng=9)
    last = len(bids) - 5  # in the last file by path (ds=2026-03-03/part-2), the smallest-but-one file
    bids.loc[last, "bid"] = -1.0
    folder = _hive_folder(tmp_path, bids)
    local, on_spark = _local_and_spark_errors(spark, folder, max_bids_per_shard=max_bids)
    assert on_spark == local and "column 'bid' row" in on_spark


def test_unreadable_inputs(spark, tmp_path):
    missing = tmp_path / "nowhere.parquet"
    local, on_spark = _local_and_spark_errors(spark, missing)
    assert on_spark == local == f"{missing}: no such file or folder"
    text = tmp_path / "notes.parquet"
    text.write_text("quillfen bids, typed by hand\n")
    local, on_spark = _local_and_spark_errors(spark, text)
    # the detail in parentheses is the library's own (pyarrow's locally, Spark's error class here)
    prefix = f"{text}: not a readable Parquet file ("
    assert local.startswith(prefix) and on_spark.startswith(prefix)
    assert "\n" not in on_spark and on_spark.endswith(")") and "CANNOT_READ_FILE_FOOTER" in on_spark


def test_missing_or_null_auction_ids(spark, tmp_path):
    bids = _log(800, rng=6)
    without = tmp_path / "no_auction_id.parquet"
    bids.drop(columns=["auction_id"]).to_parquet(without, index=False)
    local, on_spark = _local_and_spark_errors(spark, without)
    assert on_spark == local and on_spark.startswith(f"{without}: column 'auction_id' is missing (required: ")
    # in shards Spark still says what is missing (the local engine's DuckDB split names its own binder error)
    on_spark_sharded = _local_and_spark_errors(spark, without, max_bids_per_shard=1000)[1]
    assert on_spark_sharded == on_spark

    nulls = tmp_path / "null_auction_id.parquet"
    ids = bids["auction_id"].astype("Int64")
    ids[700] = pd.NA
    bids.assign(auction_id=ids).to_parquet(nulls, index=False)
    local, on_spark = _local_and_spark_errors(spark, nulls)
    assert on_spark == local == f"{nulls}: column 'auction_id' row 700 is null"
    # in shards the bid without an auction goes to shard 0, which refuses it by its row there
    with pytest.raises(InputError) as sharded:
        estimate_bid_log(str(nulls), EXPERIMENTS["racks"], engine=SparkEngine(spark), max_bids_per_shard=1000)
    shard = shard_of(bids["auction_id"], 3)
    row_in_shard_0 = int(((shard == 0) & (bids.index < 700)).sum())
    assert str(sharded.value) == f"{nulls} (shard 0): column 'auction_id' row {row_in_shard_0} is null"


def test_read_order_is_the_order_of_the_paths(spark, tmp_path):
    # folder names that sort differently as paths and as URIs ('a b' is 'a%20b' to Spark; '!' sorts between)
    folder = tmp_path / "odd names"
    labels = ["a b", "a!b", "a-b", "a", "b"]
    for i, label in enumerate(labels):
        (folder / f"lane={label}").mkdir(parents=True)
        pq.write_table(pa.table({"auction_id": pa.array([i] * (i + 2), pa.int64())}),
                       folder / f"lane={label}" / "part-0.parquet")
    arrow_order = pads.dataset(str(folder), format="parquet", partitioning="hive").to_table().column("auction_id")
    read = _read_parquet(spark, str(folder), source=str(folder), view="counterbid_test_order")
    got = _with_shards(spark, read, shards=1, source=str(folder)).select("auction_id", "bid_order").toArrow()
    got = got.sort_by("bid_order")
    assert got.column("auction_id").to_pylist() == arrow_order.to_pylist()
    # as paths 'a b' < 'a!b' < 'a-b' < 'a/' < 'b/' (the order written); as URIs 'a!b' would come first
    assert arrow_order.to_pylist() == [k for k in range(5) for _ in range(k + 2)]


def test_one_file_shortcut_gives_the_joined_statements_shards_and_order(spark, tmp_path):
    # an input of one file skips the ranking join; the plain statement (join on the ranked files) is its test
    from counterbid.readers.spark_shards import _ROW_BITS, _run_sql

    bids = _log(900, rng=8)
    bids["auction_id"] = bids["auction_id"].astype("Int64")
    bids.loc[17, "auction_id"] = pd.NA  # a bid without an auction id: shard 0 on both routes
    path = tmp_path / "one file.parquet"
    bids.to_parquet(path, index=False, row_group_size=700)  # several row groups: row numbers run across them
    read = _read_parquet(spark, str(path), source=str(path), view="counterbid_test_one_file")
    short = _with_shards(spark, read, shards=5, source=str(path)).select("auction_id", "bidder_id", "shard", "bid_order")
    assert "bid_file" not in short.columns
    spark.createDataFrame([(f, 0) for f in {read.inputFiles()[0], *(r[0] for r in read.select("bid_file").distinct().collect())}],
                          "bid_file string, file_rank long").createOrReplaceTempView("counterbid_bid_files")
    read.drop("shard", "bid_order").createOrReplaceTempView("counterbid_bids")
    plain = _run_sql(spark, "spark_bids_with_shard", n_shards=5, row_bits=_ROW_BITS).select(
        "auction_id", "bidder_id", "shard", "bid_order")
    got, want = short.toArrow().sort_by("bid_order"), plain.toArrow().sort_by("bid_order")
    assert got.num_rows == want.num_rows == len(bids)
    assert got.to_pydict() == want.to_pydict()  # (the key is nullable on one route only)
    assert got.column("bid_order").to_pylist() == list(range(len(bids)))
    expected = np.zeros(len(bids), dtype=np.int64)
    present = bids["auction_id"].notna().to_numpy()
    expected[present] = shard_of(bids["auction_id"][present].astype(np.int64), 5)
    assert got.column("shard").to_pylist() == expected.tolist()


def test_a_lake_day_gives_the_pieces_the_local_staging_gives(spark, tmp_path):
    import datetime as dt

    import duckdb

    from counterbid.dags_example.lake import write_bid_lake
    from counterbid.readers.shards import pieces_by_shard, shard_folders, write_shards
    from counterbid.readers.spark_shards import lake_partition_pieces_on_spark
    from counterbid.sql import load_sql

    spec = {"experiments": [{**e, "start": "2026-03-02"} for e in SPEC["experiments"]]}
    experiments = parse_experiments(spec)
    lake = tmp_path / "lake"
    write_bid_lake(lake, experiments.values(), start=dt.date(2026, 3, 2), days=2, auctions_per_day=600,
                   n_bidders={3: 0.5, 4: 0.5}, seed=1)
    day, exp = dt.date(2026, 3, 3), experiments["racks"]
    # the local load step: DuckDB's shard of every row of the day, streamed into shard folders
    with duckdb.connect() as con:
        rows = con.sql(load_sql("lake_read_partition_shards"), params={
            "lake_glob": f"{lake}/**/*.parquet", "ds": day, "experiment_id": exp.id, "n_shards": 3}).to_arrow_reader(2**20)
        write_shards(rows, tmp_path / "day", 3)
    local = pieces_by_shard(shard_folders(tmp_path / "day"), exp, day=day, source="day")
    (lake / "ds=2026-03-02" / "notes.parquet").write_text("not bids")  # another day's folder is not read
    on_spark = lake_partition_pieces_on_spark(spark, str(lake), experiment=exp, ds=day, shards=3, source="day")
    assert [p.key for p in on_spark.pieces] == [p.key for p in local.pieces]
    assert len({p.shard for p in local.pieces}) == 3 and {p.day for p in local.pieces} == {"2026-03-03"}
    assert all(mine.equals(theirs) for mine, theirs in zip(on_spark.pieces, local.pieces, strict=True))
    assert on_spark.n_excluded_auctions == local.n_excluded_auctions
    with pytest.raises(InputError) as missing:
        lake_partition_pieces_on_spark(spark, str(lake), experiment=exp, ds=dt.date(2026, 3, 9), shards=1)
    assert str(missing.value) == f"{lake}: partition ds=2026-03-09 is missing (no such folder)"


def test_a_shard_with_no_bid_at_the_floor(spark, tmp_path):
    """Shard 1 of 3 holds no eligible bid: both engines count it at revenue 0, and the local engine's rows
    are the estimator's own combination of the shards (1e-12)."""
    exp = EXPERIMENTS["racks-gsp"]
    bids = _log(1500, rng=13, experiment="racks-gsp", bidder_pool=400)
    bids["auction_id"] = "lot-" + bids["auction_id"].astype(str)
    shard = shard_of(bids["auction_id"], 3)
    bids.loc[shard == 1, "bid"] = np.linspace(0.02, 0.39, int((shard == 1).sum()))
    bids.loc[shard == 1, "position"] = np.nan
    path = tmp_path / "sunk.parquet"
    bids.to_parquet(path, index=False)
    local, local_said, on_spark, spark_said = _both(spark, path, "racks-gsp", max_bids_per_shard=len(bids) // 3 + 1)
    assert local.shards == 3 and local.cluster == "bidder"
    _same_frames(local, on_spark, "gsp, floor 0.4, shard 1 of 3 below the floor")
    assert spark_said == local_said
    pieces = [p for k in range(3) for p in stratum_pieces(bids[shard == k], exp, shard=k, cluster="bidder")]
    assert {p.shard for p in pieces if p.below_floor} == {1}
    want = combine_pieces(pieces, exp, cluster="bidder").table
    for col in ("estimate", "std_error"):
        np.testing.assert_allclose(local.table[col].to_numpy(float), want[col].to_numpy(float), rtol=1e-12, atol=0)


@pytest.mark.parametrize("shards", [3, 7, 40])
def test_every_shard_gets_a_partition_of_its_own(spark, shards):
    # the shards' partition keys put shard k's rows in partition k, and only there; Spark's hash of
    # the shard itself would not (two of 0..2 share a partition under pmod(hash(shard), 3))
    from pyspark.sql import functions as F

    from counterbid.readers.spark_shards import _partition_key

    rows = spark.range(0, 20 * shards).withColumn("shard", F.pmod(F.col("id") * 7919, F.lit(shards)))
    placed = rows.repartition(shards, _partition_key(spark, shards)).select(
        "shard", F.spark_partition_id().alias("partition")).distinct().collect()
    assert sorted((r["shard"], r["partition"]) for r in placed) == [(k, k) for k in range(shards)]
    by_shard = rows.repartition(shards, "shard").select("shard", F.spark_partition_id().alias("partition")).distinct()
    if shards == 3:  # what the key avoids: some partition holds two shards
        assert by_shard.select("partition").distinct().count() < shards


def test_a_partition_of_several_shards_answers_each_in_arrival_order():
    # the fallback when some partition has no key: a worker answers every shard it was sent, by
    # number, each with its rows in the order they arrived
    from counterbid.readers.spark_shards import _partition_answers

    shard = [2, 0, 2, 2, 0, 1]
    batches = [pa.record_batch({"shard": pa.array(shard[:4], pa.int64()), "row": pa.array(range(4), pa.int64())}),
               pa.record_batch({"shard": pa.array([], pa.int64()), "row": pa.array([], pa.int64())}),
               pa.record_batch({"shard": pa.array(shard[4:], pa.int64()), "row": pa.array(range(4, 6), pa.int64())})]
    seen = []

    def answer(table):
        seen.append((table.column("shard").to_pylist(), table.column("row").to_pylist()))
        return pa.table({"shard": [table.column("shard")[0].as_py()], "n": [table.num_rows]})

    out = pa.Table.from_batches(list(_partition_answers(iter(batches), answer)))
    assert out.to_pylist() == [{"shard": 0, "n": 2}, {"shard": 1, "n": 1}, {"shard": 2, "n": 3}]
    assert seen == [([0, 0], [1, 4]), ([1], [5]), ([2, 2, 2], [0, 2, 3])]
    assert list(_partition_answers(iter([]), answer)) == []  # an empty partition answers nothing


def test_the_engine_splits_one_file_for_every_task_thread_and_keeps_its_read_order(spark, tmp_path):
    # a file of several row groups read while the engine's job runs: at least as many input splits as
    # _SPLITS_PER_THREAD per task thread (outside it, Spark's default: one or two for this file); the
    # rows still reach their shards in read order, and the session's own setting is back afterwards
    from counterbid.readers.spark_shards import _MIN_SPLITS, _SPLITS_PER_THREAD, _input_splits

    bids = _log(2400, rng=11)
    path = tmp_path / "rows.parquet"
    bids.to_parquet(path, index=False, row_group_size=1000)
    threads = spark.sparkContext.defaultParallelism
    old_cost = spark.conf.get("spark.sql.files.openCostInBytes")
    spark.conf.set("spark.sql.files.openCostInBytes", "1024")  # lets a small file split as a large one would
    try:
        read = _read_parquet(spark, str(path), source=str(path), view="counterbid_test_splits")
        plain = read.select("auction_id").rdd.getNumPartitions()  # a new frame each time: a frame keeps its rdd
        with _input_splits(spark):
            split = read.select("auction_id").rdd.getNumPartitions()
            local, _, on_spark, _ = _both(spark, path, max_bids_per_shard=len(bids) // 3)
        assert spark.conf.get(_MIN_SPLITS, None) is None
        spark.conf.set(_MIN_SPLITS, "1")  # a setting of the session's own is left as it is
        with _input_splits(spark):
            assert spark.conf.get(_MIN_SPLITS) == "1"
    finally:
        spark.conf.unset(_MIN_SPLITS)
        spark.conf.set("spark.sql.files.openCostInBytes", old_cost)
    assert pq.ParquetFile(path).metadata.num_row_groups >= _SPLITS_PER_THREAD * threads
    assert plain <= threads and split >= _SPLITS_PER_THREAD * threads, (plain, split)
    assert on_spark.shards == local.shards > 1
    _same_frames(local, on_spark, "one file in many splits")
    np.testing.assert_array_equal(on_spark.table["estimate"].to_numpy(float), local.table["estimate"].to_numpy(float))


#: A fresh interpreter that starts a local session through counterbid and prints its JVM's collectors.
_COLLECTORS = """
from counterbid.readers.spark_shards import spark_session
session = spark_session("local[1]")
beans = session.sparkContext._jvm.java.lang.management.ManagementFactory.getGarbageCollectorMXBeans()
print(sorted(str(b.getName()) for b in beans))
session.stop()
"""


def test_a_local_session_collects_its_garbage_with_the_throughput_collector(java_home, tmp_path, monkeypatch):
    # counterbid's own local sessions choose the JVM's collector unless the settings already name one
    # (two collectors would stop the JVM from starting); checked in a fresh process, since a JVM that
    # another session launched in this one (an Airflow task's) would serve the test's sessions too
    import os
    import subprocess
    import sys

    from counterbid.readers.spark_shards import _LOCAL_GC, _local_jvm_options

    monkeypatch.setenv("SPARK_CONF_DIR", str(tmp_path))
    for name in ("JAVA_TOOL_OPTIONS", "JDK_JAVA_OPTIONS", "_JAVA_OPTIONS"):
        monkeypatch.delenv(name, raising=False)
    started = subprocess.run([sys.executable, "-c", _COLLECTORS], capture_output=True, text=True, timeout=300,
                             env={**os.environ, "JAVA_HOME": java_home})
    assert started.returncode == 0, started.stderr[-2000:]
    assert started.stdout.strip().splitlines()[-1] == "['PS MarkSweep', 'PS Scavenge']"
    assert _local_jvm_options("local[2]", {}) == {"spark.driver.defaultJavaOptions": _LOCAL_GC}
    assert _local_jvm_options("local", {"spark.driver.extraJavaOptions": "-Xss4m"}) != {}
    assert _local_jvm_options("spark://head:7077", {}) == {}
    assert _local_jvm_options("local[2]", {"spark.driver.extraJavaOptions": "-Xss4m -XX:+UseG1GC"}) == {}
    monkeypatch.setenv("JAVA_TOOL_OPTIONS", "-XX:+UseSerialGC")
    assert _local_jvm_options("local[2]", {}) == {}
    monkeypatch.delenv("JAVA_TOOL_OPTIONS")
    (tmp_path / "spark-defaults.conf").write_text("# site settings\nspark.driver.extraJavaOptions=-XX:+UseZGC -Xss4m\n")
    assert _local_jvm_options("local[2]", {}) == {}
    (tmp_path / "spark-defaults.conf").write_text("spark.driver.defaultJavaOptions   -Dsite=1\n")
    assert _local_jvm_options("local[2]", {}) == {}
