"""What-if layouts through the pipeline steps: staged, estimated, stored (schema version 5), combined to date
from the stored pieces, and shown in the report's own section (and, when ranked, as candidates)."""

from __future__ import annotations

import datetime as dt
import warnings

import numpy as np
import pandas as pd
import pytest

from counterbid.dags_example.lake import write_bid_lake
from counterbid.estimators import EstimatorWarning, WhatIf, combine_pieces, parse_experiments, stratum_pieces
from counterbid.estimators.candidates import rank_candidates
from counterbid.operators import partition
from counterbid.operators.hooks import ResultsHook
from counterbid.operators.lake_hook import LakeHook
from counterbid.operators.report import CANDIDATES_NOTE, WHAT_IF_NOTE, candidate_table, write_report
from counterbid.operators.schema_gate import schema_gate
from counterbid.operators.staging import StagedPartition

START = dt.date(2026, 6, 1)
SPEC = {"experiments": [{
    "id": "reedhall", "control_arm": "plain", "start": "2026-06-01",
    "arms": [{"name": "plain", "share": 0.7, "position_weights": [0.4, 0.2, 0.1]},
             {"name": "bold", "share": 0.3, "position_weights": [0.5, 0.15, 0.05]}],
    # one layout between the arms and one selling a fourth position no arm sells
    "what_if": [{"name": "halfway", "position_weights": [0.45, 0.18, 0.07]},
                {"name": "four-deep", "position_weights": [0.4, 0.2, 0.1, 0.05]}]}]}


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    root = tmp_path_factory.mktemp("whatif")
    exp = parse_experiments(SPEC)["reedhall"]
    write_bid_lake(root / "bids", [exp], start=START, days=2, auctions_per_day=1500, n_bidders=4, seed=12)
    hook = ResultsHook(database=root / "results.duckdb")
    for k in range(2):
        day = START + dt.timedelta(days=k)
        partition.stage_partition(LakeHook(), lake_root=root / "bids", experiment=exp, ds=day, staging_root=root / "s")
        staged = StagedPartition.at(root / "s", exp.id, day)
        partition.record_checks(staged, schema_gate(LakeHook(), experiment=exp, staged=staged))
        partition.estimate_partition(hook, experiment=exp, ds=day, staging_root=root / "s", run_id=f"r{k}",
                                     confidence_level=0.95, cluster="auction")
        partition.write_partition(hook, experiment_id=exp.id, ds=day, staging_root=root / "s")
    return root, hook, exp


def _table(hook, name):
    with hook.connect() as con:
        return con.execute(f"select * from {name}").df()


def test_daily_and_to_date_rows_carry_the_what_if_layouts(stored):
    root, hook, exp = stored
    daily = _table(hook, "arm_estimates")
    marked = daily[daily["what_if"].astype(bool)]
    assert set(marked["arm"]) == {"halfway", "four-deep"}
    assert not daily.loc[~daily["what_if"].astype(bool), "effective_share"].notna().any()
    # the to-date rows (combined from the stored pieces of both days) equal combine_pieces of the days' bids
    bids = [pd.read_parquet(root / "bids" / f"ds={START + dt.timedelta(days=k)}" / "reedhall.parquet")
            for k in range(2)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimatorWarning)
        pieces = [p for k, b in enumerate(bids)
                  for p in stratum_pieces(b, exp, day=START + dt.timedelta(days=k), cluster="auction")]
        ref = combine_pieces(pieces, exp, cluster="auction").table.set_index(["arm", "metric"])
    to_date = _table(hook, "arm_estimates_to_date")
    last = to_date[to_date["ds"] == pd.Timestamp(START + dt.timedelta(days=1))].set_index(["arm", "metric"])
    for layout in ("halfway", "four-deep"):
        for metric in ("revenue_per_auction", "revenue_lift_vs_control"):
            row, want = last.loc[(layout, metric)], ref.loc[(layout, metric)]
            assert bool(row["what_if"])
            np.testing.assert_allclose([row["estimate"], row["std_error"], row["effective_share"]],
                                       [want["estimate"], want["std_error"], want["effective_share"]], rtol=1e-9)
    pieces_stored = _table(hook, "stratum_piece_arms")
    assert pieces_stored.loc[pieces_stored["what_if"].astype(bool), "own_variance"].gt(0).all()


def test_report_has_a_what_if_section(stored, tmp_path):
    _, hook, _ = stored
    page = write_report(hook, tmp_path).read_text()
    assert "Layouts that did not run" in page and "halfway" in page and "effective share" in page
    assert "respond to each layout as they would if it ran" in WHAT_IF_NOTE and "as they would if it ran" in page


def test_report_ranks_candidates_only_when_given(stored, tmp_path):
    """The ranking of :func:`rank_candidates` on the lake's bids appears in its experiment's section; a
    report written without it has no such section. Cells: revenue with its interval, the share text
    by status (a half width no share reaches in one day of 50 auctions: 'none reaches it')."""
    root, hook, exp = stored
    bids = pd.read_parquet(root / "bids" / f"ds={START}" / "reedhall.parquet")
    wide = rank_candidates(bids, exp, [WhatIf("plain-copy", (0.4, 0.2, 0.1))], days=14, auctions_per_day=1500,
                           target_half_width=0.01)
    page = write_report(hook, tmp_path / "ranked", candidates={exp.id: wide}).read_text()
    section = page[page.index("Candidates for the next experiment"):]
    assert "&plusmn;1.00% in 14 days of 1,500 auctions, beside plain" in section and CANDIDATES_NOTE[:60] in section
    cells = candidate_table(wide)
    assert list(cells.index) == list(wide.table["layout"]) and "plain-copy" in section
    assert cells.loc["plain-copy", "share needed"] == "any (even 0.001)"  # control's own layout: lift 0, no spread
    top = wide.table.iloc[0]
    assert cells.iloc[0]["revenue / auction"] == f"{top['revenue_per_auction']:.4f} [{top['revenue_low']:.4f}, " \
                                                 f"{top['revenue_high']:.4f}]"
    tight = rank_candidates(bids, exp, days=1, auctions_per_day=50, target_half_width=1e-5)
    assert set(candidate_table(tight)["share needed"]) == {"none reaches it"}
    plain = write_report(hook, tmp_path / "plain").read_text()
    assert "Candidates for the next experiment" not in plain
