"""Reading bid logs (a Parquet file or a Hive-partitioned folder of them) into a pandas frame.

Used by the command line and by the pipeline's estimate step. The bids data contract
(:mod:`counterbid.estimators.bid_contract`) is translated into Arrow types here: a column whose
declared type the contract refuses is refused before any row is read, and the values are
converted once into what :func:`counterbid.estimators.prepare_bids` reads fastest (``bid`` as
float64, integer ids in their narrowest dtype, strings as categoricals).
"""

from __future__ import annotations

import decimal
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as pads

from counterbid.estimators.bid_contract import BID_CONTRACT, INTEGER_RANGE, ColumnRule
from counterbid.estimators.errors import InputError

__all__ = ["BATCH_ROWS", "arrow_kind", "bids_from_arrow", "read_bids", "text_identity_columns"]

#: Rows converted at a time; the frame's columns are filled in place, batch by batch.
BATCH_ROWS = 2**20


def _is_text(t: pa.DataType) -> bool:
    return pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_string_view(t)


def arrow_kind(t: pa.DataType) -> str:
    """The contract kind an Arrow type carries: ``integer``, ``numeric``, ``text``, ``date`` or ``other``.

    Integer types and decimals of scale 0 (how 128-bit integers reach Arrow and Parquet) are
    ``integer``; floating-point types and other decimals are ``numeric``.
    """
    if pa.types.is_dictionary(t):
        return "text" if _is_text(t.value_type) else "other"
    if pa.types.is_integer(t) or (pa.types.is_decimal(t) and t.scale == 0):
        return "integer"
    if pa.types.is_floating(t) or pa.types.is_decimal(t):
        return "numeric"
    if _is_text(t):
        return "text"
    if pa.types.is_date(t) or pa.types.is_timestamp(t):
        return "date"
    return "other"


#: Arrow kinds each contract kind accepts (the reader's translation table of the contract).
#: ``numeric`` columns of another kind are passed on as they are, so that ``prepare_bids`` can
#: name the first row at fault; ``integer`` columns of another kind are refused here.
_ACCEPTS = {
    "numeric": {"integer", "numeric"},
    "integer": {"integer"},
    "text": {"text"},
    "text_or_integer": {"text", "integer"},
    "date": {"date", "text"},
}


def _refuse_declared_type(path: Path | str, rule: ColumnRule, t: pa.DataType) -> None:
    if rule.kind == "integer" and arrow_kind(t) not in _ACCEPTS["integer"]:
        raise InputError(f"{path}: column {rule.name!r} has type {t}; the bids data contract needs an integer type "
                         f"({rule.meaning})")
    if rule.kind == "text_or_integer" and arrow_kind(t) not in _ACCEPTS["text_or_integer"]:
        raise InputError(f"{path}: column {rule.name!r} has type {t}; the bids data contract needs text or an "
                         "integer type (a decimal only with scale 0)")


def read_bids(path: str | Path, columns: list[str] | None = None, *, source: str | None = None,
              threads: int = 1) -> pd.DataFrame:
    """Read a bid log from a Parquet file or a (Hive-partitioned) folder of Parquet files.

    Parameters
    ----------
    path : str or Path
        A Parquet file, or a folder of them (``key=value`` sub-folders become columns).
    columns : list of str, optional
        Columns to read; names the log does not have are skipped. Default: all.
    source : str, optional
        Name of the input in error messages (default: ``path``); a shard names the log it came
        from, not its temporary folder.
    threads : int, optional
        Columns read at once (default 1). Arrow decodes and dictionary-encodes without the GIL, so
        two threads read two columns side by side, at the cost of two columns' buffers in flight;
        a fault is reported for the first column in order, as with one thread.

    Returns
    -------
    pandas.DataFrame
        String columns come back as categoricals (Arrow's dictionary encoding of the whole column,
        or the file's own dictionaries unified by Arrow); integer columns in the narrowest signed dtype holding their values,
        nullable integers when they hold nulls; ``bid`` as float64 whatever its numeric type
        (integer, float32, float64 or decimal). Integer contract columns stored in 128 bits
        (decimal with scale 0) come back as int64 or narrower.

    Raises
    ------
    InputError
        Missing path, unreadable Parquet, no rows, a contract column of a type the bids data
        contract refuses (``position`` not an integer type; ids neither text nor integer), or an
        integer id or position outside the int64 range; the message names the path and column.

    Notes
    -----
    The columns are allocated once, at their final size, and filled column by column and batch
    by batch, so peak memory is the frame plus about one batch of one column -- not an Arrow table
    and a frame side by side. A string column is the exception: its Arrow strings are held until
    Arrow's ``dictionary_encode`` has coded the whole column with one hash table (one column at a
    time; a file written from categoricals keeps its dictionaries, unified by Arrow instead).
    """
    path = Path(path)
    where = path if source is None else source
    if not path.exists():
        raise InputError(f"{where}: no such file or folder")
    try:
        partitioning = "hive" if path.is_dir() else None  # key=value folders name columns only below `path`
        schema = pads.dataset(str(path), format="parquet", partitioning=partitioning).schema
        wanted = _refuse_declared_types(schema, columns, where)
        fmt = pads.ParquetFileFormat(
            read_options=pads.ParquetReadOptions(dictionary_columns=_label_columns(schema, wanted)),
            default_fragment_scan_options=pads.ParquetFragmentScanOptions(pre_buffer=False))
        dataset = pads.dataset(str(path), format=fmt, partitioning=partitioning)
        n_rows = dataset.count_rows()
        if n_rows == 0:
            raise InputError(f"{where}: holds no bids (0 rows)")
        # One column at a time (per thread), one batch in flight: Arrow's buffers stay about one row
        # group of one column (Parquet is columnar, so the file's bytes are still read once in all).
        if threads > 1 and len(wanted) > 1:
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(min(int(threads), len(wanted))) as pool:
                futures = [pool.submit(_read_column, dataset, name, n_rows, where) for name in wanted]
                filled = {name: f.result() for name, f in zip(wanted, futures)}  # the first fault in column order
        else:
            filled = {name: _read_column(dataset, name, n_rows, where) for name in wanted}
    except (pa.ArrowInvalid, pa.ArrowIOError, pa.ArrowTypeError, OSError) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"{where}: not a readable Parquet file ({detail})") from None
    return pd.DataFrame(filled, copy=False)


