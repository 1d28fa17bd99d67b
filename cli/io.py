"""Reading bid logs for the command line (Parquet file or folder)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads

from counterbid.estimators.errors import InputError

#: Rows converted at a time; the frame's columns are filled in place, batch by batch.
BATCH_ROWS = 2**20


def read_bids(path: str | Path, columns: list[str] | None = None) -> pd.DataFrame:
    """Read a bid log from a Parquet file or a (Hive-partitioned) folder of Parquet files.

    Parameters
    ----------
    path : str or Path
        A Parquet file, or a folder of them (``key=value`` sub-folders become columns).
    columns : list of str, optional
        Columns to read; names the log does not have are skipped. Default: all.

    Returns
    -------
    pandas.DataFrame
        String columns come back as categoricals (read straight from Parquet's dictionary pages);
        integer columns with nulls as nullable integers.

    Raises
    ------
    InputError
        Missing path, unreadable Parquet, or no rows; the message names the path.

    Notes
    -----
    The columns are allocated once, at their final size, and filled column by column and batch by
    batch, so peak memory is the frame plus about one batch of one column -- not an Arrow table
    and a frame side by side.
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file or folder")
    try:
        partitioning = "hive" if path.is_dir() else None  # key=value folders name columns only below `path`
        schema = pads.dataset(str(path), format="parquet", partitioning=partitioning).schema
        wanted = schema.names if columns is None else [c for c in columns if c in schema.names]
        text = [f.name for f in schema if f.name in wanted and (pa.types.is_string(f.type) or pa.types.is_large_string(f.type))]
        fmt = pads.ParquetFileFormat(
            read_options=pads.ParquetReadOptions(dictionary_columns=text),
            default_fragment_scan_options=pads.ParquetFragmentScanOptions(pre_buffer=False),
        )
        dataset = pads.dataset(str(path), format=fmt, partitioning=partitioning)
        n_rows = dataset.count_rows()
        if n_rows == 0:
            raise InputError(f"{path}: holds no bids (0 rows)")
        filled = {}
        # One column at a time, one batch in flight: Arrow's buffers stay about one row group of
        # one column (Parquet is columnar, so the file's bytes are still read once in all).
        for name in wanted:
            column, done = _Column(dataset.schema.field(name).type, n_rows), 0
            for batch in dataset.to_batches(columns=[name], batch_size=BATCH_ROWS, batch_readahead=0,
                                              fragment_readahead=0, use_threads=False):
                column.put(done, batch.column(0))
                done += batch.num_rows
            if done != n_rows:  # the files changed under us
                raise InputError(f"{path}: read {done} rows of {name!r} where the metadata promised {n_rows}; "
                                 "was it being written?")
            filled[name] = column
            pa.default_memory_pool().release_unused()  # hand the decoding buffers back to the system
    except (pa.ArrowInvalid, pa.ArrowIOError, pa.ArrowTypeError, OSError) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{path}: not a readable Parquet file ({detail})") from None
    return pd.DataFrame({name: filled[name].result() for name in wanted}, copy=False)


_SIGNED = (np.int8, np.int16, np.int32, np.int64)


def _narrowest(lo: int, hi: int) -> np.dtype:
    """The smallest signed integer dtype holding ``lo..hi`` (ids and positions keep their values)."""
    for dtype in _SIGNED:
        info = np.iinfo(dtype)
        if info.min <= lo and hi <= info.max:
            return np.dtype(dtype)
    return np.dtype(np.uint64)


class _Column:
    """One column of the frame being filled: numbers in place, dictionaries as codes, else Arrow.

    The dataset projects every file onto one schema, so a column's kind is fixed up front.
    Integers are stored in the narrowest dtype that holds the values seen so far (widened, with
    one copy, if a later batch needs it); dictionary codes likewise.
    """

    def __init__(self, kind: pa.DataType, n_rows: int):
        self.n_rows = n_rows
        self.kind = ("integer" if pa.types.is_integer(kind) else "float" if pa.types.is_floating(kind) else
                     "codes" if pa.types.is_dictionary(kind) and pa.types.is_string(kind.value_type) else "arrow")
        self.values = np.empty(n_rows, dtype=kind.to_pandas_dtype()) if self.kind == "float" else None
        self.mask: np.ndarray | None = None  # nulls of an integer column, made on the first null
        self.categories: dict[str, int] = {}
        self.chunks: list[pa.Array] = []

    def _room(self, lo: int, hi: int) -> None:
        """Make sure ``self.values`` can hold integers ``lo..hi``."""
        if self.values is None:
            self.values = np.empty(self.n_rows, dtype=_narrowest(lo, hi))
        else:
            info = np.iinfo(self.values.dtype)
            if lo < info.min or hi > info.max:
                self.values = self.values.astype(_narrowest(min(lo, info.min), max(hi, info.max)))

    def put(self, at: int, array: pa.Array) -> None:
        end = at + len(array)
        if len(array) == 0:
            return
        if self.kind == "float":
            self.values[at:end] = array.to_numpy(zero_copy_only=False)  # nulls become NaN
        elif self.kind == "integer":
            if array.null_count:
                if self.mask is None:
                    self.mask = np.zeros(self.n_rows, dtype=bool)
                self.mask[at:end] = array.is_null().to_numpy(zero_copy_only=False)
                array = array.fill_null(0)
            bounds = pc.min_max(array)
            self._room(int(bounds["min"].as_py()), int(bounds["max"].as_py()))
            self.values[at:end] = array.to_numpy(zero_copy_only=False)
        elif self.kind == "codes":
            words = array.dictionary.to_pylist()
            remap = np.array([self.categories.setdefault(w, len(self.categories)) for w in words] + [-1], dtype=np.int64)
            self._room(-1, len(self.categories))
            indices = array.indices.fill_null(len(words)).to_numpy(zero_copy_only=False)  # null -> code -1
            self.values[at:end] = remap[indices]
        else:
            self.chunks.append(array)

    def result(self):
        if self.kind == "arrow":
            return pa.chunked_array(self.chunks, type=self.chunks[0].type if self.chunks else None).to_pandas()
        if self.values is None:  # no rows reached this column
            self.values = np.zeros(self.n_rows, dtype=np.int8)
        if self.kind == "codes":
            return pd.Categorical.from_codes(self.values, list(self.categories), validate=False)
        return self.values if self.mask is None else pd.arrays.IntegerArray(self.values, self.mask)
