# fieldplan: `make demo`, `make test`, `make bench`. Each creates .venv if it is missing.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e ".[test,cluster,lab]"
	touch $(STAMP)

demo: $(STAMP)
	MPLBACKEND=Agg $(VENV)/bin/fieldplan run scenarios/demo.yaml --out demo-output --force

test: $(STAMP)
	MPLBACKEND=Agg $(PY) -m pytest -q fieldplan actuators tests

bench: $(STAMP)
	MPLBACKEND=Agg $(PY) -m pytest -q -s tests/benchmarks -p no:cacheprovider -o addopts=""

clean:
	rm -rf $(VENV) demo-output .pytest_cache
