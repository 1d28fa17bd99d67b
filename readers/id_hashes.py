"""64-bit hashes of id text (FNV-1a), computed over Arrow's string buffers with numpy.

A log too large for the memory budget is estimated from shard files, each read on its own, so its
text bidder ids get a different dictionary in every shard; shards' bidder sums have to meet on
something that is the same in every shard. The text itself is what the stored pieces use, but
matching millions of Python strings across shards is what made the combination slow. The command
line's pieces never leave the call, so there the bidders meet on a 64-bit hash of the id text,
hashed once per distinct id of a shard (the shard's dictionary), never per bid.

A collision (two distinct ids with one hash) merges the two bidders into one cluster of the
cluster-robust variance: the estimates do not use bidder ids at all, only the standard errors do,
and they then treat two bidders' influence sums as one. With ``n`` distinct ids the probability of
any collision is at most ``n (n - 1) / 2**65`` (the birthday bound for a 64-bit hash): 2.7e-4 at
10**8 ids, 2.7e-8 at 10**6.

References
----------
.. [1] Fowler, G., Noll, L. C., Vo, K.-P., Eastlake, D. (2019). The FNV non-cryptographic hash
   algorithm. IETF draft-eastlake-fnv-17 (FNV-1a, 64-bit offset basis and prime).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

__all__ = ["FNV_OFFSET_BASIS", "FNV_PRIME", "fnv1a_64"]

#: FNV-1a 64-bit parameters (draft-eastlake-fnv, section 5).
FNV_OFFSET_BASIS = 0xCBF29CE484222325
FNV_PRIME = 0x100000001B3


def fnv1a_64(strings: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """FNV-1a 64-bit hash of each string's UTF-8 bytes, as int64 (the same bits as the uint64 hash).

    Parameters
    ----------
    strings : pyarrow string or large_string array (or chunked array), without nulls

    Returns
    -------
    ndarray of int64
        ``h = offset_basis; for byte in text: h = (h xor byte) * prime  (mod 2**64)`` per string.

    Notes
    -----
    Vectorised across strings, one step per byte position: strings are ordered by length once,
    so the strings still long enough at position ``j`` are a prefix of that order. Cost: about
    three numpy passes over the strings per byte of the longest one.
    """
    if isinstance(strings, pa.ChunkedArray):
        strings = strings.combine_chunks() if strings.num_chunks != 1 else strings.chunk(0)
    if pa.types.is_string_view(strings.type):
        strings = strings.cast(pa.large_string())
    if strings.null_count:
        raise ValueError("fnv1a_64: ids must not be null")
    n = len(strings)
    width = np.int64 if pa.types.is_large_string(strings.type) else np.int32
    _, offset_buffer, data_buffer = strings.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=width)[strings.offset:strings.offset + n + 1].astype(np.int64)
    data = np.frombuffer(data_buffer, dtype=np.uint8) if data_buffer is not None else np.zeros(0, np.uint8)
    lengths = np.diff(offsets)
    order = np.argsort(-lengths, kind="stable")  # longest first: the live strings are a prefix
    start = offsets[:-1][order]
    longer = np.bincount(lengths, minlength=1)[::-1].cumsum()[::-1]  # longer[j] = strings of length >= j
    h = np.full(n, FNV_OFFSET_BASIS, dtype=np.uint64)
    prime = np.uint64(FNV_PRIME)
    for j in range(int(lengths.max()) if n else 0):
        live = int(longer[j + 1])
        part = h[:live]
        part ^= data[start[:live] + j]
        part *= prime  # uint64 arithmetic wraps modulo 2**64, as the algorithm does
    out = np.empty(n, dtype=np.uint64)
    out[order] = h
    return out.view(np.int64)
