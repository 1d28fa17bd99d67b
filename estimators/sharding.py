"""Shards: the stable hash shard of an auction id, and how many shards a stratum needs.

Any split of auctions by something fixed before the auction gives independent strata; a stable
hash of ``auction_id`` splits a large stratum into shards that any engine computes alike
(``docs/method.md``, "Strata, shards and the experiment to date").
"""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd

from ._ids import ids_as_text, id_values
from ._validate import check_count
from .errors import InputError

__all__ = ["MAX_BIDS_PER_SHARD", "n_shards", "shard_of"]

#: Default largest stratum, in bids, estimated in one piece; a larger stratum is split into
#: ``n_shards(bids, MAX_BIDS_PER_SHARD)`` shards by :func:`shard_of` of its auction ids.
MAX_BIDS_PER_SHARD = 4_000_000


def shard_of(auction_ids, n_shards: int) -> np.ndarray:
    """The stable shard of each auction id: ``int(md5(str(id)).hexdigest()[:8], 16) % n_shards``.

    The reference implementation (hashlib; each distinct id hashed once) of the rule DuckDB
    computes as ``('0x' || left(md5(cast(auction_id as varchar)), 8))::ubigint % n_shards`` and a
    Spark engine as ``conv(substr(md5(cast(auction_id as string)), 1, 8), 16, 10) % n_shards``:
    the same on every engine and every rerun. Integer ids hash their decimal text (``42`` ->
    ``'42'``), text ids their UTF-8 bytes.

    Parameters
    ----------
    auction_ids : array-like
        Integer or text auction ids (a pandas Series, numpy array or list).
    n_shards : int
        At least 1.

    Returns
    -------
    ndarray of int64
        Shard ``0 .. n_shards - 1`` of each id.

    References
    ----------
    .. [1] Rivest, R. (1992). The MD5 message-digest algorithm. RFC 1321.
    """
    check_count("n_shards", n_shards, 1)
    codes, uniques = pd.factorize(pd.Series(auction_ids) if not isinstance(auction_ids, pd.Series) else auction_ids,
                                  sort=False)
    if (codes < 0).any():
        raise InputError(f"auction_id row {int(np.flatnonzero(codes < 0)[0])} is null; every auction needs an id")
    texts = ids_as_text(id_values(uniques))
    heads = np.fromiter((int.from_bytes(hashlib.md5(t.encode("utf-8")).digest()[:4], "big") for t in texts),
                        dtype=np.int64, count=len(texts))
    return (heads % int(n_shards))[codes]


def n_shards(n_bids: int, max_bids_per_shard: int = MAX_BIDS_PER_SHARD) -> int:
    """Shards of a stratum of ``n_bids`` bids: ``ceil(n_bids / max_bids_per_shard)`` (at least 1)."""
    check_count("n_bids", n_bids, 0)
    check_count("max_bids_per_shard", max_bids_per_shard, 1)
    return max(1, -(-int(n_bids) // int(max_bids_per_shard)))
