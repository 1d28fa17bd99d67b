"""The analysis window of the experiment-to-date numbers: burn-in, excluded days, failed checks."""

from __future__ import annotations

import datetime as dt

import pytest

from counterbid.estimators import InputError, parse_experiments
from counterbid.estimators.window import WINDOW_CHECKS, analysis_window, format_days

D = [dt.date(2026, 3, 2) + dt.timedelta(days=k) for k in range(8)]


def _exp(**over):
    raw = {"id": "tiles", "start": "2026-03-02", "arms": [{"name": "a", "share": 1.0, "position_weights": [0.3]}]}
    raw.update(over)
    return parse_experiments({"experiments": [raw]})["tiles"]


def test_default_window_leaves_out_days_whose_warmup_or_drift_failed():
    failed = {D[0]: ["warmup"], D[1]: ["warmup", "drift"], D[4]: ["drift"], D[5]: ["sample_ratio", "shading"]}
    w = analysis_window(D, _exp(), failed_checks=failed)
    assert w.used == (D[2], D[3], D[5], D[6], D[7])  # a failed sample-ratio or shading check does not leave a day out
    assert w.left_out == {D[0]: "warmup", D[1]: "drift+warmup", D[4]: "drift"}
    assert w.days_used == "2026-03-04..2026-03-05,2026-03-07..2026-03-09"
    assert w.days_left_out == "2026-03-02 (warmup),2026-03-03 (drift+warmup),2026-03-06 (drift)"
    kept = analysis_window(D, _exp(), failed_checks=failed, leave_out_failed=False)
    assert kept.used == tuple(D) and kept.left_out == {}
    assert set(WINDOW_CHECKS) == {"warmup", "drift"}


def test_burn_in_counts_from_start_and_excluded_days_are_named():
    w = analysis_window(D, _exp(burn_in_days=3, exclude_days=["2026-03-07", "2026-03-30"]))
    assert w.left_out == {D[0]: "burn_in", D[1]: "burn_in", D[2]: "burn_in", D[5]: "excluded"}
    assert w.days_left_out == "2026-03-02..2026-03-04 (burn_in),2026-03-07 (excluded)"
    assert w.used == (D[3], D[4], D[6], D[7])
    no_start = _exp(start=None, burn_in_days=1)
    assert analysis_window(D[3:], no_start).left_out == {D[3]: "burn_in"}  # from the first day seen


def test_empty_and_formatting_and_bad_input():
    assert analysis_window([], _exp()).used == () and format_days([]) == ""
    assert format_days([D[2], D[0], D[1], D[2]]) == "2026-03-02..2026-03-04"
    with pytest.raises(InputError, match=r"failed_checks\[2026-03-02\]: must be a list of check names"):
        analysis_window(D, _exp(), failed_checks={D[0]: "warmup"})
    with pytest.raises(InputError, match="day: must be a date"):
        analysis_window(["yesterday"], _exp())
