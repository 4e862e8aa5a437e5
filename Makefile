# Two commands set everything up on a fresh machine with Python 3.11:
#   make demo   - run the main job on the built-in simulated bench
#   make test   - run the test suite
# Both create (or reuse) the virtual environment in .venv first; running them twice is safe.

PYTHON ?= python3.11
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: venv demo test bench clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	@touch $(STAMP)

demo: $(STAMP)
	$(BIN)/tracer demo

test: $(STAMP)
	QT_QPA_PLATFORM=offscreen $(BIN)/python -m pytest

bench: $(STAMP)
	QT_QPA_PLATFORM=offscreen $(BIN)/tracer bench --quick

clean:
	rm -rf $(VENV) build *.egg-info
