"""Stratum pieces as plain frames (text, integer, float and bool columns) for the results tables, and back.

The frames are what the pipeline stores per (experiment, day): ``strata``, ``arms``,
``covariance`` and ``bidder_sums`` (:data:`PIECE_FRAMES`), each keyed by ``day``, ``n_bidders``
and ``shard`` (the fields of :class:`~.pieces.StratumKey` the tables hold today).
"""

from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pandas as pd

from ._ids import ids_as_text
from .constants import MIXTURE_ARM, REVENUE, WELFARE
from .errors import InputError
from .pieces import StratumKey, StratumPiece

__all__ = ["PIECE_FRAMES", "pieces_from_frames", "pieces_to_frames"]

#: Names of the frames :func:`pieces_to_frames` returns.
PIECE_FRAMES = ("strata", "arms", "covariance", "bidder_sums")


def pieces_to_frames(pieces: Iterable[StratumPiece]) -> dict[str, pd.DataFrame]:
    """Pieces as four plain frames (text, integer, float and bool columns) for a results table.

    Text columns have pandas' string dtype (``str``). Every frame starts with the key columns
    ``day`` (ISO text, missing when the pieces have no day), ``n_bidders``, ``shard``, ``segment``
    (the segment label, missing when the experiment declares no segments).

    * ``strata``: one row per piece: ``n_auctions, n_bids, max_bid, bid_exponent,
      floor_quantile, has_quality, flags`` (comma-joined, ``''`` for none) and
      ``n_distinct_bidders`` (-1 when the piece keeps no bidder sums).
    * ``arms``: one row per arm and the mixture (``arm_index`` 0..K-1, K for ``_mixture``):
      ``arm, revenue_per_auction, welfare_per_auction`` (the estimates), ``n_auctions``,
      ``realized_revenue_sum``, ``realized_revenue_squares`` (the realized per-arm average's sums;
      the mixture row carries the stratum's auctions and NaN sums).
    * ``covariance``: long, upper triangle, finite entries only: ``arm_i, metric_i, arm_j,
      metric_j, value`` (the piece's CR0 covariance).
    * ``bidder_sums``: long: ``bidder_id`` (text), ``arm`` (an arm or ``_mixture``), ``value``
      (the bidder's revenue influence sum), one row per bidder and revenue label.

    Parameters
    ----------
    pieces : iterable of StratumPiece

    Returns
    -------
    dict of str to pandas.DataFrame
        Keys :data:`PIECE_FRAMES`.
    """
    pieces = list(pieces)
    strata, arms, cov, sums = [], [], [], []
    for p in pieces:
        key = {"day": p.day, "n_bidders": p.n_bidders, "shard": p.shard, "segment": p.key.segment}
        strata.append({**key, "n_auctions": p.n_auctions, "n_bids": p.n_bids, "max_bid": p.max_bid,
                       "bid_exponent": p.bid_exponent, "floor_quantile": p.floor_quantile,
                       "has_quality": p.has_quality, "flags": ",".join(p.flags),
                       "n_distinct_bidders": -1 if p.bidder_ids is None else int(p.bidder_ids.size)})
        k_targets, k_arms = p.n_targets, p.n_arms
        names = [a for a, _ in p.labels[:k_targets]] + [p.labels[-1][0]]
        revenue = list(range(k_targets)) + [len(p.labels) - 1]
        gap = np.full(k_targets - k_arms, np.nan)  # what-if layouts ran in no auction: no realized sums
        arms.append(pd.DataFrame({
            **{c: [v] * (k_targets + 1) for c, v in key.items()},
            "arm_index": np.arange(k_targets + 1), "arm": names,
            "revenue_per_auction": p.estimate[revenue],
            "welfare_per_auction": np.append(p.estimate[k_targets:2 * k_targets], np.nan),
            "n_auctions": np.concatenate([p.arm_auctions, np.zeros(k_targets - k_arms), [p.n_auctions]]).astype(np.int64),
            "realized_revenue_sum": np.concatenate([p.realized_sum, gap, [np.nan]]),
            "realized_revenue_squares": np.concatenate([p.realized_squares, gap, [np.nan]]),
            "what_if": (np.arange(k_targets + 1) >= k_arms) & (np.arange(k_targets + 1) < k_targets),
            "own_variance": np.concatenate([np.full(k_arms, np.nan), p.own_variance, [np.nan]]),
        }))
        i, j = np.triu_indices(len(p.labels))
        keep = np.isfinite(p.covariance[i, j])
        i, j = i[keep], j[keep]
        cov.append(pd.DataFrame({
            **{c: [v] * i.size for c, v in key.items()},
            "arm_i": [p.labels[x][0] for x in i], "metric_i": [p.labels[x][1] for x in i],
            "arm_j": [p.labels[x][0] for x in j], "metric_j": [p.labels[x][1] for x in j],
            "value": p.covariance[i, j],
        }))
        if p.bidder_ids is not None:
            b = p.bidder_ids.size
            rows = b * (k_targets + 1)
            # text columns built once per distinct value and repeated by ``take`` (no per-row conversion)
            sums.append(pd.DataFrame({
                "day": pd.array([p.day], dtype="str").take(np.zeros(rows, dtype=np.intp)),
                "n_bidders": np.full(rows, p.n_bidders, dtype=np.int64),
                "shard": np.full(rows, p.shard, dtype=np.int64),
                "segment": pd.array([p.key.segment], dtype="str").take(np.zeros(rows, dtype=np.intp)),
                "bidder_id": pd.array(ids_as_text(p.bidder_ids), dtype="str").take(np.tile(np.arange(b), k_targets + 1)),
                "arm": pd.array(names, dtype="str").take(np.repeat(np.arange(k_targets + 1), b)),
                "value": p.bidder_sums.T.ravel(),
            }))
    key_types = {"day": "str", "n_bidders": np.int64, "shard": np.int64, "segment": "str"}
    columns = {
        "strata": {**key_types, "n_auctions": np.int64, "n_bids": np.int64, "max_bid": float, "bid_exponent": np.int64,
                   "floor_quantile": float, "has_quality": bool, "flags": "str", "n_distinct_bidders": np.int64},
        "arms": {**key_types, "arm_index": np.int64, "arm": "str", "revenue_per_auction": float,
                 "welfare_per_auction": float, "n_auctions": np.int64, "realized_revenue_sum": float,
                 "realized_revenue_squares": float, "what_if": bool, "own_variance": float},
        "covariance": {**key_types, "arm_i": "str", "metric_i": "str", "arm_j": "str", "metric_j": "str",
                       "value": float},
        "bidder_sums": {**key_types, "bidder_id": "str", "arm": "str", "value": float},
    }
    parts = {"strata": [pd.DataFrame(strata)] if strata else [], "arms": arms, "covariance": cov, "bidder_sums": sums}
    out = {}
    for name, types in columns.items():
        frame = pd.concat(parts[name], ignore_index=True) if parts[name] else pd.DataFrame(columns=list(types))
        out[name] = frame[list(types)].astype(types)
    return out


