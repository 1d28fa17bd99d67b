"""Readers of bid logs, shared by the command line and the pipeline's operators."""

from .bid_log import read_bids

__all__ = ["read_bids"]
