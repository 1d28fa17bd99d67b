"""Pure estimators for auction-rule experiments (numpy/scipy only; no Airflow, no DuckDB).

Public API
----------
estimate_arms
    Per-arm revenue, welfare, realized per-arm average and lift from one experiment's bids.
load_experiment, load_experiments, parse_experiments, parse_day
    Read and validate experiment specs; parse a day.
allocation_rule, mixture_rule
    Allocation rules of position auctions in quantile space.
measured_position_weights
    Position weights of ``measured`` arms from pooled clicks and impressions.
simulate_experiment, equilibrium_bid_function, expected_revenue_per_auction
    Equilibrium simulator (tests, demo).
"""

from .allocation import AllocationRule, allocation_rule, derivative_ratio, mixture_rule
from .arms import (
    BID_COLUMNS,
    CLUSTERS,
    METHOD_VERSION,
    METRICS,
    MIN_STRATUM_BIDS,
    MIXTURE_ARM,
    RESULT_COLUMNS,
    STATUS_FLAGS,
    PreparedBids,
    estimate_arms,
    prepare_bids,
)
from .checks import CheckResult, worst_failure
from .errors import EstimatorWarning, InputError
from .order_weights import revenue_weights, welfare_weights
from .position_weights import measured_position_weights
from .simulate import (
    BidFunction,
    equilibrium_bid_function,
    expected_revenue_per_auction,
    expected_welfare_per_auction,
    simulate_experiment,
)
from .spec import Arm, Experiment, load_experiment, load_experiments, parse_day, parse_experiments

__all__ = [
    "AllocationRule",
    "Arm",
    "BID_COLUMNS",
    "BidFunction",
    "CLUSTERS",
    "CheckResult",
    "EstimatorWarning",
    "Experiment",
    "InputError",
    "METHOD_VERSION",
    "METRICS",
    "MIN_STRATUM_BIDS",
    "MIXTURE_ARM",
    "PreparedBids",
    "RESULT_COLUMNS",
    "STATUS_FLAGS",
    "allocation_rule",
    "derivative_ratio",
    "equilibrium_bid_function",
    "estimate_arms",
    "expected_revenue_per_auction",
    "expected_welfare_per_auction",
    "load_experiment",
    "load_experiments",
    "measured_position_weights",
    "mixture_rule",
    "parse_day",
    "parse_experiments",
    "prepare_bids",
    "revenue_weights",
    "simulate_experiment",
    "welfare_weights",
    "worst_failure",
]
