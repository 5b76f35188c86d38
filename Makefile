# gasgap: the two commands a new machine needs, and a few more.
#   make demo   the main job on the embedded default (SQLite)
#   make test   the whole test suite
PYTHON ?= $(shell command -v python3.11 || command -v python3)
VENV := .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip

.PHONY: demo test bench lint clean

$(VENV)/.installed: pyproject.toml constraints.txt
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PIP) install --quiet --upgrade pip
	$(PIP) install --quiet -c constraints.txt -e '.[test,bench,lint]'
	# The coverage-guided fuzzer is used when it installs; its test skips (saying so) if not.
	$(PIP) install --quiet -c constraints.txt atheris || echo "atheris did not install: its fuzz run will be skipped"
	touch $@

demo: $(VENV)/.installed
	$(PY) -m monitor.demo

# The FHIR test server runs from its own virtualenv, never the project's.
.fhir-venv/bin/sekmet:
	PYTHON=$(PYTHON) bash scripts/fhir-test-server.sh install

# axe-core for the board's accessibility test, from the npm registry, pinned in
# tests/browser/package.json; the test injects this file, nothing is fetched at run time.
tests/browser/node_modules/axe-core/axe.min.js: tests/browser/package.json tests/browser/package-lock.json
	npm ci --prefix tests/browser --no-audit --no-fund
	touch $@

test: $(VENV)/.installed .fhir-venv/bin/sekmet tests/browser/node_modules/axe-core/axe.min.js
	$(PY) -m pytest $(PYTEST_ARGS)

bench: $(VENV)/.installed
	$(PY) -m bench

# Lint, format, types and dead code: ruff (rules and formatting) over the product code,
# the tests, fixtures and benchmarks; mypy --strict over the product code; vulture at
# 80 % confidence or more (paths and threshold in pyproject.toml, [tool.vulture]).
LINTED := monitor adapters storage fixtures bench tests vulture_whitelist.py
lint: $(VENV)/.installed
	$(PY) -m ruff check $(LINTED)
	$(PY) -m ruff format --check $(LINTED)
	$(PY) -m mypy monitor adapters storage
	$(PY) -m vulture

clean:
	rm -rf $(VENV) demo-out test-artifacts .pytest_cache .hypothesis tests/browser/node_modules
