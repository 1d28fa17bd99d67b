"""``counterbid study`` and ``counterbid plan`` end to end (real files: CSV, PNG, Parquet)."""

from __future__ import annotations

import json
from pathlib import Path

import matplotlib.colors as mcolors
import matplotlib.figure
import matplotlib.image as mimage
import numpy as np
import pandas as pd
import pytest

from counterbid.cli import main

SPEC = Path(__file__).resolve().parents[2] / "dags_example" / "experiments.yaml"
TINY_STUDY = ["--quick", "--bidders", "3", "--sizes", "20", "200", "--reps", "4", "--two-step-reps", "2",
              "--share-reps", "3", "--share-auctions", "300", "--seed", "5"]


def check_figures(folder: Path, size: pd.DataFrame) -> None:
    """Each PNG has its figure's size at dpi 110 (cli/study.py: 4.2 x 3.6 in per distribution for
    the size figure, 4.2 x 3.4 for coverage, 3.2 x 2.8 per panel of the share figure) and is drawn:
    the colour of each number of bidders (viridis, as the study draws them) covers a visible share
    of the size and coverage figures, and the share figure shows the three methods' colours."""
    import matplotlib.pyplot as plt

    n_dist = size["distribution"].nunique()
    n_share = pd.read_csv(folder / "accuracy_by_share.csv")["n_bidders"].nunique()
    pixels = {"accuracy_by_size": (3.6, 4.2 * n_dist), "accuracy_by_share": (2.8 * n_dist, 3.2 * n_share),
              "interval_coverage": (3.4, 4.2 * n_dist)}
    ns = sorted(size["n_bidders"].unique())
    viridis = plt.get_cmap("viridis")([i / max(1, len(ns) - 1) * 0.85 for i in range(len(ns))])[:, :3]
    for name, (height, width) in pixels.items():
        rgb = mimage.imread(folder / f"{name}.png")[..., :3]
        assert rgb.shape[:2] == (round(height * 110), round(width * 110)), (name, rgb.shape)
        colours = [mcolors.to_rgb(c) for c in ("C0", "C1", "C2")] if name == "accuracy_by_share" else viridis
        for c in colours:
            share = np.mean(np.all(np.abs(rgb - np.asarray(c)) < 0.02, axis=-1))
            assert share > 0.0005, (name, c, share)


@pytest.fixture
def saved_figures(monkeypatch):
    """The figures written by ``Figure.savefig`` during the test, with their paths (the real savefig runs)."""
    saved = []
    real = matplotlib.figure.Figure.savefig

    def keep(fig, fname, *args, **kwargs):
        saved.append((fig, Path(fname).name))
        return real(fig, fname, *args, **kwargs)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", keep)
    return saved


