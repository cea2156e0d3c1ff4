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
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .
	$(BIN)/python -m pytest -q

# The loss question (recipe head_norm) and the mechanism question (recipe induction_factorial),
# each a 2x2 factorial of the attention map and the per-head norm, then one report for both;
# ends with the tensorboard command to view the curves.
demo: $(STAMP)
	$(BIN)/h2h-corpus
	$(BIN)/h2h-train -m recipe=head_norm
	$(BIN)/h2h-train -m recipe=induction_factorial
	$(BIN)/h2h-report runs/head_norm runs/induction_factorial
	@echo ""
	@echo "curves: $(BIN)/tensorboard --logdir runs"

clean:
	rm -rf $(VENV) runs .pytest_cache
