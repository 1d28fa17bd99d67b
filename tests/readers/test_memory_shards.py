"""A log split into its shards in memory (`readers/memory_shards.py`) against the file-based split.

The file-based split (DuckDB's md5 shard of every row, each shard rewritten to Parquet and read
back, text bidder ids factorized across shards when combined) is the plain formula; the in-memory
split hashes each distinct auction id once and carries bidder ids as the day's integer codes, and
the command line's file-based split carries them as 64-bit hashes of their text. All three
estimate the same rows of the same shards with the same pure estimator, so every per-bidder sum is
the same number; only the order in which the combination adds bidders differs, hence 1e-12
relative (rounding of sums of a few thousand doubles is ~1e-15 relative).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    combine_pieces, n_shards, parse_experiments, shard_of, simulate_experiment, stratum_pieces,
)
from counterbid.estimators.errors import InputError
from counterbid.readers.engines import LocalEngine, estimate_bid_log
from counterbid.readers.shards import bid_log_rows, pieces_by_shard, staged_bid_log_shards
from counterbid.readers.memory_shards import (
    MEMORY_BUDGET_ENV, factorized_in_order, fits_in_memory, memory_budget_mib, row_shards,
)

SPEC = {"experiments": [
    {"id": "crates", "control_arm": "flat", "payment_rule": "gsp", "arms": [
        {"name": "flat", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
        {"name": "tiered", "share": 0.3, "position_weights": [0.55, 0.15]},
    ]},
]}
EXP = parse_experiments(SPEC)["crates"]
MAX = 1500  # bids per shard: 5 shards of the ~7 000-bid logs below


def _log(n_auctions=1800, rng=21) -> pd.DataFrame:
    """Text auction ids, text bidder ids of a small pool (bidders persist across auctions), a few
    single-bidder auctions (left out, and counted alike by both splits)."""
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), EXP, n_bidders={1: 0.05, 3: 0.55, 5: 0.4},
                               n_auctions=n_auctions, rng=rng, bidder_pool=700)
    bids["auction_id"] = "crate-" + bids["auction_id"].astype(str)
    bids["bidder_id"] = "stall-" + bids["bidder_id"].astype(str)
    return bids


def _md5_shard(text: str, n: int) -> int:
    """The documented rule, written out: int(md5(text).hexdigest()[:8], 16) % n (RFC 1321)."""
    return int(hashlib.md5(text.encode("utf-8")).hexdigest()[:8], 16) % n


@pytest.mark.parametrize("n", [2, 3, 7])
def test_row_shards_are_the_md5_rule_of_each_id(n):
    text = pd.Series(["crate-1", "crate-2", "crate-1", "ü-crate", "crate-30", "crate-2", None, "crate-9"])
    got = row_shards(text.astype("category"), n)
    want = [0 if pd.isna(t) else _md5_shard(t, n) for t in text]
    assert got.tolist() == want
    assert got[~text.isna().to_numpy()].tolist() == shard_of(text.dropna(), n).tolist()
    rng = np.random.default_rng(n)
    ints = pd.Series(rng.permutation(np.repeat(rng.integers(-10**12, 10**12, 400), 3)))
    assert row_shards(ints, n).tolist() == [_md5_shard(str(v), n) for v in ints]
    runs = pd.Series(np.sort(ints.to_numpy()))  # a log written auction by auction: ids in runs
    assert row_shards(runs, n).tolist() == [_md5_shard(str(v), n) for v in runs]
    nullable = ints.astype("Int64")
    nullable[5] = pd.NA
    assert row_shards(nullable, n)[5] == 0 and row_shards(nullable, n)[6] == _md5_shard(str(ints[6]), n)


@pytest.mark.parametrize("seed", range(4))
def test_runs_factorize_as_pandas_does(seed):
    """Ids that never decrease (runs) take the no-hash path; the plain formula is ``pd.factorize``."""
    rng = np.random.default_rng(seed)
    ids = np.repeat(np.cumsum(rng.integers(1, 1_000, 500)) - 10**6, rng.integers(1, 9, 500))
    shuffled = rng.permutation(ids)  # not in runs: pandas' own path
    for values in (ids, shuffled, ids[:1], ids[:0]):
        codes, uniques = factorized_in_order(values)
        want_codes, want_uniques = pd.factorize(values, sort=False)
        assert np.array_equal(codes, want_codes) and np.array_equal(uniques, want_uniques)


def _estimates(path, monkeypatch, budget: str, **kw):
    monkeypatch.setenv(MEMORY_BUDGET_ENV, budget)
    found = LocalEngine().log_pieces(str(path), EXP, max_bids_per_shard=MAX, cluster=kw.get("cluster", "auto"))
    return found, estimate_bid_log(path, EXP, max_bids_per_shard=MAX, **kw)


def _plain(path, cluster):
    """The plain formula: DuckDB's shard files, text bidder ids matched across shards by their text."""
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX), by_auction=False) as shards:
        found = pieces_by_shard(shards, EXP, cluster=cluster, source=str(path))
    return found, combine_pieces(found.pieces, EXP, cluster=cluster, n_excluded_auctions=found.n_excluded_auctions)


