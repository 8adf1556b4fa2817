# Pellucid's two everyday commands:
#   make serve   set up .venv and start the dashboard on the demo model at http://127.0.0.1:8000
#   make test    set up .venv (and Debian's chromium for the browser tests) and run every test
#   make lint    ruff over server/, tests/ and bench/ (ruff comes with the test extra)
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: setup serve test test-fast browser bench bench-startup lint clean

$(STAMP): pyproject.toml constraints.txt
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -c constraints.txt -e '.[imagenet,onnx,timm,test]'
	touch $(STAMP)

setup: $(STAMP)

serve: setup
	$(VENV)/bin/pellucid serve

# Debian's chromium drives the browser tests; nothing is downloaded by Playwright itself.
browser:
	@test -x /usr/bin/chromium || { \
	  echo "installing Debian's chromium for the browser tests"; \
	  SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	  $$SUDO apt-get update -qq && $$SUDO apt-get install -y -qq chromium >/dev/null; }

test: setup browser
	$(PY) -m pytest

test-fast: setup
	$(PY) -m pytest -m "not browser and not slow"

bench: setup
	$(PY) -m bench.occlusion_bench

bench-startup: setup
	$(PY) -m bench.startup_bench

lint: setup
	$(VENV)/bin/ruff check server tests bench

clean:
	rm -rf $(VENV) .pytest_cache test-artifacts
