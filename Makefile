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
	$(PIP) install --quiet -c constraints.txt -e '.[test,bench]'
	touch $@

demo: $(VENV)/.installed
	$(PY) -m monitor.demo

# The FHIR test server runs from its own virtualenv, never the project's.
.fhir-venv/bin/sekmet:
	PYTHON=$(PYTHON) bash scripts/fhir-test-server.sh install

test: $(VENV)/.installed .fhir-venv/bin/sekmet
	$(PY) -m pytest $(PYTEST_ARGS)

bench: $(VENV)/.installed
	$(PY) -m bench

clean:
	rm -rf $(VENV) demo-out test-artifacts .pytest_cache .hypothesis
