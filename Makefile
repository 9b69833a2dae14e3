# Two commands: `make demo` (set up + run the demo scenario end to end) and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean browser

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/cuewatch demo

# Browser tests drive Debian's chromium; install it when we can (root + apt), else they skip.
browser:
	@command -v chromium >/dev/null 2>&1 || { [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1 \
	  && (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium chromium-driver >/dev/null) \
	  || echo "chromium not installed: browser tests will be skipped"; }

test: $(STAMP) browser
	$(BIN)/ruff check monitor dashboards synthetic_logs tests benchmarks
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check monitor dashboards synthetic_logs tests benchmarks
	$(BIN)/ruff format --check monitor dashboards synthetic_logs tests benchmarks

bench: $(STAMP)
	$(BIN)/python -m benchmarks.run_all

clean:
	rm -rf $(VENV) demo_run .pytest_cache
