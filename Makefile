# Set-up is part of every target: a fresh machine needs only python3 (3.11+) and make.
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	python3 -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)  ## run the service on 127.0.0.1:8000 with the demo segmentation
	$(BIN)/segscore serve --demo

test: $(STAMP)  ## run the whole test suite (and a lint for undefined or unused names)
	$(BIN)/ruff check --quiet --select F,E9 service schemas segscore tests bench
	$(BIN)/python -m pytest -n 2 -q

bench: $(STAMP)  ## in-process benchmarks (figures for the README)
	$(BIN)/python bench/bench_fit.py
	$(BIN)/python bench/bench_assign.py
	$(BIN)/python bench/bench_drift.py

clean:
	rm -rf $(VENV) build *.egg-info