def _same_numbers(a, b):
    keys = ["arm", "metric", "n_auctions", "n_bids", "status"]
    assert a.table[keys].equals(b.table[keys])
    for col in ("estimate", "std_error", "ci_low", "ci_high"):
        np.testing.assert_allclose(a.table[col].to_numpy(float), b.table[col].to_numpy(float), rtol=1e-12, atol=0,
                                   err_msg=col)


@pytest.mark.parametrize("cluster", ["auto", "bidder", "auction"])
def test_in_memory_split_and_hashed_ids_equal_the_plain_split(tmp_path, monkeypatch, cluster):
    bids = _log()
    path = tmp_path / "crates.parquet"
    bids.to_parquet(path, index=False)
    mem_pieces, mem = _estimates(path, monkeypatch, "1200", cluster=cluster)  # split in memory, integer codes
    hashed_pieces, hashed = _estimates(path, monkeypatch, "0", cluster=cluster)  # shard files, 64-bit hashes
    plain_pieces, plain = _plain(path, cluster)
    assert mem.shards == hashed.shards == 5 and mem.cluster == hashed.cluster == plain.cluster
    assert mem.cluster == ("auction" if cluster == "auction" else "bidder")
    if cluster != "auction":  # each shortcut really ran: integer ids where the plain path has text
        assert all(p.bidder_ids.dtype == np.int64 for p in mem_pieces.pieces)
        assert all(p.bidder_ids.dtype == object for p in plain_pieces.pieces)
        sizes = [p.bidder_ids.size for p in plain_pieces.pieces]
        assert [p.bidder_ids.size for p in mem_pieces.pieces] == sizes
        # the file-based split set its hashed sums aside shard by shard: the pieces keep none, the
        # bidder form counts the plain path's distinct bidders
        assert all(p.bidder_ids is None for p in hashed_pieces.pieces)
        distinct = pd.unique(np.concatenate([p.bidder_ids for p in plain_pieces.pieces])).size
        assert hashed_pieces.gram.n_bidders == distinct
    else:
        assert hashed_pieces.gram is None
    assert [p.key for p in mem_pieces.pieces] == [p.key for p in plain_pieces.pieces]
    assert mem_pieces.n_excluded_auctions == plain_pieces.n_excluded_auctions > 0
    _same_numbers(mem, plain)
    _same_numbers(hashed, plain)  # no collision among 700 ids: the same clusters, the same SEs


def test_auto_with_repeats_in_some_shards_only_clusters_by_auction_as_the_plain_split(tmp_path, monkeypatch):
    """The in-memory split leaves out the auction covariance of pieces with bidder sums; when `auto`
    then combines by auction (a shard whose bidders never repeat keeps no sums), it estimates again."""
    bids = _log(rng=8)
    shard = shard_of(bids["auction_id"], 5)
    lonely = shard == 2  # every bid of shard 2 by a bidder of its own: no repeats there
    own = pd.Series(np.arange(int(lonely.sum())), index=bids.index[lonely])
    bids.loc[lonely, "bidder_id"] = "lone-" + own.astype(str)
    path = tmp_path / "mixed.parquet"
    bids.to_parquet(path, index=False)
    mem_pieces, mem = _estimates(path, monkeypatch, "1200", cluster="auto")
    plain_pieces, plain = _plain(path, "auto")
    kept = {p.key.shard: p.bidder_sums is not None for p in plain_pieces.pieces}
    assert not kept[2] and kept[0]  # the plain split's pieces are mixed, as intended
    assert mem.cluster == plain.cluster == "auction"
    assert all(np.isfinite(p.covariance[0, 0]) for p in mem_pieces.pieces)
    _same_numbers(mem, plain)
    _, bidder = _estimates(path, monkeypatch, "1200", cluster="bidder")  # forced: sums everywhere, by bidder
    assert bidder.cluster == "bidder" and _plain(path, "bidder")[1].cluster == "bidder"
    _same_numbers(bidder, _plain(path, "bidder")[1])


