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

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the names below, for type checkers; at run time each module loads on first use
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

#: Where each public name lives. A command imports only what it uses: ``counterbid estimate`` never
#: loads the checks, the simulator or the study (and SciPy's statistics with them); PEP 562.
_MODULES: dict[str, tuple[str, ...]] = {
    "allocation": ("AllocationRule", "allocation_rule", "derivative_ratio", "mixture_rule"),
    "arms": ("estimate_arms",),
    "bids": ("BID_COLUMNS", "PreparedBids", "prepare_bids"),
    "checks": ("CheckResult", "worst_failure"),
    "combine": ("ArmEstimates", "BidderGram", "combine_pieces"),
    "constants": (
        "CLUSTERS", "METHOD_VERSION", "METRICS", "MIN_STRATUM_BIDS", "MIXTURE_ARM", "RESULT_COLUMNS",
        "STATUS_FLAGS", "piece_labels",
    ),
    "errors": ("EstimatorWarning", "InputError"),
    "order_weights": ("revenue_weights", "welfare_weights"),
    "piece_frames": ("PIECE_FRAMES", "pieces_from_frames", "pieces_to_frames"),
    "pieces": ("StratumKey", "StratumPiece", "stratum_pieces"),
    "window_totals": ("WindowTotals", "bidder_totals", "extend_gram", "gram_of"),
    "sharding": ("MAX_BIDS_PER_SHARD", "n_shards", "shard_of"),
    "position_weights": ("measured_position_weights",),
    "simulate": (
        "BidFunction", "SimulatedSegment", "equilibrium_bid_function", "expected_revenue_per_auction",
        "expected_welfare_per_auction", "simulate_experiment", "simulate_segmented_experiment",
    ),
    "spec": (
        "Arm", "Experiment", "WhatIf", "load_experiment", "load_experiments", "parse_day", "parse_experiments",
    ),
}
_SOURCES = {name: module for module, names in _MODULES.items() for name in names}

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
    module = _SOURCES.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value  # once loaded, a plain attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
