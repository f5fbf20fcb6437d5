"""How often do the estimators' intervals cover the truth? A study over simulated lakes.

Not a test (it takes minutes). For each seed it simulates a lake with the true values
of the default candidates, runs ingest and the episode build (homes with presence
sensing only; a lake already under --work is reused), fits the behaviour model
(or takes the simulator's true probabilities, --behavior-model true) and, for each
candidate and estimator, computes the portfolio savings estimate and its 95 %
percentile bootstrap interval, both with the episodes pooled and stratified by
premise. Prints coverage, mean absolute error and mean width per estimator;
DEVELOPERS.md ("Choosing the behaviour model and the estimator") quotes these runs:

    PYTHONPATH=. python bench/coverage_study.py --seeds $(seq 11 26) --work /tmp/cov
    PYTHONPATH=. python bench/coverage_study.py --seeds $(seq 11 26) --work /tmp/cov --behavior-model counts
    PYTHONPATH=. python bench/coverage_study.py --seeds $(seq 11 26) --work /tmp/cov --behavior-model true

``--season winter`` studies heating lakes (``winter_params``: 40 homes, December and January)
instead, kept under ``<work>/winter-seed<S>``.
"""

from __future__ import annotations

import argparse
import shutil
from pathlib import Path

import numpy as np
import polars as pl

from pipeline import config as config_module
from pipeline import estimators, ingest, store
from pipeline.behavior import fit_behavior
from pipeline.episodes import build, load_steps
from pipeline.evaluate import _model_columns, target_probabilities
from pipeline.simulate import generate_lake, true_step_probabilities
from pipeline.simulate.params import winter_params

ESTIMATORS = ("weighted_is", "weighted_per_decision_is", "doubly_robust")


def study_lake(
    seed: int, work: Path, replicates: int, behavior_model: str, season: str = "summer"
) -> list[dict]:
    root = work / (f"seed{seed}" if season == "summer" else f"{season}-seed{seed}")
    config = config_module.load(
        overrides={
            "lake": str(root / "lake"),
            "out": str(root / "out"),
            "presence_sources": ["occupancy_flag"],
            "behavior_model": "counts" if behavior_model == "counts" else "types",
        }
    )
    if not (root / "lake" / "truth" / "policy_values.parquet").exists() or not config.warehouse_path.exists():
        shutil.rmtree(root, ignore_errors=True)
        if season == "winter":
            generate_lake(root / "lake", params=winter_params(seed=seed), policy_values=True)
        else:
            generate_lake(root / "lake", n_premises=60, seed=seed, policy_values=True)
        ingest.ingest(config)
        with store.warehouse(config.warehouse_path) as con:
            build(con, config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        steps = load_steps(con)
    if behavior_model == "true":
        b = true_step_probabilities(root / "lake", steps)
    else:
        b = fit_behavior(steps, config).probabilities(steps)
    values = pl.read_parquet(root / "lake" / "truth" / "policy_values.parquet").filter(
        pl.col("premise_id").is_null()
    )
    behavior_value = values.filter(pl.col("policy_name") == "behavior")["value_usd"][0]
    episodes = steps.group_by("premise_id").agg(pl.col("episode_id").n_unique().alias("n"))
    rows = []
    for rule in config.candidates:
        table = rule.table(config.state, config.actions, config.target_epsilon)
        truth = (
            values.filter(
                (pl.col("policy_name") == rule.name) & (pl.col("epsilon") == config.target_epsilon)
            )["value_usd"][0]
            - behavior_value
        )
        frame = steps.select("episode_id", "t", "reward", pl.col("premise_id").alias("group")).with_columns(
            pl.Series("pi", target_probabilities(steps, table, config)), pl.Series("b", b)
        )
        frame = pl.concat([frame, _model_columns(steps, table, "reward", config)], how="horizontal")
        for name in ESTIMATORS:
            for combined in ("pooled", "premise"):
                data = frame if combined == "premise" else frame.with_columns(pl.lit("all").alias("group"))
                labels, point, reps = estimators.bootstrap_replicates(
                    data, name, savings=True, n_replicates=replicates, seed=1
                )
                if combined == "premise":
                    n = dict(zip(episodes["premise_id"], episodes["n"], strict=True))
                    weight = np.array([n[label] for label in labels], dtype=float)

                    def mean(x, weight=weight):
                        ok = np.isfinite(x)
                        return (np.where(ok, x, 0.0) * weight).sum(-1) / (ok * weight).sum(-1)

                    point, reps = mean(point), mean(reps)
                else:
                    point, reps = point[0], reps[:, 0]
                low, high = np.nanquantile(reps, [0.025, 0.975])
                rows.append(
                    {
                        "seed": seed,
                        "policy": rule.name,
                        "estimator": name,
                        "combined": combined,
                        "truth": truth,
                        "estimate": float(point),
                        "covered": bool(low <= truth <= high),
                        "abs_error": abs(float(point) - truth),
                        "width": high - low,
                    }
                )
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--seeds", type=int, nargs="+", default=[11, 12, 13, 14, 15, 16])
    parser.add_argument("--replicates", type=int, default=400)
    parser.add_argument("--work", type=Path, default=Path("bench_out/coverage"))
    parser.add_argument(
        "--behavior-model",
        choices=("types", "counts", "true"),
        default="types",
        help="behaviour probabilities: a fitted model, or the simulator's own (the ideal)",
    )
    parser.add_argument("--season", choices=("summer", "winter"), default="summer")
    args = parser.parse_args()
    rows = [
        row
        for seed in args.seeds
        for row in study_lake(seed, args.work, args.replicates, args.behavior_model, args.season)
    ]
    result = pl.DataFrame(rows)
    summary = (
        result.group_by("estimator", "combined")
        .agg(
            pl.len().alias("cases"),
            pl.col("covered").sum().alias("covered"),
            pl.col("abs_error").mean().round(3),
            pl.col("width").mean().round(3),
        )
        .sort("covered", descending=True)
    )
    with pl.Config(tbl_rows=50, tbl_width_chars=140):
        print(summary)


if __name__ == "__main__":
    main()
