# Two entry points for a fresh machine: `make demo` and `make test`.
# Both create their own virtual environment in .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
DEMO_DIR ?= demo-out

.PHONY: demo test bench clean

$(BIN)/scanshelf: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $@

demo: $(BIN)/scanshelf  ## the whole job on the built-in demo: generate, survey, migrate, verify, publish, subset
	PATH="$(abspath $(BIN)):$$PATH" bash examples/run_demo.sh $(DEMO_DIR)

test: $(BIN)/scanshelf  ## the test suite (starts its own nginx and S3 servers on 127.0.0.1)
	$(BIN)/python -m pytest -n 2 --durations=15

bench: $(BIN)/scanshelf  ## speed and size figures (see benchmarks/)
	$(BIN)/python benchmarks/migrate.py

clean:
	rm -rf $(VENV) $(DEMO_DIR) .pytest_cache
