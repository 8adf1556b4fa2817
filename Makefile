# Pellucid's two everyday commands:
#   make serve   set up .venv and start the dashboard on the demo model at http://127.0.0.1:8000
#   make test    set up .venv (and Debian's chromium for the browser tests) and run every test
#   make lint    ruff over server/, tests/ and bench/ (ruff comes with the test extra)
PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
STAMP  := $(VENV)/.installed

.PHONY: setup serve test test-fast browser pdf-deps bench bench-startup lint clean

$(STAMP): pyproject.toml constraints.txt
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip
	$(PY) -m pip install --quiet -c constraints.txt -e '.[imagenet,onnx,timm,test]'
	touch $(STAMP)

setup: $(STAMP)

serve: setup pdf-deps
	$(VENV)/bin/pellucid serve

# Debian's chromium drives the browser tests; nothing is downloaded by Playwright itself.
browser:
	@test -x /usr/bin/chromium || { \
	  echo "installing Debian's chromium for the browser tests"; \
	  SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	  $$SUDO apt-get update -qq && $$SUDO apt-get install -y -qq chromium >/dev/null; }

# The report's PDF is printed by WeasyPrint, which draws text with Debian's Pango, HarfBuzz and
# fonts; the PDF tests turn pages into pictures with poppler-utils' pdftoppm. Installed when missing.
PDF_DEBS := libpango-1.0-0 libpangoft2-1.0-0 libharfbuzz0b libharfbuzz-subset0 libfontconfig1 fonts-dejavu-core poppler-utils
pdf-deps:
	@if ! command -v dpkg-query >/dev/null; then \
	  echo "not a Debian system: install Pango, HarfBuzz, a font and poppler with its package manager for PDF reports"; \
	else \
	  missing=$$(for p in $(PDF_DEBS); do dpkg-query -W -f='$${Status}\n' $$p 2>/dev/null | grep -q 'ok installed' || echo $$p; done); \
	  if [ -n "$$missing" ]; then \
	    echo "installing Debian's" $$missing "for the report's PDF"; \
	    SUDO=$$( [ "$$(id -u)" = 0 ] || echo sudo ); \
	    $$SUDO apt-get update -qq && $$SUDO apt-get install -y -qq $$missing >/dev/null; \
	  fi; \
	fi

test: setup browser pdf-deps
	$(PY) -m pytest

test-fast: setup pdf-deps
	$(PY) -m pytest -m "not browser and not slow"

bench: setup
	$(PY) -m bench.occlusion_bench

bench-startup: setup
	$(PY) -m bench.startup_bench

lint: setup
	$(VENV)/bin/ruff check server tests bench

clean:
	rm -rf $(VENV) .pytest_cache test-artifacts
