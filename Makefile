# Two commands for a newcomer: `make demo` and `make test`.
# Each creates .venv when missing, installs the project into it, then runs.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
SITE ?= demo_site

.PHONY: demo test test-fast venv tools clean

venv: $(STAMP)

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

# The demo writes a fresh copy of the invented site, checks it and closes its months.
demo: $(STAMP)
	$(BIN)/python -m inventory._demo.run_demo $(SITE)

# Outside tools that some reference checks use (gdalinfo, ogrinfo, LibreOffice, Chromium).
# Installed when we are root and they are missing; tests skip with a reason otherwise.
tools:
	-bash .ci/ensure-tools

test: $(STAMP) tools
	$(BIN)/python -m pytest -q

test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow"

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache
