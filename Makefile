# Two entry points for a fresh clone: `make demo` and `make test`.
VENV ?= .venv
PY := $(VENV)/bin/python
export PYOPENGL_PLATFORM ?= egl

$(VENV)/.installed: pyproject.toml
	python3.11 -m venv $(VENV) || python3 -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	$(PY) -m pip install -q -e '.[test]'
	touch $@

install: $(VENV)/.installed

node_modules/.installed: package.json
	npm install --no-audit --no-fund --silent
	touch $@

demo: install
	$(VENV)/bin/featuretex scene=demo out=runs/demo

test: install node_modules/.installed
	$(PY) -m pytest -q

# the report's three.js bundle, rebuilt from the versions package.json pins (the result is committed)
vendor: node_modules/.installed
	node featuretex/report/vendor/build.mjs

bench: install
	for b in benchmarks/*.py; do echo "== $$b"; $(PY) $$b || exit 1; done

.PHONY: install demo test bench vendor
