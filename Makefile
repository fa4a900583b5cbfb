# Set-up and everyday commands. `make run` and `make test` each create the
# virtual environment and install the project first, so a fresh clone needs
# nothing else.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
LAB    ?= lab

.PHONY: run test bench install clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

run: $(STAMP)
	$(BIN)/lenslane init $(LAB)
	cp -n inbox_samples/*.json $(LAB)/inbox/ 2>/dev/null || true
	$(BIN)/lenslane watch $(LAB)

test: $(STAMP)
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python tests/benchmarks/bench_drain.py
	$(BIN)/python tests/benchmarks/bench_latency.py

clean:
	rm -rf $(VENV) $(LAB) .pytest_cache
