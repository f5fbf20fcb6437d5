"""Tests of the benchmark command on a tiny simulated lake (no timing assertions)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from numpy.testing import assert_allclose

from pipeline import bench, estimators
from pipeline.cli import main
from pipeline.stages import STAGES


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """One benchmark of 4 homes x 7 days, with the CSV ingest, and its JSON read back."""
    settings = bench.BenchSettings(
        premises=4, days=7, seed=3, work=tmp_path_factory.mktemp("bench"), csv=True
    )
    report = bench.run_bench(settings, say=lambda text: None)
    return settings, report, json.loads((settings.work / "bench-4.json").read_text())


def test_every_stage_is_timed_with_positive_seconds_memory_and_rows(tiny):
    """The JSON has every stage in order, each with positive seconds, peak memory and rows."""
    _, _, written = tiny
    assert [s["stage"] for s in written["stages"]] == list(STAGES)
    for stage in written["stages"]:
        assert stage["seconds"] > 0 and stage["peak_mib"] > 0 and stage["rows"] > 0, stage


def test_the_whole_run_is_the_sum_and_the_peak_the_largest_stage(tiny):
    """The whole run's seconds are the stages' sum and its peak memory the largest stage's."""
    _, _, written = tiny
    assert_allclose(written["whole_run"]["seconds"], sum(s["seconds"] for s in written["stages"]))
    assert written["whole_run"]["peak_mib"] == max(s["peak_mib"] for s in written["stages"])


def test_every_ratio_is_finite_and_positive(tiny):
    """Whole run over floor, estimator speed-ups and CSV over Parquet ingest are finite and above 0."""
    _, _, written = tiny
    ratios = [written["whole_run_over_floor"], written["csv_ingest"]["csv_over_parquet"]]
    ratios += [e["speedup"] for e in written["estimators"].values()]
    assert all(math.isfinite(r) and r > 0 for r in ratios), ratios


def test_the_rerun_with_no_new_files_reuses_every_stage(tiny):
    """The second pass over the same lake times every stage and records each as reused in the ledger."""
    settings, _, written = tiny
    assert sorted(written["rerun"]["stages"]) == sorted(STAGES)
    assert_allclose(
        written["rerun"]["seconds"], sum(s["seconds"] for s in written["rerun"]["stages"].values())
    )
    ledger = settings.work / f"out-{settings.lake.name}" / "ledger"
    work = pl.read_parquet(ledger / "stage_work" / "run_date=*" / "*.parquet", hive_partitioning=False)
    # `thermal-ledger ingest` alone writes no run record; each later stage writes one per pass.
    recorded = sorted(work.select("stage", "status").rows())
    assert recorded == sorted((stage, status) for stage in STAGES[1:] for status in ("computed", "reused"))


def test_the_csv_copy_loads_the_same_meter_rows(tiny):
    """The meter files converted to CSV load exactly as many meter rows as the Parquet files."""
    _, _, written = tiny
    assert written["csv_ingest"]["meter_rows"] == written["stages"][0]["rows"]


def test_the_floor_counts_the_premise_hours_polars_finds(tiny):
    """The floor query's premise-hours equal polars' distinct (premise, UTC hour) pairs of the meter files."""
    settings, report, _ = tiny
    meter = pl.read_parquet(settings.lake / "landing" / "meter" / "*.parquet")
    expected = meter.select("premise_id", pl.col("interval_start").dt.truncate("1h")).unique().height
    assert report["floor"]["premise_hours"] == expected


def test_reference_loops_equal_the_vectorised_estimators_on_the_run_steps(tiny):
    """On the run's steps and stored behaviour model, each reference loop equals the vectorised estimator."""
    settings, report, _ = tiny
    frame = bench.estimator_frame(settings.lake, settings.work / f"out-{settings.lake.name}")
    assert frame.height == report["stages"][-1]["rows"]
    assert not np.allclose(frame["pi"].to_numpy(), frame["b"].to_numpy()), "weights should not all be 1"
    episode, t, reward, pi, b = (frame[c].to_numpy() for c in ("episode_id", "t", "reward", "pi", "b"))
    assert_allclose(
        estimators.weighted_is(frame)["estimate"][0], bench.reference_weighted_is(episode, reward, pi, b)
    )
    assert_allclose(
        estimators.per_decision_is(frame)["estimate"][0],
        bench.reference_per_decision_is(episode, t, reward, pi, b),
    )
    for figures in report["estimators"].values():
        assert_allclose(figures["estimate"], figures["reference"])


def test_reference_loops_give_the_hand_computed_values():
    """Two episodes worked by hand from the definitions (Sutton and Barto 2018 eq. 5.6; Precup 2000)."""
    # Episode 1: rewards 1, 2 with ratios 0.5/0.25 = 2 and 1; episode 2: reward 4 with ratio 0.5.
    episode, t = np.array([1, 1, 2]), np.array([0, 1, 0])
    reward, pi, b = np.array([1.0, 2.0, 4.0]), np.array([0.5, 0.3, 0.5]), np.array([0.25, 0.3, 1.0])
    # WIS: (2 * 3 + 0.5 * 4) / (2 + 0.5) = 3.2.
    assert_allclose(bench.reference_weighted_is(episode, reward, pi, b), 3.2)
    # PDIS: ((2 * 1 + 2 * 1 * 2) + 0.5 * 4) / 2 = 4.
    assert_allclose(bench.reference_per_decision_is(episode, t, reward, pi, b), 4.0)


def test_a_matching_lake_is_reused_and_says_so(tiny):
    """A second preparation of the same size and seed reuses the lake instead of simulating it."""
    settings, report, _ = tiny
    said: list[str] = []
    assert report["lake_reused"] is False
    assert bench.prepare_lake(settings, say=said.append) is True
    assert said == [f"lake: reusing {settings.lake} (its {bench.LAKE_SUMMARY} matches)"]


def test_reuse_without_a_matching_lake_is_refused(tmp_path):
    """--reuse with no simulated lake there raises BenchError naming the folder, and simulates nothing."""
    settings = bench.BenchSettings(premises=2, days=1, work=tmp_path, reuse=True)
    with pytest.raises(bench.BenchError, match=str(settings.lake)):
        bench.prepare_lake(settings, say=lambda text: None)
    assert not settings.lake.exists()


def test_a_failing_stage_names_the_stage_and_its_log(tmp_path):
    """A stage whose child process fails raises BenchError with the stage, exit code and log file."""
    log = tmp_path / "ingest.log"
    with pytest.raises(bench.BenchError, match=r"stage ingest exited with 2 .*ingest\.log"):
        bench.run_stage("ingest", tmp_path / "no_lake", tmp_path / "out", log)


def test_the_command_refuses_no_premises_in_one_line(tmp_path, capsys):
    """`thermal-ledger bench --premises 0` answers one line on stderr and exit code 2."""
    assert main(["bench", "--premises", "0", "--work", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["thermal-ledger bench: --premises 0 --days 92: both must be at least 1"]


def test_the_command_prints_every_stage(tmp_path, capsys, tiny):
    """The command reuses the lake and prints one table row per stage, the floor ratio and the speed-ups."""
    settings, _, _ = tiny
    args = ["bench", "--premises", "4", "--days", "7", "--seed", "3", "--work", str(settings.work), "--reuse"]
    assert main(args) == 0
    out = capsys.readouterr().out
    for word in (*STAGES, "whole run (sum)", "whole run / floor", "weighted_is", "per_decision_is"):
        assert word in out, word
    assert Path(settings.work / "bench-4.json").exists()
