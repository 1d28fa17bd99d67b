"""Bidder clustering on Spark without the bidders on the driver (`readers/spark_bidder_gram.py`), and its failures.

The Spark engine adds each bidder's sums across shards on the executors and sends the driver one
``(K + 1) x (K + 1)`` Gram form per partition. The steps are checked here without Spark against
the plain formula (``gram_of(bidder_totals(pieces))``, Cameron & Miller 2015, the cluster-robust
sandwich as a sum of outer products), then on Spark with about two million distinct bidder ids
under Spark's default driver settings (1 GiB of driver heap; the per-bidder sums of that many
bidders used to end in ``java.lang.OutOfMemoryError`` while the driver served them to Python),
and two real failures of a small session must each end in one line naming the cause.

Tolerances: the Gram route adds the same numbers as the per-bidder route in another order, so
the two agree to rounding: 1e-12 relative without Spark (a few hundred additions of doubles,
each off by at most 2**-53), 1e-9 relative across engines, as in `test_spark_shards.py`.
"""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import scipy.stats as st
import yaml

from counterbid.estimators import (
    bidder_totals, combine_pieces, gram_of, parse_experiments, prepare_bids, simulate_experiment, stratum_pieces,
)
from counterbid.readers.engines import LocalEngine, estimate_bid_log
from counterbid.readers.id_hashes import fnv1a_64
from counterbid.readers.spark_bidder_gram import (
    bidder_buckets, bidder_keys, bidder_rows, bidder_table, combined_gram, combined_grams, partition_gram,
)
from counterbid.readers.spark_shards import _answer_schema

SPEC = """experiments:
  - id: ledges
    control_arm: flat
    arms:
      - {name: flat, share: 0.55, position_weights: [0.33, 0.16, 0.06]}
      - {name: tiered, share: 0.45, position_weights: [0.36, 0.12, 0.04]}
    what_if:
      - {name: shallow, position_weights: [0.34, 0.14, 0.05]}
"""
EXPERIMENT = parse_experiments(yaml.safe_load(SPEC))["ledges"]
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


def _log(n_auctions: int, bidder_pool: int, rng: int = 5) -> pd.DataFrame:
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), EXPERIMENT, n_bidders={3: 0.5, 5: 0.5},
                               n_auctions=n_auctions, rng=rng, bidder_pool=bidder_pool)
    bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)  # text ids, as when ids are seats
    return bids


def _close(a: pd.DataFrame, b: pd.DataFrame, rtol: float) -> None:
    assert list(a["arm"]) == list(b["arm"]) and list(a["metric"]) == list(b["metric"])
    for column in NUMBERS:
        x, y = a[column].to_numpy(float), b[column].to_numpy(float)
        assert np.array_equal(np.isnan(x), np.isnan(y)), column
        ok = ~np.isnan(x)
        np.testing.assert_allclose(x[ok], y[ok], rtol=rtol, atol=0, err_msg=column)


def _keys_of(rows: pa.Table) -> np.ndarray:
    """Every bidder key of packed bidder rows, row after row."""
    return np.concatenate([np.frombuffer(v, "<i8") for v in rows.column("bidder_keys").to_pylist()])


