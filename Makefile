# Everything a fresh machine needs: `make test` and `make run` build .venv from nothing.
PYTHON ?= python3.11
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: venv run screen-demo test lint bench openapi clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

run: $(STAMP)
	$(BIN)/python -m service.demo_server

screen-demo: $(STAMP)
	$(BIN)/heedful demo-data --out demo
	$(BIN)/heedful lint demo/instrument.json
	$(BIN)/heedful screen demo/responses.csv --instrument demo/instrument.json --out demo/screened.csv

# Slow checks included; the tests run on up to four processes (two on a 2-core machine).
# mypy reads its settings from pyproject.toml and keeps its cache in .mypy_cache.
test: $(STAMP)
	$(BIN)/ruff check detectors service tests
	$(BIN)/mypy
	$(BIN)/python -m pytest -q -n auto --maxprocesses 4 --dist worksteal

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_detectors.py
	$(BIN)/python tests/benchmarks/bench_screen_cli.py
	$(BIN)/python tests/benchmarks/bench_service.py
	$(BIN)/python tests/benchmarks/bench_startup.py

openapi: $(STAMP)
	$(BIN)/heedful openapi --out openapi/openapi.json

clean:
	rm -rf $(VENV) demo nightly .pytest_cache .mypy_cache
