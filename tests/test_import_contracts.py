"""The layering of pyproject.toml's [tool.importlinter] contracts holds (also run by `make test` before pytest).

`lint-imports` builds the import graph of every installed portion of `counterbid` (function-level
imports included) and checks each contract: the estimators import no Airflow, DuckDB, Spark,
operators, readers or cli; the SQL loader no domain code; the cli not the example DAGs; and the
estimators' modules form layers (so no two of them import each other).
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_are_kept():
    exe = shutil.which("lint-imports", path=str(Path(sys.executable).parent))
    assert exe, "lint-imports is missing: install the test extra (pip install -e '.[test]')"
    run = subprocess.run([exe, "--no-cache"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert run.returncode == 0, run.stdout[-4000:] + run.stderr[-2000:]
    assert "0 broken" in run.stdout