def test_study_writes_tables_figures_and_summary(tmp_path, capsys, saved_figures):
    out = tmp_path / "study"
    assert main(["study", "--out", str(out), *TINY_STUDY]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == ["accuracy_by_share.csv", "accuracy_by_share.png", "accuracy_by_size.csv", "accuracy_by_size.png",
                     "interval_coverage.csv", "interval_coverage.png", "summary.md"]
    size = pd.read_csv(out / "accuracy_by_size.csv")
    assert set(size["method"]) == {"ordstat", "two_step"}
    assert sorted(size["n_bids"].unique()) == [20, 200]
    assert set(size["distribution"]) == {"uniform", "beta", "lognormal"}
    share = pd.read_csv(out / "accuracy_by_share.csv")
    assert set(share["method"]) == {"ordstat", "informed_ab", "realized_average"}
    check_figures(out, size)
    # the accuracy figure plots the CSV's numbers: per distribution, the treated arm's RMSE x sqrt(N)
    fig = dict((name, f) for f, name in saved_figures)["accuracy_by_size.png"]
    for ax, dist in zip(fig.axes, ("uniform", "beta", "lognormal")):
        assert ax.get_title() == f"{dist} values"
        for method, label in (("ordstat", "n=3 estimator"), ("two_step", "n=3 two-step")):
            (line,) = [ln for ln in ax.get_lines() if ln.get_label() == label]
            want = size.query("distribution == @dist and arm == 'treated' and method == @method").sort_values("n_bids")
            np.testing.assert_array_equal(line.get_xdata(), want["n_bids"].to_numpy())
            # (the CSV keeps 6 significant digits)
            np.testing.assert_allclose(line.get_ydata(), want["rmse_sqrt_n"].to_numpy(), rtol=1e-5)
    summary = (out / "summary.md").read_text()
    assert "## RMSE x sqrt(N)" in summary and "## Coverage" in summary
    assert "![RMSE vs share](accuracy_by_share.png)" in summary
    # Same seed, same numbers; no scratch folder is left behind.
    assert main(["study", "--out", str(out), *TINY_STUDY]) == 0
    pd.testing.assert_frame_equal(pd.read_csv(out / "accuracy_by_size.csv"), size)
    assert not [p for p in out.iterdir() if p.name.startswith(".study-")]


def test_study_with_gsp_and_a_floor_names_the_auction(tmp_path, capsys):
    out = tmp_path / "study"
    assert main(["study", "--out", str(out), *TINY_STUDY, "--payment-rule", "gsp", "--floor", "0.4"]) == 0
    size = pd.read_csv(out / "accuracy_by_size.csv")
    assert set(size["method"]) == {"ordstat"}  # the two-step baseline models first price without a floor
    # every cell: 3 distributions x 2 sizes x 2 arms, each with the truth of Myerson's formula with the floor
    assert sorted(size.groupby(["distribution", "n_bids", "arm"]).size().index) == sorted(
        (d, n, a) for d in ("uniform", "beta", "lognormal") for n in (20, 200) for a in ("control", "treated"))
    assert (size.groupby(["distribution", "arm"])["truth"].nunique() == 1).all()
    share = pd.read_csv(out / "accuracy_by_share.csv")
    assert set(share["method"]) == {"ordstat", "informed_ab", "realized_average"}
    assert share.groupby("distribution")["truth"].nunique().eq(1).all()
    coverage = pd.read_csv(out / "interval_coverage.csv")
    assert set(coverage["design"]) == {"size", "share"} and coverage["coverage"].between(0, 1).all()
    summary = (out / "summary.md").read_text()
    assert "Auction: payment rule gsp, floor 0.4." in summary
    assert "Generated by `counterbid study --payment-rule gsp --floor 0.4`" in summary
    assert "Two-step kernel baseline: not run" in summary
    # A redraw keeps the auction the run named (read back from its provenance line).
    assert main(["study", "--redraw", str(out)]) == 0
    assert "Auction: payment rule gsp, floor 0.4." in (out / "summary.md").read_text()


@pytest.mark.parametrize("extra, message", [
    (["--floor", "-1"], "--floor must be a finite number >= 0 (value units); got -1.0"),
    (["--floor", "2.5"], "`floor` 2.5 lies above every uniform value"),
])
def test_study_bad_floor_is_one_line_error(tmp_path, capsys, extra, message):
    assert main(["study", "--out", str(tmp_path / "study"), *TINY_STUDY, *extra]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err
    assert not (tmp_path / "study").exists()


def test_study_bad_jobs_is_one_line_error(tmp_path, capsys):
    assert main(["study", "--out", str(tmp_path), "--quick", "--jobs", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["counterbid: error: --jobs must be >= 1; got 0"]
    assert list(tmp_path.iterdir()) == []


def test_plan_from_an_assumed_distribution_json(capsys):
    rc = main(["plan", "--experiment", str(SPEC), "--experiment-id", "featured-rows", "--days", "3",
               "--auctions-per-day", "4000", "--bidders", "4", "--shares", "0.05", "0.2",
               "--calibration-auctions", "1500", "--target-half-width", "1.0", "--format", "json"])
    assert rc == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["basis"] == "assumed" and doc["n_auctions"] == 12000
    rows = pd.DataFrame(doc["rows"])
    assert set(rows["arm"]) == {"classic", "wide-top", "five-slot"}
    assert set(rows["share"]) == {0.05, 0.2}
    # each non-control arm gets the candidate share of the 12,000 auctions, the control the rest
    treated = rows["arm"] != "classic"
    np.testing.assert_array_equal(rows.loc[treated, "auctions_in_arm"], (rows.loc[treated, "share"] * 12000).round())
    np.testing.assert_array_equal(rows.loc[~treated, "auctions_in_arm"], ((1 - 2 * rows.loc[~treated, "share"]) * 12000).round())
    rev = rows[treated & (rows["metric"] == "revenue_per_auction")].set_index(["arm", "share"])
    for arm in ("wide-top", "five-slot"):
        # the informed-bidder test sees only the arm's auctions: 4x the auctions, half the width
        assert rev.loc[(arm, 0.05), "informed_ab_half_width"] == pytest.approx(
            2 * rev.loc[(arm, 0.2), "informed_ab_half_width"], rel=1e-6)
        # the estimator uses every auction's bids: at 5 % it is several times narrower than that test
        assert rev.loc[(arm, 0.05), "half_width"] < rev.loc[(arm, 0.05), "informed_ab_half_width"] / 3
    # A target of 1.0 revenue per auction is met by the smallest candidate share.
    assert doc["recommended_share"] == 0.05
    assert (rows.loc[treated & (rows["share"] == 0.05), "half_width"] <= 1.0).all()
    assert doc["anytime_valid"] is False


def test_plan_for_the_anytime_valid_bounds(capsys):
    args = ["plan", "--experiment", str(SPEC), "--experiment-id", "featured-rows", "--days", "3",
            "--auctions-per-day", "4000", "--bidders", "4", "--shares", "0.2", "--calibration-auctions", "1500"]
    assert main([*args, "--format", "json"]) == 0
    fixed = json.loads(capsys.readouterr().out)
    assert main([*args, "--anytime-valid", "--format", "json"]) == 0
    anytime = json.loads(capsys.readouterr().out)
    assert anytime["anytime_valid"] is True
    # the boundary tuned for the planned end is 3.0351 standard errors there, against z = 1.95996 (95 %)
    ratio = pd.DataFrame(anytime["rows"])["half_width"] / pd.DataFrame(fixed["rows"])["half_width"]
    assert np.allclose(ratio, 3.035122 / 1.959964, rtol=1e-6)
    assert main([*args, "--anytime-valid"]) == 0
    assert "half-widths of the anytime-valid bounds at the planned end" in capsys.readouterr().out


def test_plan_from_pilot_bids_table(tmp_path, capsys):
    lake = tmp_path / "lake"
    assert main(["simulate", "--experiment", str(SPEC), "--experiment-id", "maker-spotlight", "--out", str(lake),
                 "--days", "1", "--auctions-per-day", "3000", "--bidders", "4", "--seed", "2",
                 "--segment", "weavers:lognorm:4:0.6", "--segment", "potters:beta:3:0.4"]) == 0  # the spec's shop kinds
    capsys.readouterr()
    rc = main(["plan", "--experiment", str(SPEC), "--bids", str(lake), "--days", "7", "--auctions-per-day", "2000",
               "--shares", "0.1", "0.3", "--calibration-auctions", "1500", "--target-half-width", "1e-9"])
    assert rc == 0
    out = capsys.readouterr().out
    assert "from pilot bids" in out
    assert "no candidate share reaches half-width 1e-09" in out
    assert "tile-stack" in out and "informed_ab_half_width" in out


@pytest.mark.parametrize("extra, message", [
    (["--days", "0", "--auctions-per-day", "100"], "`days` must be an integer >= 1; got 0"),
    (["--days", "1", "--auctions-per-day", "100", "--bids", "/nonexistent/pilot"], "/nonexistent/pilot: no such file"),
    (["--days", "1", "--auctions-per-day", "100", "--shares", "1.5"], "`shares` must be"),
])
def test_plan_bad_input_is_one_line_error(extra, message, capsys):
    rc = main(["plan", "--experiment", str(SPEC), "--experiment-id", "maker-spotlight", *extra])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("counterbid: error: ") and message in err[0]


COMMITTED_STUDY = Path(__file__).resolve().parents[2] / "docs" / "study"


def test_study_redraw_keeps_the_numbers_and_redraws_figures(tmp_path, capsys):
    import shutil

    out = tmp_path / "study"
    shutil.copytree(COMMITTED_STUDY, out)
    csv_before = {p.name: p.read_bytes() for p in out.glob("*.csv")}
    for png in out.glob("*.png"):
        png.unlink()
    (out / "summary.md").write_text("# stale\n\nGenerated by `counterbid study` on 2026-01-01 in 1.0 minutes (seed 7).\n")
    assert main(["study", "--redraw", str(out)]) == 0
    # the CSVs are inputs only: byte for byte unchanged
    assert {p.name: p.read_bytes() for p in out.glob("*.csv")} == csv_before
    check_figures(out, pd.read_csv(out / "accuracy_by_size.csv"))
    summary = (out / "summary.md").read_text()
    # the committed summary's tables come back unchanged from the CSVs alone
    committed = (COMMITTED_STUDY / "summary.md").read_text().splitlines()
    redrawn = summary.splitlines()
    assert len(redrawn) == len(committed)
    assert [a for a, b in zip(redrawn, committed) if a != b and not a.startswith("Generated by")] == []
    # the run's own provenance is kept, with the redraw noted once even after a second redraw
    assert main(["study", "--redraw", str(out)]) == 0
    head = [line for line in (out / "summary.md").read_text().splitlines() if line.startswith("Generated by")]
    assert len(head) == 1 and head[0].startswith("Generated by `counterbid study` on 2026-01-01 in 1.0 minutes (seed 7).")
    assert head[0].count("redrawn from the CSVs") == 1
    assert not [p for p in out.iterdir() if p.name.startswith(".study-")]


def test_study_redraw_missing_column_is_one_line_error(tmp_path, capsys):
    import shutil

    out = tmp_path / "study"
    shutil.copytree(COMMITTED_STUDY, out)
    share = pd.read_csv(out / "accuracy_by_share.csv").drop(columns="rmse_vs_informed")
    share.to_csv(out / "accuracy_by_share.csv", index=False)
    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir()}
    assert main(["study", "--redraw", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"counterbid: error: {out / 'accuracy_by_share.csv'}: missing column 'rmse_vs_informed'"]
    assert {p.name: p.stat().st_mtime_ns for p in out.iterdir()} == before  # nothing half-written
