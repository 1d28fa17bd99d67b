"""`counterbid estimate --engine spark`: the local engine's rows, its one-line errors, and one line without PySpark.

The command runs as a subprocess (`python -m counterbid.cli`, as a user runs it), so what reaches
stderr is what a user sees: Spark's startup lines may stay, a Java stack trace or Spark's log of a
failed task may not.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import scipy.stats as st
import yaml

from counterbid.cli import main
from counterbid.estimators import parse_experiments, simulate_experiment
from counterbid.readers.spark_shards import SPARK_EXTRA

pytestmark = pytest.mark.spark

SPEC = """experiments:
  - id: shelves
    control_arm: eye-level
    arms:
      - {name: eye-level, share: 0.6, position_weights: [0.35, 0.15, 0.05]}
      - {name: top, share: 0.4, position_weights: [0.30, 0.20, 0.10]}
"""

#: What Spark itself may print on stderr while it starts (before counterbid quiets its log):
#: the JVM's note on the vector module Spark loads, log4j's default profile, Spark's hint on the
#: log level, and the startup warnings of its network and Hadoop utilities.
STARTUP_LINES = [
    re.compile(r"WARNING: Using incubator modules: jdk\.incubator\.vector"),
    re.compile(r"Using Spark's default log4j profile: \S+"),
    re.compile(r'Setting default log level to "WARN"\.'),
    re.compile(r"To adjust logging level use sc\.setLogLevel\(newLevel\)\..*"),
    re.compile(r"\d\d/\d\d/\d\d \d\d:\d\d:\d\d WARN (Utils|NativeCodeLoader): .*"),
]


@pytest.fixture
def files(tmp_path):
    spec = tmp_path / "spec.yaml"
    spec.write_text(SPEC)
    exp = parse_experiments(yaml.safe_load(SPEC))["shelves"]
    bids = simulate_experiment(st.lognorm(0.5, scale=0.8), exp, n_bidders={3: 0.5, 5: 0.5}, n_auctions=1000, rng=8)
    bids["auction_id"] = "shelf-" + bids["auction_id"].astype(str)
    path = tmp_path / "bids.parquet"
    bids.to_parquet(path, index=False)
    return spec, path, bids


def _counterbid(argv, java_home, *, code: str | None = None) -> subprocess.CompletedProcess:
    env = {**os.environ, "JAVA_HOME": java_home, "COUNTERBID_SPARK_MASTER": "local[2]"}
    command = [sys.executable, "-m", "counterbid.cli", *argv] if code is None else [sys.executable, "-c", code, *argv]
    return subprocess.run(command, capture_output=True, text=True, env=env, timeout=300)


def _counterbid_lines(stderr: str) -> list[str]:
    """The lines of stderr that are not Spark's startup lines; fails on anything else (a stack trace, a log line)."""
    ours = []
    for line in stderr.splitlines():
        if line.startswith("counterbid: "):
            ours.append(line)
        else:
            assert any(p.fullmatch(line) for p in STARTUP_LINES), f"unexpected stderr line: {line!r}"
    return ours


def test_spark_gives_the_local_rows(files, java_home, capsys):
    spec, path, _ = files
    argv = ["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json", "--max-bids-per-shard", "1500"]
    assert main([*argv, "--engine", "local"]) == 0
    out, local_err = capsys.readouterr()
    local = json.loads(out)
    done = _counterbid([*argv, "--engine", "spark"], java_home)
    assert done.returncode == 0, done.stderr
    on_spark = json.loads(done.stdout)
    assert on_spark["engine"] == "spark" and local["engine"] == "local"
    assert on_spark["shards"] == local["shards"] == 3
    for key in ("experiment_id", "cluster", "n_excluded_auctions", "payment_rule", "floor", "quality", "method_version"):
        assert on_spark[key] == local[key], key
    assert len(on_spark["rows"]) == len(local["rows"]) > 0
    for mine, theirs in zip(on_spark["rows"], local["rows"], strict=True):
        assert mine.keys() == theirs.keys()
        for key, value in theirs.items():
            if isinstance(value, float):  # the JSON keeps 10 decimals; the engines agree far below that
                np.testing.assert_allclose(mine[key], value, rtol=0, atol=1e-10, err_msg=key)
            else:
                assert mine[key] == value, key
    # the lines the local run prints (warnings, notes), and nothing of Spark's past its startup
    assert _counterbid_lines(done.stderr) == local_err.splitlines()


