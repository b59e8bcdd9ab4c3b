# Every target creates .venv and installs what it needs, so a fresh clone needs nothing by hand.
PY      ?= python3
VENV    := .venv
BIN     := $(VENV)/bin
STAMP   := $(VENV)/.installed
CORES   ?= 2

.PHONY: demo test test-cluster bench lint design clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# ARGS passes anything on to snakemake, e.g. make demo ARGS="--config extract=PATH protocol=FILE"
# `emulant run` recovers from an interrupted run by itself (README "Running unattended") and ends
# by printing the results and report of the study it ran.
ARGS    ?=

demo: $(STAMP)
	$(BIN)/python -m emulant.cli run --cores $(CORES) --scheduler greedy $(ARGS)

design: $(STAMP)
	$(BIN)/snakemake design --cores $(CORES) --scheduler greedy $(ARGS)

test: $(STAMP)
	$(BIN)/python -m pytest

# The workflow through a real single-node SLURM (cluster/single-node-slurm.sh starts it; needs
# root and the Debian packages slurm-wlm and munge, else the test skips and says why).
test-cluster: $(STAMP)
	$(BIN)/python -m pytest -m cluster tests/test_cluster.py

bench: $(STAMP)
	$(BIN)/python -m bench.run

# snakemake --lint also asks for a conda environment per rule; the workflow runs in .venv, so
# that one lint is shown but does not fail the target. Every other lint does.
lint: $(STAMP)
	$(BIN)/ruff check emulant synthetic_cohort scripts tests bench
	$(BIN)/snakemake --lint --cores 1 > $(VENV)/lint.txt 2>&1 || true
	@cat $(VENV)/lint.txt
	@! grep -E '^ +[*] ' $(VENV)/lint.txt | grep -v 'conda environment or container'

clean:
	rm -rf results .snakemake
