# Two set-up commands: `make demo` and `make test`. Both create .venv when missing.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_OUT ?= demo-output

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/wearcast demo --out $(DEMO_OUT)

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/pip install --quiet -e '.[bench]'
	$(BIN)/python bench/run.py

clean:
	rm -rf $(VENV) $(DEMO_OUT) .pytest_cache