def pieces_from_frames(frames: dict[str, pd.DataFrame]) -> list[StratumPiece]:
    """The pieces :func:`pieces_to_frames` wrote (or the same frames read back from a table).

    Pieces are identified by ``(day, n_bidders, shard, segment)``; bidder ids come back as text.
    Extra columns (an experiment id, say) are ignored; frames without a ``segment`` column
    (written before segments existed) read as unsegmented.

    Parameters
    ----------
    frames : dict of str to pandas.DataFrame
        Keys :data:`PIECE_FRAMES`.

    Returns
    -------
    list of StratumPiece
        In the order of the ``strata`` frame.
    """
    missing = [name for name in PIECE_FRAMES if name not in frames]
    if missing:
        raise InputError(f"piece frames: frame {missing[0]!r} is missing (need {', '.join(PIECE_FRAMES)})")

    def text_or_none(frame: pd.DataFrame, name: str) -> pd.Series:
        if name not in frame.columns:
            return pd.Series(["\0none"] * len(frame), dtype=object)
        return frame[name].astype(object).where(frame[name].notna(), "\0none")

    def keyed(frame: pd.DataFrame) -> dict:
        frame = frame.reset_index(drop=True)
        groups = pd.DataFrame({"day": text_or_none(frame, "day"), "n": frame["n_bidders"], "s": frame["shard"],
                               "g": text_or_none(frame, "segment")}).groupby(["day", "n", "s", "g"], sort=False).indices
        return {(_text(d), int(n), int(s), _text(g)): frame.iloc[idx] for (d, n, s, g), idx in groups.items()}

    arms_of = keyed(frames["arms"])
    cov_of = keyed(frames["covariance"])
    sums_of = keyed(frames["bidder_sums"])
    pieces = []
    for _, row in frames["strata"].reset_index(drop=True).iterrows():
        day = None if pd.isna(row["day"]) else str(row["day"])
        segment = None if "segment" not in row.index or pd.isna(row["segment"]) else str(row["segment"])
        key = (day, int(row["n_bidders"]), int(row["shard"]), segment)
        where = f"piece {key}"
        if key not in arms_of:
            raise InputError(f"piece frames: {where} has no rows in 'arms'")
        arms = arms_of[key].sort_values("arm_index")
        names = arms["arm"].tolist()
        if not names or names[-1] != MIXTURE_ARM:
            raise InputError(f"piece frames: {where}: the last arm row must be {MIXTURE_ARM!r}")
        k_targets = len(names) - 1
        what_if = (arms["what_if"].fillna(False).to_numpy(dtype=bool) if "what_if" in arms
                   else np.zeros(k_targets + 1, dtype=bool))
        k_arms = int((~what_if[:k_targets]).sum())
        if what_if[:k_arms].any():
            raise InputError(f"piece frames: {where}: what-if rows must follow the arms' rows")
        labels = tuple([(a, REVENUE) for a in names[:k_targets]] + [(a, WELFARE) for a in names[:k_targets]]
                       + [(MIXTURE_ARM, REVENUE)])
        index = {label: x for x, label in enumerate(labels)}
        revenue = arms["revenue_per_auction"].to_numpy(dtype=float)
        estimate = np.concatenate([revenue[:k_targets],
                                   arms["welfare_per_auction"].to_numpy(dtype=float)[:k_targets], revenue[k_targets:]])
        own_variance = (arms["own_variance"].to_numpy(dtype=float)[k_arms:k_targets] if "own_variance" in arms
                        else np.full(k_targets - k_arms, np.nan))
        covariance = np.full((len(labels), len(labels)), np.nan)
        if key in cov_of:
            c = cov_of[key]
            try:
                i = np.array([index[(a, m)] for a, m in zip(c["arm_i"], c["metric_i"])], dtype=np.intp)
                j = np.array([index[(a, m)] for a, m in zip(c["arm_j"], c["metric_j"])], dtype=np.intp)
            except KeyError as err:
                raise InputError(f"piece frames: {where}: covariance names an unknown label {err.args[0]!r}") from None
            covariance[i, j] = covariance[j, i] = c["value"].to_numpy(dtype=float)
        bidder_ids = bidder_sums = None
        if int(row["n_distinct_bidders"]) >= 0:
            s = sums_of.get(key)
            if s is None:
                raise InputError(f"piece frames: {where} has {int(row['n_distinct_bidders'])} bidders but no rows in "
                                 "'bidder_sums'")
            codes, uniques = pd.factorize(s["bidder_id"].astype(str), sort=False)
            column = pd.Index(names).get_indexer(s["arm"])  # the column of sum_labels: arms, then _mixture
            if (column < 0).any():
                raise InputError(f"piece frames: {where}: bidder_sums names an unknown arm "
                                 f"{s['arm'].to_numpy()[np.flatnonzero(column < 0)[0]]!r}")
            bidder_ids = np.asarray(uniques, dtype=object)
            bidder_sums = np.full((bidder_ids.size, k_targets + 1), np.nan)
            bidder_sums[codes, column] = s["value"].to_numpy(dtype=float)
        flags = tuple(f for f in str(row["flags"] if not pd.isna(row["flags"]) else "").split(",") if f)
        pieces.append(StratumPiece(
            key=StratumKey(day=day, n_bidders=key[1], shard=key[2], segment=segment), n_auctions=int(row["n_auctions"]), n_bids=int(row["n_bids"]),
            labels=labels, estimate=estimate, covariance=covariance, bidder_ids=bidder_ids, bidder_sums=bidder_sums,
            arm_auctions=arms["n_auctions"].to_numpy(dtype=np.int64)[:k_arms],
            realized_sum=arms["realized_revenue_sum"].to_numpy(dtype=float)[:k_arms],
            realized_squares=arms["realized_revenue_squares"].to_numpy(dtype=float)[:k_arms],
            floor_quantile=_number(row["floor_quantile"]), max_bid=_number(row["max_bid"]),
            bid_exponent=int(row["bid_exponent"]), has_quality=bool(row["has_quality"]), flags=flags,
            own_variance=own_variance))
    return pieces


def _text(value) -> str | None:
    """A grouped key text back to ``None`` where it stood for a missing value."""
    return None if value == "\0none" else str(value)


def _number(value) -> float:
    """A stored float, NaN where the sink gave back a null (PostgreSQL stores NaN written by COPY as null)."""
    return np.nan if value is None or pd.isna(value) else float(value)
