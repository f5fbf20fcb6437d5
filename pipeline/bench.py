"""The ``thermal-ledger bench`` command: the whole pipeline on a simulated lake, timed stage by stage.

Each stage runs in its own child process (``python -m pipeline.cli <stage>``), so its wall
time includes starting Python and its peak resident memory (``os.wait4``) includes
DuckDB's native memory. The whole run is the sum of the stages run one after another,
and its peak memory the largest stage's. Beside it: the floor (one DuckDB query reading
the meter Parquet files once into premise-hours), the vectorised estimators against
plain reference loops on the run's own steps, and with ``--csv`` the ingest of the same
meter rows as CSV files.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from pipeline import config as config_module
from pipeline import estimators, store
from pipeline.behavior import BEHAVIOR_TABLES, load_behavior
from pipeline.episodes import load_steps
from pipeline.evaluate import target_probabilities
from pipeline.simulate import generate_lake
from pipeline.stages import STAGES

LAKE_SUMMARY = "bench-lake.json"
"""Written into a simulated lake once it is complete; a lake is reused only when it matches."""

ROW_COUNTS: dict[str, tuple[str, str]] = {
    "ingest": ("meter rows loaded", "select count(*) from meter_read"),
    "episodes": ("premise-hours", "select count(*) from hourly"),
    "learn": ("decision steps", "select count(*) from step"),
    "improve": ("decision steps", "select count(*) from step"),
    "evaluate": ("decision steps", "select count(*) from step"),
}
"""What each stage's rows per second counts, read from the warehouse after the run."""


class BenchError(RuntimeError):
    """The benchmark cannot run as asked (no lake to reuse, a stage failed)."""


@dataclass(frozen=True)
class BenchSettings:
    """What to benchmark: lake size and seed, where to work, and the optional extras."""

    premises: int
    days: int = 92
    seed: int = 7
    work: Path = Path("bench_out")
    csv: bool = False
    reuse: bool = False

    @property
    def lake(self) -> Path:
        """The simulated lake's folder, named after its size and seed."""
        return self.work / f"lake-{self.premises}x{self.days}-s{self.seed}"

    def identity(self) -> dict[str, int]:
        """What a reusable lake must have been simulated with."""
        return {"n_premises": self.premises, "days": self.days, "seed": self.seed}


@dataclass(frozen=True)
class StageTiming:
    """One stage's child process: wall seconds, peak resident memory and throughput."""

    stage: str
    seconds: float
    peak_mib: float
    rows: int
    counted: str

    @property
    def rows_per_second(self) -> float:
        """Rows counted for this stage per wall second."""
        return self.rows / self.seconds


# ---- reference loops -------------------------------------------------------------------------


def reference_weighted_is(episode: np.ndarray, reward: np.ndarray, pi: np.ndarray, b: np.ndarray) -> float:
    """Weighted importance sampling with a plain loop over steps (Sutton and Barto 2018, eq. 5.6)."""
    numerator = denominator = 0.0
    weight, total, current = 1.0, 0.0, episode[0]
    for i in range(len(episode)):
        if episode[i] != current:
            numerator += weight * total
            denominator += weight
            weight, total, current = 1.0, 0.0, episode[i]
        weight *= pi[i] / b[i]
        total += reward[i]
    numerator += weight * total
    denominator += weight
    return numerator / denominator


def reference_per_decision_is(
    episode: np.ndarray, t: np.ndarray, reward: np.ndarray, pi: np.ndarray, b: np.ndarray
) -> float:
    """Per-decision importance sampling with a plain loop (Precup, Sutton and Singh 2000)."""
    total, episodes, weight = 0.0, 0, 1.0
    for i in range(len(episode)):
        if t[i] == 0:
            weight = 1.0
            episodes += 1
        weight *= pi[i] / b[i]
        total += weight * reward[i]
    return total / episodes


# ---- the parts ---------------------------------------------------------------------------------


