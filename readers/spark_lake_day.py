"""One experiment's lake day on Spark as the DAG's Spark steps see it: its files' fingerprint and its column types.

The Spark load step copies nothing: it records which files make the day (path, size in bytes,
rows, rows of the experiment; ``sql/spark_lake_day_files.spark.sql``, one small row per file to the
driver) and the column types Spark reads from the Parquet metadata. The estimate step takes the
same fingerprint again before it reads the day: a partition that changed in between is refused.

Needs the ``spark`` extra; ``pyspark`` is imported when a function runs, not with this module.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

from counterbid.estimators import Experiment
from counterbid.sql import statement

from .spark_shards import _analysis_error, _as_engine_failure, _is_read_failure, lake_day_frame

__all__ = ["DAY_FILES_STATEMENT_PARAMETERS", "DayFile", "LakeDay", "lake_day_files"]

#: The statement this module runs (``sql/<name>.spark.sql``) and the ``:name`` parameters it binds.
DAY_FILES_STATEMENT_PARAMETERS = {"spark_lake_day_files": frozenset({"experiment_id"})}
#: The view ``sql/spark_lake_day_files.spark.sql`` reads.
FILES_VIEW = "counterbid_day_files"
#: Columns Spark adds to the day's rows (file and row of each bid), not the log's.
READ_COLUMNS = ("bid_file", "bid_row")


@dataclass(frozen=True)
class DayFile:
    """One Parquet file of a lake day: its URI as Spark names it, size in bytes, rows, rows of the experiment."""

    path: str
    size: int
    rows: int
    experiment_rows: int


@dataclass(frozen=True)
class LakeDay:
    """What the Spark load step records of one (experiment, day) of the lake.

    Attributes
    ----------
    files : tuple of DayFile
        The day's files, by path (the fingerprint).
    columns : dict of str to str
        Column name -> Spark type (``simpleString``) as read from the Parquet metadata.
    """

    files: tuple[DayFile, ...]
    columns: dict[str, str]

    @property
    def experiment_rows(self) -> int:
        """Bids of the experiment on the day."""
        return sum(f.experiment_rows for f in self.files)

    def fingerprint(self) -> list[dict]:
        """The files as plain rows (what the manifest stores and the estimate step compares)."""
        return [asdict(f) for f in self.files]


def lake_day_files(spark, lake_root: str, *, experiment: Experiment, ds, source: str | None = None) -> LakeDay:
    """The fingerprint and column types of one experiment's day of the Hive-partitioned lake, read on Spark.

    Parameters
    ----------
    spark : pyspark.sql.SparkSession
    lake_root : str
        Root of the lake (``ds=YYYY-MM-DD`` folders), a path or an object-store URL.
    experiment : Experiment
    ds : datetime.date
    source : str, optional
        Name of the partition in messages (default ``"<lake_root> ds=<day>"``).

    Returns
    -------
    LakeDay

    Raises
    ------
    InputError
        The day's folder is missing (``"<lake_root>: partition ds=<day> is missing (no such folder)"``)
        or unreadable, or the lake has no ``experiment_id`` column.
    EngineFailure
        Spark failed: one line with the cause.
    """
    source = source or f"{lake_root} ds={ds}"
    day = lake_day_frame(spark, lake_root, experiment=experiment, ds=ds, source=source)
    columns = {f.name: f.dataType.simpleString() for f in day.schema.fields if f.name not in READ_COLUMNS}
    root = str(lake_root).rstrip("/")
    try:
        files = spark.read.option("mergeSchema", "true").option("basePath", root).parquet(f"{root}/ds={ds}")
        files.select(files["_metadata.file_path"].alias("bid_file"), files["_metadata.file_size"].alias("file_size"),
                     "experiment_id").createOrReplaceTempView(FILES_VIEW)
        args = {"experiment_id": experiment.id}  # exactly DAY_FILES_STATEMENT_PARAMETERS' names
        rows = spark.sql(statement("spark_lake_day_files", dialect="spark"), args=args).collect()
    except Exception as exc:  # a footer Spark lists but cannot read shows up when the job runs
        if _is_read_failure(exc):
            raise _analysis_error(exc, source) from None
        raise _as_engine_failure(exc, source)
    found = tuple(DayFile(str(r["bid_file"]), int(r["file_size"]), int(r["file_rows"]), int(r["experiment_rows"]))
                  for r in rows)
    return LakeDay(files=found, columns=columns)
