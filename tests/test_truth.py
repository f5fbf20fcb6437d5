"""Off-policy estimates against the simulator's truth on the committed sample lake.

The simulator rolled every default candidate out on-policy on the same weather,
prices, occupancy and base load as the logged history (truth/policy_values.parquet,
which the pipeline never reads), so each estimate has a known right answer.
"""

from __future__ import annotations

from pathlib import Path
from types import SimpleNamespace

import polars as pl
import pytest

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"


@pytest.fixture(scope="module")
def evaluated(sample_lake_run):
    config, summary = sample_lake_run.config, sample_lake_run.summary
    values = pl.read_parquet(SAMPLE_LAKE / "truth" / "policy_values.parquet").filter(
        pl.col("epsilon") == config.target_epsilon
    )
    behavior = pl.read_parquet(SAMPLE_LAKE / "truth" / "policy_values.parquet").filter(
        pl.col("policy_name") == "behavior"
    )
    truth = values.join(
        behavior.select("premise_id", pl.col("value_usd").alias("behavior_usd")),
        on="premise_id",
        how="left",
        nulls_equal=True,
    ).select(
        "policy_name",
        pl.col("premise_id").fill_null("portfolio").alias("key"),
        (pl.col("value_usd") - pl.col("behavior_usd")).alias("true_savings"),
    )
    recommended = summary.evaluation.savings.filter(pl.col("recommended"))
    return SimpleNamespace(rows=recommended.join(truth, on=["policy_name", "key"]), config=config)


def _portfolio(evaluated, policy_name):
    rows = evaluated.rows.filter((pl.col("scope") == "portfolio") & (pl.col("policy_name") == policy_name))
    assert rows.height == 1
    return rows.row(0, named=True)


@pytest.mark.parametrize("policy_name", ["setback-1", "setback-2", "setback-2-early"])
def test_portfolio_interval_covers_the_true_savings(evaluated, policy_name):
    """The recommended portfolio 95 % interval covers the candidate's true savings."""
    row = _portfolio(evaluated, policy_name)
    assert row["status"] == "ok"
    assert row["ci_low"] <= row["true_savings"] <= row["ci_high"], row


def test_per_premise_intervals_cover_the_truth_near_their_nominal_rate(evaluated, record_property):
    """Across premises with enough evidence, 95 % intervals cover the truth at least 85 % of the time."""
    premises = evaluated.rows.filter((pl.col("scope") == "premise") & (pl.col("status") == "ok"))
    covered = (
        (pl.col("ci_low") <= pl.col("true_savings")) & (pl.col("true_savings") <= pl.col("ci_high"))
    ).mean()
    rate = premises.select(covered).item()
    record_property("premise_coverage", rate)
    print(f"per-premise coverage {rate:.3f} over {premises.height} supported premise-policy rows")
    assert premises.height >= 30 and rate >= 0.85


def test_lower_bound_is_below_the_truth_at_least_at_its_level(evaluated):
    """The 95 % lower bound on savings lies below the true savings in at least 95 % of rows."""
    below = evaluated.rows.select((pl.col("lower_bound_usd") <= pl.col("true_savings")).mean()).item()
    assert below >= 0.95


@pytest.mark.parametrize("policy_name", ["setback-1", "setback-2", "setback-2-early"])
def test_with_the_true_behaviour_probabilities_the_interval_covers(evaluated, policy_name):
    """Weighted IS with the simulator's own behaviour probabilities: the 95 % interval covers the truth.

    Isolates the estimator and its bootstrap from the behaviour model (Sutton and Barto 2018,
    eq. 5.6 needs the true b for consistency).
    """
    from pipeline import estimators, store
    from pipeline.episodes import load_steps
    from pipeline.evaluate import target_probabilities
    from pipeline.simulate import true_step_probabilities

    config = evaluated.config
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        steps = load_steps(con)
    steps = steps.with_columns(pl.Series("b", true_step_probabilities(SAMPLE_LAKE, steps)))
    rule = next(r for r in config.candidates if r.name == policy_name)
    table = rule.table(config.state, config.actions, config.target_epsilon)
    frame = steps.select("episode_id", "t", "reward", "b").with_columns(
        pl.Series("pi", target_probabilities(steps, table, config))
    )
    row = estimators.bootstrap_interval(frame, "weighted_is", savings=True, n_replicates=400, seed=1).row(
        0, named=True
    )
    truth = _portfolio(evaluated, policy_name)["true_savings"]
    assert row["ci_low"] <= truth <= row["ci_high"], (row, truth)


def test_bootstrap_lower_bound_is_below_the_truth_in_most_supported_rows(evaluated, record_property):
    """The approximate one-sided 95 % bootstrap bound lies below the true savings in at least 85 % of rows."""
    rows = evaluated.rows.filter(pl.col("status") == "ok")
    below = rows.select((pl.col("lower_bound_bootstrap_usd") <= pl.col("true_savings")).mean()).item()
    record_property("bootstrap_bound_below_truth", below)
    print(f"bootstrap lower bound below the truth in {below:.3f} of {rows.height} supported rows")
    assert rows.height >= 30 and below >= 0.85


def _true_parts(config, policy_name):
    """The simulator's true comfort cost (USD and °C-hours) and bill savings per visible episode."""
    values = pl.read_parquet(SAMPLE_LAKE / "truth" / "policy_values.parquet").filter(
        pl.col("premise_id").is_null()
    )
    policy = values.filter(
        (pl.col("policy_name") == policy_name) & (pl.col("epsilon") == config.target_epsilon)
    ).row(0, named=True)
    logged = values.filter(pl.col("policy_name") == "behavior").row(0, named=True)
    # value = -(bill) - comfort penalty (pipeline.simulate.episode_return), so bill = -value - penalty.
    bill = -policy["value_usd"] - policy["comfort_penalty_usd"]
    logged_bill = -logged["value_usd"] - logged["comfort_penalty_usd"]
    return SimpleNamespace(
        comfort_usd=policy["comfort_penalty_usd"],
        comfort_degree_hours=policy["comfort_penalty_usd"] / config.comfort_penalty_usd_per_degree_hour,
        bill_savings=logged_bill - bill,
    )


@pytest.mark.parametrize("policy_name", ["setback-1", "setback-2", "setback-2-early"])
def test_portfolio_comfort_cost_interval_covers_the_true_comfort_cost(evaluated, policy_name):
    """The portfolio's 95 % comfort-cost interval (USD and °C-hours) covers the candidate's true comfort
    cost from the simulator's on-policy roll-out (truth/policy_values.parquet)."""
    row = _portfolio(evaluated, policy_name)
    truth = _true_parts(evaluated.config, policy_name)
    assert row["comfort_cost_usd_ci_low"] <= truth.comfort_usd <= row["comfort_cost_usd_ci_high"], (
        row,
        truth,
    )
    low, high = row["comfort_degree_hours_ci_low"], row["comfort_degree_hours_ci_high"]
    assert low <= truth.comfort_degree_hours <= high


@pytest.mark.parametrize("policy_name", ["setback-1", "setback-2", "setback-2-early"])
def test_portfolio_bill_savings_interval_covers_the_true_energy_only_savings(evaluated, policy_name):
    """The energy-only bill savings interval covers the true bill savings (true value plus its penalty)."""
    row = _portfolio(evaluated, policy_name)
    truth = _true_parts(evaluated.config, policy_name)
    assert row["bill_ci_low"] <= truth.bill_savings <= row["bill_ci_high"], (row, truth)
