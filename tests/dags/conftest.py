"""Shared data of the DAG tests (the Airflow home and `airflow_db` are in tests/conftest.py)."""

from __future__ import annotations

import datetime as dt


START = dt.date(2026, 3, 2)
SPEC_TEXT = """
experiments:
  - id: tiles
    control_arm: plain
    start: 2026-03-02
    checks: {warmup: {days: 1}}  # the first day is a warm-up day: left out of the to-date numbers
    arms:
      - {name: plain, share: 0.7, position_weights: [0.4, 0.2, 0.1]}
      - {name: bold,  share: 0.3, position_weights: [0.5, 0.15, 0.05]}
  - id: banners
    control_arm: one
    start: 2026-03-02
    checks: {warmup: {days: 1}}
    arms:
      - {name: one, share: 0.5, position_weights: [0.3, 0.05]}
      - {name: two, share: 0.5, position_weights: [0.3, 0.25]}
"""


