# Two commands for a fresh machine with Python 3.11+:  `make demo`  and  `make test`.
# Both create .venv, install the pinned dependencies (requirements.lock) and the package.

PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: demo test bench lock clean-venv

$(STAMP): pyproject.toml requirements.lock
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --disable-pip-version-check -r requirements.lock
	$(PY) -m pip install --quiet --disable-pip-version-check --no-deps --no-build-isolation -e .
	touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/envelope demo

test: $(STAMP)
	$(PY) -m pytest -q

# Every benchmark in turn (about 30 minutes on 2 cores); see bench/README.md.
bench: $(STAMP)
	$(PY) bench/bench_spread.py
	$(PY) bench/bench_fit.py
	$(PY) bench/bench_project.py
	$(PY) bench/bench_target.py

# Regenerate the lock after changing dependencies in pyproject.toml.
lock: $(STAMP)
	$(PY) -m pip freeze --all --exclude-editable | grep -vi -E "^(envelope|pip)==" > requirements.lock

clean-venv:
	rm -rf $(VENV)
