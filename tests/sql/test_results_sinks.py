"""The results sink on DuckDB and on PostgreSQL (a real server the session starts): the same writes,
the same views, versioned migrations in place, and a newer schema refused."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from counterbid.estimators.checks import CheckResult
from counterbid.estimators.errors import InputError
from counterbid.operators.check_runner import read_check_results, write_check_results
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.results_schema import MIGRATIONS, SCHEMA_VERSION, schema_version

D1, D2 = dt.date(2026, 3, 2), dt.date(2026, 3, 3)
NOW = pd.Timestamp("2026-03-04 01:00", tz="UTC")
ORDER = {"arm_lift": "span, experiment_id, ds, arm", "arm_position_weights": "experiment_id, ds, arm, position",
         "counterbid_schema": "version"}


def _rows(exp, ds, *, estimate=1.0, run_id="r1", to_date=False, status="ok", level=0.95, cluster="auction"):
    rows = []
    for arm, metric, est in [("plain", "revenue_per_auction", estimate), ("bold", "revenue_per_auction", estimate * 1.1),
                             ("bold", "revenue_lift_vs_control", 0.1), ("_mixture", "revenue_per_auction", np.nan)]:
        row = dict(experiment_id=exp, ds=ds, arm=arm, metric=metric, estimate=est, std_error=0.01,
                   ci_low=est - 0.02, ci_high=est + 0.02, n_auctions=100, n_bids=400, status=status,
                   confidence_level=level, cluster=cluster, payment_rule="first_price", floor=0.0,
                   method_version="ordstat-1", run_id=run_id, computed_at=NOW, what_if=False, effective_share=np.nan,
                   segment=None)
        if to_date:
            row.update(first_ds=D1, days_used=f"{D1}..{ds}", days_left_out="", n_days_used=(ds - D1).days + 1,
                       n_days_left_out=0, anytime_low=est - 0.03, anytime_high=est + 0.03,
                       anytime_horizon_auctions=2800)
        rows.append(row)
    return pa.Table.from_pandas(pd.DataFrame(rows), preserve_index=False)


def _weights(exp, ds):
    frame = pd.DataFrame({"experiment_id": exp, "ds": ds, "arm": "plain", "position": [1, 2], "weight": [0.4, 0.2],
                          "source": "measured", "impressions": [900, 800], "clicks": [360, 160],
                          "first_click_ds": D1, "run_id": "r1", "computed_at": NOW})
    return pa.Table.from_pandas(frame, preserve_index=False)


def _table(hook, name, schema="main"):
    """Every row of a table or view, sorted, as a DataFrame with DuckDB's column types."""
    order = ORDER.get(name, "experiment_id, ds, arm, metric")
    query = f'select * from "{schema}".{name} order by {order}'
    with hook.connect(read_only=True) as con:
        if hook.dialect == "duckdb":
            frame = con.execute(query).df()
        else:
            cur = con.execute(query)
            frame = pd.DataFrame.from_records(cur.fetchall(), columns=[d.name for d in cur.description])
    for col in frame.columns:  # one representation of dates and times for both sinks
        if col in ("ds", "first_ds", "first_click_ds"):
            frame[col] = pd.to_datetime(frame[col]).astype("datetime64[us]")
        elif col in ("computed_at", "migrated_at"):
            frame[col] = pd.to_datetime(frame[col], utc=True).astype("datetime64[us, UTC]")
    return frame


def _write_days(hook):
    for exp, ds, est in (("tiles", D1, 1.0), ("tiles", D2, 2.0), ("banners", D1, 3.0)):
        hook.replace_partition(experiment_id=exp, ds=ds, tables={
            "arm_estimates": _rows(exp, ds, estimate=est, status="few_bids,warning" if est == 2.0 else "ok"),
            "arm_estimates_to_date": _rows(exp, ds, estimate=est / 2, to_date=True, level=0.9, cluster="bidder"),
            "position_weights": _weights(exp, ds)})


