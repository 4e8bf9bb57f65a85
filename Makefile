# Two commands on a fresh machine:  make demo  and  make test
PY ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: setup system demo test lint bench clean

$(BIN)/cdcnorm: pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev,fast]' || { \
	  echo "sqlglot's compiled modules (the fast extra) cannot be installed here: installing without them"; \
	  $(BIN)/pip install --quiet -e '.[dev]'; }
	touch $@

# The tests also run the plans on Spark (tests/test_engine_spark.py): pyspark, the optional extra.
$(VENV)/.spark: $(BIN)/cdcnorm
	$(BIN)/pip install --quiet -e '.[dev,fast,spark]' || $(BIN)/pip install --quiet -e '.[dev,spark]'
	touch $@

# Graphviz's dot program draws the lineage diagrams (SVG/PNG); DOT, GraphML and JSON need nothing.
system:
	@command -v dot >/dev/null 2>&1 || { \
	  echo "installing graphviz (the dot program)"; \
	  SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	  $$SUDO apt-get update -qq && $$SUDO apt-get install -y -qq graphviz >/dev/null; }

setup: $(BIN)/cdcnorm system

demo: setup
	$(BIN)/cdcnorm demo

lint: setup $(VENV)/.spark
	$(BIN)/ruff check cdcnorm tests
	$(BIN)/ruff format --check cdcnorm tests
	$(BIN)/mypy cdcnorm

test: lint
	$(BIN)/pytest

bench: setup
	$(BIN)/python tests/bench/bench_convert.py --rows 1000000 5000000 --limited 20000000 --small-files 3000
	$(BIN)/python tests/bench/bench_forms.py --rows 1000000 --pairs 3
	$(BIN)/python tests/bench/bench_feed.py --nights 30 --rows 200000
	$(BIN)/python tests/bench/bench_state.py --runs 5 --rows-per-run 1500000
	$(BIN)/python tests/bench/bench_lineage.py
	$(BIN)/python tests/bench/bench_lineage.py --size 2000

clean:
	rm -rf build $(VENV) *.egg-info
