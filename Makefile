PYTHON ?= python3
VENV   := .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: test demo bench clean

$(STAMP): pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -e '.[test]'
	# Compile the numba kernels once now (about a minute of CPU) rather than in the first daemon or test.
	$(PY) -c 'from streamtag import crf_kernels as c, feature_kernels as f, scan_kernels as s, record_kernels as r; c.load(); f.load(); s.scanner(); r.load()'
	touch $(STAMP)

test: $(STAMP)
	$(PY) -m pytest -q

demo: $(STAMP)
	$(PY) -m streamtag.demo.run

bench: $(STAMP)
	$(PY) -m streamtag bench

clean:
	rm -rf $(VENV) demo-run .pytest_cache