def test_bad_input_is_one_line_and_exit_2(files, java_home, capsys):
    spec, path, bids = files
    bids.loc[len(bids) - 3, "bid"] = -2.0
    bids.to_parquet(path, index=False)
    argv = ["estimate", "--bids", str(path), "--experiment", str(spec), "--max-bids-per-shard", "1500"]
    assert main([*argv, "--engine", "local"]) == 2
    local = capsys.readouterr().err.strip()
    done = _counterbid([*argv, "--engine", "spark"], java_home)
    assert done.returncode == 2 and done.stdout == ""
    assert _counterbid_lines(done.stderr) == [local]
    assert local.startswith(f"counterbid: error: {path} (shard ") and "column 'bid' row" in local


BLOCK_PYSPARK = """
import sys

class NoPySpark:  # as if the spark extra were not installed
    def find_spec(self, name, path=None, target=None):
        if name == "pyspark" or name.startswith("pyspark."):
            raise ModuleNotFoundError(f"No module named {name!r}", name=name)
        return None

sys.meta_path.insert(0, NoPySpark())
from counterbid.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_without_pyspark_one_line_naming_the_extra(files, java_home):
    spec, path, _ = files
    done = _counterbid(["estimate", "--bids", str(path), "--experiment", str(spec), "--engine", "spark"], java_home,
                       code=BLOCK_PYSPARK)
    assert done.returncode == 2 and done.stdout == ""
    assert done.stderr.splitlines() == [
        f"counterbid: error: the Spark engine needs PySpark, which is not installed here: {SPARK_EXTRA}"]
    assert SPARK_EXTRA == "pip install 'counterbid[spark]'"
    # the local engine does not need it
    done = _counterbid(["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "csv"], java_home,
                       code=BLOCK_PYSPARK)
    assert done.returncode == 0, done.stderr


def test_without_java_one_line(files, tmp_path):
    spec, path, _ = files
    nowhere = tmp_path / "no-jdk"
    done = _counterbid(["estimate", "--bids", str(path), "--experiment", str(spec), "--engine", "spark"], str(nowhere))
    assert done.returncode == 2 and done.stdout == ""
    assert done.stderr.splitlines() == [
        f"counterbid: error: JAVA_HOME={nowhere} holds no bin/java; Spark needs a Java 17 or 21 runtime: set JAVA_HOME "
        "to one"]


CONNECT_SERVER = """
import os, sys
os.environ["PYSPARK_PYTHON"] = sys.executable
from pyspark.sql import SparkSession
# a local Spark Connect server (Spark, its JVM and Python workers in this process tree) on a port, with a
# token; its own client looks for the default port, so getOrCreate keeps waiting while the server serves
SparkSession.builder.remote("local[2]").config("spark.connect.grpc.binding.port", sys.argv[1]) \\
    .config("spark.connect.authenticate.token", sys.argv[2]).config("spark.sql.shuffle.partitions", "4").getOrCreate()
"""


@pytest.fixture
def connect_server(java_home):
    """A Spark Connect server in its own process: ``sc://localhost:<port>/;token=<token>``."""
    import socket

    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    token = "quillfen-bench-token"
    env = {**os.environ, "JAVA_HOME": java_home}
    server = subprocess.Popen([sys.executable, "-c", CONNECT_SERVER, str(port), token], stdout=subprocess.DEVNULL,
                              stderr=subprocess.DEVNULL, env=env, start_new_session=True)
    try:
        deadline = time.monotonic() + 180
        while True:  # until the server accepts connections
            assert server.poll() is None, "the Spark Connect server exited"
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                assert time.monotonic() < deadline, "the Spark Connect server did not start in 180 s"
                time.sleep(0.5)
        yield f"sc://localhost:{port}/;token={token}"
    finally:
        os.killpg(server.pid, signal.SIGKILL)  # the server's JVM and Python workers too
        server.wait(timeout=30)


def test_spark_connect_server_gives_the_local_rows(files, connect_server, capsys):
    """``--spark-master sc://...``: the client needs no Java; the server's Spark estimates the shards."""
    spec, path, _ = files
    argv = ["estimate", "--bids", str(path), "--experiment", str(spec), "--format", "json", "--max-bids-per-shard", "1500"]
    assert main([*argv, "--engine", "local"]) == 0
    local = json.loads(capsys.readouterr().out)
    env = {k: v for k, v in os.environ.items() if k != "JAVA_HOME"}
    done = subprocess.run([sys.executable, "-m", "counterbid.cli", *argv, "--engine", "spark", "--spark-master",
                           connect_server], capture_output=True, text=True, timeout=300,
                          env={**env, "PATH": os.path.dirname(sys.executable)})  # no java on PATH either
    assert done.returncode == 0, done.stderr
    remote = json.loads(done.stdout)
    assert remote["shards"] == local["shards"] == 3
    for mine, theirs in zip(remote["rows"], local["rows"], strict=True):
        for key, value in theirs.items():
            if isinstance(value, float):
                np.testing.assert_allclose(mine[key], value, rtol=0, atol=1e-10, err_msg=key)
            else:
                assert mine[key] == value, key
