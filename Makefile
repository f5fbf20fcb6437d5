# Two commands do all set-up on a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
OUT ?= out
LAKE ?= sample_lake
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,dask]'
	touch $(STAMP)

# Both seasons: the summer lake (cooling) as the Prefect flow, then its winter companion
# (heating) into $(OUT)/winter with the same stages called directly, which spares a second
# start of Prefect's temporary server (about 35 s of the winter run's 44 s).
# The embedded Prefect server would otherwise try to send usage analytics (and log a
# failure on a machine without network).
# The run writes its report (out/report/<run_id>/report.html); on a simulated lake the truth
# check then adds policy_truth to the ledger and the report is written again to show it.
demo: $(STAMP)
	@PREFECT_SERVER_ANALYTICS_ENABLED=false $(BIN)/thermal-ledger run --lake $(LAKE) --out $(OUT) \
		$(if $(wildcard $(LAKE)/settings.toml),--config $(LAKE)/settings.toml)
	@$(if $(wildcard $(LAKE)/truth),$(BIN)/thermal-ledger truth --lake $(LAKE) --out $(OUT) \
		$(if $(wildcard $(LAKE)/settings.toml),--config $(LAKE)/settings.toml) && \
		$(BIN)/thermal-ledger report --lake $(LAKE) --out $(OUT) \
		$(if $(wildcard $(LAKE)/settings.toml),--config $(LAKE)/settings.toml),true)
	@$(BIN)/thermal-ledger run --no-prefect --lake $(LAKE)/winter --out $(OUT)/winter \
		--config $(LAKE)/winter/settings.toml

test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check pipeline flows tests
	$(BIN)/ruff format --check pipeline flows tests

# Reuses bench_out/lake-1000x92-s7 when it was simulated before; figures in bench_out/bench-1000.json.
bench: $(STAMP)
	$(BIN)/thermal-ledger bench --premises 1000 --days 92 --work bench_out

clean:
	rm -rf $(OUT) .pytest_cache
