# Set-up is part of every target: a fresh machine needs only python3 (3.11+) and make.
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp

.PHONY: demo test bench calibrate load clean

# `make demo` and `make test` started at once on a fresh clone must not both build .venv: the set-up runs
# under an exclusive lock (flock, util-linux), and whoever gets it second finds the stamp fresh and skips.
$(STAMP): pyproject.toml
	flock .setup.lock $(MAKE) --no-print-directory setup-locked

.PHONY: setup-locked
setup-locked:
	@if [ ! -f $(STAMP) ] || [ pyproject.toml -nt $(STAMP) ]; then \
		python3 -m venv $(VENV) && \
		$(BIN)/pip install --quiet --upgrade pip && \
		$(BIN)/pip install --quiet -e '.[test]' && \
		touch $(STAMP); \
	fi

demo: $(STAMP)  ## run the service on 127.0.0.1:8000 with the demo segmentation
	$(BIN)/segscore serve --demo

# The postgres store tests run against this server when it answers (they skip otherwise; under CI=true they fail).
TEST_DATABASE_URL ?= postgresql://postgres@127.0.0.1:5432/test

test: $(STAMP)  ## run the whole test suite (and a lint for undefined or unused names)
	$(BIN)/ruff check --quiet --select F,E9 service schemas segscore tests bench
	@if [ -z "$$SEGSCORE_TEST_DATABASE_URL" ] && $(BIN)/python -c "import psycopg,sys; psycopg.connect(sys.argv[1], connect_timeout=3).close()" "$(TEST_DATABASE_URL)" 2>/dev/null; then \
		export SEGSCORE_TEST_DATABASE_URL="$(TEST_DATABASE_URL)"; fi; \
	$(BIN)/python -m pytest -n 2 -q

bench: $(STAMP)  ## in-process benchmarks (figures for the README)
	$(BIN)/python bench/bench_fit.py
	$(BIN)/python bench/bench_assign.py
	$(BIN)/python bench/bench_drift.py
	$(BIN)/python bench/bench_auth.py

calibrate: $(STAMP)  ## calibration sweeps of the outlier flag and the drift p-values (figures for the README)
	$(BIN)/python bench/calibrate.py

load: $(STAMP)  ## HTTP load on 127.0.0.1 (~5 min, stops by itself): assign p99 during a fit, 2 x 60 s mixed traffic
	@command -v wrk >/dev/null || { echo "make load needs wrk (the mixed traffic's generator)." \
		"On Debian/Ubuntu: sudo apt-get update && sudo apt-get install -y wrk"; exit 1; }
	$(BIN)/python bench/load_mixed.py

clean:
	rm -rf $(VENV) build *.egg-info .setup.lock