@pytest.mark.postgres
def test_postgres_tables_and_views_hold_what_duckdb_holds(tmp_path, postgres_url):
    duck, pg = ResultsHook(database=tmp_path / "r.duckdb"), ResultsHook(database=postgres_url)
    for hook in (duck, pg):
        _write_days(hook)
        _write_days(hook)  # a rerun changes nothing
    for name in ("arm_estimates", "arm_estimates_to_date", "arm_position_weights", "arm_estimates_cumulative", "arm_lift"):
        want, got = _table(duck, name), _table(pg, name)
        assert len(want) > 0, name
        pd.testing.assert_frame_equal(got, want, check_exact=True, check_dtype=False, obj=name)
    # and the report's statements, through the hook
    for name, params in (("report_cumulative", None), ("report_experiments", None),
                         ("report_daily_estimates", {"experiment_id": "tiles"}),
                         ("report_position_weights", {"experiment_id": "tiles"})):
        want, got = duck.fetch_df(name, params), pg.fetch_df(name, params)
        pd.testing.assert_frame_equal(got, want, check_exact=True, check_dtype=False, obj=name)


def test_replace_is_idempotent_scoped_and_deduplicated(sink):
    sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    sink.replace_partition(experiment_id="tiles", ds=D2, tables={"arm_estimates": _rows("tiles", D2)})
    first = _table(sink, "arm_estimates")
    sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    pd.testing.assert_frame_equal(_table(sink, "arm_estimates"), first)
    newer = _rows("tiles", D1, estimate=5.0, run_id="new").to_pandas().assign(computed_at=NOW + pd.Timedelta(minutes=5))
    batch = pa.concat_tables([_rows("tiles", D1, run_id="old"), pa.Table.from_pandas(newer, preserve_index=False),
                              _rows("tiles", D2, run_id="other-day")])
    assert sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": batch}) == {"arm_estimates": 12}
    after = _table(sink, "arm_estimates")
    assert len(after) == 8
    assert set(after.loc[after["ds"] == pd.Timestamp(D1), "run_id"]) == {"new"}
    assert set(after.loc[after["ds"] == pd.Timestamp(D2), "run_id"]) == {"r1"}


def test_a_violated_constraint_rolls_back_every_table(sink):
    sink.replace_partition(experiment_id="tiles", ds=D1, tables={
        "arm_estimates": _rows("tiles", D1), "arm_estimates_to_date": _rows("tiles", D1, to_date=True)})
    before = {t: _table(sink, t) for t in ("arm_estimates", "arm_estimates_to_date")}
    with pytest.raises(Exception, match="(?i)check"):  # duckdb.ConstraintException / psycopg CheckViolation
        sink.replace_partition(experiment_id="tiles", ds=D1, tables={
            "arm_estimates": _rows("tiles", D1, estimate=9.0, run_id="r9"),
            "arm_estimates_to_date": _rows("tiles", D1, to_date=True, cluster="arm")})
    for table, frame in before.items():
        pd.testing.assert_frame_equal(_table(sink, table), frame)


def test_check_outcomes_are_replaced_per_day(sink):
    first = [CheckResult("drift", "warning", False, np.float64(1e-5), 1e-3, {"by_bidders": {"5": {"pvalue": 1e-5}}}),
             CheckResult("sample_ratio", "error", True, 0.4, 1e-3)]
    for _ in range(2):
        assert sink.record_checks(write_check_results, first, experiment_id="tiles", ds=D1, run_id="run-1") == 2
    sink.record_checks(write_check_results, first[:1], experiment_id="tiles", ds=D2, run_id="run-1")
    with sink.session(read_only=True) as s:
        out = read_check_results(s, experiment_id="tiles", ds=D1)
    assert out["check"].tolist() == ["drift", "sample_ratio"] and out["passed"].tolist() == [False, True]
    assert out["details"].iloc[0].replace(" ", "") == '{"by_bidders":{"5":{"pvalue":1e-05}}}'
    status = sink.fetch_df("report_day_check_status", {"experiment_id": "tiles"})
    assert status["worst_status"].tolist() == ["warning", "warning"] and status["n_checks"].tolist() == [2, 1]
    assert sink.table_exists("data_checks") and not sink.table_exists("nothing_here")


