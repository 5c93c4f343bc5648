# `make demo`: set up a fresh machine and solve a bundled example end to end.
# `make test`: set up, lint, and run the whole test suite (.ci/run calls this).
# `make lint`: set up and run only the linter (ruff, configured in pyproject.toml).

SHELL := bash
.SHELLFLAGS := -eu -o pipefail -c
.ONESHELL:
.DEFAULT_GOAL := help

PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
# The stamp's name carries a hash of pyproject.toml: editing the dependencies
# makes a new stamp name, so the install reruns; otherwise it is skipped.
STAMP := $(VENV)/.fixq-installed-$(shell cksum pyproject.toml | cut -d' ' -f1)
DEMO_PROBLEM ?= service/examples/plant_capacity.json
# Test processes (pytest-xdist): one per core by default; 0 runs the suite in this process.
# Each test module runs in one process (--dist loadfile), so a model structure its tests share is compiled
# by that process (two processes meeting one new structure at once: one compiles, the other waits and loads,
# worker._codegen.cache.warming): on 2 cores the suite took 588 s so against 626-640 s with tests dealt out
# one by one (2026-12-05, fresh kernel folders).
PYTEST_WORKERS ?= auto

.PHONY: help env demo lint test

help:
	@echo "make demo   set up .venv, start fixq, solve $(DEMO_PROBLEM), stop"
	@echo "make lint   set up .venv and run ruff (settings in pyproject.toml)"
	@echo "make test   set up .venv, run ruff, then the test suite"

$(STAMP): pyproject.toml
	@echo "setting up $(VENV) (the first time takes a few minutes)"
	if [ ! -x $(BIN)/python ]; then $(PYTHON) -m venv $(VENV); fi
	$(BIN)/python -m pip install --quiet -e '.[test]'
	rm -f $(VENV)/.fixq-installed-*
	touch $@

env: $(STAMP)

lint: $(STAMP)
	$(BIN)/ruff check .

# PYTEST_STATUS=FILE makes the recipe write pytest's own exit code there,
# since make itself exits 2 on any failure (.ci/run needs to tell 5 apart).
# A lint failure stops the recipe before pytest runs (so no status is written).
test: $(STAMP)
	@$(BIN)/ruff check .
	rc=0
	$(BIN)/python -m pytest -q -n $(PYTEST_WORKERS) --dist loadfile $(PYTEST_ARGS) || rc=$$?
	if [ -n "$(PYTEST_STATUS)" ]; then echo "$$rc" >"$(PYTEST_STATUS)"; fi
	if [ "$$rc" -eq 5 ]; then echo "make test: pytest collected no tests" >&2; fi
	exit "$$rc"

demo: $(STAMP)
	@export PATH="$(CURDIR)/$(BIN):$$PATH"
	workdir=$$(mktemp -d)
	port=$$(python -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
	export FIXQ_URL="http://127.0.0.1:$$port"
	stop() {
	    if [ -n "$${run_pid:-}" ] && kill -0 "$$run_pid" 2>/dev/null; then
	        kill -TERM "$$run_pid"
	        wait "$$run_pid" || true
	    fi
	    rm -rf "$$workdir"
	}
	trap stop EXIT
	trap 'exit 130' INT TERM
	fixq run --port "$$port" >"$$workdir/run.log" 2>&1 &
	run_pid=$$!
	healthy() { python -c 'import sys, urllib.request; urllib.request.urlopen(sys.argv[1], timeout=1)' "$$FIXQ_URL/healthz" 2>/dev/null; }
	for _ in $$(seq 1 150); do
	    if healthy; then break; fi
	    if ! kill -0 "$$run_pid" 2>/dev/null; then cat "$$workdir/run.log"; exit 1; fi
	    sleep 0.2
	done
	healthy || { echo "fixq did not become healthy:"; cat "$$workdir/run.log"; exit 1; }
	grep '^fixq' "$$workdir/run.log" || true
	echo "submitting $(DEMO_PROBLEM)"
	job=$$(fixq submit "$(DEMO_PROBLEM)" --wait) || { cat "$$workdir/run.log"; exit 1; }
	echo
	fixq status "$$job"
	echo
	echo "A few rows of the solution table (every 250th grid point):"
	fixq result "$$job" --format csv | awk -F, 'NR == 1 { for (i = 1; i <= NF; i++) printf "%16s", $$i; print "" } NR > 1 && NR % 250 == 2 { for (i = 1; i <= NF; i++) printf "%16.6g", $$i; print "" }'
