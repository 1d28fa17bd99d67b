"""The bids data contract, stated once: each column's kind, nullability and bounds, and the key.

Every layer that checks bids reads these definitions and translates the kinds into its own types,
with the translation table kept next to the layer:

* the reader of bid logs (``counterbid.readers.bid_log``): Arrow/Parquet types;
* the schema gate and the contract suite (``counterbid.operators``): DuckDB type names;
* :func:`counterbid.estimators.prepare_bids`: numpy/pandas dtypes.

Each layer checks what it is placed to check (a file's declared types, a staged partition's types
and nulls, the values themselves), but none restates a rule. This module is pure Python.

Kinds
-----
``numeric``
    Any integer, floating-point or decimal type (decimals are how warehouses export money). The
    estimator reads the values as float64.
``integer``
    Any integer type, including 128-bit ones (DuckDB ``HUGEINT``/``UHUGEINT``, or a decimal with
    scale 0, which is how a 128-bit integer reaches Arrow and Parquet), provided every value lies
    in :data:`INTEGER_RANGE`; a value outside it is refused with one error naming the column.
``text``
    A string (possibly dictionary-encoded).
``text_or_integer``
    ``text`` or ``integer``: ids may be either.
``date``
    A calendar day.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "BID_CONTRACT",
    "ColumnRule",
    "INTEGER_RANGE",
    "KINDS",
]

KINDS = ("numeric", "integer", "text", "text_or_integer", "date")

#: Integers of any storage width are accepted when every value lies in this (int64) range.
INTEGER_RANGE = (-(2**63), 2**63 - 1)


@dataclass(frozen=True)
class ColumnRule:
    """One column of the bids data contract.

    Attributes
    ----------
    name : str
    kind : str
        One of :data:`KINDS`.
    nullable : bool
        Whether a row may leave it null (``position``: null = not shown).
    lower_bound : float or None
        Smallest admissible value (inclusive), when there is one.
    finite : bool
        Values must be finite (no NaN, no infinity).
    partition_key : bool
        The lake's partition column: every lake row has it, but a relation of one day need not.
    optional : bool
        The column may be absent from a log; where it is present its rules apply to every row.
    strictly_positive : bool
        Values must be > 0 (``quality``).
    meaning : str
        What the column holds, for messages and docs.
    """

    name: str
    kind: str
    nullable: bool
    lower_bound: float | None = None
    finite: bool = False
    partition_key: bool = False
    optional: bool = False
    strictly_positive: bool = False
    meaning: str = ""

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"column {self.name!r}: unknown kind {self.kind!r} (one of {', '.join(KINDS)})")

    @property
    def accepts_text(self) -> bool:
        return self.kind in ("text", "text_or_integer")

    @property
    def accepts_integer(self) -> bool:
        return self.kind in ("integer", "text_or_integer")


#: The contract, column by column, in the order docs/usage.md lists them.
BID_CONTRACT: dict[str, ColumnRule] = {r.name: r for r in (
    ColumnRule("experiment_id", "text", nullable=False, meaning="the experiment the bid belongs to"),
    ColumnRule("ds", "date", nullable=False, partition_key=True, meaning="the day of the bid"),
    ColumnRule("auction_id", "text_or_integer", nullable=False,
               meaning="the auction; unique within an experiment across days"),
    ColumnRule("bidder_id", "text_or_integer", nullable=False, meaning="the bidder"),
    ColumnRule("arm", "text", nullable=False, meaning="the arm this auction ran"),
    ColumnRule("bid", "numeric", nullable=False, lower_bound=0.0, finite=True, meaning="the bid, per click"),
    ColumnRule("position", "integer", nullable=True, lower_bound=1,
               meaning="the position the bid was shown at, 1 = top; null = not shown (always null for a bid "
                       "whose effective bid is below the experiment's floor)"),
    ColumnRule("quality", "numeric", nullable=False, finite=True, optional=True, strictly_positive=True,
               meaning="optional quality factor (> 0): auctions rank by bid x quality, the effective bid"),
)}
