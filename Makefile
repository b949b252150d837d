# Set-up and checks. `make test` and `make demo` are the two commands a fresh machine needs.
SHELL := /bin/bash
VENV  := .venv
VPY   := $(VENV)/bin/python
STAMP := $(VENV)/.installed

# An interpreter >= 3.12, in this order: $PYTHON, python3.13, python3.12, python3, pyenv's versions.
FIND_PYTHON := for c in "$$PYTHON" python3.13 python3.12 python3 \
    $$(ls -d $$(pyenv root 2>/dev/null || echo $$HOME/.pyenv)/versions/3.1[2-9]*/bin/python3 2>/dev/null | sort -rV); do \
  [ -n "$$c" ] || continue; p=$$(command -v "$$c" 2>/dev/null) || continue; \
  "$$p" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 12) else 1)' 2>/dev/null && { echo "$$p"; exit 0; }; \
done; exit 1

.PHONY: venv install test test-fast demo bench clean

$(VENV)/bin/python:
	@py=$$($(FIND_PYTHON)) || { echo "tallchain needs Python >= 3.12: install it (e.g. 'pyenv install 3.12') or set PYTHON=/path/to/python3.12" >&2; exit 2; }; \
	echo "using $$py"; "$$py" -m venv $(VENV)

$(STAMP): $(VENV)/bin/python pyproject.toml
	$(VPY) -m pip install --quiet --upgrade pip
	$(VPY) -m pip install --quiet -e '.[test,distributed]'
	@touch $(STAMP)

venv install: $(STAMP)

# Tests run in one worker process per core, at most four (pytest-xdist); `worksteal` balances
# the few long statistical tests. Every test owns its files (tmp_path), so workers never share.
PYTEST_WORKERS := -n auto --maxprocesses 4 --dist worksteal

test: $(STAMP)
	$(VPY) -m pytest $(PYTEST_WORKERS)

test-fast: $(STAMP)
	$(VPY) -m pytest $(PYTEST_WORKERS) -m "not slow"

demo: $(STAMP)
	$(VENV)/bin/tallchain demo

bench: $(STAMP)
	$(VPY) benchmarks/run_all.py

clean:
	rm -rf $(VENV) build src/*.egg-info .pytest_cache
