# Loam: `make` prepares the demo corpus, `make test` runs the tests.
# Pick another dump with RAW=..., OUT=..., CONFIG=... (CONFIG may be empty for defaults).

PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

RAW    ?= demo_corpus
OUT    ?= build/demo
CONFIG ?= demo_corpus/corpus.toml
WORKERS ?=
BENCH_OUT ?= build/bench
FUZZ_FILES ?= 3000
SEARCH_SCALE ?= 50
SEARCH_TESTS ?= tests
SCALE_SOURCES ?= 100000
SCALE_FLAGS ?= --cluster

CONFIG_FLAG  := $(if $(CONFIG),--config "$(CONFIG)",)
WORKERS_FLAG := $(if $(WORKERS),--workers $(WORKERS),)

.PHONY: all bytecode prepare test fuzz property-search validate report bench bench-scale lint clean distclean help

all: prepare report
	@$(BIN)/loam validate "$(OUT)" > "$(OUT)/logs/validate.txt" || (cat "$(OUT)/logs/validate.txt"; exit 1)
	@tail -n 4 "$(OUT)/logs/validate.txt"
	@echo "manifests: $(OUT)/manifests/  report: $(OUT)/report/index.html  datasheet: $(OUT)/report/datasheet.md"

help:
	@echo "make            create .venv, install, prepare $(RAW) into $(OUT), write its report, validate it"
	@echo "make test       run the test suite"
	@echo "make validate   check the manifests in OUT before training"
	@echo "make report     write OUT/report/index.html, summary.json and datasheet.md"
	@echo "make fuzz       prepare $(FUZZ_FILES) damaged audio files (make test runs 300) and print the outcomes"
	@echo "make property-search  run the property tests with $(SEARCH_SCALE)x their examples, drawn at random"
	@echo "make bench      throughput, memory and rebuild benchmarks"
	@echo "make bench-scale  rerun, rebuild and memory at $(SCALE_SOURCES) generated sources (long: a cold run of them first)"
	@echo "make bytecode   byte-compile the package (make does it at install; loam then starts without compiling)"
	@echo "make lint       ruff"
	@echo "make clean      remove build outputs (keeps .venv)"
	@echo "variables: RAW=$(RAW) OUT=$(OUT) CONFIG=$(CONFIG) WORKERS=$(WORKERS)"

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	$(MAKE) --no-print-directory bytecode
	touch $(STAMP)

# An editable install writes no bytecode for Loam's own modules (a regular pip install
# does), and where PYTHONDONTWRITEBYTECODE is set nothing ever writes it: every loam
# command would compile its modules again (0.08 CPU seconds of each run's start-up).
# Python reads these files even under PYTHONDONTWRITEBYTECODE and compiles in memory a
# module edited since; `make bench` refreshes them. __pycache__ is git-ignored and
# `make clean` removes it.
bytecode:
	$(BIN)/python -m compileall -q pipeline

prepare: $(STAMP)
	$(BIN)/loam prepare "$(RAW)" "$(OUT)" $(CONFIG_FLAG) $(WORKERS_FLAG)

report: prepare
	$(BIN)/loam report "$(OUT)"

validate: $(STAMP)
	$(BIN)/loam validate "$(OUT)"

# Every test runs, none is skipped. The only system package a test needs is a browser:
# the report's test renders the page in headless Chromium (Debian's chromium package),
# installed here when missing, as root with apt-get; elsewhere a message says so and
# that test fails.
test: $(STAMP)
	@if ! command -v chromium >/dev/null 2>&1 && ! command -v chromium-browser >/dev/null 2>&1; then \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then \
	    echo "make test: installing Debian's chromium package for the report's browser test"; \
	    (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null) \
	      || echo "make test: could not install chromium; the report's browser tests will fail" >&2; \
	  else \
	    echo "make test: chromium is not installed and this is not a root shell with apt-get;" \
	      "install Debian's chromium package, or the report's browser tests will fail" >&2; \
	  fi; \
	fi
	$(BIN)/python -m pytest -q

fuzz: $(STAMP)
	LOAM_FUZZ_FILES=$(FUZZ_FILES) $(BIN)/python -m pytest -q -s -p no:cacheprovider tests/test_fuzz.py

# `make test` draws the same property-test examples on every run (tests/conftest.py);
# this runs only the property tests (marked by hypothesis's pytest plugin) with new draws,
# SEARCH_SCALE times as many (SEARCH_TESTS=tests/test_split.py to narrow).
property-search: $(STAMP)
	LOAM_HYPOTHESIS=search LOAM_HYPOTHESIS_SCALE=$(SEARCH_SCALE) $(BIN)/python -m pytest -q -p no:cacheprovider \
	  -m hypothesis $(SEARCH_TESTS)

bench: $(STAMP) bytecode
	$(BIN)/python bench/run.py --out "$(BENCH_OUT)"
	$(BIN)/python bench/bench_align.py

# Opt-in: generates SCALE_SOURCES short sources (6.1 GB at 100,000) and prepares them
# cold once (on a two-worker dask LocalCluster with SCALE_FLAGS=--cluster, locally with SCALE_FLAGS=).
bench-scale: $(STAMP)
	$(BIN)/python bench/bench_scale.py --out "$(BENCH_OUT)-scale" --sources $(SCALE_SOURCES) $(SCALE_FLAGS)

lint: $(STAMP)
	$(BIN)/ruff check pipeline tests bench demo_corpus

clean:
	rm -rf build .pytest_cache .ruff_cache .hypothesis
	find . -name __pycache__ -type d -not -path './$(VENV)/*' -prune -exec rm -rf {} +

distclean: clean
	rm -rf $(VENV) *.egg-info
