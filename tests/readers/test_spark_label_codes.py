"""Text labels through Spark's shuffle as codes (`readers/spark_label_codes.py`).

The decoded column must hold exactly the values of the text column it replaced (listed words,
unlisted texts, nulls), whatever the mix; the estimate's own agreement with the local engine is
`test_spark_shards.py`'s.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest

from counterbid.readers.spark_label_codes import CODE_SUFFIX, REST_SUFFIX, coded_label_columns, decoded_labels

LISTED = ("lantern", "kettle", "spindle")


def _labels(n: int, rng: np.random.Generator, unlisted_share: float, null_share: float) -> list:
    """Mostly listed words, some unlisted texts (one of them the empty text) and some nulls."""
    pool = ["", "Lantern", "spindle ", "whisk"]
    out = []
    for u in rng.random(n):
        if u < null_share:
            out.append(None)
        elif u < null_share + unlisted_share:
            out.append(pool[rng.integers(len(pool))])
        else:
            out.append(LISTED[rng.integers(len(LISTED))])
    return out


def _coded_by_hand(values: list) -> pa.Table:
    """The two columns as the Spark expression fills them: 1-based code (0 unlisted, null for null), rest text."""
    code = [None if v is None else (LISTED.index(v) + 1 if v in LISTED else 0) for v in values]
    rest = [v if c == 0 else None for v, c in zip(values, code)]
    return pa.table({"bid": np.arange(len(values), dtype=float), "arm" + CODE_SUFFIX: pa.array(code, pa.int32()),
                     "arm" + REST_SUFFIX: pa.array(rest, pa.string())})


@pytest.mark.parametrize("unlisted_share, null_share", [(0.0, 0.0), (0.05, 0.0), (0.0, 0.1), (0.3, 0.2), (1.0, 0.0)])
def test_decoded_column_holds_the_original_values(unlisted_share, null_share):
    values = _labels(5000, np.random.default_rng(11), unlisted_share, null_share)
    out = decoded_labels(_coded_by_hand(values), {"arm": LISTED})
    assert out.column_names == ["bid", "arm"]
    assert pa.types.is_dictionary(out.column("arm").type)
    assert out.column("arm").to_pylist() == values
    assert out.column("arm").null_count == values.count(None)


@pytest.mark.spark
def test_spark_columns_decode_to_the_text_column(spark):
    values = _labels(3000, np.random.default_rng(5), 0.1, 0.05)
    frame = spark.createDataFrame([(i, v) for i, v in enumerate(values)], "row long, arm string")
    selected, coded = coded_label_columns(frame, ["row", "arm"], {"arm": LISTED, "missing": ("x",)})
    assert coded == {"arm": LISTED}
    table = frame.select(*selected).orderBy("row").toArrow()
    assert table.column_names == ["row", "arm" + CODE_SUFFIX, "arm" + REST_SUFFIX]
    assert table.column("arm" + REST_SUFFIX).null_count == sum(v is None or v in LISTED for v in values)
    assert decoded_labels(table, coded).column("arm").to_pylist() == values


@pytest.mark.spark
def test_a_label_column_that_is_not_text_travels_as_it_is(spark):
    frame = spark.createDataFrame([(1, 7), (2, 8)], "row long, arm long")
    selected, coded = coded_label_columns(frame, ["row", "arm"], {"arm": LISTED})
    assert coded == {}
    assert frame.select(*selected).columns == ["row", "arm"]
