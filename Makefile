# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip --disable-pip-version-check -q

.PHONY: demo test test-fast install install-test bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)

$(VENV)/.installed: pyproject.toml | $(PY)
	$(PIP) install -e . 2>&1 | grep -v "is ignored: it is neither" || true
	$(PY) -c "import fleetsift, torch, av, deltalake, prefect" 
	touch $@

$(VENV)/.installed-test: $(VENV)/.installed
	$(PIP) install -e '.[test]' 2>&1 | grep -v "is ignored: it is neither" || true
	# sktime's wheel ships UEA BasicMotions for tests/test_opendata.py, which reads its data files only; without
	# --no-deps its pandas<3.1 pin would downgrade pandas.
	$(PIP) install --no-deps sktime==1.2.0 2>&1 | grep -v "is ignored: it is neither" || true
	$(PY) -c "import pytest, hypothesis, pyriemann, skimage"
	touch $@

install: $(VENV)/.installed
install-test: $(VENV)/.installed-test

demo: install
	$(VENV)/bin/fleetsift demo

test: install-test
	$(PY) -m pytest

test-fast: install-test
	$(PY) -m pytest -m "not slow"

bench: install-test
	$(PY) bench/scoring.py --quick
	$(PY) bench/embed.py

clean:
	rm -rf demo_out .pytest_cache
