"""The safety test against the simulator's truth over fresh simulated lakes.

For each seed: simulate a small lake, run every stage on it (the run's seed is the lake's),
roll every policy of the run out in the simulator (``pipeline.truth``) and keep the rows.
Then, over all scope-lakes the safety test judged (a learned policy with enough evidence):

* false-pass rate: proposed although the true improvement on the held-out episodes is < 0;
* power: share proposed among scope-lakes whose true improvement exceeds 0.20 USD/episode;
* tightness: true savings minus the bound (mean and median), for the bound in use;

and the held-out intervals' coverage of the learned policies' true savings. Writes every
truth row to ``<work>/safety-study.parquet`` and the figures to ``<work>/safety-study.json``.

    PYTHONPATH=. python bench/safety_study.py --seeds 1 2 3 --work /tmp/study
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import polars as pl

from pipeline import config as config_module
from pipeline import stages, store, truth
from pipeline.simulate import generate_lake

POWER_THRESHOLD_USD = 0.20


def one_lake(seed: int, work: Path, premises: int, days: int, overrides: dict) -> pl.DataFrame:
    """Simulate, run and score one lake; its policy_truth rows with the seed."""
    tag = "-".join(f"{k}{v}" for k, v in sorted(overrides.items()) if k.startswith(("improve_", "safety_")))
    lake, out = work / f"lake-s{seed}", work / f"out-s{seed}-{tag}"
    if not (lake / "truth" / "episodes.parquet").is_file():
        generate_lake(lake, n_premises=premises, seed=seed, days=days)
    config = config_module.load(overrides={"lake": str(lake), "out": str(out), "seed": seed, **overrides})
    stages.run_all(config)
    run_id, _, ledger = truth.read_run(config.ledger_path)
    params = truth.lake_params(lake, seed, days=days)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        behavior = stages._load_behavior(con, "behavior", config)
        homes = store.frame(con, "select premise_id, cohort, comfort_cool_c, comfort_heat_c from premise")
    rows = truth.policy_truth(config, ledger, behavior, homes, params)
    return rows.with_columns(pl.lit(seed).alias("seed"), pl.lit(run_id).alias("run_id"))


def figures(rows: pl.DataFrame) -> dict:
    """The study's rates and tightness from the truth rows of every lake."""
    tests = rows.filter(pl.col("estimator").str.starts_with("safety_test"))
    proposed = pl.col("outcome") == "proposed"
    true = pl.col("true_savings_usd_per_episode")
    strong = tests.filter(true > POWER_THRESHOLD_USD)
    learned = rows.filter(
        (pl.col("kind") == "learned")
        & ~pl.col("estimator").str.starts_with("safety_test")
        & pl.col("covered").is_not_null()
    )
    return {
        "lakes": rows["seed"].n_unique(),
        "scope_lakes_tested": tests.height,
        "proposed": tests.filter(proposed).height,
        "false_passes": tests.filter(proposed & (true < 0)).height,
        "false_pass_rate": tests.filter(proposed & (true < 0)).height / max(tests.height, 1),
        "truly_better_than_0.20": strong.height,
        "passed_of_those": strong.filter(proposed).height,
        "power_above_0.20": strong.filter(proposed).height / max(strong.height, 1),
        "bound_held_share": float(tests["bound_held"].mean() or 0.0),
        "tightness_mean_usd": float(tests["tightness_usd"].mean() or 0.0),
        "tightness_median_usd": float(tests["tightness_usd"].median() or 0.0),
        "true_savings_of_proposed_mean_usd": float(
            tests.filter(proposed)["true_savings_usd_per_episode"].mean() or 0.0
        ),
        "learned_interval_rows": learned.height,
        "learned_interval_coverage": float(learned["covered"].mean() or 0.0),
        "by_scope": {
            scope: {
                "tested": part.height,
                "proposed": part.filter(proposed).height,
                "false_passes": part.filter(proposed & (true < 0)).height,
                "above_0.20": part.filter(true > POWER_THRESHOLD_USD).height,
                "passed_above_0.20": part.filter(proposed & (true > POWER_THRESHOLD_USD)).height,
            }
            for (scope,), part in tests.group_by("scope", maintain_order=True)
        },
    }


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", required=True)
    parser.add_argument("--work", type=Path, required=True)
    parser.add_argument("--premises", type=int, default=60)
    parser.add_argument("--days", type=int, default=92)
    parser.add_argument("--replicates", type=int, default=200, help="bootstrap replicates (default 200)")
    parser.add_argument("--bound", default="student_t", help="safety_bound setting (default student_t)")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=JSON",
        help="another setting, e.g. improve_min_count=20",
    )
    args = parser.parse_args(argv)
    args.work.mkdir(parents=True, exist_ok=True)
    overrides = {
        "bootstrap_replicates": args.replicates,
        "safety_bound": args.bound,
        "presence_sources": ["occupancy_flag"],
    }
    for item in args.set:
        key, value = item.split("=", 1)
        overrides[key] = json.loads(value)
    frames = []
    for seed in args.seeds:
        began = time.perf_counter()
        frames.append(one_lake(seed, args.work, args.premises, args.days, overrides))
        print(f"seed {seed}: {time.perf_counter() - began:.0f} s", flush=True)
    rows = pl.concat(frames, how="diagonal_relaxed")
    stem = "-".join(["safety-study", *(item.replace("=", "") for item in args.set), args.bound])
    rows.write_parquet(args.work / f"{stem}.parquet")
    result = {"seeds": args.seeds, "premises": args.premises, "days": args.days, **overrides}
    result |= figures(rows)
    (args.work / f"{stem}.json").write_text(json.dumps(result, indent=2, default=str))
    print(json.dumps(result, indent=2, default=str))
    return result


if __name__ == "__main__":
    main()
