"""The bids data contract in DuckDB type names: the translation table of the schema gate and the contract suite.

The rules themselves (kinds, nulls, bounds, key) live in :mod:`counterbid.estimators.bid_contract`;
this module only says which DuckDB types carry each kind. 128-bit integers (``HUGEINT``,
``UHUGEINT``, a ``DECIMAL`` of scale 0 -- how they come back from Arrow and Parquet) and
``UBIGINT`` are accepted as integers when every value fits in int64; :data:`WIDE_INTEGER` names
the types whose values need that range check.
"""

from __future__ import annotations

import re

from counterbid.estimators.bid_contract import BID_CONTRACT

__all__ = ["COLUMN_TYPES", "KIND_TYPES", "WIDE_INTEGER", "accepts", "needs_range_check"]

_NARROW = r"TINYINT|SMALLINT|INTEGER|BIGINT|UTINYINT|USMALLINT|UINTEGER"
_WIDE = r"UBIGINT|HUGEINT|UHUGEINT|DECIMAL\(\d+,\s*0\)"
_INTEGER = rf"(?:{_NARROW}|{_WIDE})"

#: DuckDB types (regular expressions, matched whole) of each kind of the contract.
KIND_TYPES: dict[str, str] = {
    "numeric": rf"^(?:DOUBLE|FLOAT|DECIMAL\(\d+,\s*\d+\)|{_INTEGER})$",
    "integer": rf"^{_INTEGER}$",
    "text": r"^VARCHAR$",
    "text_or_integer": rf"^(?:VARCHAR|{_INTEGER})$",
    "date": r"^(?:DATE|TIMESTAMP(?: WITH TIME ZONE)?|TIMESTAMP_(?:S|MS|NS))$",
}

#: Integer types whose values may lie outside int64 (checked by the schema gate).
WIDE_INTEGER = re.compile(rf"^(?:{_WIDE})$")

#: Every contract column and the DuckDB types (regular expression) accepted for it.
COLUMN_TYPES: dict[str, str] = {name: KIND_TYPES[rule.kind] for name, rule in BID_CONTRACT.items()}


def accepts(column: str, duckdb_type: str | None) -> bool:
    """Whether the contract accepts DuckDB type ``duckdb_type`` for ``column``."""
    return duckdb_type is not None and re.match(COLUMN_TYPES[column], duckdb_type) is not None


def needs_range_check(column: str, duckdb_type: str) -> bool:
    """An integer-kind column stored in a type that can hold values beyond int64."""
    return BID_CONTRACT[column].accepts_integer and WIDE_INTEGER.match(duckdb_type) is not None
