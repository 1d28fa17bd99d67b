"""Bidder and auction ids as the pieces keep them: int64 for integer ids, text otherwise.

Sums of one bidder from different strata, days or shards meet on the text of its id (``7`` and
``'7'`` are one bidder); shards hash the id's text.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["id_values", "ids_as_text"]


def id_values(values) -> np.ndarray:
    """Ids as int64 (integers) or objects."""
    values = pd.Index(values)
    if pd.api.types.is_integer_dtype(values.dtype) or pd.api.types.infer_dtype(values, skipna=False) == "integer":
        return values.to_numpy(dtype=np.int64)
    return values.to_numpy(dtype=object)


def ids_as_text(ids: np.ndarray) -> np.ndarray:
    """Ids as str objects (integers by their decimal text)."""
    if ids.dtype == object and all(type(v) is str for v in ids[:64]) and pd.api.types.infer_dtype(ids) == "string":
        return ids
    return np.array([str(int(v)) if isinstance(v, (int, np.integer)) else str(v) for v in ids.tolist()], dtype=object)