def prepare_lake(settings: BenchSettings, say: Callable[[str], None] = print) -> bool:
    """Simulate the lake, or reuse it when its summary matches; return whether it was reused."""
    summary = settings.lake / LAKE_SUMMARY
    found = json.loads(summary.read_text()) if summary.exists() else None
    if found is not None and all(found.get(k) == v for k, v in settings.identity().items()):
        say(f"lake: reusing {settings.lake} (its {LAKE_SUMMARY} matches)")
        return True
    if settings.reuse:
        why = "has no" if found is None else "has a different"
        raise BenchError(
            f"--reuse: {settings.lake} {why} {LAKE_SUMMARY} for {settings.premises} premises x"
            f" {settings.days} days, seed {settings.seed}; run without --reuse to simulate it"
        )
    shutil.rmtree(settings.lake, ignore_errors=True)
    say(f"lake: simulating {settings.premises} homes x {settings.days} days into {settings.lake}")
    made = generate_lake(settings.lake, n_premises=settings.premises, seed=settings.seed, days=settings.days)
    kept = {k: v for k, v in made.items() if k != "files"}
    summary.write_text(json.dumps(kept, indent=2) + "\n")
    say(f"lake: simulated in {made['seconds']:.1f} s")
    return False


def _meter_glob(lake: Path) -> str:
    return str(lake / "landing" / "meter" / "*.parquet")


def measure_floor(lake: Path, scratch: Path) -> tuple[float, int]:
    """Seconds for one query rolling the meter Parquet files up to premise-hours, in a fresh database."""
    scratch.unlink(missing_ok=True)
    with store.warehouse(scratch) as con:
        started = time.perf_counter()
        hours = store.build_table(con, "bench_floor_hour", {"meter_glob": _meter_glob(lake)}, temp=True)
        seconds = time.perf_counter() - started
    scratch.unlink(missing_ok=True)
    return seconds, hours


def run_stage(stage: str, lake: Path, out: Path, log: Path) -> tuple[float, float]:
    """Run one stage in a child process; return its wall seconds and peak resident MiB."""
    command = [sys.executable, "-m", "pipeline.cli", stage, "--lake", str(lake), "--out", str(out)]
    log.parent.mkdir(parents=True, exist_ok=True)
    with log.open("w") as sink:
        started = time.perf_counter()
        child = subprocess.Popen(command, stdout=sink, stderr=subprocess.STDOUT)
        _, status, usage = os.wait4(child.pid, 0)
        seconds = time.perf_counter() - started
    child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode != 0:
        last = log.read_text().strip().splitlines()[-1:] or ["(no output)"]
        raise BenchError(f"stage {stage} exited with {child.returncode} ({log}): {last[0]}")
    # ru_maxrss is in KiB on Linux.
    return seconds, usage.ru_maxrss / 1024


def _counts(out: Path, stages: tuple[str, ...] = STAGES) -> dict[str, int]:
    with store.warehouse(out / "warehouse.duckdb", read_only=True) as con:
        return {stage: store.execute(con, ROW_COUNTS[stage][1])[0][0] for stage in stages}


def measure_startup() -> float:
    """Wall seconds of a child that only starts Python and imports the command (part of every stage)."""
    started = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import pipeline.cli"], check=True)
    return time.perf_counter() - started


def run_stages(lake: Path, out: Path, logs: Path, say: Callable[[str], None] = print) -> list[StageTiming]:
    """Every stage of ``STAGES`` in its own process on a fresh output folder, timed."""
    shutil.rmtree(out, ignore_errors=True)
    measured = {}
    for stage in STAGES:
        measured[stage] = run_stage(stage, lake, out, logs / f"{stage}.log")
        say(f"{stage}: {measured[stage][0]:.1f} s")
    counts = _counts(out)
    return [
        StageTiming(stage, seconds, peak, counts[stage], ROW_COUNTS[stage][0])
        for stage, (seconds, peak) in measured.items()
    ]


def _best_of_alternating(
    fast: Callable[[], Any], slow: Callable[[], Any], repeat: int
) -> tuple[float, Any, float, Any]:
    """Best wall seconds (and the value) of each of two calls, timed in turn ``repeat`` times.

    Taking turns lets load from other processes fall on both alike, so their ratio
    measures the code rather than the moment.
    """
    best_fast = best_slow = math.inf
    fast_value = slow_value = None
    for _ in range(repeat):
        started = time.perf_counter()
        fast_value = fast()
        best_fast = min(best_fast, time.perf_counter() - started)
        started = time.perf_counter()
        slow_value = slow()
        best_slow = min(best_slow, time.perf_counter() - started)
    return best_fast, fast_value, best_slow, slow_value


