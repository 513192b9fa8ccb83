PYTHON ?= python3.11
VENV := .venv
BASE := $(VENV)/.installed-base
TEST := $(VENV)/.installed-test

.PHONY: demo test

# The environment is created on first use and refreshed when pyproject.toml changes. The demo
# installs the tool alone; the test tools (pytest, statsmodels, ...) come with `make test`.
$(BASE): pyproject.toml
	test -x $(VENV)/bin/python || $(PYTHON) -m venv $(VENV)
	$(VENV)/bin/pip install -e .
	touch $(BASE)

$(TEST): $(BASE)
	$(VENV)/bin/pip install -e '.[test,postgres,spark]'
	touch $(TEST)

demo: $(BASE)
	$(VENV)/bin/python -m bigpanel.demo

test: $(TEST)
	$(VENV)/bin/python -m pytest
