# edgeproof: two commands set everything up on a fresh Debian machine: `make demo` and `make test`.
SHELL := /bin/bash
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: help setup system demo test test-all bench bench-quick lint clean

help:
	@echo "make demo      install into .venv, then run the whole pipeline on the invented demo scenario"
	@echo "make test      install into .venv, then run the test suite (slow cases excluded)"
	@echo "make test-all  the whole suite, slow cases included"
	@echo "make bench     the benchmarks; tables go to bench/RESULTS.md"
	@echo "make lint      ruff and mypy"

$(STAMP): pyproject.toml
	@$(PYTHON) -c 'import sys; sys.exit(0 if sys.version_info >= (3, 10) else 1)' || { echo "error: edgeproof needs Python 3.10 or newer (found $$($(PYTHON) --version)); set PYTHON=python3.x"; exit 1; }
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test,lint]'
	@touch $(STAMP)

setup: $(STAMP) system

# Graphviz's `dot` renders the graphs; install it through the system package manager when missing.
system:
	@if ! command -v dot >/dev/null 2>&1; then \
	  echo "Graphviz 'dot' is missing: installing the Debian package 'graphviz' with apt-get..."; \
	  if [ "$$(id -u)" = "0" ]; then SUDO=""; elif command -v sudo >/dev/null 2>&1; then SUDO="sudo"; else SUDO="none"; fi; \
	  if [ "$$SUDO" = "none" ] || ! command -v apt-get >/dev/null 2>&1; then \
	    echo "error: cannot install Graphviz here (no apt-get or no root); install the package 'graphviz' (it provides 'dot') and rerun."; exit 1; \
	  fi; \
	  $$SUDO apt-get update -qq && DEBIAN_FRONTEND=noninteractive $$SUDO apt-get install -y -qq graphviz >/dev/null \
	    || { echo "error: apt-get could not install 'graphviz'; install it by hand (it provides 'dot') and rerun."; exit 1; }; \
	  echo "Graphviz installed: $$(dot -V 2>&1)"; \
	fi

demo: setup
	$(BIN)/edgeproof demo

test: setup
	$(BIN)/pytest

test-all: setup
	$(BIN)/pytest -m "slow or not slow"

bench: setup
	$(BIN)/python bench/run_all.py

bench-quick: setup
	$(BIN)/python bench/run_all.py --quick

lint: setup
	$(BIN)/ruff check pipeline tests
	$(BIN)/mypy pipeline

clean:
	rm -rf $(VENV) outputs/*/ .pytest_cache
