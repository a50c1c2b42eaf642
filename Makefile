# Two entry points a newcomer needs: `make run` and `make test`. Both create .venv on first use.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: run demo test lint prometheus browser kubectl bench faults clean

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python -m service.demo

run: $(STAMP)
	$(BIN)/keepset serve

lint: $(STAMP)
	$(BIN)/ruff check service tests loadtest deploy/kubernetes
	$(BIN)/ruff format --check service tests loadtest deploy/kubernetes
	$(BIN)/mypy
	$(BIN)/mypy deploy/kubernetes/sync_registry.py

# The alert-rule tests need promtool and the live monitoring test a real Prometheus: Debian's
# prometheus package (the script does nothing when both are already installed).
prometheus:
	bash deploy/prometheus/install-prometheus.sh

# The preview report's browser test opens it in Debian's Chromium (headless).
browser:
	bash deploy/install-chromium.sh

# The deploy tests render the kustomize overlays with kubectl (Debian's kubernetes-client when
# no kubectl is installed).
kubectl:
	bash deploy/kubernetes/install-kubectl.sh

test: lint prometheus browser kubectl
	$(BIN)/python -m pytest -q

bench: $(STAMP)
	$(BIN)/python loadtest/bench_sampling.py
	$(BIN)/python loadtest/bench_http.py
	$(BIN)/python loadtest/bench_transport.py
	$(BIN)/python loadtest/bench_continue.py

# Load and fault runs on loopback with a table of figures against their bounds (about 15 min,
# 10 of them the soak); --quick in ARGS for a short try.
faults: $(STAMP)
	$(BIN)/python loadtest/faults.py $(ARGS)

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache .hypothesis
