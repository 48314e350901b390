# tidewatch developer commands. `make demo` and `make test` set up everything on a fresh machine.
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP_RUN := $(VENV)/.installed-run
STAMP_TEST := $(VENV)/.installed-test
NAB ?= ../shared/nab-dev

.PHONY: demo test test-fast bench-nab bench-changepoint bench broker-fetch broker-up broker-down clean

$(STAMP_RUN): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip
	$(BIN)/python -m pip install -q -e .
	@touch $@

$(STAMP_TEST): $(STAMP_RUN)
	$(BIN)/python -m pip install -q -e '.[test]'
	@touch $@

## demo: create the virtual environment, install, run the built-in demo (no broker needed)
demo: $(STAMP_RUN)
	$(BIN)/tidewatch demo --out-dir demo-output

## test: install the test extras and the system tools, run the whole suite (starts a local Kafka broker)
test: $(STAMP_TEST)
	bash .ci/system-deps
	$(BIN)/python -m pytest

## test-fast: the suite without the tests that need a broker
test-fast: $(STAMP_TEST)
	$(BIN)/python -m pytest -m "not kafka"

## bench-nab: NAB scores on a directory laid out like nab-dev (NAB=path)
bench-nab: $(STAMP_TEST)
	$(BIN)/python tests/benchmarks/bench_nab.py $(NAB)

bench-changepoint: $(STAMP_TEST)
	$(BIN)/python tests/benchmarks/bench_changepoint.py

broker-fetch:
	deploy/local-kafka/kafka.sh fetch

broker-up:
	deploy/local-kafka/kafka.sh start

broker-down:
	deploy/local-kafka/kafka.sh stop

clean:
	rm -rf demo-output .pytest_cache build *.egg-info
