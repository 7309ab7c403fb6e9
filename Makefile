# Everything a fresh machine needs: `make test` and `make run` build .venv from nothing.
PYTHON ?= python3.11
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: venv browser run screen-demo test screenshots lint bench openapi clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

# The browser tests drive Debian's Chromium through its ChromeDriver (nothing is downloaded by
# the tests). Installed here when missing and this is root with apt-get; elsewhere the browser
# tests show as skipped with the reason.
BROWSER_PACKAGES := chromium chromium-driver
browser:
	@if [ -x /usr/bin/chromium ] && [ -x /usr/bin/chromedriver ]; then :; \
	elif [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null; then \
	  echo "Installing $(BROWSER_PACKAGES) for the browser tests"; \
	  DEBIAN_FRONTEND=noninteractive apt-get install -y -q $(BROWSER_PACKAGES) >/dev/null 2>&1 || \
	  { DEBIAN_FRONTEND=noninteractive apt-get update -q >/dev/null 2>&1 && \
	    DEBIAN_FRONTEND=noninteractive apt-get install -y -q $(BROWSER_PACKAGES) >/dev/null 2>&1; } || \
	  echo "Could not install $(BROWSER_PACKAGES): the browser tests will be skipped."; \
	else echo "No Chromium and no apt-get as root: the browser tests will be skipped."; fi

run: $(STAMP)
	$(BIN)/python -m service.demo_server

screen-demo: $(STAMP)
	$(BIN)/heedful demo-data --out demo
	$(BIN)/heedful lint demo/instrument.json
	$(BIN)/heedful screen demo/responses.csv --instrument demo/instrument.json --out demo/screened.csv

# Slow checks included; the tests run on up to four processes (two on a 2-core machine).
# mypy reads its settings from pyproject.toml and keeps its cache in .mypy_cache.
test: $(STAMP) browser
	$(BIN)/ruff check detectors service tests
	$(BIN)/mypy
	$(BIN)/python -m pytest -q -n auto --maxprocesses 4 --dist worksteal

# The README's screenshots of the review pages, taken by the browser tests.
screenshots: $(STAMP) browser
	HEEDFUL_SCREENSHOTS=1 $(BIN)/python -m pytest -q tests/browser

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_detectors.py
	$(BIN)/python tests/benchmarks/bench_screen_cli.py
	$(BIN)/python tests/benchmarks/bench_service.py
	$(BIN)/python tests/benchmarks/bench_startup.py
	$(BIN)/python tests/benchmarks/bench_review_pages.py

openapi: $(STAMP)
	$(BIN)/heedful openapi --out openapi/openapi.json

clean:
	rm -rf $(VENV) demo nightly .pytest_cache .mypy_cache
