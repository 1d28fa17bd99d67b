"""Shards' per-bidder sums set aside on disk, then added bidder by bidder one bucket at a time.

Bidder clustering of a day needs each bidder's influence sums added over every shard before
squaring (``docs/method.md``). Holding every shard's sums until the last shard is read sizes the
combination by the day's distinct bidders. Instead, as each shard's pieces arrive
(:meth:`BidderSpill.add`) their sums go to ``.npy`` files in a folder, rows ordered by bucket
(:func:`counterbid.estimators.keyed_gram.bucket_of` of the 64-bit bidder key) with the bucket
bounds kept, and the pieces keep no sums. :meth:`BidderSpill.grams` then reads, for one run of
adjacent buckets at a time (at most ``max_rows`` rows, a memory-mapped slice of every shard's
file), the rows of those buckets only, weights them by their stratum (``M_s 2**(e_s - e)``, the
unit of :class:`~counterbid.estimators.BidderGram`) and adds their Gram form: a bidder lies in one
bucket, so the sum over runs is the day's form. Memory: one shard's pieces, then one run.

The keys are integers: the 64-bit hashes of text ids (:mod:`.id_hashes`) or integer ids as they
are; pieces with other ids are left as they are (:meth:`BidderSpill.add` returns them unchanged).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from counterbid.estimators import BidderGram, StratumPiece
from counterbid.estimators.keyed_gram import BUCKET_BITS, KeyedGram, bucket_of, keyed_gram

__all__ = ["MAX_SPILL_ROWS", "BidderSpill"]

#: Rows added up in one pass of :meth:`BidderSpill.grams` (about 48 bytes a row with four revenue
#: labels, times three for the sort's copies: ~0.3 GiB).
MAX_SPILL_ROWS = 2_000_000


@dataclass
class _Part:
    """One shard's rows on disk: the files and the first row of each bucket (``2**bits + 1`` bounds)."""

    keys: Path
    sums: Path
    piece: Path
    bounds: np.ndarray


@dataclass
class BidderSpill:
    """Per-bidder sums of many pieces in ``folder``, added into Gram forms bucket by bucket.

    Parameters
    ----------
    folder : Path
        An empty folder this object owns (a temporary one).
    max_rows : int
        Rows added up in one pass (at least one bucket is read per pass, whatever its size).
    bits : int
        ``2**bits`` buckets.
    """

    folder: Path
    max_rows: int = MAX_SPILL_ROWS
    bits: int = BUCKET_BITS
    _pieces: list[tuple[int, int, str | None]] = field(default_factory=list)  # (n_auctions, bid_exponent, segment)
    _parts: list[_Part] = field(default_factory=list)
    _n_columns: int | None = None
    _all_kept: bool = True

    def add(self, pieces: list[StratumPiece]) -> list[StratumPiece]:
        """Set aside the bidder sums of one shard's pieces; returns the pieces without them.

        A piece whose ids are not integers keeps its sums, and no form is built
        (:meth:`grams` returns ``None``): the pieces then combine as they always did.
        """
        kept = [p for p in pieces if p.bidder_sums is not None]
        if len(kept) != len(pieces) or any(np.asarray(p.bidder_ids).dtype.kind not in "iu" for p in kept):
            self._all_kept = False
        if not self._all_kept or not kept:
            self._pieces += [(p.n_auctions, p.bid_exponent, p.key.segment) for p in pieces]
            return pieces
        first = len(self._pieces)
        self._pieces += [(p.n_auctions, p.bid_exponent, p.key.segment) for p in pieces]
        keys = np.concatenate([np.asarray(p.bidder_ids, dtype=np.int64) for p in kept])
        sums = np.concatenate([p.bidder_sums for p in kept])
        which = np.concatenate([np.full(p.bidder_sums.shape[0], first + i, dtype=np.int32)
                                for i, p in enumerate(kept)])
        self._n_columns = sums.shape[1]
        bucket = bucket_of(keys, self.bits)
        order = np.argsort(bucket, kind="stable")  # within a bucket, rows keep the pieces' order
        bounds = np.searchsorted(bucket[order], np.arange(2 ** self.bits + 1))
        del bucket
        k = len(self._parts)
        part = _Part(self.folder / f"keys-{k}.npy", self.folder / f"sums-{k}.npy", self.folder / f"piece-{k}.npy",
                     bounds)
        np.save(part.keys, keys[order])
        del keys
        np.save(part.sums, sums[order])
        del sums
        np.save(part.piece, which[order])
        self._parts.append(part)
        return [p.without_bidder_sums() for p in pieces]

    def grams(self) -> tuple[BidderGram, dict[str, BidderGram]] | None:
        """The pooled form and each segment's (``combine_pieces(bidder_gram=, segment_grams=)``).

        ``None`` when some piece carried no bidder sums, or ids that are not integers (the
        pieces kept what they had), or no piece at all.

        Returns
        -------
        (BidderGram, dict of str to BidderGram) or None
            In units of ``2**e`` bids, ``e`` the largest exponent of the pieces.
        """
        if not self._all_kept or not self._parts:
            return None
        exponent = max(e for _, e, _ in self._pieces)
        weight = np.array([m * math.ldexp(1.0, e - exponent) for m, e, _ in self._pieces])
        segments = sorted({s for _, _, s in self._pieces if s is not None})
        segment_code = np.array([-1 if s is None else segments.index(s) for _, _, s in self._pieces])
        size = self._n_columns
        pooled = KeyedGram(np.zeros((size, size)), 0)
        by_segment = [KeyedGram(np.zeros((size, size)), 0) for _ in segments]
        for lo, hi in self._runs():
            keys, rows, which = self._read(lo, hi)
            rows *= weight[which][:, None]
            pooled += keyed_gram(keys, rows)
            if segments:
                code = segment_code[which]
                for j in range(len(segments)):
                    mine = code == j
                    by_segment[j] += keyed_gram(keys[mine], rows[mine])
            del keys, rows, which
        as_gram = lambda g: BidderGram(gram=g.gram, n_bidders=g.n_keys, bid_exponent=exponent)  # noqa: E731
        return as_gram(pooled), {s: as_gram(g) for s, g in zip(segments, by_segment)}

    def _runs(self) -> list[tuple[int, int]]:
        """Runs ``[lo, hi)`` of adjacent buckets, each of at most ``max_rows`` rows (or one bucket)."""
        per_bucket = sum(np.diff(p.bounds) for p in self._parts)
        runs, lo, rows = [], 0, 0
        for b, n in enumerate(per_bucket):
            if b > lo and rows + n > self.max_rows:
                runs.append((lo, b))
                lo, rows = b, 0
            rows += int(n)
        runs.append((lo, per_bucket.size))
        return runs

    def _read(self, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The rows of buckets ``lo .. hi - 1`` of every shard, shard by shard (copies of memory-mapped slices)."""
        keys, rows, which = [], [], []
        for p in self._parts:
            a, b = int(p.bounds[lo]), int(p.bounds[hi])
            keys.append(np.array(np.load(p.keys, mmap_mode="r")[a:b]))
            rows.append(np.array(np.load(p.sums, mmap_mode="r")[a:b]))
            which.append(np.array(np.load(p.piece, mmap_mode="r")[a:b]))
        return np.concatenate(keys), np.concatenate(rows), np.concatenate(which)
