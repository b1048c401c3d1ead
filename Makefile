# agegrid: make install | demo | test | bench
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: help install demo test bench clean

help:
	@echo "make install  create .venv and install agegrid (editable, with the test extra)"
	@echo "make demo     build the bundled demo scenario into build/demo"
	@echo "make test     run the test suite"
	@echo "make bench    run the benchmarks (prints ratios against scipy griddata)"

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

install: $(STAMP)

demo: install
	$(BIN)/agegrid demo --output build/demo

test: install
	$(BIN)/python -m pytest -q

bench: install
	$(BIN)/python bench/run_bench.py

clean:
	rm -rf build .pytest_cache
