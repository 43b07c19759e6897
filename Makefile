# Set-up is two commands: `make demo` and `make test`. Both create .venv when
# it is missing and install the project into it.

# python3.12 may sit behind a version manager that hides it from PATH lookups;
# try the plain name first, then the usual install locations.
PYTHON312 ?= $(shell for p in python3.12 /usr/bin/python3.12 /usr/local/bin/python3.12 $$HOME/.pyenv/versions/3.12*/bin/python3.12; do \
	if $$p -c 'import sys; assert sys.version_info[:2] == (3, 12)' >/dev/null 2>&1; then command -v $$p || echo $$p; break; fi; done)
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test install clean

$(PY):
	@test -n "$(PYTHON312)" || { echo "make: python3.12 not found (looked on PATH and under ~/.pyenv/versions)"; exit 2; }
	$(PYTHON312) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[test]'
	touch $(STAMP)

install: $(STAMP)

# DEMO_FLAGS passes sampling options through (the README test uses small draws).
demo: $(STAMP)
	$(VENV)/bin/workbench demo --out reports/demo --force $(DEMO_FLAGS)

test: $(STAMP)
	$(PY) -m pytest -q

clean:
	rm -rf $(VENV) build *.egg-info
