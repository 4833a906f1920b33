# takeup: the two set-up commands of the README.
#   make demo   install, generate the demo scenario, ingest it, run the monitoring as a Prefect flow (which publishes
#               the results to sample_warehouse/published/ and sample_warehouse/dashboard.duckdb), write the report
#   make test   install with test extras and run the test suite
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
export PREFECT_SERVER_ANALYTICS_ENABLED ?= false
export DO_NOT_TRACK ?= 1
export PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS ?= 120

.PHONY: demo test install install-test bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip "setuptools>=77" wheel

install: $(PY)
	$(PY) -m pip install --quiet -e .

install-test: $(PY)
	$(PY) -m pip install --quiet -e ".[test]"

demo: install
	$(VENV)/bin/takeup demo --out sample_warehouse --force

test: install-test
	$(PY) -m pytest -q -p no:cacheprovider tests

bench: install
	$(PY) benchmarks/run_benchmarks.py

clean:
	rm -rf sample_warehouse/incoming sample_warehouse/*.duckdb* sample_warehouse/report.html sample_warehouse/export \
		sample_warehouse/published