#: Text columns with many distinct values (one per auction, one per bidder): read as plain strings and
#: dictionary-encoded once over the whole column, which costs less than unifying every row group's
#: dictionary when most values are distinct.
IDENTITY_COLUMNS = ("auction_id", "bidder_id")


def text_identity_columns(path: str | Path) -> list[str]:
    """The identity columns (:data:`IDENTITY_COLUMNS`) a bid log stores as text, from its schema only.

    These are the columns :func:`read_bids` dictionary-encodes over the whole column (one Arrow hash
    table each); an unreadable or missing log gives ``[]`` (reading it names the fault).
    """
    path = Path(path)
    try:
        schema = pads.dataset(str(path), format="parquet", partitioning="hive" if path.is_dir() else None).schema
    except (pa.ArrowInvalid, pa.ArrowIOError, OSError, ValueError):
        return []
    return [n for n in IDENTITY_COLUMNS if n in schema.names and arrow_kind(schema.field(n).type) == "text"
            and not pa.types.is_dictionary(schema.field(n).type)]


def _label_columns(schema: pa.Schema, wanted: list[str]) -> list[str]:
    """Text columns read with the file's own dictionaries: every text column but the identity columns.

    Labels (``experiment_id``, ``arm``, segment columns) hold a handful of values, and a Parquet writer
    stores them as dictionary pages: Arrow then hands over each row group's dictionary and its
    indices, so no string of the column is hashed (measured at 10M bids: 0.18 s of CPU for
    ``experiment_id`` against 0.66 s for decoding the strings and encoding them again).
    """
    return [n for n in wanted if n not in IDENTITY_COLUMNS and arrow_kind(schema.field(n).type) == "text"
            and not pa.types.is_dictionary(schema.field(n).type)]


def _read_column(dataset: pads.Dataset, name: str, n_rows: int, where):
    """One column of the frame, batch by batch (one batch of Arrow buffers in flight)."""
    column, done = _Column(name, dataset.schema.field(name).type, n_rows, source=where), 0
    for batch in dataset.to_batches(columns=[name], batch_size=BATCH_ROWS, batch_readahead=0,
                                    fragment_readahead=0, use_threads=False):
        column.put(done, batch.column(0))
        done += batch.num_rows
    if done != n_rows:  # the files changed under us
        raise InputError(f"{where}: read {done} rows of {name!r} where the metadata promised {n_rows}; "
                         "was it being written?")
    values = column.result()
    del column
    pa.default_memory_pool().release_unused()  # hand the decoding buffers back to the system
    return values


def _refuse_declared_types(schema: pa.Schema, columns: list[str] | None, where) -> list[str]:
    """The columns to read (``columns`` the schema has, else all); refuses contract columns of a wrong type."""
    wanted = schema.names if columns is None else [c for c in columns if c in schema.names]
    for name in wanted:
        if name in BID_CONTRACT:
            _refuse_declared_type(where, BID_CONTRACT[name], schema.field(name).type)
    return wanted


