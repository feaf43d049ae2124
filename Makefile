# Developer entry points. `make test` works on a clean clone: it creates .venv first.
PYTHON_BOOT := $(shell command -v python3.11 2>/dev/null || command -v python3)
VENV := .venv
STAMP := $(VENV)/.installed

.PHONY: venv demo test bench

venv: $(STAMP)

# Re-install only when pyproject.toml is newer than the stamp.
$(STAMP): pyproject.toml
	test -x $(VENV)/bin/python || $(PYTHON_BOOT) -m venv $(VENV)
	$(VENV)/bin/python -m pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: venv
	$(VENV)/bin/certify demo

test: venv
	$(VENV)/bin/python -m pytest -q -p no:cacheprovider tests

bench: venv
	@if [ -f benchmarks/run.py ]; then $(VENV)/bin/python benchmarks/run.py; \
	else echo "benchmarks/run.py does not exist yet"; fi
