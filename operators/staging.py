"""The staging folder of one (experiment, day): its file names and atomic writes.

Tasks never pass bids through XCom: each step reads the files an earlier step wrote here and
writes its own. Every file is written to a temporary name and renamed, so a reader sees the old
file or the new one, never half of one.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import re
import shutil
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from counterbid.estimators.errors import InputError

__all__ = ["StagedPartition", "replace_folder", "write_json", "write_parquet"]

_PATH_SAFE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,127}$")


@dataclass(frozen=True)
class StagedPartition:
    """Files of one (experiment, day) in the staging folder.

    Attributes
    ----------
    folder : Path
        ``<staging_root>/<experiment_id>/ds=YYYY-MM-DD``.
    """

    folder: Path

    @classmethod
    def at(cls, staging_root: str | Path, experiment_id: str, ds: dt.date) -> "StagedPartition":
        if not _PATH_SAFE.match(experiment_id):
            raise InputError(f"experiment id {experiment_id!r} cannot name a staging folder (letters, digits, '_', '.', '-')")
        return cls(Path(staging_root) / experiment_id / f"ds={ds.isoformat()}")

    # written by 'load': the day's bids, one folder per shard (``day/shard=K/*.parquet``)
    day = property(lambda self: self.folder / "day")
    # the day's shard count and bids as the load step split them (the Spark engine splits the same way)
    day_manifest = property(lambda self: self.folder / "day" / "shards.json")
    measured_weights = property(lambda self: self.folder / "measured_weights.parquet")
    # written by 'validate'
    checks = property(lambda self: self.folder / "checks.json")
    bid_quantiles = property(lambda self: self.folder / "bid_quantiles.parquet")
    # written by 'estimate'
    pieces = property(lambda self: self.folder / "stratum_pieces.parquet")
    estimates_day = property(lambda self: self.folder / "estimates_day.parquet")
    estimates_to_date = property(lambda self: self.folder / "estimates_to_date.parquet")
    weights = property(lambda self: self.folder / "position_weights.parquet")

    @property
    def day_files(self) -> str:
        """Glob of every staged Parquet file of the day, all shards (what DuckDB reads)."""
        return str(self.day / "shard=*" / "*.parquet")

    def shard(self, k: int) -> Path:
        """Folder of shard ``k`` of the staged day (what :func:`counterbid.readers.bid_log.read_bids` reads)."""
        return self.day / f"shard={int(k)}"

    def shards(self) -> list[int]:
        """Shards staged for the day, ascending (empty before the load step ran)."""
        if not self.day.is_dir():
            return []
        found = [p.name.split("=", 1)[1] for p in self.day.iterdir() if p.is_dir() and p.name.startswith("shard=")]
        return sorted(int(k) for k in found if k.isdigit())

    def require(self, path: Path, *, step: str) -> Path:
        if not path.exists():
            raise InputError(f"{path}: missing; run the {step!r} step of this (experiment, day) first")
        return path


def _temporary(target: Path) -> Path:
    target.parent.mkdir(parents=True, exist_ok=True)
    return target.with_name(f".{target.name}.{os.getpid()}.tmp")


def write_parquet(table: pa.Table, target: Path) -> None:
    """Write ``table`` to ``target`` atomically."""
    tmp = _temporary(target)
    pq.write_table(table, tmp)
    os.replace(tmp, target)  # readers see the old file or the new one, never half of one


def replace_folder(fill, target: Path) -> None:
    """Fill a fresh temporary folder with ``fill(folder)``, then move it to ``target``.

    A reader sees the old folder or the complete new one (a rerun replaces the whole folder).
    """
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    old = target.with_name(f".{target.name}.{os.getpid()}.old")
    for leftover in (tmp, old):
        shutil.rmtree(leftover, ignore_errors=True)
    try:
        fill(tmp)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if target.exists():
        os.replace(target, old)
    os.replace(tmp, target)
    shutil.rmtree(old, ignore_errors=True)


def write_json(payload, target: Path) -> None:
    """Write ``payload`` as JSON to ``target`` atomically (dates and other values as text)."""
    tmp = _temporary(target)
    tmp.write_text(json.dumps(payload, indent=1, default=str), encoding="utf-8")
    os.replace(tmp, target)
