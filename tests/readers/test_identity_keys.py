"""Text ids as integers without a dictionary (`readers/identity_keys.py`) against the plain reader.

The plain formula is `read_bids`: Arrow's dictionary of each text id column, codes in order of first
appearance (what `pd.factorize` gives). The keyed reader must give the same codes (auction runs, codes
of 64-bit bidder keys), give way (``None``) wherever it does not apply, and leave every estimate and
every error line of `counterbid estimate`'s local engine as the plain reader gives them.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.stats as st

from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.estimators.errors import InputError
from counterbid.readers.bid_log import read_bids
from counterbid.readers.engines import LocalEngine, estimate_bid_log
from counterbid.readers.identity_keys import auction_runs, bidder_keys, id_keys, keyed_bids
from counterbid.readers.memory_shards import MEMORY_BUDGET_ENV

SPEC = {"experiments": [
    {"id": "pallets", "control_arm": "dock", "payment_rule": "gsp", "arms": [
        {"name": "dock", "share": 0.6, "position_weights": [0.45, 0.2, 0.1]},
        {"name": "ramp", "share": 0.4, "position_weights": [0.5, 0.25]},
    ]},
]}
EXP = parse_experiments(SPEC)["pallets"]
COLUMNS = ["experiment_id", "auction_id", "bidder_id", "arm", "bid", "position"]


def _log(n_auctions=1500, rng=3) -> pd.DataFrame:
    """Text auction ids written auction by auction, text bidder ids of a pool (they repeat)."""
    bids = simulate_experiment(st.gamma(2.5, scale=0.3), EXP, n_bidders={1: 0.05, 2: 0.35, 4: 0.6},
                               n_auctions=n_auctions, rng=rng, bidder_pool=600)
    bids["auction_id"] = "pallet-" + bids["auction_id"].astype(str)
    bids["bidder_id"] = "hauler-" + bids["bidder_id"].astype(str)
    return bids


def _write(bids: pd.DataFrame, path, row_group_size=700) -> str:
    pq.write_table(pa.Table.from_pandas(bids, preserve_index=False), path, row_group_size=row_group_size)
    return str(path)


def _chunks(values: list, cuts: list[int]) -> list[pa.Array]:
    bounds = [0, *cuts, len(values)]
    return [pa.array(values[lo:hi], pa.string()) for lo, hi in zip(bounds[:-1], bounds[1:])]


@pytest.mark.parametrize("seed", range(5))
def test_auction_runs_are_factorize_codes_across_any_batches(seed):
    rng = np.random.default_rng(seed)
    ids = [f"pallet-{v}" for v in rng.permutation(400)]
    values = [i for i, n in zip(ids, rng.integers(1, 6, 400)) for _ in range(n)]
    cuts = sorted(rng.choice(np.arange(1, len(values)), size=7, replace=False).tolist())  # runs cut across batches
    runs = auction_runs(_chunks(values, cuts), len(values))
    codes, uniques = pd.factorize(pd.Series(values), sort=False)
    assert runs is not None and np.array_equal(runs.codes, codes) and runs.ids.to_pylist() == list(uniques)


def test_auction_runs_give_way_when_ids_recur_or_are_null():
    values = ["pallet-a", "pallet-a", "pallet-b", "pallet-a"]  # 'a' again after 'b': not written in runs
    assert auction_runs(_chunks(values, [2]), 4) is None
    assert auction_runs(_chunks(["pallet-a", "pallet-b"], [1]) + [pa.array(["pallet-a"], pa.string())], 3) is None
    assert auction_runs([pa.array(["pallet-a", None, "pallet-c"], pa.string())], 3) is None
    assert auction_runs(_chunks(["pallet-a", "pallet-b"], []), 3) is None  # fewer rows than promised


def test_keys_are_one_function_of_the_text_whatever_the_arrow_type(tmp_path):
    text = ["", "a", "hauler-1", "hauler-1", "ü-hauler", "a much longer hauler id than twelve bytes"]
    path = _write(pd.DataFrame({"bidder_id": text}), tmp_path / "k.parquet")
    from_file = bidder_keys([path])
    assert from_file is not None and from_file.dtype == np.int64
    for t in (pa.string(), pa.large_string(), pa.string_view()):
        assert np.array_equal(id_keys(pa.array(text, t)), from_file)
    assert from_file[2] == from_file[3] and len(set(from_file.tolist())) == 5
    with_null = _write(pd.DataFrame({"bidder_id": ["a", None]}), tmp_path / "n.parquet")
    assert bidder_keys([with_null]) is None


def test_keyed_frame_has_the_plain_readers_codes(tmp_path):
    bids = _log()
    path = _write(bids, tmp_path / "log.parquet")
    keyed = keyed_bids(path, COLUMNS, threads=2)
    plain = read_bids(path, columns=COLUMNS)
    assert keyed is not None and len(keyed.bids) == len(plain) == len(bids)
    assert np.array_equal(keyed.bids["auction_id"].to_numpy(), plain["auction_id"].cat.codes.to_numpy())
    assert keyed.auction_ids.to_pylist() == list(plain["auction_id"].cat.categories)
    assert np.array_equal(keyed.bids["bidder_id"].to_numpy(), plain["bidder_id"].cat.codes.to_numpy())
    for name in ("experiment_id", "arm", "bid", "position"):
        pd.testing.assert_series_equal(keyed.bids[name], plain[name])
    as_keys = keyed_bids(path, COLUMNS, bidder_keys_only=True)
    assert np.array_equal(as_keys.bids["bidder_id"].to_numpy(), id_keys(pa.array(bids["bidder_id"].tolist())))


def test_keyed_reader_reads_a_folder_in_the_plain_readers_row_order(tmp_path):
    bids = _log(rng=4)
    folder = tmp_path / "day"
    for k, part in enumerate(np.array_split(np.arange(len(bids)), 3)):
        (folder / f"part={k}").mkdir(parents=True)
        _write(bids.iloc[part], folder / f"part={k}" / "bids.parquet")
    keyed = keyed_bids(folder, COLUMNS)
    plain = read_bids(folder, columns=COLUMNS)
    assert keyed is not None
    assert np.array_equal(keyed.bids["bidder_id"].to_numpy(), plain["bidder_id"].cat.codes.to_numpy())
    assert np.array_equal(keyed.bids["auction_id"].to_numpy(), plain["auction_id"].cat.codes.to_numpy())


def test_keyed_reader_gives_way_where_it_does_not_apply(tmp_path):
    bids = _log(rng=5)
    shuffled = _write(bids.sample(frac=1.0, random_state=2), tmp_path / "shuffled.parquet")  # no runs
    assert keyed_bids(shuffled, COLUMNS) is None
    integer = bids.assign(bidder_id=np.arange(len(bids)))
    assert keyed_bids(_write(integer, tmp_path / "int.parquet"), COLUMNS) is None
    null = bids.copy()
    null.loc[11, "bidder_id"] = None
    assert keyed_bids(_write(null, tmp_path / "null.parquet"), COLUMNS) is None
    assert keyed_bids(tmp_path / "missing.parquet", COLUMNS) is None


def _same(a, b, exact: bool):
    keys = ["arm", "metric", "n_auctions", "n_bids", "status"]
    assert a.table[keys].equals(b.table[keys]) and a.cluster == b.cluster and a.shards == b.shards
    for col in ("estimate", "std_error", "ci_low", "ci_high"):
        x, y = a.table[col].to_numpy(float), b.table[col].to_numpy(float)
        if exact:
            np.testing.assert_array_equal(x, y, err_msg=col)
        else:
            np.testing.assert_allclose(x, y, rtol=1e-12, atol=0, err_msg=col)


@pytest.mark.parametrize("route", ["memory", "files", "one"])
@pytest.mark.parametrize("cluster", ["auto", "auction"])
def test_estimates_equal_the_plain_readers(tmp_path, monkeypatch, route, cluster):
    """Codes equal to the dictionary's give the same numbers bit for bit (the in-memory split, one shard);
    the file-based split's bidders meet on DuckDB's key instead of FNV-1a, which only reorders the
    bidder sums: 1e-12 (rounding of sums of a few thousand doubles is ~1e-15 relative)."""
    import counterbid.readers.identity_keys as identity_keys

    path = _write(_log(rng=6), tmp_path / "log.parquet")
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "0" if route == "files" else "1200")
    most = 10**6 if route == "one" else 1200
    read, real = [], identity_keys.keyed_bids
    monkeypatch.setattr(identity_keys, "keyed_bids", lambda *a, **kw: read.append(real(*a, **kw)) or read[-1])
    keyed = estimate_bid_log(path, EXP, engine=LocalEngine(), max_bids_per_shard=most, cluster=cluster)
    # the keyed reader ran and applied: once for the day (in memory, one shard), once per shard file
    assert len(read) == (4 if route == "files" else 1) and all(r is not None for r in read)
    plain = estimate_bid_log(path, EXP, engine=LocalEngine(keyed_ids=False), max_bids_per_shard=most, cluster=cluster)
    assert keyed.shards == (1 if route == "one" else 4)
    assert keyed.cluster == ("auction" if cluster == "auction" else "bidder")
    _same(keyed, plain, exact=route != "files")


def _error_line(path, engine, monkeypatch, budget):
    monkeypatch.setenv(MEMORY_BUDGET_ENV, budget)
    with pytest.raises(InputError) as err:
        estimate_bid_log(path, EXP, engine=engine, max_bids_per_shard=1200)
    return str(err.value)


@pytest.mark.parametrize("fault", ["null bidder", "bidder twice", "two arms"])
def test_bad_input_gets_the_plain_readers_line(tmp_path, monkeypatch, fault):
    bids = _log(rng=7)
    first = bids.index[bids["auction_id"] == bids.loc[40, "auction_id"]]
    if fault == "null bidder":
        bids.loc[40, "bidder_id"] = None
    elif fault == "bidder twice":
        bids.loc[first[1], "bidder_id"] = bids.loc[first[0], "bidder_id"]
    else:
        bids.loc[first[1], "arm"] = "ramp" if bids.loc[first[0], "arm"] == "dock" else "dock"
    path = _write(bids, tmp_path / "bad.parquet")
    lines = {_error_line(path, LocalEngine(keyed_ids=keyed), monkeypatch, budget)
             for keyed in (True, False) for budget in ("1200", "0")}
    assert len(lines) == 1, lines
    line = lines.pop()
    assert "\n" not in line and line.startswith(str(path))
    assert ("is null" in line) if fault == "null bidder" else ("hauler-" in line or "pallet-" in line)


@pytest.mark.parametrize("keyed", [True, False])
def test_a_key_collision_inside_one_auction_is_named_not_reported_as_a_duplicate(tmp_path, monkeypatch, keyed):
    """Shard files key bidders by a 64-bit hash of the text (DuckDB's, or FNV-1a off the keyed reader).
    A real collision cannot be built, so the hash is replaced by one that sends two ids of one auction
    to one key: the error names the collision, never a duplicate bid the log does not hold."""
    import counterbid.readers.id_hashes as id_hashes
    import counterbid.readers.identity_keys as identity_keys

    bids = _log(rng=8)
    auction = bids.loc[bids.groupby("auction_id")["bidder_id"].transform("size") >= 2, "auction_id"].iloc[0]
    pair = bids.loc[bids["auction_id"] == auction, "bidder_id"].iloc[:2].tolist()
    path = _write(bids, tmp_path / "log.parquet")
    module, name = (identity_keys, "id_keys") if keyed else (id_hashes, "fnv1a_64")
    real = getattr(module, name)

    def colliding(ids, *args, **kwargs):
        keys = np.asarray(real(ids, *args, **kwargs)).copy()
        text = np.asarray(pa.array(ids).to_pylist(), dtype=object)
        keys[text == pair[1]] = keys[text == pair[0]][0] if (text == pair[0]).any() else keys[text == pair[1]]
        return keys

    monkeypatch.setattr(module, name, colliding)
    monkeypatch.setattr(identity_keys, "keyed_bids", lambda *a, **kw: None)  # the day is read shard by shard
    line = _error_line(path, LocalEngine(keyed_ids=keyed), monkeypatch, "0")
    assert "\n" not in line and "share a 64-bit key" in line and "cluster 'auction'" in line, line
    assert "twice" not in line
    # and the log estimates by auction, which keys no bidder
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "0")
    assert estimate_bid_log(path, EXP, engine=LocalEngine(keyed_ids=keyed), max_bids_per_shard=1200,
                            cluster="auction").cluster == "auction"
