# Two entry points (see README): `make demo` runs the main job, `make test` runs the whole suite.
# Both create/reuse a project-local virtual environment in .venv.
PY ?= python3
VENV := .venv
VPY := $(VENV)/bin/python
STAMP := $(VENV)/.installed

.PHONY: demo test lint venv clean browser

$(STAMP): pyproject.toml
	test -x $(VPY) || $(PY) -m venv $(VENV)
	$(VPY) -m pip install --quiet --upgrade pip
	# torch first, pinned: the CPU build on disk. A bare `torch` would pull a multi-GB CUDA build.
	$(VPY) -c "import torch" 2>/dev/null || $(VPY) -m pip install --quiet "torch==2.13.0"
	$(VPY) -m pip install --quiet -e ".[dev]"
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(VPY) examples/sensor_drift_demo.py

# Browser tests render pages in Debian's headless Chromium; install it when missing (root).
browser:
	@command -v chromium >/dev/null 2>&1 || { \
	  echo "installing Debian chromium for the browser tests"; \
	  (apt-get update -qq && apt-get install -y -qq chromium) >/dev/null; }

test: $(STAMP) browser
	$(VPY) -m pytest -q tests

lint: $(STAMP)
	$(VPY) -m ruff check shiftwatch tests examples benchmarks

clean:
	rm -rf $(VENV)
