# Set-up and everyday commands. `make run` and `make test` each create the
# virtual environment and install the project first, so a fresh clone needs
# nothing else.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
LAB    ?= lab

.PHONY: run test bench install bytecode clean chromium

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

# Compiled once here, so a start-up never compiles the engine's modules again,
# even where PYTHONDONTWRITEBYTECODE keeps Python from writing them itself.
bytecode:
	$(BIN)/python -m compileall -q engine plugins config

install: $(STAMP) bytecode

run: $(STAMP) bytecode
	$(BIN)/lenslane init $(LAB)
	cp -n inbox_samples/*.json $(LAB)/inbox/ 2>/dev/null || true
	$(BIN)/lenslane watch $(LAB)

test: $(STAMP) bytecode chromium
	$(BIN)/python -m pytest -q

# The web page's tests drive Debian's chromium (never a browser downloaded by a test tool).
# Installed here when missing and make runs as root; otherwise make stops with the command to run.
chromium:
	@command -v chromium >/dev/null 2>&1 || [ -x /usr/bin/chromium ] || { \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q chromium; \
	  else \
	    echo "The browser tests need Debian's chromium: run  sudo apt-get install -y chromium" >&2; exit 1; \
	  fi; }

bench: $(STAMP) bytecode
	$(BIN)/python tests/benchmarks/bench_drain.py
	$(BIN)/python tests/benchmarks/bench_latency.py
	$(BIN)/python tests/benchmarks/bench_audit.py
	$(BIN)/python tests/benchmarks/bench_exact.py

clean:
	rm -rf $(VENV) $(LAB) .pytest_cache test-output
