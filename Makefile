# Two entry points: `make demo` and `make test`. Each creates .venv when missing.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

# torch is installed first and pinned so pip takes the CPU build.
$(STAMP): $(BIN)/python pyproject.toml
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet torch==2.13.0
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

test: $(STAMP)
	$(BIN)/python -m pytest -q

demo: $(STAMP)
	$(BIN)/ablate-train -m recipe=quickstart

clean:
	rm -rf $(VENV) runs .pytest_cache
