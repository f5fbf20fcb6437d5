"""Sharded work gives the same ledger whatever the shard size and wherever the shards run.

The reference is the pipeline run directly with every premise in one shard; the others
cut the 60 homes of the sample lake into shards of 1 and of 7 premises and run them as
Prefect tasks, on Prefect's thread pool and on a local two-worker Dask cluster.

Tolerance: text, integer and boolean columns must be equal exactly; floating-point columns
to a relative 1e-9 (the shards change only where rows are read from, not the arithmetic,
so any difference beyond rounding would be a defect). Columns that name the run or time
the work (``run_id``, ``run_date``, ``seconds``) and the run record are left out.
"""

from __future__ import annotations

import contextlib
import shutil
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from pipeline import config as config_module
from pipeline import stages

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"
SETTINGS = {"lake": str(SAMPLE_LAKE), "bootstrap_replicates": 60}
SKIPPED_TABLES = {"run", "shard_work"}
RUN_COLUMNS = {"run_id", "run_date", "seconds"}


def _read_table(folder: Path) -> pl.DataFrame:
    """Every file of one ledger table (a stage may add a second file per run, with more columns)."""
    paths = sorted(folder.glob("run_date=*/*.parquet"))
    return pl.concat([pl.read_parquet(p, hive_partitioning=False) for p in paths], how="diagonal_relaxed")


def ledger(out: Path) -> dict[str, pl.DataFrame]:
    """Every ledger table of the single run in ``out``, without run ids and timings, in a fixed order."""
    tables = {}
    for folder in sorted((out / "ledger").iterdir()):
        if folder.name in SKIPPED_TABLES:
            continue
        frame = _read_table(folder)
        frame = frame.drop([c for c in frame.columns if c in RUN_COLUMNS])
        keys = [c for c, t in frame.schema.items() if not t.is_float() and not t.is_nested()]
        tables[folder.name] = frame.sort(keys, nulls_last=True) if keys else frame
    return tables


def assert_same_ledger(expected: dict[str, pl.DataFrame], actual: dict[str, pl.DataFrame]) -> None:
    assert sorted(actual) == sorted(expected)
    for name, frame in expected.items():
        assert_frame_equal(actual[name], frame, check_exact=False, rel_tol=1e-9, abs_tol=1e-12), name


@pytest.fixture(scope="module")
def one_shard(tmp_path_factory):
    out = tmp_path_factory.mktemp("one_shard")
    config = config_module.load(overrides={**SETTINGS, "out": str(out), "shard_premises": 1000})
    stages.run_all(config)
    return out, ledger(out)


def _flow_ledger(out: Path, **settings) -> tuple[dict[str, pl.DataFrame], pl.DataFrame]:
    from flows.thermal_run import thermal_ledger_run

    thermal_ledger_run(None, {**SETTINGS, "out": str(out), **settings})
    work = pl.read_parquet(
        out / "ledger" / "shard_work" / "run_date=*" / "*.parquet", hive_partitioning=False
    )
    return ledger(out), work


def test_one_shard_is_the_whole_lake(one_shard):
    """With shards larger than the lake, the run record shows one computed shard of all 60 homes."""
    out, _ = one_shard
    work = pl.read_parquet(
        out / "ledger" / "shard_work" / "run_date=*" / "*.parquet", hive_partitioning=False
    )
    assert work.select("shard_id", "n_premises", "status").rows() == [(0, 60, "computed")]


def test_shards_of_one_premise_on_the_thread_pool_give_the_same_ledger(prefect_harness, one_shard, tmp_path):
    """60 shards of one home each, mapped as Prefect tasks, publish the same ledger as one shard."""
    _, expected = one_shard
    actual, work = _flow_ledger(tmp_path, shard_premises=1)
    assert work.height == 60 and set(work["status"]) == {"computed"} and work["n_premises"].sum() == 60
    assert_same_ledger(expected, actual)


