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

bench: $(STAMP)
	$(PY) -m bench

# Regenerate the lock after changing dependencies in pyproject.toml.
lock: $(STAMP)
	$(PY) -m pip freeze --all --exclude-editable | grep -vi -E "^(envelope|pip)==" > requirements.lock

clean-venv:
	rm -rf $(VENV)
