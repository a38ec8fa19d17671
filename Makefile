# Two commands set everything up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
DEMO_DIR ?= demo-out

.PHONY: install lock demo test lint bench clean

install: $(STAMP)

# constraints.txt pins every dependency (direct and indirect) to the versions last tested.
$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[test]'
	touch $(STAMP)

# Re-resolve the newest versions pyproject.toml allows, in a fresh venv, and pin them.
lock:
	set -e; scratch=$$(mktemp -d); trap 'rm -rf "$$scratch"' EXIT; \
	$(PYTHON) -m venv "$$scratch/venv"; \
	"$$scratch/venv/bin/python" -m pip install --quiet --upgrade pip; \
	"$$scratch/venv/bin/python" -m pip install --quiet -e '.[test]'; \
	"$$scratch/venv/bin/python" -m pip freeze --exclude causeline > constraints.txt.new; \
	mv constraints.txt.new constraints.txt

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
