"""Experiment spec validation: every rule gives one line naming the key."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from counterbid.estimators import InputError, load_experiment, load_experiments, parse_day, parse_experiments


def doc(**over):
    exp = {"id": "e1", "control_arm": "a", "arms": [
        {"name": "a", "share": 0.6, "position_weights": [0.3, 0.1]},
        {"name": "b", "share": 0.4, "position_weights": [0.3, 0.2]}]}
    exp.update(over)
    return {"experiments": [exp]}


def test_valid_spec_round_trip(tmp_path):
    path = tmp_path / "spec.yaml"
    path.write_text("experiments:\n  - id: e1\n    control_arm: a\n    start: 2026-03-01\n    arms:\n"
                    "      - {name: a, share: 0.5, position_weights: [0.3, 0.1]}\n"
                    "      - {name: b, share: 0.5, position_weights: measured}\n")
    exp = load_experiment(path)
    assert exp.arm_names == ("a", "b") and exp.start == dt.date(2026, 3, 1)
    assert exp.arm("b").measured and exp.arm("b").position_weights is None
    assert exp.is_active(dt.date(2026, 3, 1)) and not exp.is_active(dt.date(2026, 2, 28))
    filled = exp.with_position_weights({"b": [0.3, 0.05]})
    assert filled.arm("b").weights_for(4) == (0.3, 0.05, 0.0, 0.0)


@pytest.mark.parametrize("over,message", [
    ({"arms": [{"name": "a", "share": 0.6, "position_weights": [0.3]},
               {"name": "b", "share": 0.3, "position_weights": [0.3]}]}, "sum to 1"),
    ({"arms": [{"name": "a", "share": 1.0, "position_weights": [0.1, 0.3]}]}, "non-increasing; position 2"),
    ({"payment_rule": "second_price"}, "unknown payment_rule 'second_price'"),
    ({"control_arm": "zzz"}, "control_arm 'zzz' is not one of the arms"),
    ({"arms": [{"name": "_x", "share": 1.0, "position_weights": [0.3]}]}, "arms\\[0\\]: 'name'"),
    ({"arms": [{"name": "a", "share": 1.5, "position_weights": [0.3]}]}, "'share' must be a number in \\(0, 1\\]"),
    ({"arms": [{"name": "a", "share": 1.0, "position_weights": [-0.1]}]}, "finite number >= 0"),
    ({"colour": 3}, "unknown key 'colour'"),
    ({"start": "2026-13-01"}, "must be a date"),
])
def test_rejects(over, message):
    with pytest.raises(InputError, match=message):
        parse_experiments(doc(**over), source="spec.yaml")


def test_duplicate_ids_and_missing_key():
    with pytest.raises(InputError, match="duplicate experiment id 'e1'"):
        parse_experiments({"experiments": doc()["experiments"] * 2})
    with pytest.raises(InputError, match="top-level key 'experiments' is missing"):
        parse_experiments({"exp": []})


def test_file_errors(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("experiments: [unclosed\n")
    with pytest.raises(InputError, match=r"bad.yaml: not valid YAML at line"):
        load_experiments(bad)
    with pytest.raises(InputError, match="cannot read experiment spec"):
        load_experiments(tmp_path / "missing.yaml")
    two = tmp_path / "two.yaml"
    two.write_text("experiments:\n" + "".join(
        f"  - {{id: {i}, control_arm: a, arms: [{{name: a, share: 1.0, position_weights: [1]}}]}}\n" for i in ("x", "y")))
    with pytest.raises(InputError, match="holds 2 experiments"):
        load_experiment(two)
    with pytest.raises(InputError, match="no experiment with id 'z'"):
        load_experiment(two, "z")


# A typo at any level of the spec is refused, naming the key, the file, the experiment and the arm.
@pytest.mark.parametrize("document,message", [
    ({**doc(), "experiment": []}, r"^spec.yaml: top level: unknown key 'experiment' \(known: description, experiments\)$"),
    (doc(controlarm="a"), r"^spec.yaml: experiments\[0\] \(id 'e1'\): unknown key 'controlarm'"),
    ({"experiments": [{"iid": "e1", "arms": []}]}, r"^spec.yaml: experiments\[0\]: unknown key 'iid'"),
    (doc(arms=[{"name": "a", "share": 0.6, "position_weights": [0.3]},
               {"name": "b", "share": 0.4, "position_weights": [0.3], "postion_weights": [0.5, 0.1]}]),
     r"^spec.yaml: experiments\[0\] \(id 'e1'\) arms\[1\] \(b\): unknown key 'postion_weights' "
     r"\(known: description, name, position_weights, share\)$"),
    (doc(arms=[{"nmae": "a", "share": 1.0, "position_weights": [0.3]}]),
     r"^spec.yaml: experiments\[0\] \(id 'e1'\) arms\[0\]: unknown key 'nmae'"),
    (doc(checks={"sampel_ratio": {"alpha": 0.01}}),
     r"^spec.yaml: experiments\[0\] \(id 'e1'\) checks: unknown check 'sampel_ratio' \(known: "),
    (doc(checks={"sample_ratio": {"alpah": 0.01}}),
     r"^spec.yaml: experiments\[0\] \(id 'e1'\) checks.sample_ratio: unknown setting 'alpah' \(known: severity, alpha\)$"),
    (doc(checks={"drift": {"severity": "fatal"}}), r"checks.drift.severity: must be one of warning, error; got 'fatal'$"),
    (doc(checks={"warmup": 3}), r"checks.warmup: must be a mapping of setting to value$"),
])
def test_unknown_keys_are_refused_at_every_level(document, message):
    with pytest.raises(InputError, match=message):
        parse_experiments(document, source="spec.yaml")


def test_known_optional_keys_are_accepted():
    document = {"description": "demo", **doc(description="layouts", checks={"sample_ratio": {"alpha": 1e-4}}, arms=[
        {"name": "a", "share": 1.0, "position_weights": [0.3], "description": "the current layout"}])}
    exp = parse_experiments(document)["e1"]
    assert exp.checks == {"sample_ratio": {"alpha": 1e-4}} and exp.arm_names == ("a",)


@pytest.mark.parametrize("value", [
    dt.date(2026, 3, 2), dt.datetime(2026, 3, 2, 23, 59), pd.Timestamp("2026-03-02 05:00", tz="UTC"),
    "2026-03-02", "2026-03-02T00:00:00+00:00", "2026-03-02 00:00:00", np.datetime64("2026-03-02"),
])
def test_parse_day_accepts_dates_datetimes_and_iso_text(value):
    assert parse_day(value) == dt.date(2026, 3, 2)


@pytest.mark.parametrize("value", ["yesterday", "2026-13-01", "2026-03-02garbage", "2026-03-02T25:00", None, 20260302.5])
def test_parse_day_names_what_it_was_parsing(value):
    with pytest.raises(InputError, match=r"^--start: must be a date YYYY-MM-DD; got "):
        parse_day(value, what="--start")


def test_analysis_window_keys_burn_in_and_excluded_days(tmp_path):
    path = tmp_path / "spec.yaml"
    path.write_text("experiments:\n  - id: e1\n    start: 2026-03-01\n    burn_in_days: 2\n"
                    "    exclude_days: [2026-03-09, '2026-03-05', 2026-03-09]\n"
                    "    arms:\n      - {name: a, share: 1.0, position_weights: [0.3, 0.1]}\n")
    exp = load_experiment(path)
    assert exp.burn_in_days == 2
    assert exp.exclude_days == (dt.date(2026, 3, 5), dt.date(2026, 3, 9))  # sorted, once each
    plain = parse_experiments(doc())["e1"]
    assert plain.burn_in_days == 0 and plain.exclude_days == ()


@pytest.mark.parametrize("over,message", [
    ({"burn_in_days": -1}, r"\(id 'e1'\): 'burn_in_days' must be a whole number >= 0; got -1$"),
    ({"burn_in_days": 1.5}, r"'burn_in_days' must be a whole number >= 0; got 1.5$"),
    ({"burn_in_days": True}, r"'burn_in_days' must be a whole number >= 0; got True$"),
    ({"exclude_days": "2026-03-02"}, r"'exclude_days' must be a list of dates YYYY-MM-DD"),
    ({"exclude_days": ["2026-03-02", "March 3"]}, r"exclude_days\[1\]: must be a date YYYY-MM-DD; got 'March 3'$"),
])
def test_analysis_window_keys_refuse_bad_values(over, message):
    with pytest.raises(InputError, match=message):
        parse_experiments(doc(**over), source="spec.yaml")


@pytest.mark.parametrize("bad_id", ["it's", 'say "hi"', "a b", "_hidden", "-dash", "x" * 129, "semi;colon"])
def test_experiment_ids_are_checked_when_the_spec_loads(tmp_path, bad_id):
    # an id names staging folders, lake partitions and result rows: the arm names' alphabet, refused at load
    path = tmp_path / "spec.yaml"
    path.write_text("experiments:\n  - id: " + repr(bad_id).replace("\\'", "''") + "\n    control_arm: a\n"
                    "    arms:\n      - {name: a, share: 1.0, position_weights: [0.3]}\n")
    with pytest.raises(InputError) as info:
        load_experiments(path)
    message = str(info.value)
    assert "\n" not in message and message.startswith(f"{path}: experiments[0]")
    assert f"experiment id {bad_id!r} must be 1-128 characters" in message


def test_plain_ids_still_load():
    for good in ("summer.strip-v2", "E_7", 42):
        assert list(parse_experiments(doc(id=good))) == [str(good)]


@pytest.mark.parametrize("value,message", [
    (0, "'max_bid' must be a finite number > 0; got 0"),
    (-3.0, "'max_bid' must be a finite number > 0"),
    (float("inf"), "'max_bid' must be a finite number > 0"),
    ("40", "'max_bid' must be a finite number > 0; got '40'"),
    (True, "'max_bid' must be a finite number > 0; got True"),
])
def test_max_bid_is_validated_like_the_other_keys(value, message):
    with pytest.raises(InputError, match=message):
        parse_experiments(doc(max_bid=value), source="spec.yaml")


def test_max_bid_below_the_floor_is_refused_and_a_good_one_kept():
    with pytest.raises(InputError, match=r"'max_bid' 0\.5 lies below the floor 1\.0"):
        parse_experiments(doc(max_bid=0.5, floor=1.0))
    assert parse_experiments(doc(max_bid=40))["e1"].max_bid == 40.0
    assert parse_experiments(doc())["e1"].max_bid is None
