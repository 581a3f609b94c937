# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3.11
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.entivec-installed

.PHONY: demo test lint bench clean stack-up stack-down

$(STAMP): pyproject.toml
	@command -v $(PYTHON) >/dev/null || { echo "needs $(PYTHON) on PATH (or: make PYTHON=/path/to/python3.11)"; exit 2; }
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	# torch first and pinned: the CPU build; an unpinned resolve would fetch a CUDA build.
	$(BIN)/python -m pip install --quiet torch==2.13.0
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@

demo: $(STAMP)
	$(BIN)/entivec demo

test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check .

bench: $(STAMP)
	$(BIN)/python benchmarks/bench_trainer.py

# The team stack on this machine (PostgreSQL, MLflow server, Prefect server, worker): see infra/README.md.
stack-up: $(STAMP)
	infra/stack up

stack-down:
	infra/stack down

clean:
	rm -rf $(VENV) .entivec demo-out