# -- migrations ------------------------------------------------------------------------------------
V1_ROW = ("tiles", D1, "bold", "revenue_per_auction", 1.5, 0.1, 1.3, 1.7, 100, 400, "warning", "ordstat-1", "r0", NOW)


def _build_version_1(hook, *, record=True):
    """A results database as counterbid wrote it at schema version 1, with one row in each estimates table."""
    with hook.session() as s, s.transaction():
        s.execute("results_create_schema")
        for st in MIGRATIONS[0].statements:  # the previous version's DDL is migration step 1
            s.execute(st.name, **dict(st.identifiers))
        if record:
            s.execute("results_create_schema_version")
            s.execute("results_record_version", {"version": 1, "migrated_at": NOW.to_pydatetime()})
    insert = ("insert into main.{t} (experiment_id, ds, {first}arm, metric, estimate, std_error, ci_low, ci_high, n_auctions,"
              " n_bids, status, method_version, run_id, computed_at) values ({marks})")
    with hook.connect() as con:
        for table, first, row in (("arm_estimates", "", V1_ROW),
                                  ("arm_estimates_to_date", "first_ds, ", V1_ROW[:2] + (D1,) + V1_ROW[2:])):
            mark = "?" if hook.dialect == "duckdb" else "%s"
            con.execute(insert.format(t=table, first=first, marks=", ".join([mark] * len(row))),
                        [v.to_pydatetime() if isinstance(v, pd.Timestamp) else v for v in row])


@pytest.mark.parametrize("recorded", [True, False], ids=["versioned", "before-versions"])
def test_a_version_1_database_is_upgraded_in_place_with_its_rows(sink, recorded, tmp_path):
    _build_version_1(sink, record=recorded)
    with sink.session() as s:
        assert schema_version(s) == 1
    assert sink.ensure_tables() == [m.version for m in MIGRATIONS[1:]]
    assert sink.ensure_tables() == []  # idempotent
    kept = _table(sink, "arm_estimates")
    columns = ["arm", "estimate", "status", "run_id", "confidence_level", "cluster", "payment_rule", "floor"]
    assert kept[columns].values.tolist() == [["bold", 1.5, "warning", "r0", 0.95, "auction", "first_price", 0.0]]
    kept_to_date = _table(sink, "arm_estimates_to_date")
    assert len(kept_to_date) == 1
    # version 3 added the anytime-valid bounds: rows written before it have none (null, never 0)
    assert kept_to_date[["anytime_low", "anytime_high", "anytime_horizon_auctions"]].isna().all(axis=None)
    assert kept_to_date["estimate"].tolist() == [1.5]
    # version 5 added what_if and effective_share: rows written before it are arms' (null)
    for table in (kept, kept_to_date):
        assert table[["what_if", "effective_share"]].isna().all(axis=None)
    assert _table(sink, "counterbid_schema")["version"].tolist() == [m.version for m in MIGRATIONS]
    # the upgraded tables take today's rows, and have exactly the columns of a fresh database
    sink.replace_partition(experiment_id="tiles", ds=D2, tables={"arm_estimates": _rows("tiles", D2, status="few_bids")})
    assert len(_table(sink, "arm_estimates")) == 5
    fresh = ResultsHook(database=tmp_path / "fresh.duckdb")
    fresh.ensure_tables()
    for table in ("arm_estimates", "arm_estimates_to_date", "arm_position_weights", "data_checks"):
        with sink.session() as s, fresh.session() as f:
            cols = [r[0] for r in s.execute("results_table_columns", {"schema": "main", "table": table}).fetchall()]
            assert cols == [r[0] for r in f.execute("results_table_columns", {"schema": "main", "table": table}).fetchall()]


