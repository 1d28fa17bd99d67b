"""The HTML report from a real results database built by the pipeline steps."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import matplotlib.colors as mcolors
import matplotlib.figure
import matplotlib.image as mimage
import numpy as np
import pandas as pd
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import CheckResult, parse_experiments
from counterbid.operators import partition, report
from counterbid.operators.check_runner import write_check_results
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.report import ASSUMPTIONS, cumulative_table, format_cumulative, write_report
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 3, 2)
SPEC = {"experiments": [{
    # the first day (clustered by auction) is left out of the experiment to date by the spec
    "id": "tiles", "control_arm": "plain", "start": "2026-03-02", "exclude_days": ["2026-03-02"],
    "arms": [{"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}]}]}


#: How each day was run: (confidence level, clustering, a data check warned, estimator flags on arm 'bold').
#: (level, clustering, a data check warned) per day; the second day keeps only 20 auctions (80 bids),
#: so the estimator itself flags it ``few_bids`` (below ``MIN_STRATUM_BIDS``).
RUNS = [(0.95, "auction", False), (0.975, "bidder", False), (0.975, "bidder", True)]
SMALL_DAY_AUCTIONS = 20


def png_pixels(path, width_in, height_in, dpi=110):
    """The PNG's RGB pixels, after checking its size is the figure's (inches x dpi, as matplotlib rounds)."""
    img = mimage.imread(path)
    assert img.shape[:2] == (round(height_in * dpi), round(width_in * dpi)), img.shape
    return img[..., :3]


def share_of_colour(rgb, colour, tol=0.02):
    """Share of pixels within ``tol`` of a matplotlib colour (``C0``, ...) in every channel."""
    return float(np.mean(np.all(np.abs(rgb - np.asarray(mcolors.to_rgb(colour))) < tol, axis=-1)))


@pytest.fixture
def saved_figures(monkeypatch):
    """The figures written by ``Figure.savefig`` during the test, with their paths (the real savefig runs)."""
    saved = []
    real = matplotlib.figure.Figure.savefig

    def keep(fig, fname, *args, **kwargs):
        saved.append((fig, str(fname)))
        return real(fig, fname, *args, **kwargs)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", keep)
    return saved


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    exp = parse_experiments(SPEC)["tiles"]
    write_bid_lake(root / "bids", [exp], start=START, days=3, auctions_per_day=1500, n_bidders=4, seed=8)
    small = root / "bids" / f"ds={START + dt.timedelta(days=1)}" / "tiles.parquet"
    frame = pd.read_parquet(small)
    keep = frame["auction_id"].isin(frame["auction_id"].unique()[:SMALL_DAY_AUCTIONS])
    frame[keep].to_parquet(small, index=False)
    hook = ResultsHook(database=root / "results.duckdb")
    for k, (level, cluster, warned) in enumerate(RUNS):
        day = START + dt.timedelta(days=k)
        partition.stage_partition(LakeHook(), lake_root=root / "bids", experiment=exp, ds=day, staging_root=root / "s")
        staged = StagedPartition.at(root / "s", exp.id, day)
        checks = schema_gate(LakeHook(), experiment=exp, staged=staged)
        if warned:
            # a warning that keeps the day in the window (a failed drift or warm-up check would not)
            checks.append(CheckResult(check="shading", severity="warning", passed=False, observed=0.2, threshold=0.05))
        partition.record_checks(staged, checks)

        partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=root / "s", run_id=f"r{k}",
                                     confidence_level=level, cluster=cluster)
        partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=root / "s")
    return root, hook


def test_report_has_plots_assumptions_and_days(results, saved_figures):
    root, hook = results
    page = write_report(hook, root / "out")
    text = page.read_text()
    for assumption in ASSUMPTIONS:
        assert assumption in text
    # the auction that ran, per experiment, from the stored rows
    assert "The auction that ran (payment rule, floor per click): " in text and "first_price, no floor" in text
    # each PNG is its figure (size in inches x dpi 110), drawn, not blank: the revenue plot shows
    # both arms' colours, the lift plot the treated arm's only
    figures = {Path(path).name: fig for fig, path in saved_figures}
    colours = report._colours(hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"}))
    for png, arms in (("tiles_revenue.png", ("plain", "bold")), ("tiles_lift.png", ("bold",))):
        assert f'src="{png}"' in text
        width, height = figures[png].get_size_inches()
        rgb = png_pixels(root / "out" / png, width, height)
        for arm in arms:
            assert share_of_colour(rgb, colours[arm]) > 0.002, (png, arm)
        if png == "tiles_lift.png":
            assert share_of_colour(rgb, colours["plain"]) == 0
    for k in range(3):
        assert f"<th>{START + dt.timedelta(days=k)}</th>" in text
    assert "data checks" not in text  # no data_checks table: nothing shown
    # the experiment to date combines the two days the spec leaves in, and says which days it used
    assert f"{1500 + SMALL_DAY_AUCTIONS:,} auctions, each day estimated alone" in text
    assert "days used (2): 2026-03-03..2026-03-04; left out (1): 2026-03-02 (excluded)" in text


def test_report_says_the_level_clustering_and_status_each_interval_used(results):
    root, hook = results
    text = write_report(hook, root / "out").read_text()
    assert "95%" not in text and "Intervals are 95" not in text  # no fixed level anywhere
    # the experiment-to-date table (the latest run: 97.5 %, by bidder), its columns and what it speaks for
    assert "<th>revenue / auction (97.5 %, by bidder)</th>" in text
    assert "<th>lift vs control (97.5 %, by bidder)</th>" in text
    assert "<th>realized per-arm average (97.5 %, by auction)</th>" in text
    assert "Intervals: 97.5 %, clustered by bidder (they speak for a new draw of bidders as well as of auctions)" in text
    assert "clustered by auction, for\nthese same bidders in new auctions" in text  # the page says what both mean
    # per day: the interval and the flags that need attention, by metric (welfare's no_interval is by design)
    few = "few_bids (revenue / auction, welfare / auction, lift vs control)"
    by_day = dict(zip([str(START + dt.timedelta(days=k)) for k in range(3)],
                      [("ok", "95 %, clustered by auction"), (few, "97.5 %, clustered by bidder"),
                       ("warning", "97.5 %, clustered by bidder")]))
    for day, (status, how) in by_day.items():
        assert f"<th>{day}</th>\n      <td>{status}</td>\n      <td>{how}</td>" in text, day
    assert "no_interval" not in text.split("<h2>")[1]  # only the assumptions above explain it
    # the banner names the flagged day and metrics, and only that day
    assert ("The estimator flagged rows that need attention (2026-03-03: few_bids on revenue / auction, welfare / "
            "auction, lift vs control)") in text


def test_plot_titles_name_the_intervals_of_their_rows(results, tmp_path, saved_figures):
    _, hook = results
    daily = hook.fetch_df("report_daily_estimates", {"experiment_id": "tiles"})
    to_date = hook.fetch_df("report_to_date_estimates", {"experiment_id": "tiles"})
    title = report._plot_revenue(daily, "tiles", tmp_path / "r.png")
    # the plotted data are the stored rows: each arm's estimate and realized average by day
    (fig, path), = saved_figures
    assert path == str(tmp_path / "r.png")
    lines = {line.get_label(): line for line in fig.axes[0].get_lines()}
    for arm in ("plain", "bold"):
        for metric, label in (("revenue_per_auction", "if run everywhere"), ("realized_revenue_per_auction",
                                                                             "realized per-arm average")):
            rows = daily[(daily["arm"] == arm) & (daily["metric"] == metric)]
            assert len(rows) == 3
            np.testing.assert_array_equal(lines[f"{arm}: {label}"].get_ydata(), rows["estimate"].to_numpy(float))
    assert fig.axes[0].get_ylabel() == "revenue per auction"
    assert title.endswith("(bands: 95 %, clustered by auction (1 days); 97.5 %, clustered by bidder (2 days) intervals)")
    title = report._plot_lift(daily, to_date, "tiles", tmp_path / "l.png")
    assert title.splitlines()[1] == ("(that day: 95 %, clustered by auction (1 days); 97.5 %, clustered by bidder "
                                     "(2 days); to date: 97.5 %, clustered by bidder)")  # one kind: no day counts
    assert title.splitlines()[2] == "looking daily? act on the hatched anytime-valid band, not the fixed one"
    one_run = daily[daily["ds"] == daily["ds"].max()]
    assert report.interval_caption(one_run[one_run["metric"] == "revenue_per_auction"]) == "97.5 %, clustered by bidder"


def test_report_shows_the_worst_check_status_per_day(results, tmp_path):
    root, hook = results
    with hook.connect() as con:  # stored by the pipeline's own writer (it creates the table)
        write_check_results(con, [CheckResult("sample_ratio", "warning", False, 0.001, 0.01),
                                  CheckResult("rows", "error", True, 1.0, 1.0)], experiment_id="tiles", ds="2026-03-03",
                            run_id="r")
    text = write_report(hook, tmp_path).read_text()
    assert "<th>data checks</th>" in text
    assert "warning (1/2 failed)" in text and text.count("not run") == 2
    with hook.connect() as con:
        con.execute("drop table data_checks")


def test_cumulative_table_text(results):
    _, hook = results
    text = format_cumulative(cumulative_table(hook))
    # the second day's 20 auctions are below the estimator's minimum stratum: its flag reaches the to-date rows
    assert text.startswith(f"tiles: 2026-03-03 .. 2026-03-04, {1500 + SMALL_DAY_AUCTIONS} auctions, status few_bids "
                           "(revenue / auction, welfare / auction, lift vs control), warning; intervals 97.5 %, "
                           "clustered by bidder\n"
                           "days used (2): 2026-03-03..2026-03-04; left out (1): 2026-03-02 (excluded)\n")
    assert "revenue / auction (97.5 %, by bidder)" in text and "realized per-arm average (97.5 %, by auction)" in text
    assert "lift vs control" in text and "_mixture" in text
    # both bands on every revenue and lift row, and which one to act on; the horizon is 28 planned days (no
    # `end` in the spec) x the mean of the two days used (1520 auctions / 2)
    assert ("anytime-valid bounds ('anytime [low, high]'): 97.5 % for every daily look at once, same clustering, "
            "tightest at 21,280 auctions (the planned end)\n" + report.ANYTIME_NOTE) in text
    assert text.count(" anytime [") == 2 * 2 + 1 + 2  # revenue and realized of both arms, the lift, the mixture's two


def test_to_date_rows_carry_anytime_bounds_wider_than_the_fixed_interval(results):
    _, hook = results
    rows = hook.fetch_df("report_to_date_estimates", {"experiment_id": "tiles"})
    pending = rows[rows["n_days_used"] == 0]  # day 1 is excluded by the spec: rows without numbers or bounds
    assert set(pending["status"]) == {"days_excluded"} and pending["anytime_low"].isna().all()
    rows = rows[rows["n_days_used"] > 0]
    with_bounds = rows[rows["metric"] != "welfare_per_auction"]
    assert with_bounds["anytime_low"].notna().all() and rows.loc[rows["metric"] == "welfare_per_auction", "anytime_low"].isna().all()
    # 28 planned days (no `end` in the spec) x the mean auctions per day used so far: one day of 20, then 1520 in 2
    assert rows.groupby("ds")["anytime_horizon_auctions"].first().tolist() == [28 * 20, 28 * 760]
    # the same standard error times the normal-mixture multiplier at days used / planned days (1/28, then 2/28)
    from counterbid.estimators.sequential import anytime_multiplier

    m = anytime_multiplier(with_bounds["n_days_used"] / 28, confidence_level=with_bounds["confidence_level"].iloc[-1])
    m = np.where(with_bounds["confidence_level"] == 0.975, m, np.nan)
    late = with_bounds["confidence_level"] == 0.975
    np.testing.assert_allclose((with_bounds["anytime_high"] - with_bounds["estimate"])[late],
                               (m * with_bounds["std_error"])[late], rtol=1e-12)
    np.testing.assert_allclose((with_bounds["estimate"] - with_bounds["anytime_low"])[late],
                               (m * with_bounds["std_error"])[late], rtol=1e-12)
    assert ((with_bounds["anytime_high"] - with_bounds["anytime_low"])
            > (with_bounds["ci_high"] - with_bounds["ci_low"]) * 1.5).all()


def _copy_days(source: ResultsHook, target: ResultsHook, days) -> None:
    """Replace ``days`` of ``target`` with ``source``'s stored rows (the writer's own replace)."""
    with source.connect(read_only=True) as con:
        for day in days:
            tables = {dest: con.execute(f"select * from {table} where ds = ?", [day]).to_arrow_table()
                      for dest, table in (("arm_estimates", "arm_estimates"), ("arm_estimates_to_date", "arm_estimates_to_date"),
                                          ("position_weights", "arm_position_weights"))}
            target.replace_partition(experiment_id="tiles", ds=day, tables=tables)


def test_a_clean_run_shows_no_banner_and_status_ok(results, tmp_path):
    # the first day alone: no check warned, no estimator flag but welfare's by-design no_interval
    _, hook = results
    clean = ResultsHook(database=tmp_path / "clean.duckdb")
    _copy_days(hook, clean, [START])
    text = write_report(clean, tmp_path / "out").read_text()
    section = text.split("<h2>")[1]
    assert "class='note'" not in section and "flagged" not in section
    assert f"<th>{START}</th>\n      <td>ok</td>" in section
    # its to-date rows hold no number yet (the spec excludes the day) and say so instead of a table of n/a
    assert f"Experiment to date, to {START}: no day used yet (status days_excluded)" in section
    assert "left out (1): 2026-03-02 (excluded)" in section


@pytest.mark.postgres
def test_the_report_from_postgres_is_the_report_from_duckdb(results, postgres_url, tmp_path):
    """The same rows written to PostgreSQL (one replace per day) give the same console table and HTML page."""
    import re

    root, duck = results
    pg = ResultsHook(database=postgres_url)
    with duck.connect(read_only=True) as con:
        for k in range(3):
            day = START + dt.timedelta(days=k)
            tables = {dest: con.execute(f"select * from {table} where ds = ?", [day]).to_arrow_table()
                      for dest, table in (("arm_estimates", "arm_estimates"), ("arm_estimates_to_date", "arm_estimates_to_date"),
                                          ("position_weights", "arm_position_weights"))}
            pg.replace_partition(experiment_id="tiles", ds=day, tables=tables)
    assert format_cumulative(cumulative_table(pg)) == format_cumulative(cumulative_table(duck))

    def page(hook, out):
        text = write_report(hook, out).read_text()
        return re.sub(r"<p class=\"small\">Generated .*?</p>", "", text)  # the line naming the database and time

    want, got = page(duck, tmp_path / "duck"), page(pg, tmp_path / "pg")
    assert "tiles" in got and got == want


def test_a_segmented_experiment_gets_a_lift_by_segment_view(tmp_path):
    """Two days of an experiment with two segments through the steps: the report's segment view shows
    each arm's to-date lift per segment and pooled, the values stored; the rest of the page reads the pooled rows."""
    import scipy.stats as st

    from counterbid.estimators import SimulatedSegment, simulate_segmented_experiment

    spec = {"experiments": [{**SPEC["experiments"][0], "id": "aisles", "exclude_days": [], "segments": ["kind"],
                             "checks": {"warmup": {"days": 0}}}]}
    exp = parse_experiments(spec)["aisles"]
    kinds = {"glaze": SimulatedSegment(st.gamma(2.5, scale=0.5), 4, 0.5),
             "yarn": SimulatedSegment(st.lognorm(0.45, scale=1.2), 5, 0.5)}
    hook = ResultsHook(database=tmp_path / "results.duckdb")
    for k in range(2):
        day = START + dt.timedelta(days=k)
        folder = tmp_path / "bids" / f"ds={day}"
        folder.mkdir(parents=True)
        simulate_segmented_experiment(kinds, exp, n_auctions=1200, rng=k, column="kind", first_auction_id=k * 5000) \
            .to_parquet(folder / "aisles.parquet", index=False)
        partition.stage_partition(LakeHook(), lake_root=tmp_path / "bids", experiment=exp, ds=day,
                                  staging_root=tmp_path / "s")
        staged = StagedPartition.at(tmp_path / "s", exp.id, day)
        partition.record_checks(staged, schema_gate(LakeHook(), experiment=exp, staged=staged))
        partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=tmp_path / "s", run_id=f"r{k}")
        partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=tmp_path / "s")
    cum = cumulative_table(hook)
    view = report.segment_lift_table(cum)
    assert list(view.index) == ["bold"] and [c.split(" (")[0] for c in view.columns] == ["glaze", "yarn", "pooled"]
    lift = cum[(cum["metric"] == "revenue_lift_vs_control") & (cum["arm"] == "bold")]
    for column, seg in zip(view.columns, ["glaze", "yarn", None]):
        row = lift[lift["segment"].isna()] if seg is None else lift[lift["segment"] == seg]
        assert view.loc["bold", column] == report._interval(row["estimate"].iloc[0], row["ci_low"].iloc[0],
                                                             row["ci_high"].iloc[0], pct=True)
    pooled_auctions = int(cum.loc[(cum["metric"] == "revenue_per_auction") & cum["segment"].isna(), "n_auctions"].max())
    assert f"pooled ({pooled_auctions:,} auctions)" in view.columns
    page = write_report(hook, tmp_path / "out").read_text()
    assert "<h3>Lift by segment</h3>" in page and view.loc["bold", view.columns[0]] in page
    assert f"{pooled_auctions:,} auctions, each day estimated alone" in page  # the headline counts pooled rows once
    assert "lift vs control by segment:" in format_cumulative(cum)
