# Two entry points: `make demo` and `make test`. The venv is made once and reused;
# it is refreshed (and the compiled kernels rebuilt) when pyproject.toml, setup.py or
# ntrans/_kernels.pyx changes.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml setup.py ntrans/_kernels.pyx
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/ntrans demo

lint: $(STAMP)
	$(BIN)/ruff check ntrans cli tests bench data_demo

test: lint
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python -m pip install --quiet -e '.[test,bench]'
	$(BIN)/python bench/bench_tables.py

clean:
	rm -rf $(VENV) build *.egg-info
