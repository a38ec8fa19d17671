# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_DIR ?= demo-out

.PHONY: install demo test lint bench clean

install: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: install
	$(BIN)/python fixtures/demo/run_demo.py --out $(DEMO_DIR)

test: install
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -q

lint: install
	$(BIN)/ruff check .

bench: install
	$(BIN)/python bench/run.py

clean:
	rm -rf $(VENV) $(DEMO_DIR) .pytest_cache
