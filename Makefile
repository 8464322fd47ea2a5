# Two commands a new user runs: `make demo` and `make test`. Both build .venv from nothing.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
PIP := $(BIN)/pip
# Every dependency of every extra at the version tested, for Python 3.11 on Linux (`make lock`).
LOCK := requirements/lock.txt
STAMP := $(VENV)/.installed-$(shell cat pyproject.toml $(LOCK) | sha256sum | cut -c1-12)
# The lock pins torch's CPU build (2.13.0+cpu), which PyPI does not have: it comes from pip's own
# wheel folder when pip has one (PIP_FIND_LINKS), from PyTorch's CPU index otherwise
# (`make venv TORCH_FROM=` leaves it to pip's configuration alone).
TORCH_INDEX ?= https://download.pytorch.org/whl/cpu
TORCH_FROM ?= $(if $(PIP_FIND_LINKS),,--extra-index-url $(TORCH_INDEX))

.PHONY: demo test check venv services bench soak overload lock clean

# torch is installed alone first, so that only it may come from PyTorch's index.
$(STAMP): pyproject.toml $(LOCK)
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(PIP) install --quiet --upgrade pip
	$(PIP) install --quiet -c $(LOCK) --no-deps $(TORCH_FROM) torch
	$(PIP) install --quiet -c $(LOCK) -e '.[serve,train,report,parquet,cluster,dev,check]'
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
	$(PIP) install --quiet -c $(LOCK) -e '.[bench]'
	$(BIN)/python bench/run.py
	$(BIN)/python bench/liveloop.py

# SOAK_MINUTES=60 make soak: an hour of mixed load with hot swaps; memory must stay within 10 %.
SOAK_MINUTES ?= 10
soak: venv
	$(BIN)/python bench/soak.py --seconds $$(( $(SOAK_MINUTES) * 60 ))

# 1,000 connections against one replica: every request answered in time or refused at once.
overload: venv
	$(BIN)/python bench/overload.py

# Regenerates $(LOCK) from pyproject.toml for every extra, keeping the versions it already holds
# where they still fit (`make lock LOCK_ARGS=--upgrade` moves everything to the newest release).
# torch is resolved against its CPU build (pip's wheel folder, or PyTorch's CPU wheel page), so the
# lock holds `torch==2.13.0+cpu` and none of the CUDA packages PyPI's torch depends on: pip then
# refuses any other build of torch rather than download gigabytes of CUDA libraries.
LOCK_ARGS ?=
lock:
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	test -x $(BIN)/uv || $(PIP) install --quiet -c $(LOCK) uv
	$(BIN)/uv pip compile pyproject.toml --all-extras --python-version 3.11 --python-platform x86_64-manylinux_2_28 \
		$(addprefix --find-links ,$(or $(PIP_FIND_LINKS),$(TORCH_INDEX)/torch/)) \
		--custom-compile-command 'make lock' $(LOCK_ARGS) -o $(LOCK)

clean:
	rm -rf $(VENV) demo-run textsieve-registry .pytest_cache .mypy_cache .ruff_cache .import_linter_cache .test-env
