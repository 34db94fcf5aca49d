PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test quick bench screenshots clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/python -m pip install --quiet -e ".[test,viewer]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/vesselflow demo -o results --overwrite --config configs/tumour-window-demo.yaml --report

test: $(STAMP)
	$(BIN)/python -m pytest -q

quick: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow and not integration"

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py

screenshots: $(STAMP)
	$(BIN)/python docs/make_screenshots.py

clean:
	rm -rf $(VENV) results .pytest_cache
