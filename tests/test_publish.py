"""Publishing a run is one step, and one process at a time writes an output folder.

Checks: a run killed with SIGKILL part-way leaves nothing an analyst's view returns and the
next run removes its files and lists it; a second run on the same output folder refuses with
one line and its own exit code while the first holds the lock; every view of sql/views.sql
exists over a whole run's ledger (a view skipped for a missing table must not hide a typo).
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import polars as pl
import pytest

from pipeline import cli, ledger, store

ROOT = Path(__file__).resolve().parent.parent


def _views(con) -> set[str]:
    rows = con.execute("select view_name from duckdb_views() where not internal").fetchall()
    return {row[0] for row in rows}


def test_every_view_of_views_sql_exists_over_a_whole_runs_ledger(sample_lake_run):
    declared = set(re.findall(r"create or replace view (\w+) as", store.sql_text("views")))
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    assert declared - _views(con) == set()


def test_views_show_only_runs_with_a_run_record_and_the_next_run_sweeps_the_rest(sample_lake_run, tmp_path):
    source = sample_lake_run.config.ledger_path
    copy = tmp_path / "ledger"
    shutil.copytree(source, copy)
    published = store.connect_ledger(copy).execute("select count(*) from savings").fetchall()[0][0]
    # A run that wrote savings and policy, then died before its run record.
    killed = "20990101T000000Z-dead00"
    for table in ("savings", "policy"):
        frame = pl.read_parquet(next((copy / table).glob("*/*.parquet")))
        folder = copy / table / "run_date=2099-01-01"
        folder.mkdir()
        frame.with_columns(pl.lit(killed).alias("run_id")).write_parquet(folder / f"{killed}.parquet")
    (copy / "savings" / "run_date=2099-01-01" / "other-run.parquet.tmp").write_bytes(b"half a file")
    con = store.connect_ledger(copy)
    assert con.execute("select count(*) from savings").fetchall()[0][0] == published
    assert con.execute("select count(*) from savings where run_id = $k", {"k": killed}).fetchall() == [(0,)]

    swept = ledger.sweep_abandoned(copy, keep="the-current-run")
    assert swept.to_dicts() == [
        {"abandoned_run_id": killed, "tables": "policy,savings", "files_removed": 2},
        {"abandoned_run_id": "other-run", "tables": "savings", "files_removed": 1},
    ]
    assert not list(copy.glob(f"*/*/{killed}.parquet")) and not list(copy.glob("*/*/*.tmp"))
    assert store.connect_ledger(copy).execute("select count(*) from savings").fetchall()[0][0] == published


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "pipeline.cli", *args]


def test_a_run_killed_with_sigkill_leaves_nothing_visible_and_the_rerun_lists_it(sample_lake_run, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(sample_lake_run.config.out, out)
    args = ["--lake", str(sample_lake_run.config.lake), "--out", str(out)]
    args += ["--set", 'presence_sources=["occupancy_flag"]']
    before = store.connect_ledger(out / "ledger").execute("select run_id from run order by all").fetchall()
    known = {p.stem for p in (out / "ledger").glob("*/*/*.parquet")}
    # Killed at its third ledger write, between writing the temporary file and renaming it.
    env = {**os.environ, store.FAULT_VARIABLE: "ledger-write:3"}
    killed_run = subprocess.run(_cli("run", "--no-prefect", *args), cwd=ROOT, env=env, capture_output=True)
    assert killed_run.returncode == -signal.SIGKILL
    fresh = {p.name.split(".")[0] for p in (out / "ledger").glob("*/*/*.parquet*")} - known
    assert len(fresh) == 1
    killed = fresh.pop()
    assert len(list((out / "ledger").glob(f"*/*/{killed}.parquet"))) == 2
    assert len(list((out / "ledger").glob(f"*/*/{killed}.parquet.tmp"))) == 1
    con = store.connect_ledger(out / "ledger")
    assert con.execute("select run_id from run order by all").fetchall() == before
    for view in ("savings", "policy", "episode_summary", "behavior_policy"):
        rows = con.execute(f"select count(*) from {view} where run_id = $k", {"k": killed}).fetchall()
        assert rows == [(0,)]

    done = subprocess.run(_cli("run", "--no-prefect", *args), cwd=ROOT, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    con = store.connect_ledger(out / "ledger")
    latest = con.execute("select run_id from latest_run").fetchall()[0][0]
    listed = con.execute("select abandoned_run_id from abandoned_run where run_id = $r", {"r": latest})
    assert listed.fetchall() == [(killed,)]
    assert not list((out / "ledger").glob(f"*/*/{killed}.parquet*"))


HOLD = """
import sys, time
from pipeline import ledger
with ledger.exclusive_output(sys.argv[1], "(test holder)"):
    print("held", flush=True)
    time.sleep(60)
"""


def test_a_second_run_on_the_same_output_folder_refuses_while_the_first_holds_it(tmp_path, capsys):
    out = tmp_path / "out"
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(out)], cwd=ROOT, stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        lake = ROOT / "sample_lake"
        code = cli.main(["run", "--no-prefect", "--lake", str(lake), "--out", str(out)])
        err = capsys.readouterr().err.strip()
        assert code == cli.EXIT_BUSY
        assert len(err.splitlines()) == 1
        assert f"pid {holder.pid}" in err and "(test holder)" in err and str(out) in err
        assert not (out / "ledger").exists() and not (out / "warehouse.duckdb").exists()
    finally:
        holder.kill()
        holder.wait()
    # The system drops the lock of a killed holder: the folder is free again at once.
    with ledger.exclusive_output(out):
        pass


def test_the_lock_is_reentrant_within_one_process(tmp_path):
    with ledger.exclusive_output(tmp_path), ledger.exclusive_output(tmp_path):
        pass
    with ledger.exclusive_output(tmp_path):
        pass


@pytest.mark.parametrize("stage", ["ingest", "episodes", "learn", "evaluate"])
def test_every_stage_command_takes_the_lock(stage, tmp_path, capsys):
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD, str(tmp_path)], cwd=ROOT, stdout=subprocess.PIPE, text=True
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        code = cli.main([stage, "--lake", str(ROOT / "sample_lake"), "--out", str(tmp_path)])
        assert code == cli.EXIT_BUSY
        assert "is being written by" in capsys.readouterr().err
    finally:
        holder.kill()
        holder.wait()


def test_an_analyst_reading_in_a_loop_while_a_run_writes_never_sees_part_of_a_run(sample_lake_run, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(sample_lake_run.config.out, out)
    args = ["--lake", str(sample_lake_run.config.lake), "--out", str(out)]
    args += ["--set", 'presence_sources=["occupancy_flag"]', "--set", "seed=11"]
    con = store.connect_ledger(out / "ledger")
    query = """
        select r.run_id,
            (select count(*) from savings s where s.run_id = r.run_id),
            (select count(*) from policy p where p.run_id = r.run_id),
            (select count(*) from stage_work w where w.run_id = r.run_id)
        from run r order by all
    """
    seen: list[list[tuple]] = []
    writer = subprocess.Popen(_cli("run", "--no-prefect", *args), cwd=ROOT, stdout=subprocess.DEVNULL)
    while writer.poll() is None:
        seen.append(con.execute(query).fetchall())
    assert writer.returncode == 0
    final = {row[0]: row for row in store.connect_ledger(out / "ledger").execute(query).fetchall()}
    assert len(final) == len(seen[0]) + 1, "the writer published one new run"
    # Every observation holds whole runs only: each run it shows has all of its final rows.
    for rows in seen:
        assert all(row == final[row[0]] for row in rows)
    assert len(seen) > 5