@pytest.mark.parametrize("cluster", ["auto", "bidder"])
def test_one_shard_with_coded_bidders_equals_the_text_ids(tmp_path, cluster):
    """A log of one shard: its bidders meet on their dictionary codes; the plain formula keys them by text."""
    bids = _log(n_auctions=900, rng=13)
    path = tmp_path / "one.parquet"
    bids.to_parquet(path, index=False)
    found = LocalEngine().log_pieces(str(path), EXP, max_bids_per_shard=10**6, cluster=cluster)
    coded = estimate_bid_log(path, EXP, max_bids_per_shard=10**6, cluster=cluster)
    plain_pieces = pieces_by_shard([(0, path)], EXP, cluster=cluster, source=str(path))
    plain = combine_pieces(plain_pieces.pieces, EXP, cluster=cluster,
                           n_excluded_auctions=plain_pieces.n_excluded_auctions)
    assert found.shards == coded.shards == 1 and coded.cluster == plain.cluster == "bidder"
    assert all(p.bidder_ids.dtype == np.int64 for p in found.pieces)  # the shortcut ran
    assert all(p.bidder_ids.dtype == object for p in plain_pieces.pieces)
    assert [p.bidder_ids.size for p in found.pieces] == [p.bidder_ids.size for p in plain_pieces.pieces]
    _same_numbers(coded, plain)
    bad = bids.copy()
    bad.loc[7, "bidder_id"] = None
    bad.to_parquet(path, index=False)
    with pytest.raises(InputError, match=r"column 'bidder_id' row 7 is null"):
        estimate_bid_log(path, EXP, max_bids_per_shard=10**6, cluster=cluster)
    twice = bids.copy()
    row = int(np.flatnonzero(twice["auction_id"].to_numpy() == twice.loc[0, "auction_id"])[1])
    twice.loc[row, "bidder_id"] = twice.loc[0, "bidder_id"]
    twice.to_parquet(path, index=False)
    with pytest.raises(InputError, match=rf"bidder '?{twice.loc[0, 'bidder_id']}'? bids twice .*rows 0 and {row}"):
        estimate_bid_log(path, EXP, max_bids_per_shard=10**6, cluster=cluster)  # the message quotes the text


def test_bad_row_in_a_later_shard_gets_the_file_split_line(tmp_path, monkeypatch):
    bids = _log(rng=5)
    shard = shard_of(bids["auction_id"], 5)
    row = int(np.flatnonzero(shard == 3)[10])
    same = bids.index[(bids["auction_id"] == bids.loc[row, "auction_id"]) & (bids.index != row)][0]
    bids.loc[row, "bidder_id"] = bids.loc[same, "bidder_id"]  # a bidder twice in one auction
    path = tmp_path / "twice.parquet"
    bids.to_parquet(path, index=False)
    lines = []
    for budget in ("1200", "0"):
        monkeypatch.setenv(MEMORY_BUDGET_ENV, budget)
        with pytest.raises(InputError) as err:
            estimate_bid_log(path, EXP, max_bids_per_shard=MAX)
        lines.append(str(err.value))
    assert lines[0] == lines[1] and lines[0].startswith(f"{path} (shard 3): bidder 'stall-")


def test_budget_setting(monkeypatch):
    monkeypatch.delenv(MEMORY_BUDGET_ENV, raising=False)
    assert memory_budget_mib() == 1200 and fits_in_memory(10_000_000) and not fits_in_memory(30_000_000)
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "0")
    assert not fits_in_memory(1)
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "lots")
    with pytest.raises(InputError, match=f"^{MEMORY_BUDGET_ENV} must be a whole number of MiB >= 0; got 'lots'$"):
        fits_in_memory(1)


def _segmented_and_scaled_logs():
    """The spec's auction-level columns travel through both splits: segments, then scale covariates."""
    from counterbid.estimators import SimulatedSegment, simulate_segmented_experiment

    base = SPEC["experiments"][0]
    spec = {"experiments": [dict(base, id="crates-aisles", segments=["aisle"]),
                            dict(base, id="crates-scaled", scale_covariates=["crate_size"])]}
    exps = parse_experiments(spec)
    aisles = {"dry": SimulatedSegment(st.gamma(3.0, scale=0.4), 3, 0.5),
              "cold": SimulatedSegment(st.lognorm(0.5, scale=1.2), {3: 0.5, 5: 0.5}, 0.5)}
    segmented = simulate_segmented_experiment(aisles, exps["crates-aisles"], n_auctions=1800, rng=8, column="aisle",
                                              bidder_pool=700)
    scaled = simulate_experiment(st.lognorm(0.5, scale=0.8), exps["crates-scaled"], n_bidders={3: 0.6, 5: 0.4},
                                 n_auctions=1800, rng=9, bidder_pool=700,
                                 scale_covariates={"crate_size": (0.5, st.norm(0.0, 1.0))})
    return [(exps["crates-aisles"], segmented), (exps["crates-scaled"], scaled)]


