"""Episode building and estimator throughput on a simulated lake of many homes.

Not a test. Generates a lake with the project's simulator (``--premises`` homes,
``--days`` days), ingests it, then times the episode build (SQL only) and the
behaviour model fit (with its held-out choice of the number of habit types) and the
off-policy estimators, vectorised against a plain per-episode reference loop,
and reports the speed-up ratio rather than a raw time:

    PYTHONPATH=. python bench/pipeline_bench.py --premises 1000 --days 92 --work /tmp/bench_pipeline
"""

from __future__ import annotations

import argparse
import resource
import shutil
import time
from pathlib import Path

import numpy as np
import polars as pl

from pipeline import config as config_module
from pipeline import estimators, ingest, store
from pipeline.behavior import fit_behavior
from pipeline.episodes import build, load_steps
from pipeline.evaluate import target_probabilities
from pipeline.simulate import generate_lake


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


def reference_per_decision_is(episode, t, reward, pi, b) -> float:
    """Per-decision importance sampling with a plain loop (Precup, Sutton and Singh 2000)."""
    total, episodes, weight = 0.0, 0, 1.0
    for i in range(len(episode)):
        if t[i] == 0:
            weight = 1.0
            episodes += 1
        weight *= pi[i] / b[i]
        total += weight * reward[i]
    return total / episodes


def timed(fn, *args, repeat: int = 3):
    best, value = float("inf"), None
    for _ in range(repeat):
        started = time.perf_counter()
        value = fn(*args)
        best = min(best, time.perf_counter() - started)
    return best, value


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--premises", type=int, default=1000)
    parser.add_argument("--days", type=int, default=92)
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--work", type=Path, default=Path("bench_out/pipeline"))
    args = parser.parse_args()
    shutil.rmtree(args.work, ignore_errors=True)

    started = time.perf_counter()
    generate_lake(args.work / "lake", n_premises=args.premises, seed=args.seed, days=args.days)
    print(f"simulated {args.premises} homes x {args.days} days in {time.perf_counter() - started:.1f} s")

    config = config_module.load(overrides={"lake": str(args.work / "lake"), "out": str(args.work / "out")})
    started = time.perf_counter()
    ingest.ingest(config)
    print(f"ingest: {time.perf_counter() - started:.1f} s")

    with store.warehouse(config.warehouse_path) as con:
        meter_rows = store.execute(con, "select count(*) from meter_read")[0][0]
        started = time.perf_counter()
        counts = build(con, config)
        build_seconds = time.perf_counter() - started
        steps = load_steps(con)
    print(
        f"episode build (SQL): {build_seconds:.1f} s for {meter_rows:,} meter rows"
        f" -> {counts.hours:,} premise-hours, {counts.episodes_used:,} episodes, {counts.steps:,} steps"
        f" ({counts.hours / build_seconds:,.0f} premise-hours/s)"
    )

    started = time.perf_counter()
    behavior = fit_behavior(steps, config)
    print(
        f"behaviour model ({config.behavior_model}, {behavior.n_types} types, k={behavior.prior_strength:g},"
        f" chosen by 5-fold held-out likelihood): {time.perf_counter() - started:.1f} s"
    )
    rule = config.candidates[0]
    frame = steps.select("episode_id", "t", "reward").with_columns(
        pl.Series("pi", target_probabilities(steps, rule.table(config.state, config.actions, 0.05), config)),
        pl.Series("b", behavior.probabilities(steps)),
    )
    arrays = [frame[c].to_numpy() for c in ("episode_id", "t", "reward", "pi", "b")]
    vec_wis, wis = timed(estimators.weighted_is, frame)
    loop_wis, wis_ref = timed(reference_weighted_is, arrays[0], arrays[2], arrays[3], arrays[4], repeat=1)
    vec_pdis, pdis = timed(estimators.per_decision_is, frame)
    loop_pdis, pdis_ref = timed(reference_per_decision_is, *arrays, repeat=1)
    assert np.isclose(wis["estimate"][0], wis_ref) and np.isclose(pdis["estimate"][0], pdis_ref)
    print(f"estimators on {frame.height:,} steps / {counts.episodes_used:,} episodes:")
    print(f"  weighted_is      vectorised is {loop_wis / vec_wis:,.0f}x the reference loop")
    print(f"  per_decision_is  vectorised is {loop_pdis / vec_pdis:,.0f}x the reference loop")
    boot, _ = timed(estimators.bootstrap_interval, frame, estimators.weighted_per_decision_is, repeat=1)
    print(f"  bootstrap, 1000 replicates of weighted_per_decision_is: {boot:.1f} s")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak memory: {peak:,.0f} MiB")


if __name__ == "__main__":
    main()
