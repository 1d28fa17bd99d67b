"""The running bidder window through the steps: the same to-date rows as the full recombination.

Five days of one experiment whose bidders (text ids from a pool of 240) come back every day, so
``auto`` clusters by bidder; day 3 is excluded by the spec. Each day runs load, validate,
estimate and write on a DuckDB file and on PostgreSQL, then reruns of an earlier and of the last
day. After every write, the stored to-date rows must equal ``combine_pieces`` over every stored
piece of the window with its bidder sums (the recombination the window replaces) to 1e-12
relative (exact identities; the running form's rounding is of order 1e-16 times the ratio of the
form to a lift's variance), and the stored window must equal a rebuild from the stored pieces.
What it can catch: a day counted twice or missing after a rerun or a left-out day, a returning
bidder counted as new, a stored window that no longer matches its days' pieces, either sink's SQL.

A segmented experiment (two segments; the second starts on day 2) runs the same days: its pooled
and per-segment to-date rows must equal the full recombination to 1e-12, and the stored window of
every key (pooled, each segment) its rebuild from the stored pieces. What that adds: a segment's
totals mixed with another's or with the pooled ones (a bidder bids in both segments), a segment
new to the window in the daily update, the segment key of the window tables' SQL.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
import scipy.stats as st

from counterbid.estimators import (
    SimulatedSegment, bidder_totals, combine_pieces, gram_of, parse_experiments, simulate_experiment,
    simulate_segmented_experiment,
)
from counterbid.operators import partition, window_state
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 6, 1)
DAYS = [START + dt.timedelta(days=k) for k in range(5)]
NUMBERS = ["estimate", "std_error", "ci_low", "ci_high"]


def _spec():
    return parse_experiments({"experiments": [{
        "id": "lanterns", "control_arm": "even", "start": str(START), "exclude_days": [str(DAYS[2])],
        "checks": {"warmup": {"days": 0}},
        "arms": [{"name": "even", "share": 0.6, "position_weights": [0.4, 0.25, 0.1]},
                 {"name": "tall", "share": 0.4, "position_weights": [0.55, 0.2, 0.05]}],
        # a layout that did not run: its revenue is one more column of the bidder sums and of the window
        "what_if": [{"name": "between", "position_weights": [0.48, 0.22, 0.08]}]}]})["lanterns"]


@pytest.fixture(scope="module")
def lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("lake") / "bids"
    exp = _spec()
    for k, day in enumerate(DAYS):
        bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.5, 4: 0.5}, n_auctions=700,
                                   rng=40 + k, bidder_pool=240, first_auction_id=10_000 * k).drop(columns=["ds"])
        bids["bidder_id"] = "seat-" + bids["bidder_id"].astype(str)
        (root / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(root / f"ds={day}" / "lanterns.parquet", index=False)
    return root


def _run_day(hook, lake, exp, stage, day, run):
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=day, staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, day)
    results = partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=day)
    partition.record_checks(staged, results)
    out = partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=stage, run_id=run)
    partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=stage)
    return out


def _check_against_full_recombination(hook, exp, day, days_used):
    stored = hook.stored_piece_frames(experiment_id=exp.id, days=days_used, tables=list(partition.PIECE_TABLES.values()))
    pieces = window_state.pieces_of_rows(stored)
    want = combine_pieces(pieces, exp, cluster="auto")
    assert want.cluster == "bidder"  # the bidders repeat: the case where the window matters
    rows = hook.fetch_df("report_to_date_estimates", {"experiment_id": exp.id})
    got = rows[rows["ds"].dt.date == day].set_index(["arm", "metric"])
    want = want.table.set_index(["arm", "metric"])
    assert set(got.xs("revenue_per_auction", level="metric")["cluster"]) == {"bidder"} and len(got) == len(want)
    np.testing.assert_allclose(got.loc[want.index, NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float),
                               rtol=1e-12, atol=0)


def _check_stored_window(hook, exp):
    base = hook.bidder_window(experiment_id=exp.id)
    if base is None:
        return None
    days = [dt.date.fromisoformat(d) for d in str(base[0]["days_used"].iloc[0]).split(",")]
    stored = hook.stored_piece_frames(experiment_id=exp.id, days=days, tables=list(partition.PIECE_TABLES.values()))
    rebuilt = gram_of(bidder_totals(window_state.pieces_of_rows(stored)))
    assert int(base[0]["n_distinct_bidders"].iloc[0]) == rebuilt.n_bidders
    kept = window_state._gram_of_rows(base[1][base[1]["segment"].isna()], rebuilt.n_bidders, rebuilt.bid_exponent, exp)
    np.testing.assert_allclose(kept.gram, rebuilt.gram, rtol=1e-12, atol=0)
    return days


def test_daily_runs_reruns_and_a_left_out_day_give_the_full_recombination(sink, lake, tmp_path):
    exp = _spec()
    stage = tmp_path / "stage"
    used = {DAYS[0]: DAYS[:1], DAYS[1]: DAYS[:2], DAYS[2]: DAYS[:2], DAYS[3]: [DAYS[0], DAYS[1], DAYS[3]],
            DAYS[4]: [DAYS[0], DAYS[1], DAYS[3], DAYS[4]]}
    routes = []
    for day in DAYS:
        routes.append(_run_day(sink, lake, exp, stage, day, f"r-{day}")["bidder_window"])
        _check_against_full_recombination(sink, exp, day, used[day])
        assert _check_stored_window(sink, exp) == used[day]
    # first day rebuilt (nothing stored), then today's bidders only; day 3 is left out: the window as stored
    assert routes == ["rebuilt", "extended", "stored", "extended", "extended"]
    # a rerun of an earlier day rebuilds its window (and the stored window becomes its window) ...
    assert _run_day(sink, lake, exp, stage, DAYS[1], "again-2")["bidder_window"] == "rebuilt"
    _check_against_full_recombination(sink, exp, DAYS[1], used[DAYS[1]])
    assert _check_stored_window(sink, exp) == used[DAYS[1]]
    # ... so the last day, run again, rebuilds too; and a rerun of the day the window ends on as well
    for run in ("again-5", "third-5"):
        assert _run_day(sink, lake, exp, stage, DAYS[4], run)["bidder_window"] == "rebuilt"
        _check_against_full_recombination(sink, exp, DAYS[4], used[DAYS[4]])
        assert _check_stored_window(sink, exp) == used[DAYS[4]]


def test_a_write_without_the_window_drops_a_window_that_covers_its_day(lake, tmp_path):
    exp = _spec()
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    for day in DAYS[:2]:
        _run_day(hook, lake, exp, stage, day, f"r-{day}")
    assert _check_stored_window(hook, exp) == DAYS[:2]
    # day 1's pieces written again by a writer that brings no window (e.g. an older estimate step)
    partition.stage_partition(LakeHook(), lake_root=lake, experiment=exp, ds=DAYS[0], staging_root=stage)
    staged = StagedPartition.at(stage, exp.id, DAYS[0])
    partition.record_checks(staged, partition.run_partition_checks(hook, LakeHook(), experiment=exp, staged=staged, ds=DAYS[0]))
    partition.estimate_partition(hook, experiment=exp, ds=DAYS[0], staging_root=stage, run_id="again-1")
    (staged.folder / "bidder_window.json").unlink()
    partition.write_partition(hook, experiment_id=exp.id, ds=DAYS[0], staging_root=stage)
    assert hook.bidder_window(experiment_id=exp.id) is None
    # the next day rebuilds from the stored pieces
    assert _run_day(hook, lake, exp, stage, DAYS[2], "r-3")["bidder_window"] == "rebuilt"
    assert _check_stored_window(hook, exp) == DAYS[:2]


def test_a_rebuilt_window_reads_each_stored_piece_table_once(lake, tmp_path):
    """A rerun rebuilds the window from the stored pieces: the strata, arms and covariance rows read for
    the to-date pieces serve the rebuild too; only the bidder sums are read in addition, streamed once
    in record batches of their own size (never as one frame)."""
    exp = _spec()
    hook = ResultsHook(database=tmp_path / "results.duckdb", lock_timeout=5)
    stage = tmp_path / "stage"
    for day in DAYS[:3]:
        _run_day(hook, lake, exp, stage, day, f"r-{day}")
    reads, streamed = [], []
    plain, stream = hook.stored_piece_frames, hook.stored_bidder_sum_batches

    def counted(**kw):
        reads.extend(kw["tables"])
        return plain(**kw)

    def batches(**kw):
        for batch in stream(**kw):
            streamed.append(batch.num_rows)
            yield batch

    hook.stored_piece_frames, hook.stored_bidder_sum_batches = counted, batches  # the real hook, its reads listed
    assert _run_day(hook, lake, exp, stage, DAYS[1], "again-2")["bidder_window"] == "rebuilt"
    assert sorted(reads) == sorted(t for t in partition.PIECE_TABLES.values() if t != "stratum_piece_bidder_sums"), reads
    stored = plain(experiment_id=exp.id, days=[DAYS[0]], tables=["stratum_piece_bidder_sums"])
    assert sum(streamed) == len(stored["stratum_piece_bidder_sums"]) > 0  # day 1's rows, each once
    del hook.stored_piece_frames, hook.stored_bidder_sum_batches
    _check_against_full_recombination(hook, exp, DAYS[1], DAYS[:2])
    assert _check_stored_window(hook, exp) == DAYS[:2]


# -- a segmented experiment: pooled and per-segment windows -------------------------------------
#: Two invented stalls of one market, of different value scales and auction sizes; the bidder ids of
#: both come from one pool, so a bidder's totals differ between the pooled window and a segment's.
#: Day 1 has only the first stall: the second's window starts on day 2 (from nothing, in the daily update).
STALLS = {
    "awning": SimulatedSegment(st.gamma(3.0, scale=0.4), 4, 0.55),
    "kiosk": SimulatedSegment(st.lognorm(0.6, scale=1.5), {3: 0.5, 5: 0.5}, 0.45),
}


def _segmented_spec():
    return parse_experiments({"experiments": [{
        "id": "stalls", "control_arm": "flat", "start": str(START), "exclude_days": [str(DAYS[2])],
        "segments": ["stall"], "checks": {"warmup": {"days": 0}},
        "arms": [{"name": "flat", "share": 0.55, "position_weights": [0.4, 0.2, 0.1]},
                 {"name": "steep", "share": 0.45, "position_weights": [0.5, 0.18, 0.04]}]}]})["stalls"]


@pytest.fixture(scope="module")
def segmented_lake(tmp_path_factory):
    root = tmp_path_factory.mktemp("lake") / "bids"
    exp = _segmented_spec()
    for k, day in enumerate(DAYS):
        stalls = {"awning": STALLS["awning"]} if k == 0 else STALLS  # shares are normalised
        bids = simulate_segmented_experiment(stalls, exp, n_auctions=600, rng=70 + k, column="stall",
                                             bidder_pool=150, first_auction_id=10_000 * k).drop(columns=["ds"])
        bids["bidder_id"] = "stand-" + bids["bidder_id"].astype(str)
        (root / f"ds={day}").mkdir(parents=True)
        bids.to_parquet(root / f"ds={day}" / "stalls.parquet", index=False)
    return root


def _check_segmented(hook, exp, day, days_used):
    """To-date rows (pooled and per segment) = the full recombination; each stored window = its rebuild."""
    stored = hook.stored_piece_frames(experiment_id=exp.id, days=days_used, tables=list(partition.PIECE_TABLES.values()))
    pieces = window_state.pieces_of_rows(stored)
    want = combine_pieces(pieces, exp, cluster="auto")
    assert want.cluster == "bidder" and want.segments  # bidders repeat, and rows per segment
    rows = hook.fetch_df("report_to_date_estimates", {"experiment_id": exp.id})
    rows["segment"] = rows["segment"].astype(object).where(rows["segment"].notna(), "(pooled)")
    got = rows[rows["ds"].dt.date == day].set_index(["segment", "arm", "metric"])
    want = want.table.assign(segment=lambda t: t["segment"].astype(object).where(t["segment"].notna(), "(pooled)"))
    want = want.set_index(["segment", "arm", "metric"])
    assert len(got) == len(want) and set(got.xs("revenue_per_auction", level="metric")["cluster"]) == {"bidder"}
    assert set(want.index.get_level_values("segment")) == {"(pooled)", "awning", "kiosk"} - (
        {"kiosk"} if days_used == [DAYS[0]] else set())
    np.testing.assert_allclose(got.loc[want.index, NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float),
                               rtol=1e-12, atol=0)
    base = hook.bidder_window(experiment_id=exp.id)
    if base is None:
        return None
    keys = [None if pd.isna(s) else s for s in base[0]["segment"]]
    assert keys[0] is None and sorted(keys[1:]) == sorted({p.key.segment for p in pieces})
    days = [dt.date.fromisoformat(d) for d in str(base[0]["days_used"].iloc[0]).split(",")]
    window = window_state.pieces_of_rows(hook.stored_piece_frames(experiment_id=exp.id, days=days,
                                                                  tables=list(partition.PIECE_TABLES.values())))
    for key, n in zip(keys, base[0]["n_distinct_bidders"]):
        rebuilt = gram_of(bidder_totals([p for p in window if key is None or p.key.segment == key],
                                        bid_exponent=max(p.bid_exponent for p in window)))
        assert int(n) == rebuilt.n_bidders
        form = base[1][[(None if pd.isna(s) else s) == key for s in base[1]["segment"]]]
        kept = window_state._gram_of_rows(form, rebuilt.n_bidders, rebuilt.bid_exponent, exp)
        np.testing.assert_allclose(kept.gram, rebuilt.gram, rtol=1e-12, atol=0)
    return days


def test_a_segmented_experiment_keeps_a_window_per_segment_equal_to_the_full_recombination(sink, segmented_lake,
                                                                                            tmp_path):
    exp = _segmented_spec()
    stage = tmp_path / "stage"
    used = {DAYS[0]: DAYS[:1], DAYS[1]: DAYS[:2], DAYS[2]: DAYS[:2], DAYS[3]: [DAYS[0], DAYS[1], DAYS[3]],
            DAYS[4]: [DAYS[0], DAYS[1], DAYS[3], DAYS[4]]}
    routes = []
    for day in DAYS:
        routes.append(_run_day(sink, segmented_lake, exp, stage, day, f"r-{day}")["bidder_window"])
        assert _check_segmented(sink, exp, day, used[day]) == used[day]
    # as unsegmented: day 2 extends (its second stall from an empty window), day 3 (excluded) keeps the stored one
    assert routes == ["rebuilt", "extended", "stored", "extended", "extended"]
    assert _run_day(sink, segmented_lake, exp, stage, DAYS[1], "again-2")["bidder_window"] == "rebuilt"
    assert _check_segmented(sink, exp, DAYS[1], used[DAYS[1]]) == used[DAYS[1]]
    assert _run_day(sink, segmented_lake, exp, stage, DAYS[4], "again-5")["bidder_window"] == "rebuilt"
    assert _check_segmented(sink, exp, DAYS[4], used[DAYS[4]]) == used[DAYS[4]]


# -- migration 10: the version-9 window (one row per bidder and label) becomes one row per bidder --------
#: The results tables whose version-9 and version-10 columns are the same (copied as they are).
SAME_SHAPE = ("arm_estimates", "arm_estimates_to_date", "arm_position_weights", "stratum_pieces", "stratum_piece_arms",
              "stratum_piece_covariance", "stratum_piece_bidder_sums", "bid_quantiles", "data_checks",
              "bidder_window_gram")


def _as_version_9(hook, schema):
    """Schema ``schema`` of the same database at version 9, holding ``main``'s rows in version 9's shape."""
    from counterbid.operators.results_schema import MIGRATIONS

    legacy = ResultsHook(database=hook.database, schema=schema, lock_timeout=5)
    when = pd.Timestamp("2026-06-01 00:00", tz="UTC").to_pydatetime()
    with legacy.session() as s, s.transaction():
        s.execute("results_create_schema")
        s.execute("results_create_schema_version")
        for step in MIGRATIONS[:9]:
            for stmt in step.statements:
                if stmt.dialects is None or legacy.dialect in stmt.dialects:
                    s.execute(stmt.name, **dict(stmt.identifiers))
            s.execute("results_record_version", {"version": step.version, "migrated_at": when})
    with hook.connect() as con:
        for table in SAME_SHAPE:
            con.execute(f"insert into {schema}.{table} select * from main.{table}")
        con.execute(f"insert into {schema}.bidder_window select experiment_id, segment, ds, days_used, n_distinct_bidders,"
                    " bid_exponent, run_id, computed_at from main.bidder_window")
        # one row per (segment, bidder, label): the label names zipped with the list of totals
        con.execute(f"insert into {schema}.bidder_window_totals (experiment_id, bidder_id, arm, value, segment)"
                    " select t.experiment_id, t.bidder_id, unnest(string_to_array(w.sum_labels, ',')), unnest(t.sums),"
                    " t.segment from main.bidder_window_totals as t inner join"
                    " (select distinct experiment_id, sum_labels from main.bidder_window) as w"
                    " on w.experiment_id = t.experiment_id")
    return legacy


def test_a_version_9_window_with_rows_migrates_and_extends_to_the_same_numbers(sink, segmented_lake, tmp_path):
    """Days 1-2 stored at version 9 (one row per bidder and label), migrated to version 10: day 4 extends the
    migrated window and gives the to-date rows of the same day on a database that was never migrated (1e-12),
    and the full recombination; the stored windows agree after the day."""
    exp = _segmented_spec()
    for day in DAYS[:2]:
        _run_day(sink, segmented_lake, exp, tmp_path / "stage", day, f"r-{day}")
    legacy = _as_version_9(sink, "legacy")
    with legacy.connect() as con:
        long_rows = con.execute("select count(*) from legacy.bidder_window_totals").fetchone()[0]
        wide_rows = con.execute("select count(*) from main.bidder_window_totals").fetchone()[0]
    assert long_rows == 3 * wide_rows > 0  # three revenue labels: flat, steep, the mixture
    assert legacy.ensure_tables() == [10]
    # the version-9 rows carry no label order: the migration records the names' byte order
    assert legacy.bidder_window(experiment_id=exp.id)[0]["sum_labels"].tolist() == ["_mixture,flat,steep"] * 3
    day = DAYS[3]
    assert _run_day(legacy, segmented_lake, exp, tmp_path / "stage-legacy", day, "r-4")["bidder_window"] == "extended"
    assert _run_day(sink, segmented_lake, exp, tmp_path / "stage", day, "r-4")["bidder_window"] == "extended"
    assert _check_segmented(legacy, exp, day, [DAYS[0], DAYS[1], day]) == [DAYS[0], DAYS[1], day]
    rows = [h.fetch_df("report_to_date_estimates", {"experiment_id": exp.id}) for h in (legacy, sink)]
    got, want = (r[r["ds"].dt.date == day].assign(segment=lambda t: t["segment"].fillna("(pooled)"))
                 .set_index(["segment", "arm", "metric"]).sort_index() for r in rows)
    assert got.index.equals(want.index) and len(got) > 0
    np.testing.assert_allclose(got[NUMBERS].to_numpy(float), want[NUMBERS].to_numpy(float), rtol=1e-12, atol=0)
    forms = [h.bidder_window(experiment_id=exp.id)[1].assign(segment=lambda t: t["segment"].fillna("(pooled)"))
             .set_index(["segment", "arm_i", "arm_j"]).sort_index()["value"] for h in (legacy, sink)]
    np.testing.assert_allclose(forms[0].to_numpy(), forms[1].to_numpy(), rtol=1e-12, atol=0)


def test_two_ids_on_one_stored_key_send_the_day_to_a_rebuild(sink, lake, tmp_path):
    """A stored row of another id under the integer key of one of today's bidders (what an md5 collision
    leaves): the daily update would mix the two bidders' totals, so the day rebuilds from the pieces and
    still gives the full recombination."""
    exp = _spec()
    stage = tmp_path / "stage"
    for day in DAYS[:2]:
        _run_day(sink, lake, exp, stage, day, f"r-{day}")
    with sink.connect() as con:  # a copy of one stored bidder's row under a text id of no bidder
        con.execute("insert into main.bidder_window_totals (experiment_id, segment, bidder_key, bidder_id, sums)"
                    " select experiment_id, segment, bidder_key, 'seat-none', sums from main.bidder_window_totals"
                    " where bidder_id = 'seat-1'")
    assert _run_day(sink, lake, exp, stage, DAYS[3], "r-4")["bidder_window"] == "rebuilt"
    _check_against_full_recombination(sink, exp, DAYS[3], [DAYS[0], DAYS[1], DAYS[3]])
    assert _check_stored_window(sink, exp) == [DAYS[0], DAYS[1], DAYS[3]]
    with sink.connect() as con:
        assert con.execute("select count(*) from main.bidder_window_totals where bidder_id = 'seat-none'"
                           ).fetchone()[0] == 0


class _WatchedHook(ResultsHook):
    """A real DuckDB results hook that notes the kind of rows each write is handed."""

    def __init__(self, **kw):
        super().__init__(**kw)
        self.handed: list[dict[str, str]] = []

    def replace_partition(self, *, experiment_id, ds, tables, window=None):
        kinds = {dest: type(rows).__name__ for dest, rows in tables.items() if rows is not None}
        kinds.update({f"window:{dest}": type(rows).__name__ for dest, rows in (window.tables if window else {}).items()})
        self.handed.append(kinds)
        return super().replace_partition(experiment_id=experiment_id, ds=ds, tables=tables, window=window)


def _stored_bidder_rows(hook, exp):
    with hook.connect(read_only=True) as con:
        sums = con.execute("select * exclude (computed_at, run_id) from stratum_piece_bidder_sums "
                           "where experiment_id = ? order by ds, n_bidders, segment nulls first, shard, bidder_id, arm",
                           [exp.id]).df()
        totals = con.execute("select * from bidder_window_totals where experiment_id = ? "
                             "order by segment nulls first, bidder_id", [exp.id]).df()
    return sums, totals


def test_the_write_step_streams_staged_bidder_rows_in_small_batches_to_the_same_rows(lake, tmp_path, monkeypatch):
    """The write step hands the sink the staged per-bidder files (datasets, never whole tables); with the
    batch size forced to 50 rows (several batches per table) the stored bidder sums and window totals
    equal those of a write in one batch, day by day through an extend."""
    from counterbid.operators import results_schema

    exp = _spec()
    whole = ResultsHook(database=tmp_path / "whole.duckdb", lock_timeout=5)
    for day in DAYS[:2]:
        _run_day(whole, lake, exp, tmp_path / "stage-whole", day, f"r-{day}")
    monkeypatch.setattr(results_schema, "WRITE_BATCH_ROWS", 50)
    watched = _WatchedHook(database=tmp_path / "batched.duckdb", lock_timeout=5)
    for day in DAYS[:2]:
        _run_day(watched, lake, exp, tmp_path / "stage-batched", day, f"r-{day}")
    for kinds in watched.handed:
        assert kinds["stratum_piece_bidder_sums"] == "FileSystemDataset"
        assert kinds["window:bidder_window_totals"] == "FileSystemDataset"
    want, got = _stored_bidder_rows(whole, exp), _stored_bidder_rows(watched, exp)
    assert len(got[0]) > 4 * 50 and len(got[1]) > 50  # several batches of each table
    for w, g in zip(want, got):
        pd.testing.assert_frame_equal(g, w)
