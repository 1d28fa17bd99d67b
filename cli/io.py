"""Reading bid logs for the command line (Parquet file or folder)."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.dataset as pads

from counterbid.estimators.errors import InputError


def read_bids(path: str | Path, columns: list[str] | None = None) -> pd.DataFrame:
    """Read a bid log from a Parquet file or a (Hive-partitioned) folder of Parquet files.

    Raises
    ------
    InputError
        Missing path, unreadable Parquet, or no rows; the message names the path.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file or folder")
    try:
        dataset = pads.dataset(str(path), format="parquet", partitioning="hive")
        if columns is not None:
            columns = [c for c in columns if c in dataset.schema.names]
        table = dataset.to_table(columns=columns)
    except (pa.ArrowInvalid, pa.ArrowIOError, OSError) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: not a readable Parquet file ({detail})") from None
    if table.num_rows == 0:
        raise InputError(f"{path}: holds no bids (0 rows)")
    return table.to_pandas()
