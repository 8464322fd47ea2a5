# Two commands a new user runs: `make demo` and `make test`. Both build .venv from nothing.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
PIP := $(BIN)/pip
STAMP := $(VENV)/.installed-$(shell cat pyproject.toml constraints.txt | sha256sum | cut -c1-12)

.PHONY: demo test check venv services bench soak overload clean

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(PIP) install --quiet --upgrade pip
	$(PIP) install --quiet -c constraints.txt -e '.[serve,train,dev,check]'
	rm -f $(VENV)/.installed-* && touch $@

venv: $(STAMP)

demo: venv
	$(BIN)/textsieve demo

# System services the tests use (PostgreSQL, nginx, Chromium) come from Debian's packages.
services:
	bash scripts/test-services.sh

# Format, lint, types and the layer contract (scripts/check); CI runs it before the tests.
check: venv
	BIN=$(BIN) bash scripts/check

test: venv services
	. ./.test-env 2>/dev/null; $(BIN)/python -m pytest

bench: venv
	$(PIP) install --quiet -c constraints.txt -e '.[bench]'
	$(BIN)/python bench/run.py

# SOAK_MINUTES=60 make soak: an hour of mixed load with hot swaps; memory must stay within 10 %.
SOAK_MINUTES ?= 10
soak: venv
	$(BIN)/python bench/soak.py --seconds $$(( $(SOAK_MINUTES) * 60 ))

# 1,000 connections against one replica: every request answered in time or refused at once.
overload: venv
	$(BIN)/python bench/overload.py

clean:
	rm -rf $(VENV) demo-run textsieve-registry .pytest_cache .mypy_cache .ruff_cache .import_linter_cache .test-env
