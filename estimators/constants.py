"""The names and constants every result of the estimator carries: metrics, flags, clusterings, version.

One home for what the estimate, the stored rows, the CLI and the report agree on. Nothing here
computes; every module of :mod:`counterbid.estimators` may import it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pragma: no cover
    from .spec import Experiment

__all__ = [
    "CLUSTERS",
    "METHOD_VERSION",
    "METRICS",
    "MIN_STRATUM_BIDS",
    "MIXTURE_ARM",
    "RESULT_COLUMNS",
    "REVENUE",
    "STATUS_FLAGS",
    "UNIT_EXPONENT",
    "WELFARE",
    "piece_labels",
]

#: Metrics in the results, in output order.
METRICS = ("revenue_per_auction", "welfare_per_auction", "realized_revenue_per_auction", "revenue_lift_vs_control")
#: Derived row: the mixture that actually ran (estimate vs realized: the sanity identity).
MIXTURE_ARM = "_mixture"
#: Written beside every stored estimate; bump when numbers could change for the same bids.
#: ordstat-2: default cluster ``auto``, welfare's endpoint terms from the top/bottom spacings and no
#: welfare interval, NaN for degenerate strata, ``status`` column.
#: ordstat-3: the payment rule that ran (``first_price``, ``gsp``, ``vcg``), the spec's floor (clamped
#: bids, boundary term, estimated threshold quantile) and quality-weighted (effective) bids.
METHOD_VERSION = "ordstat-3"
#: Cluster units of the standard errors; ``auto`` is bidder when bidder ids repeat across auctions.
CLUSTERS = ("auto", "auction", "bidder")
#: Strata (number of bidders) with fewer bids than this are flagged ``few_bids``: the normal
#: approximation behind the intervals is poor there (nominal 95 % intervals covered 59-89 % at 10
#: bids in the project's simulations; the estimator's bias is of order 1/N as well).
MIN_STRATUM_BIDS = 100
#: Values of the ``status`` column; several flags are comma-joined in this order.
STATUS_FLAGS = {
    "ok": "nothing to report",
    "few_bids": f"a stratum behind the row has fewer than {MIN_STRATUM_BIDS} bids: its interval under-covers",
    "degenerate": "a stratum's bids are all equal, which no equilibrium of continuous values produces: NaN",
    "not_identified": "welfare: the mixture's top (or bottom) positions weigh the same, so values there "
                      "cannot be recovered from bids: NaN",
    "no_interval": "the estimate stands without a standard error or interval (welfare always, see estimate_arms; "
                   "or fewer than two clusters; or a segment none of whose bids reaches the floor: revenue 0)",
    "no_auctions": "realized per-arm average of an arm that ran in no auction: NaN",
    "thin_support": "a what-if layout the mixture's bids say too little about: its weights are unbounded, or "
                    "it leans on fewer effective bids than MIN_STRATUM_BIDS (docs/method.md, 'Layouts that did "
                    "not run'): NaN",
}
RESULT_COLUMNS = ("arm", "segment", "metric", "estimate", "std_error", "ci_low", "ci_high", "n_auctions", "n_bids", "status",
                  "what_if", "effective_share")
#: Bids are estimated in their own unit when the largest lies in [2**-UNIT_EXPONENT, 2**UNIT_EXPONENT];
#: otherwise in a power-of-two unit (exact), so no square or sum of bids overflows or underflows.
UNIT_EXPONENT = 200

#: Metric names of a stratum piece's labels (the same as the result rows').
REVENUE = "revenue_per_auction"
WELFARE = "welfare_per_auction"


def piece_labels(experiment: Experiment) -> tuple[tuple[str, str], ...]:
    """The (arm, metric) labels of a stratum piece's linear quantities, in order.

    Revenue of every target (the arms, then the what-if layouts), welfare of every target, then the
    mixture's revenue (arm ``_mixture``).

    Parameters
    ----------
    experiment : Experiment

    Returns
    -------
    tuple of (str, str)
        ``2 T + 1`` labels for ``T`` targets (arms and what-if layouts).
    """
    names = experiment.target_names
    return tuple([(a, REVENUE) for a in names] + [(a, WELFARE) for a in names] + [(MIXTURE_ARM, REVENUE)])
