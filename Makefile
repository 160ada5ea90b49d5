# Each target builds its own virtual environment in .venv the first time.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo plant-demo test lint bench clean

# The project is installed editable with -qq (errors only): setuptools notes on every editable
# install that folders named like the package may shadow it, which is how a checkout is used.
$(STAMP): pyproject.toml constraints.txt
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install -qq -c constraints.txt -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/formgate demo

# two demo stations on one PostgreSQL database of the demo's own (needs the server binaries,
# Debian package postgresql)
plant-demo: $(STAMP)
	$(BIN)/formgate plant demo

test: $(STAMP)
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/python -m pip install --quiet ruff mypy
	$(BIN)/ruff check pipeline tests
	$(BIN)/mypy

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

clean:
	rm -rf $(VENV) demo-output
