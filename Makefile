# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean venv

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(BIN)/benchctl demo --out runs/demo --replace

test: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)
	$(BIN)/python -m benchmarks

clean:
	rm -rf $(VENV) runs build dist *.egg-info