@pytest.mark.parametrize("recorded", [True, False], ids=["versioned", "before-versions"])
def test_a_version_2_database_gets_the_anytime_columns_in_place(sink, recorded):
    _build_version_1(sink)
    with sink.session() as s, s.transaction():  # version 2 as released: step 2 of the migrations
        for st in MIGRATIONS[1].statements:
            s.execute(st.name, **dict(st.identifiers))
        s.execute("results_record_version", {"version": 2, "migrated_at": NOW.to_pydatetime()})
        if not recorded:
            s.execute("results_drop_table", table="counterbid_schema")
    with sink.session() as s:
        assert schema_version(s) == 2  # from the recorded row, or from the columns
    # anytime, warm-up rows, what-if, bidder window, segments, the window's index (PostgreSQL), the window per segment,
    # the window's totals one row per bidder
    assert sink.ensure_tables() == [m.version for m in MIGRATIONS[2:]] == [3, 4, 5, 6, 7, 8, 9, 10]
    sink.replace_partition(experiment_id="tiles", ds=D2, tables={
        "arm_estimates_to_date": _rows("tiles", D2, estimate=2.0, to_date=True)})
    rows = _table(sink, "arm_estimates_to_date").set_index(["ds", "arm", "metric"])
    old = rows.loc[(pd.Timestamp(D1), "bold", "revenue_per_auction")]
    assert pd.isna(old["anytime_low"]) and old["estimate"] == 1.5
    new = rows.loc[(pd.Timestamp(D2), "bold", "revenue_lift_vs_control")]
    assert (new["anytime_low"], new["anytime_high"], new["anytime_horizon_auctions"]) == (0.1 - 0.03, 0.1 + 0.03, 2800)
    lift = _table(sink, "arm_lift")
    assert lift.loc[lift["span"] == "to_date", "anytime_low"].notna().all()


def test_a_database_written_before_versions_at_today_shape_is_recorded_not_rebuilt(sink):
    sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    with sink.connect() as con:  # as the previous release left it: no version table
        con.execute("drop table main.counterbid_schema")
    # its columns say version 10 (the running bidder window records its totals' label order: the last shape the columns
    # tell apart; version 8 adds only a PostgreSQL index): only later steps run
    later = [m.version for m in MIGRATIONS if m.version > 10]
    assert sink.ensure_tables() == later
    assert _table(sink, "counterbid_schema")["version"].tolist() == [10, *later]
    assert len(_table(sink, "arm_estimates")) == 4


def test_a_newer_database_is_refused_and_left_untouched(sink):
    sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    with sink.session() as s:
        s.execute("results_record_version", {"version": SCHEMA_VERSION + 1, "migrated_at": NOW.to_pydatetime()})
    before = _table(sink, "arm_estimates")
    newer = rf"results schema version {SCHEMA_VERSION + 1} was written by a newer counterbid"
    with pytest.raises(InputError, match=newer):
        sink.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1, run_id="r2")})
    with pytest.raises(InputError, match=newer):
        sink.fetch_df("report_experiments")
    pd.testing.assert_frame_equal(_table(sink, "arm_estimates"), before)


def test_an_older_database_is_not_read_as_if_current(sink):
    _build_version_1(sink)
    with pytest.raises(InputError, match=r"results schema version 1 is older than this counterbid's .* upgrades it in place"):
        sink.fetch_df("report_experiments")


def test_urls_other_than_postgresql_are_refused_by_name(tmp_path):
    for bad in ("mysql://u:secret@h/db", "s3://bucket/results.duckdb", "http://h/x"):
        with pytest.raises(InputError, match=r"is not a results database; give a DuckDB file path or a postgresql:// URL") as info:
            ResultsHook(database=bad)
        assert "secret" not in str(info.value)
    with pytest.raises(InputError, match="names no database"):
        ResultsHook(database="postgresql://u@h:5432/")
    assert ResultsHook(database="postgresql://u:pw@h:5432/db").where == "postgresql://u:***@h:5432/db"
    assert ResultsHook(database=tmp_path / "x.duckdb").dialect == "duckdb"


