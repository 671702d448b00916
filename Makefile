# Set-up and everyday commands. Each target creates .venv and installs what it needs.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test test-fast lint bench schema clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)  ## run the example workflow end to end
	cd example_workflow && ../$(BIN)/snakemake --cores 2
	cd example_workflow && ../$(BIN)/snakemake --cores 1 --report report.html
	@echo "Report: example_workflow/report.html"

test: $(STAMP)  ## lint, then the whole test suite (slow tests included)
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -n 3 --dist loadfile --no-loadscope-reorder

test-fast: $(STAMP)  ## the suite without slow tests
	$(BIN)/python -m pytest -n 3 --dist loadfile --no-loadscope-reorder -m "not slow"

lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)  ## storage and speed benchmarks (minutes; writes tests/benchmarks/RESULTS.md)
	$(BIN)/python tests/benchmarks/bench_engine.py

schema: $(STAMP)  ## refresh the committed JSON Schema
	$(BIN)/chainyard schema -o rules/run_config.schema.json

clean:
	rm -rf $(VENV) example_workflow/results example_workflow/logs example_workflow/.snakemake
