"""Pure estimators for auction-rule experiments (numpy/scipy only; no Airflow, no DuckDB).

Public API
----------
estimate_arms, ArmEstimates
    Per-arm revenue, welfare, realized per-arm average and lift from one experiment's bids, as a
    frozen result (the rows in ``.table``, and what they were computed with).
stratum_pieces, combine_pieces, StratumKey, StratumPiece, pieces_to_frames, pieces_from_frames
    Strata as the unit of work: estimate each stratum alone, store and combine what it contributes.
bidder_totals, gram_of, extend_gram, WindowTotals, BidderGram
    Running bidder totals of an analysis window (bidder clustering from today's bidders only).
shard_of, n_shards, MAX_BIDS_PER_SHARD
    The stable hash shard of an auction id and the number of shards of a stratum.
load_experiment, load_experiments, parse_experiments, parse_day
    Read and validate experiment specs; parse a day.
allocation_rule, mixture_rule
    Allocation rules of position auctions in quantile space.
measured_position_weights
    Position weights of ``measured`` arms from pooled clicks and impressions.
simulate_experiment, equilibrium_bid_function, expected_revenue_per_auction
    Equilibrium simulator (tests, demo).
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the same names, for type checkers and editors
    from .allocation import AllocationRule, allocation_rule, derivative_ratio, mixture_rule
    from .arms import estimate_arms
    from .bids import BID_COLUMNS, PreparedBids, prepare_bids
    from .checks import CheckResult, worst_failure
    from .combine import ArmEstimates, BidderGram, combine_pieces
    from .constants import (
        CLUSTERS,
        METHOD_VERSION,
        METRICS,
        MIN_STRATUM_BIDS,
        MIXTURE_ARM,
        RESULT_COLUMNS,
        STATUS_FLAGS,
        piece_labels,
    )
    from .errors import EstimatorWarning, InputError
    from .order_weights import revenue_weights, welfare_weights
    from .piece_frames import PIECE_FRAMES, pieces_from_frames, pieces_to_frames
    from .pieces import StratumKey, StratumPiece, stratum_pieces
    from .window_totals import WindowTotals, bidder_totals, extend_gram, gram_of
    from .sharding import MAX_BIDS_PER_SHARD, n_shards, shard_of
    from .position_weights import measured_position_weights
    from .simulate import (
        BidFunction,
        SimulatedSegment,
        equilibrium_bid_function,
        expected_revenue_per_auction,
        expected_welfare_per_auction,
        simulate_experiment,
        simulate_segmented_experiment,
    )
    from .spec import Arm, Experiment, WhatIf, load_experiment, load_experiments, parse_day, parse_experiments

#: Where each public name lives: imported on first use (PEP 562), so that importing one light
#: submodule (``errors``, ``spec``, ``constants``) does not load the estimator and scipy with it;
#: the example DAG's file, which Airflow re-parses, and the command line import little.
_EXPORTS = {
    "AllocationRule": "allocation",
    "allocation_rule": "allocation",
    "derivative_ratio": "allocation",
    "mixture_rule": "allocation",
    "estimate_arms": "arms",
    "BID_COLUMNS": "bids",
    "PreparedBids": "bids",
    "prepare_bids": "bids",
    "CheckResult": "checks",
    "worst_failure": "checks",
    "ArmEstimates": "combine",
    "BidderGram": "combine",
    "combine_pieces": "combine",
    "CLUSTERS": "constants",
    "METHOD_VERSION": "constants",
    "METRICS": "constants",
    "MIN_STRATUM_BIDS": "constants",
    "MIXTURE_ARM": "constants",
    "RESULT_COLUMNS": "constants",
    "STATUS_FLAGS": "constants",
    "piece_labels": "constants",
    "EstimatorWarning": "errors",
    "InputError": "errors",
    "revenue_weights": "order_weights",
    "welfare_weights": "order_weights",
    "PIECE_FRAMES": "piece_frames",
    "pieces_from_frames": "piece_frames",
    "pieces_to_frames": "piece_frames",
    "StratumKey": "pieces",
    "StratumPiece": "pieces",
    "stratum_pieces": "pieces",
    "WindowTotals": "window_totals",
    "bidder_totals": "window_totals",
    "extend_gram": "window_totals",
    "gram_of": "window_totals",
    "MAX_BIDS_PER_SHARD": "sharding",
    "n_shards": "sharding",
    "shard_of": "sharding",
    "measured_position_weights": "position_weights",
    "BidFunction": "simulate",
    "SimulatedSegment": "simulate",
    "equilibrium_bid_function": "simulate",
    "expected_revenue_per_auction": "simulate",
    "expected_welfare_per_auction": "simulate",
    "simulate_experiment": "simulate",
    "simulate_segmented_experiment": "simulate",
    "Arm": "spec",
    "Experiment": "spec",
    "WhatIf": "spec",
    "load_experiment": "spec",
    "load_experiments": "spec",
    "parse_day": "spec",
    "parse_experiments": "spec",
}


__all__ = [
    "AllocationRule",
    "Arm",
    "ArmEstimates",
    "BID_COLUMNS",
    "BidFunction",
    "CLUSTERS",
    "CheckResult",
    "EstimatorWarning",
    "Experiment",
    "InputError",
    "MAX_BIDS_PER_SHARD",
    "METHOD_VERSION",
    "METRICS",
    "MIN_STRATUM_BIDS",
    "MIXTURE_ARM",
    "PIECE_FRAMES",
    "PreparedBids",
    "RESULT_COLUMNS",
    "STATUS_FLAGS",
    "StratumKey",
    "StratumPiece",
    "WhatIf",
    "allocation_rule",
    "combine_pieces",
    "bidder_totals",
    "extend_gram",
    "gram_of",
    "WindowTotals",
    "BidderGram",
    "derivative_ratio",
    "equilibrium_bid_function",
    "estimate_arms",
    "expected_revenue_per_auction",
    "expected_welfare_per_auction",
    "load_experiment",
    "load_experiments",
    "measured_position_weights",
    "mixture_rule",
    "n_shards",
    "parse_day",
    "parse_experiments",
    "piece_labels",
    "pieces_from_frames",
    "pieces_to_frames",
    "prepare_bids",
    "revenue_weights",
    "shard_of",
    "SimulatedSegment",
    "simulate_experiment",
    "simulate_segmented_experiment",
    "stratum_pieces",
    "welfare_weights",
    "worst_failure",
]


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(import_module(f".{module}", __name__), name)
    globals()[name] = value  # later lookups are plain attribute reads
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))