def estimator_frame(lake: Path, out: Path) -> pl.DataFrame:
    """The run's steps with the first candidate's ``pi`` and the stored behaviour model's ``b``."""
    config = config_module.load(overrides={"lake": str(lake), "out": str(out)})
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        steps = load_steps(con)
        tables = {name: store.frame(con, f"select * from behavior_{name}") for name in BEHAVIOR_TABLES}
    behavior = load_behavior(tables, config.actions, config.state)
    rule = config.candidates[0]
    pi = target_probabilities(steps, rule.table(config.state, config.actions, config.target_epsilon), config)
    return steps.select("episode_id", "t", "reward").with_columns(
        pl.Series("pi", pi), pl.Series("b", behavior.probabilities(steps))
    )


def compare_estimators(frame: pl.DataFrame) -> dict[str, dict[str, float]]:
    """Weighted IS and per-decision IS, vectorised against the reference loops (best of 5, in turns)."""
    episode, t, reward, pi, b = (frame[c].to_numpy() for c in ("episode_id", "t", "reward", "pi", "b"))
    cases = {
        "weighted_is": (estimators.weighted_is, reference_weighted_is, (episode, reward, pi, b)),
        "per_decision_is": (
            estimators.per_decision_is,
            reference_per_decision_is,
            (episode, t, reward, pi, b),
        ),
    }
    compared = {}
    for name, (vectorised, loop, arrays) in cases.items():
        vec_s, result, loop_s, reference = _best_of_alternating(
            lambda vectorised=vectorised: vectorised(frame),
            lambda loop=loop, arrays=arrays: loop(*arrays),
            repeat=5,
        )
        compared[name] = {
            "vectorised_s": vec_s,
            "loop_s": loop_s,
            "speedup": loop_s / vec_s,
            "estimate": float(result["estimate"][0]),
            "reference": float(reference),
        }
    return compared


def csv_lake(lake: Path, dest: Path) -> Path:
    """A copy of ``lake`` with every meter Parquet file written as CSV by DuckDB."""
    shutil.rmtree(dest, ignore_errors=True)
    shutil.copytree(lake / "landing", dest / "landing", ignore=shutil.ignore_patterns("*.parquet"))
    with store.warehouse(dest / "convert.duckdb") as con:
        for path in sorted((lake / "landing" / "meter").glob("*.parquet")):
            con.read_parquet(str(path)).write_csv(str(dest / "landing" / "meter" / f"{path.stem}.csv"))
    (dest / "convert.duckdb").unlink()
    return dest


# ---- the command -------------------------------------------------------------------------------


def run_bench(settings: BenchSettings, say: Callable[[str], None] = print) -> dict[str, Any]:
    """Run the whole benchmark; write ``<work>/bench-<N>.json`` and return the same figures."""
    settings.work.mkdir(parents=True, exist_ok=True)
    load_before = os.getloadavg()
    reused = prepare_lake(settings, say)
    name = settings.lake.name
    floor_s, floor_hours = measure_floor(settings.lake, settings.work / f"floor-{name}.duckdb")
    say(f"floor: {floor_s:.1f} s for {floor_hours:,} premise-hours")
    out = settings.work / f"out-{name}"
    timings = run_stages(settings.lake, out, settings.work / f"logs-{name}", say)
    # The same lake again with no new files: every stage should reuse its build.
    rerun = [
        (stage, *run_stage(stage, settings.lake, out, settings.work / f"logs-{name}" / f"{stage}-again.log"))
        for stage in STAGES
    ]
    startup_s = measure_startup()
    whole_s = sum(t.seconds for t in timings)
    rerun_s = sum(seconds for _, seconds, _ in rerun)
    say(f"rerun with no new files: {rerun_s:.1f} s")
    report: dict[str, Any] = {
        "premises": settings.premises,
        "days": settings.days,
        "seed": settings.seed,
        "lake": str(settings.lake),
        "lake_reused": reused,
        "cpus": os.cpu_count(),
        "floor": {"seconds": floor_s, "premise_hours": floor_hours},
        "stages": [asdict(t) | {"rows_per_second": t.rows_per_second} for t in timings],
        "whole_run": {
            "seconds": whole_s,
            "peak_mib": max(t.peak_mib for t in timings),
            "how": "sum of the stages' wall seconds, each in its own process one after another;"
            " peak = the largest stage's peak resident memory",
        },
        "whole_run_over_floor": whole_s / floor_s,
        "rerun": {
            "seconds": rerun_s,
            "over_whole_run": rerun_s / whole_s,
            "stages": {stage: {"seconds": seconds, "peak_mib": peak} for stage, seconds, peak in rerun},
            "how": "every stage again on the same lake and output folder, no file added",
        },
        "startup_seconds": startup_s,
        "estimators": compare_estimators(estimator_frame(settings.lake, out)),
    }
    if settings.csv:
        lake_csv = csv_lake(settings.lake, settings.work / f"{name}-csv")
        csv_out = settings.work / f"out-{name}-csv"
        shutil.rmtree(csv_out, ignore_errors=True)
        log = settings.work / f"logs-{name}" / "ingest-csv.log"
        csv_s, csv_peak = run_stage("ingest", lake_csv, csv_out, log)
        csv_rows = _counts(csv_out, ("ingest",))["ingest"]
        if csv_rows != timings[0].rows:
            raise BenchError(
                f"the CSV copy loaded {csv_rows:,} meter rows, the Parquet lake"
                f" {timings[0].rows:,}: see {log}"
            )
        parquet_s = timings[0].seconds
        report["csv_ingest"] = {
            "seconds": csv_s,
            "peak_mib": csv_peak,
            "meter_rows": csv_rows,
            "parquet_seconds": parquet_s,
            "csv_over_parquet": csv_s / parquet_s,
        }
    report["load_average"] = {"before": list(load_before), "after": list(os.getloadavg())}
    path = settings.work / f"bench-{settings.premises}.json"
    path.write_text(json.dumps(report, indent=2) + "\n")
    report["json"] = str(path)
    return report


