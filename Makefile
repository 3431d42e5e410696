# Every target sets up .venv itself, so a fresh clone needs only `make demo` / `make test`.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test test-fast bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/plateaufit demo --out demo_output

test: $(STAMP)
	$(PY) -m pytest -q

# everything but the tests marked slow (process pools, subprocesses, the browser, all plots)
test-fast: $(STAMP)
	$(PY) -m pytest -q -m "not slow"

bench: $(STAMP)
	$(PY) benchmarks/run_benchmarks.py

clean:
	rm -rf $(VENV) demo_output batch_output .pytest_cache
