# nightbank — every target creates .venv on first use and is safe to run again.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
EXTRAS ?= test,postgres,dask

.PHONY: install demo test lint bench serve lock clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml constraints.txt | $(BIN)/python
	$(BIN)/python -m pip install --quiet -c constraints.txt -e ".[$(EXTRAS)]"
	@touch $@

install: $(STAMP)

demo: install
	mkdir -p var
	$(BIN)/nightbank demo

# the suite runs in TEST_WORKERS processes (pytest-xdist; one per core by default); --dist loadfile keeps each
# test file in one process, so module fixtures (trained models, servers) are built once
TEST_WORKERS ?= auto
test: install
	$(BIN)/python -m pytest -q -n $(TEST_WORKERS) --dist loadfile

# static checks: ruff (pyflakes, pycodestyle, isort, bugbear, pyupgrade) and mypy; settings in pyproject.toml
lint: install
	$(BIN)/ruff check .
	$(BIN)/mypy

bench: install
	@for b in bench/[!_]*.py; do echo "== $$b"; $(BIN)/python $$b || exit 1; done

serve: install
	mkdir -p var
	$(BIN)/nightbank serve

lock: install
	( echo "# Versions installed and tested together (pip install -c constraints.txt). Regenerate with: make lock"; $(BIN)/python -m pip freeze --exclude-editable | grep -v "^nightbank" ) > constraints.txt

clean:
	rm -rf $(VENV) var .pytest_cache .mypy_cache .ruff_cache
