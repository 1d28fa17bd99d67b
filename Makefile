# counterbid: the two commands of the README, plus the benchmark.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

.PHONY: test demo bench bench-strata clean

# Create .venv if missing and install the package (editable) with its test extras.
$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --disable-pip-version-check --upgrade pip
	$(PY) -m pip install --quiet --disable-pip-version-check -e '.[test]'
	touch $(STAMP)

# A Java 17/21 runtime for Spark in local mode (.ci/java-home finds one, or installs Debian's as root).
# Not fatal: without one the file is not written, every other test still runs and the Spark tests
# fail, each with the script's one line naming what to install.
JAVA_HOME_FILE := $(VENV)/java-home
$(JAVA_HOME_FILE): .ci/java-home | $(STAMP)
	@if .ci/java-home > $@.tmp; then mv $@.tmp $@; else rm -f $@.tmp; \
	    echo "make: no Java runtime for Spark: the Spark tests will fail; every other test runs" >&2; fi

# The import contracts of pyproject.toml ([tool.importlinter]) first: a broken layer fails the target.
# PYTEST_ARGS picks tests or options, e.g. PYTEST_ARGS='-m "not slow" tests/estimators'.
PYTEST_ARGS ?=
test: $(STAMP) $(JAVA_HOME_FILE)
	$(VENV)/bin/lint-imports
	JAVA_HOME=$$(cat $(JAVA_HOME_FILE) 2>/dev/null || printf '%s' "$$JAVA_HOME") $(PY) -m pytest $(PYTEST_ARGS)

# 14 days of the invented Quillfen marketplace through the daily DAG (dag.test per day), then the report.
demo: $(STAMP)
	rm -rf demo_output
	@mkdir -p demo_output && date +%s > demo_output/.started
	$(PY) -m counterbid.dags_example.demo lake --out demo_output
	$(VENV)/bin/counterbid backfill --lake demo_output/lake --experiments dags_example/experiments.yaml \
	    --results demo_output/results.duckdb --start 2026-03-02 --end 2026-03-15
	$(PY) -m counterbid.dags_example.demo report --out demo_output
	@echo "demo wall time: $$(( $$(date +%s) - $$(cat demo_output/.started) ))s"

# Benchmark against the physical floor: counterbid estimate at 1M, 10M and 30M bids, integer and string
# ids, local engine and Spark in local mode (local[2]), each beside the floor of the same run; then both
# engines on one 2M-bid log compared cell by cell. An hour or more. Not part of `make test`.
# BENCH_ARGS passes options, e.g. BENCH_ARGS='--data /tmp/bench --sizes 1,10 --skip cli_spark,cli_spark_text'
# (rows: floor,input,cli,cli_text,cli_spark,cli_spark_text,estimate,sql_realized,pandas,dag,compare).
BENCH_ARGS ?=
# The package is byte-compiled first, as an installed wheel is (under PYTHONDONTWRITEBYTECODE every
# command would otherwise compile counterbid's modules again at its start).
bench: $(STAMP) $(JAVA_HOME_FILE)
	$(PY) -m compileall -q estimators readers operators cli
	JAVA_HOME=$$(cat $(JAVA_HOME_FILE)) $(PY) tests/benchmarks/bench_estimator.py --out bench_results.md $(BENCH_ARGS)

bench-strata: $(STAMP)
	$(PY) tests/benchmarks/bench_strata.py --out bench_strata_results.md

clean:
	rm -rf demo_output .pytest_cache
