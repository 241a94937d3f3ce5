# halfrail: `make demo` renders a scenario, `make test` runs the test suite,
# `make bench` prints the performance figures. Each creates .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/halfrail render scenarios/tri-square.yaml --out renders

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python bench/run.py

clean:
	rm -rf $(VENV) renders/*.wav renders/*.png renders/*.json
