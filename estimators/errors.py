"""Errors raised at the boundary of the estimator library."""

from __future__ import annotations

__all__ = ["InputError", "EstimatorWarning", "NothingToEstimate"]


class InputError(ValueError):
    """Bad input: the message is one line that names the file, column, row or key at fault."""


class NothingToEstimate(InputError):
    """Every auction of the input has a single bidder: nothing to estimate.

    A whole input that says so is bad input; one shard of a day that says so only adds its
    ``n_excluded_auctions`` single-bidder auctions to the day's (the other shards hold the bids).
    """

    def __init__(self, message: str, n_excluded_auctions: int = 0):
        super().__init__(message)
        self.n_excluded_auctions = int(n_excluded_auctions)


def no_pieces_error(source: str, experiment_id: str, *, single_bidders: bool, n_excluded_auctions: int = 0) -> InputError:
    """The one line for an input whose shards gave no stratum piece (both engines word it so)."""
    if single_bidders:
        return NothingToEstimate(f"{source}: every auction of experiment {experiment_id!r} has a single bidder; "
                                 "nothing to estimate", n_excluded_auctions)
    return InputError(f"{source}: no shard holds bids of experiment {experiment_id!r}")


class EstimatorWarning(UserWarning):
    """A degenerate case that yields NaN (or an excluded subset) rather than a crash."""
