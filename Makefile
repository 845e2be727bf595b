# Set-up and everyday commands. Every target installs the package (editable,
# with the test and dist extras) into $(VENV) first; the install is redone only
# when pyproject.toml changes (the stamp file records the last install). Then
# the native online kernels are compiled (fitrank/native; without a C++
# compiler fitrank says so and runs on XLA's code).

PYTHON ?= $(shell command -v python3.11 2>/dev/null || command -v python3)
VENV ?= .venv
STAMP := $(VENV)/.fitrank-installed
NATIVE_STAMP := $(VENV)/.fitrank-native
# The demo: a real fit on the invented demo data (outputs in runs/demo/).
DEMO_CMD = $(VENV)/bin/fitrank fit configs/demo.toml
# every script in experiments/ except the shared helpers (_name.py)
BENCHMARKS := $(sort $(filter-out experiments/_%,$(wildcard experiments/*.py)))

.PHONY: install demo test bench clean distclean

install: $(STAMP) $(NATIVE_STAMP)

$(VENV)/bin/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): pyproject.toml | $(VENV)/bin/python
	$(VENV)/bin/python -m pip install --disable-pip-version-check -e '.[test,dist]'
	touch $@

$(NATIVE_STAMP): fitrank/native/kernels.cc $(STAMP)
	$(VENV)/bin/python -m fitrank.native
	touch $@

demo: install
	$(DEMO_CMD)

test: install
	$(VENV)/bin/python -m pytest -q

bench: install
	@if [ -z "$(BENCHMARKS)" ]; then echo "no benchmark scripts in experiments/"; fi
	@set -e; for script in $(BENCHMARKS); do \
		echo "== $$script --quick"; \
		$(VENV)/bin/python $$script --quick; \
	done

clean:
	rm -rf build dist .pytest_cache .hypothesis *.egg-info fitrank/*.egg-info fitrank/native/_kernels-*.so $(NATIVE_STAMP)
	find . -path ./$(VENV) -prune -o -name __pycache__ -type d -exec rm -rf {} +

distclean: clean
	rm -rf $(VENV)
