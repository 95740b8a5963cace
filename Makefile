# Two commands do all the set-up on a fresh machine (python3 with venv, and make):
#   make demo   -- create .venv, install volsweep, run the demo
#   make test   -- create .venv, install volsweep with its test extra, run the test suite
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

# Compiled kernels are cached on disk, keyed per kernel module on a hash of its sources and imports
# (kernel/_cache.py),
# in one folder shared by every checkout on this machine: a fresh clone with the same kernel
# loads them instead of compiling again.  Override NUMBA_CACHE_DIR to move it.
export NUMBA_CACHE_DIR ?= $(HOME)/.cache/volsweep/numba

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	@$(PYTHON) -m venv $(VENV) || { echo "'$(PYTHON) -m venv' failed (on Debian: apt-get install python3-venv)"; exit 1; }
	$(BIN)/python -m pip install --quiet --disable-pip-version-check -e '.[test]'
	@touch $(STAMP)

demo: $(STAMP)
	$(BIN)/volsweep demo

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python -m benchmarks.report

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .benchmarks