def bids_from_arrow(table: pa.Table, columns: list[str] | None = None, *, source: str = "bids") -> pd.DataFrame:
    """The frame :func:`read_bids` returns, from an Arrow table already in memory.

    The same translation of the bids data contract (the same refusals, the same dtypes), for
    bids that arrive as Arrow rather than as a file: a Spark shard
    (:mod:`counterbid.readers.spark_shards`).

    Parameters
    ----------
    table : pyarrow.Table
    columns : list of str, optional
        Columns to keep; names the table does not have are skipped. Default: all.
    source : str
        Name of the input in error messages.

    Returns
    -------
    pandas.DataFrame
        As :func:`read_bids`.

    Raises
    ------
    InputError
        As :func:`read_bids`: no rows, a contract column of a refused type, an integer outside int64.
    """
    wanted = _refuse_declared_types(table.schema, columns, source)
    if table.num_rows == 0:
        raise InputError(f"{source}: holds no bids (0 rows)")
    filled = {}
    for name in wanted:
        column, done = _Column(name, table.schema.field(name).type, table.num_rows, source=source), 0
        for chunk in table.column(name).chunks:
            column.put(done, chunk)
            done += len(chunk)
        filled[name] = column.result()
        del column
    return pd.DataFrame(filled, copy=False)


_SIGNED = (np.int8, np.int16, np.int32, np.int64)


def _narrowest(lo: int, hi: int) -> np.dtype:
    """The smallest signed integer dtype holding ``lo..hi`` (ids and positions keep their values)."""
    for dtype in _SIGNED:
        info = np.iinfo(dtype)
        if info.min <= lo and hi <= info.max:
            return np.dtype(dtype)
    return np.dtype(np.uint64)