def _counts_of(rows: pa.Table) -> list[int]:
    """Keys held by each packed bidder row."""
    return [len(v) // 8 for v in rows.column("bidder_keys").to_pylist()]


@pytest.mark.parametrize("ids", ["text", "integer"])
def test_keyed_bidder_rows_are_the_plain_totals_by_id_text(ids):
    """One shard's rows keyed by 64-bit keys against ``bidder_totals``, where bidders meet on their id's text."""
    bids = _log(3000, bidder_pool=1500, rng=9)
    if ids == "integer":
        bids["bidder_id"] = bids["bidder_id"].str.slice(5).astype(np.int64) * 7_000_001  # beyond int32 too
    prepared = prepare_bids(bids, EXPERIMENT)
    pieces = stratum_pieces(prepared, EXPERIMENT, cluster="bidder")
    assert len(pieces) > 1 and all(p.bidder_sums is not None for p in pieces)
    keys, unit, sums = bidder_rows(pieces)
    plain = bidder_totals(pieces)
    assert unit == plain.bid_exponent and sums.shape == plain.sums.shape
    texts = pa.array([str(v) for v in plain.bidder_ids], pa.string())
    expected_keys = fnv1a_64(texts) if ids == "text" else np.array([int(v) for v in plain.bidder_ids], np.int64)
    assert len(np.unique(keys)) == len(keys)  # no two of these ids share a key
    order = pd.Index(keys).get_indexer(expected_keys)
    assert (order >= 0).all()
    np.testing.assert_allclose(sums[order], plain.sums, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(bidder_keys(np.array(list(texts.to_pylist()), dtype=object)), fnv1a_64(texts))


def test_partition_grams_add_up_to_the_plain_form(tmp_path):
    """Shards' bidder rows, partitioned by bidder and squared per partition, give ``sum_b U_b U_b'``."""
    path = tmp_path / "bids.parquet"
    _log(6000, bidder_pool=4000).to_parquet(path, index=False)
    found = LocalEngine().log_pieces(str(path), EXPERIMENT, max_bids_per_shard=5000, cluster="bidder")
    assert found.shards == 5
    schema = _answer_schema()
    rows = []
    for shard in sorted({p.key.shard for p in found.pieces}):
        ids, unit, sums = bidder_rows([p for p in found.pieces if p.key.shard == shard])
        rows.append(bidder_table(ids, unit, sums, shard, schema, buckets=3))
    rows = pa.concat_tables(rows)
    keys = _keys_of(rows)
    # the same bidder in several shards: what the partition step has to add before squaring
    assert pd.Series(keys).duplicated().sum() > 1000
    partition = np.array(rows.column("bidder_bucket").to_pylist())
    assert sorted(set(partition)) == [0, 1, 2] and rows.num_rows <= 3 * found.shards  # packed: a row per bucket
    out = _answer_schema(with_gram=True)
    parts = []
    for k in range(3):
        batches = rows.filter(pa.array(partition == k)).to_batches(max_chunksize=2)  # a bucket split over batches
        for batch in partition_gram(iter(batches), out):
            assert batch.schema == out
            parts += [(r["part_bidders"], r["part_unit"], r["part_gram"]) for r in batch.to_pylist()]
    size = len(found.pieces[0].sum_labels)
    gram = combined_gram(parts, size, max(p.bid_exponent for p in found.pieces))
    plain = gram_of(bidder_totals(found.pieces))
    assert gram.n_bidders == plain.n_bidders == len(set(keys))
    np.testing.assert_allclose(gram.gram, plain.gram, rtol=1e-12, atol=0)
    by_gram = combine_pieces([p.without_bidder_sums() for p in found.pieces], EXPERIMENT, cluster="auto",
                             bidder_gram=gram)
    by_sums = combine_pieces(found.pieces, EXPERIMENT, cluster="auto")
    assert by_gram.cluster == by_sums.cluster == "bidder"
    _close(by_gram.table, by_sums.table, 1e-12)


SEGMENTED_SPEC = """experiments:
  - id: ledges-bays
    control_arm: flat
    segments: [bay]
    arms:
      - {name: flat, share: 0.5, position_weights: [0.33, 0.16, 0.06]}
      - {name: tiered, share: 0.5, position_weights: [0.36, 0.12, 0.04]}
"""
SEGMENTED = parse_experiments(yaml.safe_load(SEGMENTED_SPEC))["ledges-bays"]


def _segmented_log(n_auctions: int, bidder_pool: int, rng: int = 21) -> pd.DataFrame:
    """Two bays with their own values and bidder counts; bidders (text ids) bid in both bays."""
    from counterbid.estimators import SimulatedSegment, simulate_segmented_experiment

    bays = {"dock": SimulatedSegment(st.lognorm(0.4, scale=1.5), {3: 0.5, 5: 0.5}, 0.6),
            "yard": SimulatedSegment(st.gamma(2.0, scale=0.3), {2: 0.3, 4: 0.7}, 0.4)}
    bids = simulate_segmented_experiment(bays, SEGMENTED, n_auctions=n_auctions, rng=rng, column="bay",
                                         bidder_pool=bidder_pool)
    bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
    return bids


def _partition_forms(found, n_partitions: int = 3) -> dict:
    """The shards' per-(segment, bidder) rows through partition_gram, added per form on the driver."""
    schema = _answer_schema()
    rows = []
    for shard in sorted({p.key.shard for p in found.pieces}):
        mine = [p for p in found.pieces if p.key.shard == shard]
        for label in sorted({p.key.segment for p in mine}):
            ids, unit, sums = bidder_rows([p for p in mine if p.key.segment == label])
            rows.append(bidder_table(ids, unit, sums, shard, schema, segment=label, buckets=n_partitions))
    rows = pa.concat_tables(rows)
    by_bidder = pd.Series(_keys_of(rows))
    segment = pd.Series(np.repeat(rows.column("bidder_segment").to_pylist(), _counts_of(rows)))
    # the same bidder in both segments: the pooled form must add a bidder's rows across segments
    assert by_bidder.groupby(by_bidder).transform(lambda s: segment[s.index].nunique()).gt(1).sum() > 500
    partition = np.array(rows.column("bidder_bucket").to_pylist())
    out = _answer_schema(with_gram=True)
    parts = []
    for k in range(n_partitions):
        for batch in partition_gram(iter(rows.filter(pa.array(partition == k)).to_batches(max_chunksize=3)), out):
            assert batch.schema == out
            parts += [(r["part_segment"], r["part_bidders"], r["part_unit"], r["part_gram"]) for r in batch.to_pylist()]
    units = {None: max(p.bid_exponent for p in found.pieces)}
    for p in found.pieces:
        units[p.key.segment] = max(units.get(p.key.segment, p.bid_exponent), p.bid_exponent)
    return combined_grams(parts, len(found.pieces[0].sum_labels), units)


def test_segment_forms_add_up_to_each_segments_plain_form(tmp_path):
    """Per-(segment, bidder) rows give the pooled form and one form per segment, each the plain ``sum_b U_b U_b'``."""
    path = tmp_path / "bays.parquet"
    _segmented_log(5000, bidder_pool=2500).to_parquet(path, index=False)
    found = LocalEngine().log_pieces(str(path), SEGMENTED, max_bids_per_shard=4000, cluster="bidder")
    assert found.shards >= 4
    grams = _partition_forms(found)
    assert set(grams) == {None, "dock", "yard"}
    plain = {None: gram_of(bidder_totals(found.pieces))}
    for label in ("dock", "yard"):
        plain[label] = gram_of(bidder_totals([p for p in found.pieces if p.key.segment == label]))
    for label, form in plain.items():
        assert grams[label].n_bidders == form.n_bidders, label
        assert grams[label].bid_exponent == form.bid_exponent, label
        np.testing.assert_allclose(grams[label].gram, form.gram, rtol=1e-12, atol=0, err_msg=str(label))
    # a bidder of both bays counts once in the pooled form, once in each bay's
    assert grams[None].n_bidders < grams["dock"].n_bidders + grams["yard"].n_bidders
    pooled = grams.pop(None)
    by_gram = combine_pieces([p.without_bidder_sums() for p in found.pieces], SEGMENTED, cluster="bidder",
                             bidder_gram=pooled, segment_grams=grams)
    by_sums = combine_pieces(found.pieces, SEGMENTED, cluster="bidder")
    assert set(by_gram.segments) == {"dock", "yard"}
    _close(by_gram.table, by_sums.table, 1e-12)


def test_a_partition_without_bidder_rows_sends_only_the_answers():
    schema = _answer_schema(with_gram=True)
    answer = pa.table({f.name: pa.nulls(1, f.type) for f in _answer_schema()}, schema=_answer_schema())
    answer = answer.set_column(1, "n_bids", pa.array([7], pa.int64()))
    out = pa.Table.from_batches(list(partition_gram(iter(answer.to_batches()), schema)), schema=schema)
    assert out.num_rows == 1 and out.column("n_bids").to_pylist() == [7]
    assert out.column("part_bidders").to_pylist() == [None]


# --- on Spark ----------------------------------------------------------------------------------

#: Runs in a child process: a new local[2] session with Spark's default driver settings (1 GiB heap,
#: no spark.driver.memory), the log estimated on Spark, the rows written as Parquet.
_SPARK_CHILD = """
import sys
import yaml
from counterbid.estimators import parse_experiments
from counterbid.readers.engines import SparkEngine, estimate_bid_log
from counterbid.readers.spark_shards import spark_session
spark = spark_session("local[2]")
assert spark.sparkContext.getConf().get("spark.driver.memory") is None
exp = parse_experiments(yaml.safe_load(open(sys.argv[1]).read()))["ledges"]
result = estimate_bid_log(sys.argv[2], exp, engine=SparkEngine(spark), max_bids_per_shard=int(sys.argv[3]))
result.table.assign(cluster=result.cluster, shards=result.shards).to_parquet(sys.argv[4], index=False)
"""


def _child_env(java_home: str) -> dict:
    return {**os.environ, "JAVA_HOME": java_home}


@pytest.mark.spark
@pytest.mark.slow
def test_two_million_distinct_bidders_under_default_driver_settings(tmp_path, java_home):
    """2M bids, ~1.96M distinct text bidder ids (a few repeat: `auto` clusters by bidder), 3 shards."""
    bids = _log(500_000, bidder_pool=50_000_000)
    distinct = bids["bidder_id"].nunique()
    assert 1_900_000 < distinct < len(bids)
    log, spec, out = tmp_path / "bids.parquet", tmp_path / "spec.yaml", tmp_path / "spark.parquet"
    bids.to_parquet(log, index=False)
    spec.write_text(SPEC)
    del bids
    done = subprocess.run([sys.executable, "-c", _SPARK_CHILD, str(spec), str(log), "700000", str(out)],
                          capture_output=True, text=True, env=_child_env(java_home), timeout=900)
    assert done.returncode == 0, done.stderr[-3000:]
    spark_rows = pd.read_parquet(out)
    local = estimate_bid_log(log, EXPERIMENT, max_bids_per_shard=700_000)
    assert local.shards == 3 and set(spark_rows["shards"]) == {3}
    assert local.cluster == "bidder" and set(spark_rows["cluster"]) == {"bidder"}
    _close(spark_rows, local.table, 1e-9)


_FAILURE_CHILD = """
import sys
from counterbid.cli import main
from counterbid.readers.spark_shards import spark_session
spark_session("local[1]", dict([sys.argv[1].split("=", 1)]))
sys.exit(main(sys.argv[2:]))
"""


@pytest.mark.spark
@pytest.mark.slow
@pytest.mark.parametrize("setting, cause", [
    # the Python workers' address space capped (RLIMIT_AS): they run out of memory loading numpy/scipy
    ("spark.executor.pyspark.memory=200m", "out of memory in a Python worker"),
    # the driver refuses results above 1 KiB (the first job's already)
    ("spark.driver.maxResultSize=1k", "the results exceed spark.driver.maxResultSize"),
])
def test_a_failed_spark_job_reports_its_cause_in_one_line(tmp_path, java_home, setting, cause):
    log, spec = tmp_path / "bids.parquet", tmp_path / "spec.yaml"
    _log(20_000, bidder_pool=50_000).to_parquet(log, index=False)
    spec.write_text(SPEC)
    done = subprocess.run([sys.executable, "-c", _FAILURE_CHILD, setting, "estimate", "--bids", str(log),
                           "--experiment", str(spec), "--engine", "spark"],
                          capture_output=True, text=True, env=_child_env(java_home), timeout=600)
    assert done.returncode == 2, done.stderr[-3000:]
    ours = [line for line in done.stderr.splitlines() if line.startswith("counterbid: ")]
    assert len(ours) == 1, done.stderr[-3000:]
    assert ours[0].startswith(f"counterbid: error: {log}: the Spark engine failed: {cause}"), ours[0]
    assert "no shard holds bids" not in done.stderr
    assert "Traceback" not in done.stderr and "\tat " not in done.stderr  # no Python or Java stack


@pytest.mark.spark
def test_segmented_bidder_clustering_on_spark_equals_the_local_engine(spark, tmp_path):
    """Segmented, clustered by bidder, several shards: one Gram form per segment from the executors, the local rows."""
    from counterbid.readers.engines import SparkEngine

    path = tmp_path / "bays.parquet"
    _segmented_log(4000, bidder_pool=2000).to_parquet(path, index=False)
    found = SparkEngine(spark).log_pieces(str(path), SEGMENTED, max_bids_per_shard=3500, cluster="bidder")
    # the Gram route: no piece brought its bidder sums to the driver
    assert found.shards >= 4 and all(p.bidder_sums is None for p in found.pieces)
    assert found.gram is not None and set(found.segment_grams) == {"dock", "yard"}
    local = estimate_bid_log(path, SEGMENTED, max_bids_per_shard=3500, cluster="bidder")
    on_spark = estimate_bid_log(str(path), SEGMENTED, engine=SparkEngine(spark), max_bids_per_shard=3500,
                                cluster="bidder")
    assert local.cluster == on_spark.cluster == "bidder" and local.segments == on_spark.segments
    assert len(local.table) == len(on_spark.table) and local.table["segment"].notna().any()
    assert list(local.table["segment"].astype(str)) == list(on_spark.table["segment"].astype(str))
    _close(on_spark.table, local.table, 1e-9)


def test_packed_rows_hold_every_bidder_once_in_its_bucket():
    """A shard's keys and sums packed per bucket unpack to the same rows, each key in its unsigned value's bucket."""
    rng = np.random.default_rng(3)
    keys = rng.integers(np.iinfo(np.int64).min, np.iinfo(np.int64).max, size=2001, dtype=np.int64)
    keys[:3] = [-1, 0, np.iinfo(np.int64).min]  # negative keys: buckets of the unsigned value
    sums = rng.normal(size=(keys.size, 6)) * np.ldexp(1.0, np.arange(-3, 3))
    sums[5, 2], sums[9, 0] = -0.0, np.finfo(float).tiny
    rows = bidder_table(keys, -4, sums, 7, _answer_schema(), segment="dock", buckets=5)
    assert rows.num_rows == 5 and rows.column("shard").to_pylist() == [7] * 5
    assert rows.column("bidder_unit").to_pylist() == [-4] * 5
    assert rows.column("bidder_segment").to_pylist() == ["dock"] * 5
    assert rows.column("n_bids").null_count == 5
    got_keys, got_sums = [], []
    packed = zip(rows.column("bidder_bucket").to_pylist(), rows.column("bidder_keys").to_pylist(),
                 rows.column("bidder_sums").to_pylist())
    for bucket, packed_keys, packed_sums in packed:
        mine = np.frombuffer(packed_keys, "<i8")
        assert ((mine.view(np.uint64) % np.uint64(5)) == bucket).all()
        got_keys.append(mine)
        got_sums.append(np.frombuffer(packed_sums, "<f8").reshape(mine.size, 6))
    order = np.argsort(np.concatenate(got_keys), kind="stable")
    want = np.argsort(keys, kind="stable")
    np.testing.assert_array_equal(np.concatenate(got_keys)[order], keys[want])
    np.testing.assert_array_equal(np.concatenate(got_sums)[order], sums[want])  # bit for bit, -0.0 and tiny too
    assert (bidder_buckets(keys, 5) == keys.view(np.uint64) % np.uint64(5)).all()
    with pytest.raises(ValueError, match="at least one"):
        bidder_buckets(keys, 0)


def test_the_partition_form_does_not_depend_on_the_order_rows_arrive_in(tmp_path):
    """Spark's shuffle delivers a partition's rows in no set order: the form is the same, bit for bit, in any order."""
    path = tmp_path / "bids.parquet"
    _log(6000, bidder_pool=3000, rng=12).to_parquet(path, index=False)
    found = LocalEngine().log_pieces(str(path), EXPERIMENT, max_bids_per_shard=4000, cluster="bidder")
    assert found.shards >= 4
    schema, out = _answer_schema(), _answer_schema(with_gram=True)
    rows = []
    for shard in sorted({p.key.shard for p in found.pieces}):
        ids, unit, sums = bidder_rows([p for p in found.pieces if p.key.shard == shard])
        rows.append(bidder_table(ids, unit, sums, shard, schema, buckets=1))
    rows = pa.concat_tables(rows)
    forms = []
    for seed in range(4):
        shuffled = rows.take(np.random.default_rng(seed).permutation(rows.num_rows))
        got = pa.Table.from_batches(list(partition_gram(iter(shuffled.to_batches(max_chunksize=1)), out)), schema=out)
        forms.append(np.array(got.column("part_gram").to_pylist()[0]))
    for form in forms[1:]:
        np.testing.assert_array_equal(form, forms[0])
    plain = gram_of(bidder_totals(found.pieces))
    size = len(found.pieces[0].sum_labels)
    unit = int(got.column("part_unit")[0].as_py())
    gram = combined_gram([(plain.n_bidders, unit, forms[0])], size, plain.bid_exponent)
    np.testing.assert_allclose(gram.gram, plain.gram, rtol=1e-12, atol=0)


def test_packed_sums_of_another_width_are_refused():
    schema = _answer_schema()
    rows = pa.concat_tables([bidder_table(np.arange(4), 0, np.ones((4, 3)), 0, schema),
                             bidder_table(np.arange(4, 8), 0, np.ones((4, 2)), 1, schema)])
    with pytest.raises(ValueError, match="same number of values"):
        list(partition_gram(iter(rows.to_batches()), _answer_schema(with_gram=True)))
    with pytest.raises(ValueError, match="sums of shape"):
        bidder_table(np.arange(3), 0, np.ones(3), 0, schema)
    assert bidder_table(np.zeros(0, np.int64), 0, np.zeros((0, 3)), 0, schema, buckets=4).num_rows == 0
