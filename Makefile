# Two commands do all the set-up: `make demo` and `make test`.
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
LIMEN  := $(VENV)/bin/limen
DEMO   ?= demo-output
# Modules and subpackages of scorer/ that pass `mypy --strict` (configuration: [tool.mypy] in pyproject.toml).
# Add a path here once mypy --strict reports no error in it; never remove one (DEVELOPERS.md, "Types").
MYPY_STRICT := scorer/__init__.py scorer/cli.py scorer/databases.py scorer/demo.py scorer/errors.py \
               scorer/extras.py scorer/faults.py scorer/files.py scorer/invocation.py scorer/resources.py \
               scorer/images scorer/workflow scorer/commands scorer/detector scorer/phantom \
               scorer/qc/engine.py scorer/qc/faults.py scorer/qc/inbox.py scorer/qc/mail.py scorer/qc/migrations \
               scorer/qc/schema.py scorer/qc/sensitivity.py scorer/qc/simulated.py scorer/qc/stability.py \
               scorer/qc/tables.py


.PHONY: demo test venv clean bench

$(VENV)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[all,test]'
	touch $@

venv: $(VENV)/.installed

demo: venv
	$(PY) -m scorer.demo --out $(DEMO)

test: venv
	$(VENV)/bin/ruff check .
	$(VENV)/bin/ruff format --check .
	$(PY) -m mypy --strict --follow-imports=silent $(MYPY_STRICT)
	$(PY) -m mypy --check-untyped-defs --follow-imports=silent webapp

	$(PY) -m pytest -q -n 2 tests --cov --cov-report=term --cov-fail-under=85

bench: venv
	$(PY) -m bench.run_all

clean:
	rm -rf $(VENV) $(DEMO) build *.egg-info
