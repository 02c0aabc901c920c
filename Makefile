# Every target does its own set-up: a fresh clone needs only python3 (>= 3.11) and make.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test bench lint clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python sample_lines/run_demo.py

test: $(STAMP)
	$(BIN)/python -m pytest -q -n 2 -p no:cacheprovider

bench: $(STAMP)
	$(BIN)/python -m bench

lint: $(STAMP)
	$(BIN)/ruff check qcfit tests

clean:
	rm -rf $(VENV) build *.egg-info demo-store
