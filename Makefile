# tidewatch developer commands. `make demo` and `make test` set up everything on a fresh machine.
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP_RUN := $(VENV)/.installed-run
STAMP_TEST := $(VENV)/.installed-test
NAB ?= ../shared/nab-dev

.PHONY: demo test test-fast test-c-sanitized bench-nab bench-changepoint bench broker-fetch broker-up broker-down clean

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

## test-c-sanitized: the C accelerators built with AddressSanitizer and UBSan in a scratch copy, and their tests run there
SANITIZED ?= /tmp/tidewatch-sanitized
test-c-sanitized: $(STAMP_TEST)
	rm -rf $(SANITIZED) && mkdir -p $(SANITIZED) && cp -r service models config tests pyproject.toml $(SANITIZED)/
	rm -f $(SANITIZED)/service/*.so $(SANITIZED)/models/*.so
	cd $(SANITIZED) && for ext in service/_hotpath service/_scoremsg models/_hstcore models/_baselinecore; do \
	  gcc -shared -fPIC -O1 -g -fsanitize=address,undefined -fno-omit-frame-pointer -ffp-contract=off \
	    -I"$$($(CURDIR)/$(BIN)/python -c 'import sysconfig; print(sysconfig.get_paths()["include"])')" \
	    $$ext.c -o $$ext"$$($(CURDIR)/$(BIN)/python -c 'import sysconfig; print(sysconfig.get_config_var("EXT_SUFFIX"))')" || exit 1; done
	cd $(SANITIZED) && export ASAN_OPTIONS=detect_leaks=0:abort_on_error=1 UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1 \
	  LD_PRELOAD="$$(gcc -print-file-name=libasan.so) $$(gcc -print-file-name=libubsan.so)" PYTHONPATH=$(SANITIZED) && \
	  $(CURDIR)/$(BIN)/python -c "import service._hotpath as h, service._scoremsg as e, models._hstcore as m, models._baselinecore as b, sys; \
	    sys.exit(0 if all(x.__file__.startswith('$(SANITIZED)') for x in (h, e, m, b)) else 'not the sanitized build')" && \
	  $(CURDIR)/$(BIN)/python -m pytest -q -p no:cacheprovider tests/test_hotpath.py tests/models/test_models_hst.py \
	    tests/models/test_models_fast_paths.py tests/test_score_message.py

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