class _Column:
    """One column of the frame being filled: numbers in place, strings as dictionary codes, else Arrow.

    The dataset projects every file onto one schema, so a column's kind is fixed up front.
    Integers are stored in the narrowest dtype that holds the values seen so far (widened, with
    one copy, if a later batch needs it). A string column keeps each batch's codes into that
    batch's own dictionary; at the end Arrow unifies the dictionaries
    (``ChunkedArray.unify_dictionaries``) and the codes are remapped in place. Plain strings are
    kept as Arrow arrays and dictionary-encoded once, over the whole column.
    """

    def __init__(self, name: str, kind: pa.DataType, n_rows: int, *, source: Path | str):
        self.name, self.n_rows, self.source = name, n_rows, source
        self.rule = BID_CONTRACT.get(name)
        arrow = arrow_kind(kind)
        if arrow == "text":
            self.kind = "codes"
        elif self.rule is not None and self.rule.kind == "numeric" and arrow in ("integer", "numeric"):
            self.kind = "float"  # bids of any numeric type (integers, floats, decimals) as float64
        elif pa.types.is_integer(kind) or (self.rule is not None and arrow == "integer"):
            self.kind = "integer"  # decimals of scale 0 only for contract columns (128-bit integers)
        elif pa.types.is_floating(kind):
            self.kind = "float"
        else:
            self.kind = "arrow"
        dtype = kind.to_pandas_dtype() if pa.types.is_floating(kind) and self.rule is None else np.float64
        self.values = np.empty(n_rows, dtype=dtype) if self.kind == "float" else None
        self.mask: np.ndarray | None = None  # nulls of an integer column, made on the first null
        self.dictionaries: list[pa.Array] = []  # codes column: each batch's dictionary ...
        self.segments: list[tuple[int, int]] = []  # ... and the rows it codes
        self.bound = 0  # codes column: an upper bound on the number of distinct values
        self.chunks: list[pa.Array] = []

    def _room(self, lo: int, hi: int) -> None:
        """Make sure ``self.values`` can hold integers ``lo..hi``."""
        if self.values is None:
            self.values = np.empty(self.n_rows, dtype=_narrowest(lo, hi))
        else:
            info = np.iinfo(self.values.dtype)
            if lo < info.min or hi > info.max:
                self.values = self.values.astype(_narrowest(min(lo, info.min), max(hi, info.max)))

    def _as_int64(self, at: int, array: pa.Array) -> pa.Array:
        """A decimal of scale 0 as int64; one error naming the first row outside the int64 range."""
        try:
            return array.cast(pa.int64())
        except pa.ArrowInvalid:
            t = array.type
            lo, hi = (pa.scalar(decimal.Decimal(v), type=t) for v in INTEGER_RANGE)
            outside = pc.or_(pc.less(array, lo), pc.greater(array, hi)).fill_null(False)
            i = int(np.flatnonzero(outside.to_numpy(zero_copy_only=False))[0])
            raise InputError(f"{self.source}: column {self.name!r} row {at + i} is {array[i].as_py()}, outside the "
                             f"int64 range the bids data contract allows for integers") from None

    def put(self, at: int, array: pa.Array) -> None:
        end = at + len(array)
        if len(array) == 0:
            return
        if self.kind == "float":
            if not pa.types.is_floating(array.type) or (self.rule is not None and array.type != pa.float64()):
                array = array.cast(pa.float64())  # decimals and integers: Arrow's cast (nearest double)
            self.values[at:end] = array.to_numpy(zero_copy_only=False)  # nulls become NaN
        elif self.kind == "integer":
            if pa.types.is_decimal(array.type):
                array = self._as_int64(at, array)
            if array.null_count:
                if self.mask is None:
                    self.mask = np.zeros(self.n_rows, dtype=bool)
                self.mask[at:end] = array.is_null().to_numpy(zero_copy_only=False)
                array = array.fill_null(0)
            bounds = pc.min_max(array)
            lo, hi = int(bounds["min"].as_py()), int(bounds["max"].as_py())
            if self.rule is not None and hi > INTEGER_RANGE[1]:  # uint64 beyond int64
                i = int(np.flatnonzero(array.to_numpy(zero_copy_only=False) > INTEGER_RANGE[1])[0])
                raise InputError(f"{self.source}: column {self.name!r} row {at + i} is {array[i].as_py()}, outside the "
                                 "int64 range the bids data contract allows for integers")
            self._room(lo, hi)
            self.values[at:end] = array.to_numpy(zero_copy_only=False)
        elif self.kind == "codes" and not pa.types.is_dictionary(array.type):
            self.chunks.append(array)  # plain strings: encoded once, over the whole column, at the end
            self.segments.append((at, end))
        elif self.kind == "codes":
            words = array.dictionary
            self.bound += len(words)
            self._room(-1, self.bound)
            # codes into this batch's dictionary; null -> one past its end (mapped to -1 at the end)
            self.values[at:end] = array.indices.fill_null(len(words)).to_numpy(zero_copy_only=False)
            self.dictionaries.append(words)
            self.segments.append((at, end))
        else:
            self.chunks.append(array)

    def _encoded(self) -> pd.Categorical:
        """Plain strings: Arrow's ``dictionary_encode`` of the whole column (one hash table, one dictionary)."""
        encoded = pc.dictionary_encode(pa.chunked_array(self.chunks))
        self.chunks.clear()
        words = encoded.chunk(0).dictionary if encoded.num_chunks else pa.array([], pa.string())
        codes = np.empty(self.n_rows, dtype=_narrowest(-1, len(words)))
        for (at, end), chunk in zip(self.segments, encoded.chunks):
            codes[at:end] = chunk.indices.fill_null(-1).to_numpy(zero_copy_only=False)
        del encoded
        return _from_unique_codes(codes, pd.Index(words.to_pandas(), copy=False))

    def _categorical(self) -> pd.Categorical:
        """Remap every batch's codes onto one dictionary unified by Arrow; the frame's categorical."""
        if self.chunks:
            return self._encoded()
        if not self.dictionaries:
            return pd.Categorical.from_codes(np.full(self.n_rows, -1, dtype=np.int8), categories=[])
        # Each batch's own dictionary, coded 0..k-1: after unification its indices are the batch's remap.
        identity = [pa.DictionaryArray.from_arrays(pa.array(np.arange(len(d), dtype=np.int32)), d)
                    for d in self.dictionaries]
        unified = pa.chunked_array(identity).unify_dictionaries()
        self.dictionaries.clear()
        codes = self.values
        for (at, end), chunk in zip(self.segments, unified.chunks):
            remap = np.append(chunk.indices.to_numpy(), -1).astype(codes.dtype, copy=False)
            codes[at:end] = remap[codes[at:end]]
        words = unified.chunks[0].dictionary if unified.num_chunks else pa.array([], pa.string())
        narrow = _narrowest(-1, len(words))
        if narrow.itemsize < codes.dtype.itemsize:  # many batches overstated the bound: one narrowing copy
            codes = codes.astype(narrow)
        categories = pd.Index(words.to_pandas(), copy=False)
        return _from_unique_codes(codes, categories)

    def result(self):
        if self.kind == "arrow":
            return pa.chunked_array(self.chunks, type=self.chunks[0].type if self.chunks else None).to_pandas()
        if self.kind == "codes":
            return self._categorical()
        if self.values is None:  # no rows reached this column
            self.values = np.zeros(self.n_rows, dtype=np.int8)
        return self.values if self.mask is None else pd.arrays.IntegerArray(self.values, self.mask)


def _from_unique_codes(codes: np.ndarray, categories: pd.Index) -> pd.Categorical:
    """A categorical from codes and categories known to be distinct (Arrow's unified dictionary).

    ``CategoricalDtype`` hashes its categories to check they are distinct; Arrow's dictionary
    already is, so that check is skipped where pandas offers the way to (its fast path).
    """
    fast = getattr(pd.CategoricalDtype, "_from_fastpath", None)
    dtype = fast(categories, False) if fast is not None else pd.CategoricalDtype(categories)
    return pd.Categorical.from_codes(codes, dtype=dtype, validate=False)
