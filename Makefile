# Two commands: `make demo` (set up + run the demo scenario end to end) and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

# Programs from Debian that some tests need: chromium (browser tests), the openssl CLI
# (the TLS e-mail tests' certificate) and PostgreSQL's server programs (the ingest-from-
# PostgreSQL tests start a throwaway server: tests/helpers/postgres_server.py).  CI sets CI=true: there a missing one stops
# `make test` with an error; elsewhere it is a warning and those tests skip.
CHROMIUM ?= /usr/bin/chromium
OPENSSL  ?= openssl
PG_INITDB ?= /usr/lib/postgresql/*/bin/initdb
# The Spark tests ([lake]: tests/test_lake_spark.py) run Spark in local mode on a Java runtime.
JAVA     ?= java
APT_GET  ?= apt-get
STRICT   := $(filter true True TRUE 1,$(CI))
# The suite runs on this many pytest-xdist workers; a test file stays on one worker, so a
# module's fixtures (and the Spark session of tests/test_lake_spark.py) are built once.
TEST_WORKERS ?= 2

.PHONY: demo test lint bench clean browser openssl postgres java

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test,postgres,spark]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/cuewatch demo

# $(call system_need,WHAT,CHECK,DEBIAN PACKAGES): if CHECK fails, install the packages with
# apt when we are root, then CHECK again; still failing is an error under CI, else a warning.
define system_need
@$(2) || { [ "$$(id -u)" = 0 ] && command -v $(APT_GET) >/dev/null 2>&1 \
	  && $(APT_GET) update -qq && DEBIAN_FRONTEND=noninteractive $(APT_GET) install -y -qq $(3) >/dev/null; } \
	  || true; \
	$(2) || if [ -n "$(STRICT)" ]; then \
	  echo "error: $(1) is not installed and apt could not install it ($(3)); CI=true: its tests may not be skipped." >&2; exit 1; \
	else echo "warning: $(1) is not installed: its tests will be skipped."; fi
endef

browser:
	$(call system_need,chromium ($(CHROMIUM)),[ -x "$(CHROMIUM)" ],chromium chromium-driver)

openssl:
	$(call system_need,the openssl CLI,command -v $(OPENSSL) >/dev/null 2>&1,openssl)

postgres:
	$(call system_need,PostgreSQL ($(PG_INITDB)),ls $(PG_INITDB) >/dev/null 2>&1,postgresql)

java:
	$(call system_need,a Java runtime ($(JAVA)),command -v $(JAVA) >/dev/null 2>&1,openjdk-17-jre-headless)

test: $(STAMP) browser openssl postgres java
	$(BIN)/ruff check monitor dashboards synthetic_logs tests benchmarks
	$(BIN)/python -m pytest -q -n $(TEST_WORKERS) --dist loadfile

lint: $(STAMP)
	$(BIN)/ruff check monitor dashboards synthetic_logs tests benchmarks
	$(BIN)/ruff format --check monitor dashboards synthetic_logs tests benchmarks

bench: $(STAMP)
	$(BIN)/python -m benchmarks.run_all

clean:
	rm -rf $(VENV) demo_run .pytest_cache

# Mutation testing of monitor/stats and monitor/assess with mutmut ([tool.mutmut] in
# pyproject.toml).  Slow (hours on 2 cores), so neither `make test` nor CI runs it.
# Results stay in mutants/: a second run tests only the mutants of functions that
# changed.  MUTATE_JOBS mutants run at a time, at low priority; the summary (share
# killed per package, the survivors) is printed at the end.
.PHONY: mutate
MUTATE_JOBS ?= 1
mutate: $(STAMP)
	$(BIN)/pip install --quiet -e '.[test,mutate]'
	nice -n 19 $(BIN)/mutmut run --max-children $(MUTATE_JOBS)
	$(BIN)/python -m benchmarks.mutation_score