def print_report(report: dict[str, Any]) -> None:
    """The per-stage table, then the whole run against the floor and the estimators' speed-ups."""
    from pipeline.cli import _console, _table

    console = _console()
    rows = [
        (
            s["stage"],
            round(s["seconds"], 1),
            s["counted"],
            s["rows"],
            round(s["rows_per_second"]),
            round(s["peak_mib"]),
        )
        for s in report["stages"]
    ]
    whole = report["whole_run"]
    rows.append(("whole run (sum)", round(whole["seconds"], 1), "", None, None, round(whole["peak_mib"])))
    title = f"{report['premises']:,} premises x {report['days']} days, each stage in its own process"
    console.print(_table(title, ("stage", "wall s", "rows counted", "rows", "rows/s", "peak MiB"), rows))
    floor = report["floor"]
    lines = [
        f"floor (one DuckDB query, meter Parquet -> {floor['premise_hours']:,} premise-hours):"
        f" {floor['seconds']:.1f} s; whole run / floor = {report['whole_run_over_floor']:.1f}",
    ]
    lines.append(
        "each stage's time includes starting Python and importing the command:"
        f" {report['startup_seconds']:.1f} s"
    )
    for name, e in report["estimators"].items():
        lines.append(
            f"{name}: vectorised {e['vectorised_s'] * 1000:.1f} ms,"
            f" reference loop {e['loop_s'] * 1000:.1f} ms,"
            f" speed-up {e['speedup']:.1f}x"
        )
    if "rerun" in report:
        r = report["rerun"]
        lines.append(
            f"rerun with no new files: {r['seconds']:.1f} s"
            f" ({100 * r['over_whole_run']:.1f} % of the whole run)"
        )
    if "csv_ingest" in report:
        c = report["csv_ingest"]
        lines.append(
            f"ingest with meter as CSV: {c['seconds']:.1f} s against {c['parquet_seconds']:.1f} s as Parquet"
            f" (CSV / Parquet = {c['csv_over_parquet']:.2f}), peak {c['peak_mib']:.0f} MiB"
        )
    load = report["load_average"]
    lines.append(
        f"load average (1 min) {load['before'][0]:.2f} before, {load['after'][0]:.2f} after, on"
        f" {report['cpus']} CPUs; figures written to {report['json']}"
    )
    for line in lines:
        console.print(line, markup=False)


def main_bench(premises: int, days: int, seed: int, work: Path, csv: bool, reuse: bool) -> int:
    """Entry of ``thermal-ledger bench``: 0 when it ran, 2 (one line) when it cannot."""
    settings = BenchSettings(premises, days, seed, work, csv, reuse)
    try:
        if premises < 1 or days < 1:
            raise BenchError(f"--premises {premises} --days {days}: both must be at least 1")
        report = run_bench(settings, say=lambda text: print(text, file=sys.stderr, flush=True))
    except BenchError as exc:
        print(f"thermal-ledger bench: {exc}", file=sys.stderr)
        return 2
    print_report(report)
    return 0
