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

RECIPE ?= quickstart

# The quickstart grid, then its report; ends with the tensorboard command to view the curves.
demo: $(STAMP)
	$(BIN)/h2h-corpus
	$(BIN)/h2h-train -m recipe=$(RECIPE)
	$(BIN)/h2h-report runs/$(RECIPE)
	@echo ""
	@echo "curves: $(BIN)/tensorboard --logdir runs/$(RECIPE)"

clean:
	rm -rf $(VENV) runs .pytest_cache
