PYTHON ?= python3.11
VENV := .venv
INSTALLED := $(VENV)/.installed

.PHONY: demo test

# The development environment: created on first use, refreshed when pyproject.toml changes.
$(INSTALLED): pyproject.toml
	test -x $(VENV)/bin/python || $(PYTHON) -m venv $(VENV)
	$(VENV)/bin/pip install -e '.[test]'
	touch $(INSTALLED)

demo: $(INSTALLED)
	$(VENV)/bin/python -m bigpanel.demo

test: $(INSTALLED)
	$(VENV)/bin/python -m pytest
