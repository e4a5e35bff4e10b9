# One place for the commands that README.md and .ci/run use, so they cannot drift apart.
VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip

.PHONY: setup demo test bench clean

setup: $(VENV)/.installed

# torch first and pinned: it is the CPU build found locally; an unpinned torch pulls a CUDA build.
$(VENV)/.installed: pyproject.toml
	python3 -m venv $(VENV)
	$(PIP) install -q --upgrade pip
	$(PIP) install -q torch==2.13.0
	$(PIP) install -q -e '.[dev,peft]'  # peft: the adapter tests run in CI too
	touch $@

demo: setup
	$(VENV)/bin/bonft demo

# The lint runs first: it takes a second, the suite minutes.
test: setup
	$(VENV)/bin/ruff check .
	$(PY) -m pytest -q

bench: setup
	for f in benchmarks/bench_*.py; do echo "== $$f"; $(PY) $$f || exit 1; done

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis
