# counterbid: the two commands of the README, plus the benchmark.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed-stamp

.PHONY: test demo bench clean

# Create .venv if missing and install the package (editable) with its test extras.
$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --disable-pip-version-check --upgrade pip
	$(PY) -m pip install --quiet --disable-pip-version-check -e '.[test]'
	touch $(STAMP)

test: $(STAMP)
	$(PY) -m pytest

demo: $(STAMP)
	rm -rf demo_output/lake
	$(VENV)/bin/counterbid simulate --experiment dags_example/experiments.yaml --out demo_output/lake \
	    --start 2026-03-02 --days 2 --auctions-per-day 40000 --bidders 6 --seed 7
	$(VENV)/bin/counterbid estimate --bids demo_output/lake --experiment dags_example/experiments.yaml \
	    --experiment-id featured-rows

clean:
	rm -rf demo_output .pytest_cache
