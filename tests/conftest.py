"""Shared fixtures: small experiment specs (invented data only)."""

from __future__ import annotations

import pytest

from counterbid.estimators import parse_experiments

THREE_ARMS = {
    "experiments": [
        {
            "id": "three-arms",
            "payment_rule": "first_price",
            "control_arm": "control",
            "arms": [
                {"name": "control", "share": 0.8, "position_weights": [0.31, 0.17, 0.06, 0.02]},
                {"name": "wide", "share": 0.1, "position_weights": [0.29, 0.22, 0.15, 0.02]},
                {"name": "single", "share": 0.1, "position_weights": [0.4]},
            ],
        }
    ]
}


@pytest.fixture
def three_arm_experiment():
    return parse_experiments(THREE_ARMS)["three-arms"]
