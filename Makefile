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

BENCHES := bench_io bench_boosted bench_forest bench_refits bench_choice bench_edges

# Long (tens of minutes on 2 cores): each script runs wearcast beside its peers and
# rewrites its own section of bench/README.md. Run one with e.g. `make bench BENCHES=bench_io`.
bench: $(STAMP)
	$(BIN)/pip install --quiet -e '.[bench]'
	for b in $(BENCHES); do $(BIN)/python bench/$$b.py || exit 1; done

clean:
	rm -rf $(VENV) $(DEMO_OUT) .pytest_cache
