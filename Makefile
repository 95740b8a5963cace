# Two commands do all the set-up on a fresh machine (python3 with venv, and make):
#   make demo   -- create .venv, install volsweep, run the demo
#   make test   -- create .venv, install volsweep with its test extra, run the test suite
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

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
	$(BIN)/volsweep bench

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .benchmarks
