"""Text label columns carried through Spark's shuffle as small integer codes.

The bids' ``arm`` and ``experiment_id`` columns hold a handful of distinct texts, known in
advance (the experiment's arm names, its id), repeated on every row. Before the shuffle of the
Spark engine each such column becomes two: ``<name>__code``, the 1-based position of the value
in the known words (0 for a value not among them, null for null), and ``<name>__rest``, the
text itself only where the code is 0 (null elsewhere). Rows then cross the shuffle and the
Arrow transfer at a fixed width, with no text but the rare unlisted value.

In the shard's worker :func:`decoded_labels` turns the two columns back into one Arrow
dictionary column of the same values (listed words first, in the given order, then the
unlisted ones), which :func:`counterbid.readers.bid_log.bids_from_arrow` reads as it reads
any dictionary-encoded text column: the frame holds the same values, the same nulls, and an
unlisted value still reaches :func:`~counterbid.estimators.prepare_bids`, which names its row.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["CODE_SUFFIX", "REST_SUFFIX", "coded_label_columns", "decoded_labels", "listed_words"]

#: Suffix of a coded label's code column (1-based index into the listed words; 0: unlisted).
CODE_SUFFIX = "__code"
#: Suffix of a coded label's text column (the value where the code is 0, else null).
REST_SUFFIX = "__rest"


def listed_words(experiment) -> dict[str, tuple[str, ...]]:
    """The label columns worth coding and their expected words: the experiment's id and arm names."""
    return {"experiment_id": (str(experiment.id),), "arm": tuple(str(a) for a in experiment.arm_names)}


def coded_label_columns(frame, columns: Sequence[str], words: Mapping[str, Sequence[str]]):
    """Spark columns selecting ``columns`` of ``frame``, text labels in ``words`` replaced by code and rest.

    Parameters
    ----------
    frame : pyspark.sql.DataFrame
    columns : sequence of str
        Columns to select, in order.
    words : mapping of str to sequence of str
        For each label column to code, its listed words. A column is coded only when ``frame``
        holds it as text (anything else travels as it is, for the reader to refuse).

    Returns
    -------
    (list of pyspark.sql.Column, dict of str to tuple of str)
        The columns to select, and the columns actually coded with their words (what
        :func:`decoded_labels` needs).
    """
    from pyspark.sql import functions as F
    from pyspark.sql.types import StringType

    types = {f.name: f.dataType for f in frame.schema.fields}
    selected, coded = [], {}
    for name in columns:
        listed = tuple(words.get(name, ()))
        if not listed or not isinstance(types.get(name), StringType):
            selected.append(F.col(name))
            continue
        value = F.col(name)
        code = F.array_position(F.array(*[F.lit(w) for w in listed]), value).cast("int")  # null for a null value
        selected += [code.alias(name + CODE_SUFFIX), F.when(code == 0, value).alias(name + REST_SUFFIX)]
        coded[name] = listed
    return selected, coded


def decoded_labels(table: pa.Table, coded: Mapping[str, Sequence[str]]) -> pa.Table:
    """``table`` with each coded label's code and rest columns back as one dictionary column of its values.

    Parameters
    ----------
    table : pyarrow.Table
        Rows as :func:`coded_label_columns` selected them.
    coded : mapping of str to sequence of str
        The coded columns and their listed words.

    Returns
    -------
    pyarrow.Table
        The label columns (``dictionary<int32, string>``) appended after the other columns.
    """
    for name, listed in coded.items():
        code = table.column(name + CODE_SUFFIX).combine_chunks()
        rest = table.column(name + REST_SUFFIX).combine_chunks()
        table = table.drop_columns([name + CODE_SUFFIX, name + REST_SUFFIX])
        table = table.append_column(name, _label_column(code, rest, listed))
    return table


def _label_column(code: pa.Array, rest: pa.Array, listed: Sequence[str]) -> pa.DictionaryArray:
    """One label column from its codes (1-based into ``listed``, 0: the text is in ``rest``) and rest texts."""
    index = code.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int32) - 1
    unlisted = index < 0
    extra = pa.array([], pa.string())
    if unlisted.any():  # unlisted values numbered after the listed words, in order of appearance
        encoded = pc.dictionary_encode(rest.filter(pa.array(unlisted)))
        extra = encoded.dictionary.cast(pa.string())
        index[unlisted] = encoded.indices.fill_null(-1 - len(listed)).to_numpy(zero_copy_only=False) + len(listed)
    words = pa.concat_arrays([pa.array(list(listed), pa.string()), extra])
    return pa.DictionaryArray.from_arrays(pa.array(index, pa.int32(), mask=index < 0), words)  # null: no code, no text
