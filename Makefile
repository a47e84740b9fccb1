# Two commands for users: `make demo` and `make test`. Both bring the environment up
# to date first; repeated runs do nothing when pyproject.toml and constraints.txt
# have not changed.
PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed
MEEP_STAMP := $(VENV)/.meep-checked
PYTEST_ARGS ?=

.PHONY: env meep test test-fast demo lint clean-env

env: $(STAMP)

$(STAMP): pyproject.toml constraints.txt
	@$(PYTHON) -c 'import sys; sys.exit(0 if sys.version_info >= (3, 11) else "velomatch needs Python >= 3.11 (found %s)" % sys.version.split()[0])'
	@test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --disable-pip-version-check --upgrade pip setuptools
	$(PY) -m pip install --quiet --disable-pip-version-check -c constraints.txt -e '.[dev]'
	@touch $(STAMP)

# Meep (the FDTD cross-check) is not on PyPI; it comes from Debian's python3-meep for
# the system interpreter and runs in its own process. Nothing else depends on it.
meep: $(MEEP_STAMP)

$(MEEP_STAMP): $(STAMP) scripts/ensure_meep.sh
	@bash scripts/ensure_meep.sh
	@touch $(MEEP_STAMP)

test: env meep
	$(PY) -m pytest $(PYTEST_ARGS)

test-fast: env
	$(PY) -m pytest -m "not slow" $(PYTEST_ARGS)

demo: env meep
	$(VENV)/bin/velomatch demo --overwrite

lint: env
	$(VENV)/bin/ruff check .

clean-env:
	rm -rf $(VENV)
