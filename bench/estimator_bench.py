"""Estimator speed against plain per-step loops on a synthetic frame of a 1,000-home lake's size.

Not a test. Builds 44,000 episodes of 1 to 6 steps (about 154,000 steps) with random
rewards and pi, b in (0.01, 1), optionally spread over ``--groups`` group labels,
and reports each vectorised estimator's speed as a multiple of the plain loop
(``reference_weighted_is`` for weighted IS, ``reference_per_decision_is`` for the
per-decision family). The two are timed alternately and the best of
``--repeat`` runs of each kept, so load from other processes hits both alike:

    PYTHONPATH=. python bench/estimator_bench.py --groups 1000
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import polars as pl

from pipeline import estimators
from pipeline.bench import reference_per_decision_is, reference_weighted_is
from pipeline.cli import _keep_freed_memory


def synthetic_steps(n_episodes: int, groups: int, seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, 7, n_episodes)
    n = int(lengths.sum())
    starts = np.cumsum(lengths) - lengths
    columns = {
        "episode_id": np.repeat(np.arange(n_episodes), lengths),
        "t": np.arange(n) - np.repeat(starts, lengths),
        "reward": rng.normal(-1.0, 0.5, n),
        "pi": rng.uniform(0.01, 1.0, n),
        "b": rng.uniform(0.01, 1.0, n),
        "q_hat": rng.normal(-1.0, 0.5, n),
        "v_hat": rng.normal(-1.0, 0.5, n),
    }
    if groups > 1:
        names = np.array([f"home-{k:05d}" for k in range(groups)])
        columns["group"] = np.repeat(names[rng.integers(0, groups, n_episodes)], lengths)
    return pl.DataFrame(columns)


def best_of_alternating(fast, slow, repeat: int) -> tuple[float, float]:
    best_fast = best_slow = float("inf")
    for _ in range(repeat):
        started = time.perf_counter()
        fast()
        best_fast = min(best_fast, time.perf_counter() - started)
        started = time.perf_counter()
        slow()
        best_slow = min(best_slow, time.perf_counter() - started)
    return best_fast, best_slow


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--episodes", type=int, default=44_000)
    parser.add_argument("--groups", type=int, default=1)
    parser.add_argument("--repeat", type=int, default=7)
    parser.add_argument("--seed", type=int, default=11)
    args = parser.parse_args()
    _keep_freed_memory()  # as the thermal-ledger command does before any work
    steps = synthetic_steps(args.episodes, args.groups, args.seed)
    episode, t, reward, pi, b = (steps[c].to_numpy() for c in ("episode_id", "t", "reward", "pi", "b"))
    loops = {
        "weighted_is": lambda: reference_weighted_is(episode, reward, pi, b),
        "per_decision_is": lambda: reference_per_decision_is(episode, t, reward, pi, b),
    }
    print(f"{steps.height:,} steps / {args.episodes:,} episodes in {args.groups:,} group(s)")
    for name, loop in (
        ("weighted_is", "weighted_is"),
        ("per_decision_is", "per_decision_is"),
        ("weighted_per_decision_is", "per_decision_is"),
        ("doubly_robust", "per_decision_is"),
    ):
        function = getattr(estimators, name)
        fast, slow = best_of_alternating(lambda f=function: f(steps), loops[loop], args.repeat)
        ratio = slow / fast
        print(f"  {name:25s} {fast * 1e3:6.2f} ms, {ratio:5.1f}x reference_{loop} ({slow * 1e3:.0f} ms)")


if __name__ == "__main__":
    main()