def test_shards_on_a_local_two_worker_dask_cluster_give_the_same_ledger(prefect_harness, one_shard, tmp_path):
    """Shards of 7 homes run on prefect-dask's DaskTaskRunner with two worker processes: same ledger."""
    pytest.importorskip("prefect_dask", reason="the dask extra is part of the test install")
    _, expected = one_shard
    actual, work = _flow_ledger(tmp_path, shard_premises=7, task_runner="dask", dask_workers=2)
    assert work["n_premises"].to_list() == [7] * 8 + [4]
    assert_same_ledger(expected, actual)


def _work(config, run_id: str) -> pl.DataFrame:
    work = pl.read_parquet(
        config.ledger_path / "shard_work" / "run_date=*" / "*.parquet", hive_partitioning=False
    )
    return work.filter(pl.col("run_id") == run_id).sort("shard_id")


def assert_same_ledger_rows(config, first: str, again: str) -> None:
    """A reused run republishes the same rows under its own run id, and no more."""
    for table in ("savings", "policy", "behavior_policy", "episode_summary"):
        rows = _read_table(config.ledger_path / table)
        before, after = (rows.filter(pl.col("run_id") == r).drop("run_id") for r in (first, again))
        assert after.height == before.height > 0, table
        assert_frame_equal(after, before), table


def test_a_rerun_reuses_every_shard_and_a_new_file_recomputes_only_its_shards(tmp_path):
    """Shards are reused while their inputs hash the same; a meter file for 6 homes recomputes their shard."""
    lake = tmp_path / "lake"
    shutil.copytree(SAMPLE_LAKE, lake)
    config = config_module.load(
        overrides={**SETTINGS, "lake": str(lake), "out": str(tmp_path / "out"), "shard_premises": 10}
    )
    first = stages.run_all(config)
    assert set(_work(config, first.run_id)["status"]) == {"computed"}
    again = stages.run_all(config)
    assert set(_work(config, again.run_id)["status"]) == {"reused"}
    record = pl.read_parquet(
        config.ledger_path / "stage_work" / "run_date=*" / "*.parquet", hive_partitioning=False
    ).filter(pl.col("run_id") == again.run_id)
    assert dict(record.select("stage", "status").rows()) == dict.fromkeys(stages.STAGES, "reused")
    assert_same_ledger_rows(config, first.run_id, again.run_id)

    # September's reads for the first six homes (a tenth of the lake): August's, a month on.
    august = pl.read_parquet(lake / "landing" / "meter" / "meter_2026-08.parquet")
    first_six = sorted(august["premise_id"].unique())[:6]
    september = august.filter(pl.col("premise_id").is_in(first_six)).with_columns(
        pl.col("interval_start").dt.offset_by("31d")
    )
    september.write_parquet(lake / "landing" / "meter" / "meter_2026-09.parquet")
    grown = stages.run_all(config)
    work = _work(config, grown.run_id)
    assert work.filter(pl.col("status") == "computed")["shard_id"].to_list() == [0]
    assert work.filter(pl.col("status") == "reused")["shard_id"].to_list() == [1, 2, 3, 4, 5]


def test_every_stage_opens_the_warehouse_with_the_configured_duckdb_settings(tmp_path, monkeypatch):
    """duckdb_threads reaches every connection a run opens (shards included), read back from DuckDB."""
    from pipeline import store

    opened = store.warehouse
    seen: list[int] = []

    @contextlib.contextmanager
    def recording(*args, **kwargs):
        with opened(*args, **kwargs) as con:
            seen.append(int(store.execute(con, "select current_setting('threads')")[0][0]))
            yield con

    monkeypatch.setattr(store, "warehouse", recording)
    config = config_module.load(overrides={**SETTINGS, "out": str(tmp_path), "duckdb_threads": 1})
    stages.run_all(config)
    assert len(seen) > 10 and set(seen) == {1}
