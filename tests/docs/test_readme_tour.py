"""The README's five-minute tour, command by command, as a new user would paste it into a shell."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import duckdb
import pytest

ROOT = Path(__file__).resolve().parents[2]


def _tour_commands() -> list[str]:
    """The shell lines of the README's tour block, continuation lines joined, the install line left out."""
    text = (ROOT / "README.md").read_text()
    block = re.search(r"## A five-minute tour\s+```sh\n(.*?)```", text, re.S)
    assert block, "README.md: no ```sh block under '## A five-minute tour'"
    joined = block.group(1).replace("\\\n", " ")
    lines = [line.split("  #")[0].strip() for line in joined.splitlines()]
    return [line for line in lines if line and not line.startswith(("#", "pip install"))]


@pytest.mark.slow
@pytest.mark.timeout(1200)
def test_every_command_of_the_readme_tour_runs_and_fills_the_results(tmp_path):
    commands = _tour_commands()
    assert any(c.startswith("counterbid backfill") for c in commands)
    bin_dir = str(Path(sys.executable).parent)
    env = {**os.environ, "PATH": bin_dir + os.pathsep + os.environ["PATH"]}
    script = "set -e\n" + "\n".join(c.replace("/tmp/", f"{tmp_path}/") for c in commands)
    run = subprocess.run(["bash", "-c", script], cwd=ROOT, env=env, capture_output=True, text=True)
    assert run.returncode == 0, run.stderr[-2000:]
    with duckdb.connect(str(tmp_path / "results.duckdb"), read_only=True) as con:
        days = dict(con.execute("select experiment_id, count(distinct ds) from arm_estimates group by 1").fetchall())
    assert set(days) == {"featured-rows", "maker-spotlight"} and min(days.values()) >= 1, days