@pytest.mark.postgres
def test_postgres_sink_from_an_airflow_connection(postgres_url, monkeypatch):
    from airflow.models.connection import Connection

    conn = Connection(conn_id="counterbid_results", uri=postgres_url)
    monkeypatch.setenv("AIRFLOW_CONN_COUNTERBID_RESULTS", conn.as_json())
    hook = ResultsHook()
    assert hook.dialect == "postgres"
    hook.replace_partition(experiment_id="tiles", ds=D1, tables={"arm_estimates": _rows("tiles", D1)})
    assert len(ResultsHook(database=postgres_url).fetch_df("report_daily_estimates", {"experiment_id": "tiles"})) == 4
    monkeypatch.setenv("AIRFLOW_CONN_COUNTERBID_RESULTS", '{"conn_type": "mysql", "host": "h"}')
    with pytest.raises(InputError, match="conn type 'mysql' is not a results sink"):
        ResultsHook().replace_partition(experiment_id="tiles", ds=D1, tables={})


def test_a_version_8_running_window_becomes_the_pooled_window_of_version_9(sink):
    _build_version_1(sink)
    with sink.session() as s, s.transaction():  # version 8 as released: steps 2 to 8 on this sink
        for step in MIGRATIONS[1:8]:
            for st in step.statements:
                if st.dialects is None or sink.dialect in st.dialects:
                    s.execute(st.name, **dict(st.identifiers))
            s.execute("results_record_version", {"version": step.version, "migrated_at": NOW.to_pydatetime()})
    mark = "?" if sink.dialect == "duckdb" else "%s"
    with sink.connect() as con:  # a stored window of an unsegmented experiment: one bidder, two labels
        con.execute(f"insert into main.bidder_window values ({', '.join([mark] * 7)})",
                    ["tiles", D1, D1.isoformat(), 1, 0, "r1", NOW.to_pydatetime()])
        for a, b, v in (("bold", "bold", 4.0), ("bold", "_mixture", 2.0), ("_mixture", "bold", 2.0),
                        ("_mixture", "_mixture", 1.0)):
            con.execute(f"insert into main.bidder_window_gram values ({mark}, {mark}, {mark}, {mark})", ["tiles", a, b, v])
        for arm, v in (("bold", 2.0), ("_mixture", 1.0)):
            con.execute(f"insert into main.bidder_window_totals values ({mark}, {mark}, {mark}, {mark})",
                        ["tiles", "stand-7", arm, v])
    assert sink.ensure_tables() == [9, 10]
    rows, gram = sink.bidder_window(experiment_id="tiles")
    assert rows["segment"].isna().all() and rows["days_used"].tolist() == [D1.isoformat()]
    assert rows["sum_labels"].tolist() == ["_mixture,bold"]  # version 10: the labels' order in each bidder's list
    assert gram["segment"].isna().all() and sorted(gram["value"]) == [1.0, 2.0, 2.0, 4.0]
    today = pa.table({"experiment_id": ["tiles"], "segment": pa.array([None], pa.string()),
                      "bidder_key": pa.array([None], pa.int64()), "bidder_id": ["stand-7"],
                      "sums": pa.array([None], pa.list_(pa.float64()))})
    found = sink.bidder_window_totals(experiment_id="tiles", today=today)
    assert found.column("sums").to_pylist() == [[1.0, 2.0]] and found.column("segment").null_count == 1
    # a segment's window beside the pooled one is a key of its own; a second pooled row is not
    labelled = today.set_column(1, "segment", pa.array(["awning"], pa.string()))
    assert sink.bidder_window_totals(experiment_id="tiles", today=labelled).num_rows == 0  # totals match on the segment
    with sink.connect() as con:
        con.execute(f"insert into main.bidder_window values ({', '.join([mark] * 9)})",
                    ["tiles", "awning", D1, D1.isoformat(), 1, 0, "r1", NOW.to_pydatetime(), None])
    with pytest.raises(Exception, match="(?i)duplicate|unique|constraint"), sink.connect() as con:
        con.execute(f"insert into main.bidder_window values ({', '.join([mark] * 9)})",
                    ["tiles", None, D1, D1.isoformat(), 1, 0, "r2", NOW.to_pydatetime(), None])
    assert len(sink.bidder_window(experiment_id="tiles")[0]) == 2