@pytest.mark.parametrize("which", [0, 1], ids=["segments", "scale_covariates"])
def test_in_memory_split_reads_the_spec_auction_columns(tmp_path, monkeypatch, which):
    exp, bids = _segmented_and_scaled_logs()[which]
    path = tmp_path / "log.parquet"
    bids.to_parquet(path, index=False)
    monkeypatch.setenv(MEMORY_BUDGET_ENV, "1200")
    mem = estimate_bid_log(path, exp, max_bids_per_shard=MAX, cluster="bidder")
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX)) as shards:
        found = pieces_by_shard(shards, exp, cluster="bidder", source=str(path))
    plain = combine_pieces(found.pieces, exp, cluster="bidder", n_excluded_auctions=found.n_excluded_auctions)
    assert mem.shards == 5 and (set(mem.segments) == {"dry", "cold"} if which == 0 else not mem.segments)
    keys = ["arm", "segment", "metric", "n_auctions", "n_bids", "status"]
    assert mem.table[keys].equals(plain.table[keys])
    for col in ("estimate", "std_error", "ci_low", "ci_high"):
        np.testing.assert_allclose(mem.table[col].to_numpy(float), plain.table[col].to_numpy(float), rtol=1e-12,
                                   atol=0, err_msg=col)


FLOORED = parse_experiments({"experiments": [dict(SPEC["experiments"][0], id="crates-floor", floor=0.45)]})["crates-floor"]


def _sunk_log(n_shards: int, sunk: int) -> pd.DataFrame:
    """A floored log whose auctions of shard ``sunk`` all bid below the floor (unshown, as logged)."""
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), FLOORED, n_bidders={3: 0.6, 5: 0.4},
                               n_auctions=1800, rng=31, bidder_pool=700, floor=FLOORED.floor, payment_rule="gsp")
    bids["auction_id"] = "crate-" + bids["auction_id"].astype(str)
    bids["bidder_id"] = "stall-" + bids["bidder_id"].astype(str)
    rows = shard_of(bids["auction_id"], n_shards) == sunk
    bids.loc[rows, "bid"] = np.linspace(0.05, 0.44, int(rows.sum()))
    bids.loc[rows, "position"] = np.nan
    return bids


@pytest.mark.parametrize("cluster", ["auto", "auction"])
def test_a_shard_with_no_bid_at_the_floor_gives_the_same_day_on_every_split(tmp_path, monkeypatch, cluster):
    """Shard 2 holds no eligible bid: it counts at revenue 0 on the in-memory split, the hashed-id file
    split and the plain split alike, which equal the estimator's own combination of the shards (1e-12)."""
    bids = _sunk_log(5, 2)
    path = tmp_path / "floor.parquet"
    bids.to_parquet(path, index=False)
    results = {}
    for name, budget in (("memory", "1200"), ("files", "0")):
        monkeypatch.setenv(MEMORY_BUDGET_ENV, budget)
        results[name] = estimate_bid_log(path, FLOORED, max_bids_per_shard=MAX, cluster=cluster)
    with staged_bid_log_shards(path, n_shards(bid_log_rows(path), MAX)) as shards:
        found = pieces_by_shard(shards, FLOORED, cluster=cluster, source=str(path))
    assert {p.shard for p in found.pieces if p.below_floor} == {2}
    plain = combine_pieces(found.pieces, FLOORED, cluster=cluster, n_excluded_auctions=found.n_excluded_auctions)
    shard = shard_of(bids["auction_id"], 5)
    own = [p for k in range(5) for p in stratum_pieces(bids[shard == k], FLOORED, shard=k, cluster=cluster)]
    reference = combine_pieces(own, FLOORED, cluster=cluster, n_excluded_auctions=found.n_excluded_auctions)
    _same_numbers(plain, reference)
    for result in results.values():
        assert result.shards == 5
        _same_numbers(result, reference)
    revenue = reference.table[reference.table["metric"] == "revenue_per_auction"]
    assert set(revenue["n_auctions"]) == {bids["auction_id"].nunique()}  # shard 2's auctions count
