"""A whole run killed with SIGKILL at seeded random points never publishes part of a run.

After each kill the analysts' views show exactly the runs published before it, each whole (every
table holds the rows its run record counts), the warehouse opens and every table reads; a rerun
then gives the same ledger as an uninterrupted run on a fresh output folder (all columns but
``run_id``; the tables that record how a run went rather than what it found are left out:
``run`` (timestamps, code version, row counts that include the sweep), ``stage_work`` and
``shard_work`` (seconds, reused or computed) and ``abandoned_run`` (the killed runs)).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline import store

ROOT = Path(__file__).resolve().parent.parent
SETTINGS = ["--set", "bootstrap_replicates=50"]
HOW_A_RUN_WENT = {"run", "stage_work", "shard_work", "abandoned_run"}
KILLS = 20


def _run(lake: Path, out: Path, fault: str = "") -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop(store.FAULT_VARIABLE, None)
    if fault:
        env[store.FAULT_VARIABLE] = fault
    command = [sys.executable, "-m", "pipeline.cli", "run", "--no-prefect", "--lake", str(lake)]
    return subprocess.run(
        [*command, "--out", str(out), *SETTINGS], cwd=ROOT, env=env, capture_output=True, text=True
    )


@pytest.fixture(scope="module")
def small_lake(tmp_path_factory) -> Path:
    lake = tmp_path_factory.mktemp("fault_lake")
    made = subprocess.run(
        [sys.executable, "-m", "pipeline.cli", "simulate", "--premises", "16", "--days", "42"]
        + ["--out", str(lake)],
        cwd=ROOT,
        capture_output=True,
        text=True,
    )
    assert made.returncode == 0, made.stderr
    return lake


def _published(out: Path) -> dict[str, dict[str, int]]:
    """Each run the views show -> its tables' row counts as the views give them; checked whole."""
    if not list((out / "ledger").glob("run/run_date=*/*.parquet")):
        # No run record yet (a first run killed while writing it): no run is published.
        return {}
    con = store.connect_ledger(out / "ledger")
    views = {r[0] for r in con.execute("select view_name from duckdb_views() where not internal").fetchall()}
    runs = {}
    for run_id, counts in con.execute("select run_id, row_counts from run").fetchall():
        expected: dict[str, int] = {}
        for table, n in json.loads(counts).items():
            name = table.split("-")[0]
            expected[name] = expected.get(name, 0) + n
        seen = {}
        for table in sorted(expected):
            if table in views and table not in HOW_A_RUN_WENT:
                query = f"select count(*) from {store.quote_identifier(table)} where run_id = $r"
                seen[table] = con.execute(query, {"r": run_id}).fetchall()[0][0]
        assert seen == {t: expected[t] for t in seen}, f"run {run_id} is not whole"
        runs[run_id] = seen
    return runs


def _warehouse_reads(out: Path) -> None:
    path = out / "warehouse.duckdb"
    if not path.exists():
        return
    with store.warehouse(path, read_only=True) as con:
        tables = [r[0] for r in con.execute("select table_name from duckdb_tables()").fetchall()]
        for table in tables:
            con.execute(f"select count(*) from {store.quote_identifier(table)}").fetchall()


def _ledger_of(out: Path, run_id: str) -> dict[str, pl.DataFrame]:
    tables = {}
    for folder in sorted(p for p in (out / "ledger").iterdir() if p.name not in HOW_A_RUN_WENT):
        files = sorted(folder.glob(f"run_date=*/{run_id}*.parquet"))
        if files:
            frame = pl.concat([pl.read_parquet(f) for f in files], how="diagonal_relaxed").drop("run_id")
            tables[folder.name] = frame.sort(pl.all())
    return tables


def test_twenty_sigkills_at_random_points_publish_whole_runs_only_and_the_rerun_matches(small_lake, tmp_path):
    """Killed anywhere, a run shows nothing new; resuming gives an uninterrupted run's ledger."""
    reference = tmp_path / "reference"
    done = _run(small_lake, reference)
    assert reference.joinpath("ledger", "run").is_dir(), done.stderr
    (reference_run,) = _published(reference)

    out = tmp_path / "out"
    rng = np.random.default_rng(16)
    published: dict[str, dict[str, int]] = {}
    kills, points = 0, []
    while kills < KILLS:
        nth = int(rng.integers(1, 45))
        attempt = _run(small_lake, out, f"any:{nth}")
        now = _published(out)
        _warehouse_reads(out)
        if attempt.returncode == -signal.SIGKILL:
            kills += 1
            points.append(nth)
            assert now == published, f"kill {kills} at fault point pass {nth} changed what the views show"
        else:
            # The run had fewer points than drawn: it published one whole run more.
            assert set(now) - set(published) and set(published) <= set(now), attempt.stderr
            published = now
    assert len(set(points)) > 10, "the kills fell at many different points"

    _run(small_lake, out)
    final = _published(out)
    (latest,) = set(final) - set(published)
    expected = _ledger_of(reference, reference_run)
    got = _ledger_of(out, latest)
    assert sorted(got) == sorted(expected)
    for table, frame in expected.items():
        assert got[table].equals(frame), table
