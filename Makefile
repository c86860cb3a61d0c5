# Set-up, demo, tests and benchmarks. A fresh machine needs only python3 and make.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
STAMP := $(VENV)/.installed
# torch is pinned here (the CPU wheel); the package itself asks only for a range.
TORCH_PIN := torch==2.13.0

.PHONY: setup demo test bench crash lint graphviz pdflibs tools clean

setup: $(STAMP) graphviz pdflibs tools

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet $(TORCH_PIN)
	$(PY) -m pip install --quiet -e ".[dev]"
	touch $(STAMP)

# graphviz's `dot` renders diagrams; without it colonnade still writes the DOT source.
graphviz:
	@if command -v dot >/dev/null 2>&1; then :; \
	elif [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
		echo "installing graphviz (for diagrams)"; \
		apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq graphviz >/dev/null; \
	else \
		echo "note: graphviz's 'dot' is missing; install it (Debian: sudo apt-get install graphviz) to render diagrams"; \
	fi

# WeasyPrint (report.pdf) lays out text with Pango; poppler's pdftotext lets the tests read
# the PDF back as a reader would see it. Both come from Debian.
PDF_DEBS := libpango-1.0-0 libpangoft2-1.0-0 libharfbuzz-subset0 poppler-utils
pdflibs:
	@if command -v pdftotext >/dev/null 2>&1 && ldconfig -p 2>/dev/null | grep -q libpangoft2; then :; \
	elif [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
		echo "installing $(PDF_DEBS) (for report.pdf)"; \
		apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq $(PDF_DEBS) >/dev/null; \
	else \
		echo "note: install $(PDF_DEBS) (Debian) for report.pdf and its tests"; \
	fi

# strace kills real commands at real system calls in the crash tests (tests/test_crash.py).
tools:
	@if command -v strace >/dev/null 2>&1; then :; \
	elif [ "$$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then \
		echo "installing strace (for the crash tests)"; \
		apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq strace >/dev/null; \
	else \
		echo "note: install strace (Debian: sudo apt-get install strace) for the crash tests"; \
	fi

demo: setup
	PATH="$(CURDIR)/$(VENV)/bin:$$PATH" bash examples/demo.sh

# The architecture linter first (layers and circles, from pyproject.toml), then the suite.
test: setup
	$(VENV)/bin/lint-imports --config pyproject.toml
	# Two workers (pytest-xdist), a test file each at a time: most tests wait on one core
	# (one torch thread, subprocesses), so CI's two cores halve the suite (406 s -> 210 s).
	$(PY) -m pytest -n 2 --dist loadfile

bench: setup
	$(PY) benchmarks/run.py
	for f in benchmarks/bench_*.py; do $(PY) $$f || exit 1; done

# Every pair of crashes (the grow killed at step i, the next write at step j): minutes.
crash: setup
	$(PY) benchmarks/crash_pairs.py

lint: setup
	$(VENV)/bin/ruff check src tests examples benchmarks
	$(VENV)/bin/lint-imports --config pyproject.toml

clean:
	rm -rf demo-out .pytest_cache
