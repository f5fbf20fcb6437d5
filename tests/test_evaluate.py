"""Evaluation wiring: target probabilities, scopes, savings arithmetic and the ledger tables' grain."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline import estimators
from pipeline.behavior import CohortCounts, HabitTypes
from pipeline.config import Config
from pipeline.estimators import OFF_POLICY_NAMES
from pipeline.estimators.registry import off_policy_estimator
from pipeline.evaluate import (
    _finish_savings,
    _shrink_to_cohort,
    evaluate_candidates,
    evaluate_policy,
    horizon_report,
    state_values,
    target_probabilities,
)
from pipeline.policies import SetbackRule

# Three tiny episodes; weights rho = prod pi / b are 4, 0.5 and 1, returns -3, -4 and -2.
THREE = pl.DataFrame(
    {
        "episode_id": [1, 1, 2, 3, 3, 3],
        "t": [0, 1, 0, 0, 1, 2],
        "reward": [-1.0, -2.0, -4.0, -1.0, -1.0, 0.0],
        "pi": [0.5, 1.0, 0.2, 0.9, 0.3, 1.0],
        "b": [0.25, 0.5, 0.4, 0.9, 0.6, 0.5],
    }
)


def test_weighted_importance_sampling_matches_hand_computation_on_three_episodes():
    """WIS = sum(rho G) / sum(rho) = (4*-3 + 0.5*-4 + 1*-2) / 5.5 (Sutton and Barto 2018, eq. 5.6)."""
    row = estimators.weighted_is(THREE).row(0, named=True)
    assert row["estimate"] == pytest.approx(-16 / 5.5)
    assert row["n_episodes"] == 3
    # Kish (1965): (sum w)^2 / sum w^2 = 5.5^2 / 17.25.
    assert row["ess"] == pytest.approx(5.5**2 / 17.25)
    assert estimators.ordinary_is(THREE)["estimate"][0] == pytest.approx(-16 / 3)


def test_target_probability_of_logged_actions_reads_the_rule_table():
    """A deterministic rule softened by epsilon gives 1 - eps + eps/3 to its own action, eps/3 otherwise."""
    config = Config(actions=(-1, 0, 1))
    rule = SetbackRule("r", depth_c=2)
    keys = config.state.encode([8, 8], [5.0, 5.0], [0, 0], [0, 0], [4, 4])
    steps = pl.DataFrame({"state_key": keys, "action": [1, 0]})
    pi = target_probabilities(steps, rule.table(config.state, config.actions, 0.3), config)
    np.testing.assert_allclose(pi, [0.7 + 0.1, 0.1])


def _priced(steps: pl.DataFrame, rng: np.random.Generator, horizon: int, price: float = 0.10) -> pl.DataFrame:
    """Random energy costs per step, °C-hours on each episode's last step; reward as sql/step.sql makes it."""
    last = steps["t"].to_numpy() == horizon - 1
    return steps.with_columns(
        pl.Series("cost_usd", rng.uniform(0.1, 1.0, steps.height)),
        pl.Series("recovery_cost_usd", np.where(last, rng.uniform(0.0, 0.3, steps.height), 0.0)),
        pl.Series("comfort_degree_hours", np.where(last, rng.integers(0, 3, steps.height), 0).astype(float)),
    ).with_columns(
        (-(pl.col("cost_usd") + pl.col("recovery_cost_usd") + price * pl.col("comfort_degree_hours"))).alias(
            "reward"
        )
    )


def test_target_equal_to_behaviour_gives_zero_savings_at_every_scope():
    """When pi equals b every estimate is the on-policy average, so savings are exactly zero."""
    rng = np.random.default_rng(7)
    n_episodes, horizon = 40, 3
    steps = _priced(
        pl.DataFrame(
            {
                "episode_id": np.repeat(np.arange(n_episodes), horizon),
                "t": np.tile(np.arange(horizon), n_episodes),
                "kwh": rng.uniform(0.5, 2.0, n_episodes * horizon),
                "recovery_kwh": np.zeros(n_episodes * horizon),
                "premise_id": np.repeat(np.where(np.arange(n_episodes) < 20, "A", "B"), horizon),
                "cohort": "c",
            }
        ),
        rng,
        horizon,
    )
    b = rng.uniform(0.2, 0.9, steps.height)
    days = pl.DataFrame({"premise_id": ["A", "B"], "cohort": ["c", "c"], "days_observed": [30, 30]})
    savings, diagnostics = evaluate_policy(steps, b, b, days, Config(bootstrap_replicates=50))
    assert set(savings["scope"]) == {"premise", "cohort", "portfolio"}
    np.testing.assert_allclose(savings["savings_usd_per_episode"].to_numpy(), 0.0, atol=1e-12)
    np.testing.assert_allclose(savings["savings_kwh_annual"].to_numpy(), 0.0, atol=1e-9)
    portfolio = savings.filter(pl.col("scope") == "portfolio").row(0, named=True)
    assert portfolio["n_episodes"] == n_episodes and portfolio["ess"] == pytest.approx(n_episodes)
    assert diagnostics.filter(pl.col("scope") == "premise").height == 2


def test_premise_savings_shrink_toward_cohort_by_the_empirical_bayes_weight():
    """Weight on a premise's own estimate is tau^2 / (tau^2 + se^2) (method of moments, e.g. Efron 2010);
    its kWh estimate is mixed with the cohort's in the same proportion."""
    from statistics import NormalDist

    z = NormalDist().inv_cdf(0.975)
    own = [1.0, -1.0, 3.0, -3.0]
    own_kwh = [2.0, -2.0, 6.0, -6.0]
    se = 1.0
    rows = pl.DataFrame(
        {
            "scope": ["premise"] * 4 + ["cohort"],
            "key": ["A", "B", "C", "D", "c"],
            "estimator": "weighted_is",
            "savings_usd_per_episode": [*own, 0.5],
            "savings_kwh_per_episode": [*own_kwh, 4.0],
            "ci_low": [s - z * se for s in own] + [0.0],
            "ci_high": [s + z * se for s in own] + [1.0],
        }
    )
    cohorts = pl.DataFrame({"premise_id": ["A", "B", "C", "D"], "cohort": "c"})
    out = _shrink_to_cohort(rows, cohorts, Config()).filter(pl.col("scope") == "premise").sort("key")
    tau2 = np.var(own, ddof=1) - se**2
    weight = tau2 / (tau2 + se**2)
    np.testing.assert_allclose(out["shrinkage"].to_numpy(), 1 - weight)
    np.testing.assert_allclose(
        out["shrunk_savings_usd_per_episode"].to_numpy(), [weight * s + (1 - weight) * 0.5 for s in own]
    )
    np.testing.assert_allclose(
        out["shrunk_savings_kwh_per_episode"].to_numpy(), [weight * k + (1 - weight) * 4.0 for k in own_kwh]
    )


def _estimated_rows() -> pl.DataFrame:
    """Estimator output for four premises of cohort 'c', the cohort and the portfolio, before savings.

    Premise savings are 1, -1, 3, -3 USD per episode with standard error 1, so
    tau^2 = var - se^2 = 20/3 - 1 = 17/3 and each premise keeps 17/20 of its own
    estimate; the cohort saves 8. Premise D (ess 5) and the portfolio (ess 4)
    have too little evidence. Every row has 20 episodes per 40 observed days.
    """
    from statistics import NormalDist

    z = NormalDist().inv_cdf(0.975)
    own = [1.0, -1.0, 3.0, -3.0, 8.0, 8.0]
    return pl.DataFrame(
        {
            "scope": ["premise"] * 4 + ["cohort", "portfolio"],
            "key": ["A", "B", "C", "D", "c", "portfolio"],
            "estimator": "weighted_is",
            "value_behavior_usd": -10.0,
            "value_policy_usd": [-10.0 + s for s in own],
            "kwh_behavior": 5.0,
            "kwh_policy": [5.0 - 2 * s for s in own],
            "ci_low": [s - z for s in own],
            "ci_high": [s + z for s in own],
            "lower_bound_bootstrap_usd": [s - 2 for s in own],
            "ess": [30.0, 30.0, 30.0, 5.0, 60.0, 4.0],
            "max_weight_share": 0.1,
            "n_unsupported_steps": 0,
            "n_episodes": 20,
            "days_observed": 40,
        }
    )


def test_annual_figures_come_from_the_per_episode_figure_beside_them():
    """Annual USD and kWh are the row's own per-episode figures times 20 / 40 x 122 = 61 episodes a year,
    so a premise that loses money per episode cannot show an annual gain; shrunk figures have their own."""
    premise_cohort = pl.DataFrame({"premise_id": ["A", "B", "C", "D"], "cohort": "c"})
    out = _finish_savings(_estimated_rows(), premise_cohort, Config()).sort("key")
    b = out.filter(pl.col("key") == "B").row(0, named=True)
    # B loses 1 USD per episode; its cohort pulls the shrunk figure to 0.85 * -1 + 0.15 * 8 = 0.35.
    shown = out.filter(pl.col("savings_usd_annual").is_not_null())
    assert (shown["savings_usd_per_episode"].sign() == shown["savings_usd_annual"].sign()).all()
    assert b["savings_usd_annual"] == pytest.approx(-61.0)
    assert b["savings_kwh_annual"] == pytest.approx(-2.0 * 61)
    assert b["episodes_per_year"] == pytest.approx(61.0)
    assert b["shrunk_savings_usd_per_episode"] == pytest.approx(0.35)
    assert b["shrunk_savings_usd_annual"] == pytest.approx(0.35 * 61)
    assert b["shrunk_savings_kwh_annual"] == pytest.approx((0.85 * -2 + 0.15 * 16) * 61)


def test_rows_with_insufficient_evidence_show_neither_annual_figure_of_their_own():
    """A thin row hides its per-episode and both annual figures; a thin premise keeps both shrunk annual
    figures, and a thin portfolio row, whose 'shrunk' figure would be its own, keeps none."""
    premise_cohort = pl.DataFrame({"premise_id": ["A", "B", "C", "D"], "cohort": "c"})
    out = _finish_savings(_estimated_rows(), premise_cohort, Config())
    thin = out.filter(pl.col("status") == "insufficient_evidence").sort("key")
    assert thin["key"].to_list() == ["D", "portfolio"]
    own = ["savings_usd_per_episode", "savings_usd_annual", "savings_kwh_annual", "ci_low", "ci_high"]
    assert thin.select(pl.col(own).is_null().all()).row(0) == (True,) * len(own)
    d, portfolio = thin.row(0, named=True), thin.row(1, named=True)
    # D: 0.85 * -3 + 0.15 * 8 = -1.35 USD and 0.85 * -6 + 0.15 * 16 = -2.7 kWh per episode.
    assert d["shrunk_savings_usd_annual"] == pytest.approx(-1.35 * 61)
    assert d["shrunk_savings_kwh_annual"] == pytest.approx(-2.7 * 61)
    shrunk = ["shrunk_savings_usd_per_episode", "shrunk_savings_usd_annual", "shrunk_savings_kwh_annual"]
    assert all(portfolio[c] is None for c in shrunk)


def _logged_steps(config: Config, seed: int = 11) -> pl.DataFrame:
    """Sixty three-step cooling episodes of premises A and B (cohort c) with random actions and costs."""
    rng = np.random.default_rng(seed)
    n_episodes, horizon = 60, 3
    keys = config.state.encode(
        np.full(n_episodes * horizon, 9),
        np.full(n_episodes * horizon, 5.0),
        np.zeros(n_episodes * horizon, dtype=int),
        np.zeros(n_episodes * horizon, dtype=int),
        np.tile([3, 2, 1], n_episodes),
    )
    steps = pl.DataFrame(
        {
            "episode_id": np.repeat(np.arange(n_episodes), horizon),
            "t": np.tile(np.arange(horizon), n_episodes),
            "state_key": keys,
            "action": rng.integers(-1, 2, n_episodes * horizon),
            "kwh": rng.uniform(0.5, 2.0, n_episodes * horizon),
            "recovery_kwh": 0.0,
            "premise_id": np.repeat(np.where(np.arange(n_episodes) % 2 == 0, "A", "B"), horizon),
            "cohort": "c",
            "mode": "cool",
        }
    )
    return _priced(steps, rng, horizon, config.comfort_penalty_usd_per_degree_hour)


DAYS = pl.DataFrame({"premise_id": ["A", "B"], "cohort": ["c", "c"], "days_observed": [30, 30]})


@pytest.mark.parametrize("model", ["counts", "types"])
def test_bootstrap_that_refits_the_behaviour_model_gives_an_interval_around_the_estimate(model):
    """With the re-fitting bootstrap on (either model), weighted IS rows carry finite, ordered intervals."""
    config = Config(bootstrap_replicates=40, bootstrap_refit_behavior=True, estimators=("weighted_is",))
    steps = _logged_steps(config)
    unfitted = (
        CohortCounts(actions=config.actions)
        if model == "counts"
        else HabitTypes(actions=config.actions, n_types=2, space=config.state)
    )
    behavior = unfitted.fit(steps)
    savings = evaluate_candidates(steps, behavior, DAYS, config).savings.filter(pl.col("status") == "ok")
    assert savings.height > 0
    inside = (pl.col("ci_low") <= pl.col("ci_high")) & pl.col("ci_low").is_finite()
    assert savings.select(inside.all()).item()


# ---------------------------------------------------------------- grain of the ledger tables

# habit_type: a learned policy's own row at the scope it was learned for (the improve stage).
SCOPES = {"premise", "cohort", "portfolio", "habit_type"}
MODES = {"cool", "heat"}
# Key columns and allowed codes of each ledger table evaluate writes (DESIGN.md, "Ledger contracts").
GRAIN = {
    "savings": (
        ("policy_name", "mode", "scope", "key", "estimator"),
        {
            "scope": SCOPES,
            "mode": MODES,
            "status": {"ok", "insufficient_evidence"},
            "estimator": set(OFF_POLICY_NAMES),
        },
    ),
    "policy": (
        ("policy_name", "mode", "scope", "key", "state_key", "action"),
        {"scope": SCOPES, "mode": MODES},
    ),
    "diagnostics": (("policy_name", "mode", "scope", "key"), {"scope": SCOPES, "mode": MODES}),
    "horizon": (("decision_points", "mode", "policy_name"), {"decision_points": {"fixed", "anchored"}}),
    "state_value": (
        ("mode", "scope", "key", "method", "state_key"),
        {"scope": SCOPES, "mode": MODES, "method": {"first_visit", "every_visit"}},
    ),
}


def _assert_grain(table: str, frame: pl.DataFrame) -> None:
    keys, codes = GRAIN[table]
    assert frame.height > 0, table
    nulls = frame.select(pl.col(keys).null_count()).row(0, named=True)
    assert not any(nulls.values()), (table, nulls)
    assert not frame.select(keys).is_duplicated().any(), f"{table}: duplicate {keys}"
    for column, allowed in codes.items():
        found = set(frame[column].unique().to_list())
        assert found <= allowed, (table, column, found - allowed)


def _assert_savings_rules(savings: pl.DataFrame, config: Config) -> None:
    """Annual figures agree with the per-episode ones, and one estimator is recommended per row key."""
    for per_episode, annual in (
        ("savings_usd_per_episode", "savings_usd_annual"),
        ("savings_kwh_per_episode", "savings_kwh_annual"),
        ("shrunk_savings_usd_per_episode", "shrunk_savings_usd_annual"),
        ("shrunk_savings_kwh_per_episode", "shrunk_savings_kwh_annual"),
    ):
        both = savings.filter(pl.col(per_episode).is_not_null() | pl.col(annual).is_not_null())
        assert both.select(pl.col(per_episode).is_null() | pl.col(annual).is_null()).to_series().sum() == 0
        np.testing.assert_allclose(
            both[annual].to_numpy(), both[per_episode].to_numpy() * both["episodes_per_year"].to_numpy()
        )
        assert (both[annual].sign() == both[per_episode].sign()).all(), annual
    per_year = savings["n_episodes"] / savings["days_observed"] * config.cooling_days_per_year
    np.testing.assert_allclose(savings["episodes_per_year"].to_numpy(), per_year.to_numpy())
    thin = savings.filter(pl.col("status") == "insufficient_evidence")
    assert thin.select(pl.col("savings_usd_annual", "savings_kwh_annual").is_null().all()).row(0) == (
        True,
        True,
    )
    recommended = savings.group_by("policy_name", "mode", "scope", "key").agg(pl.col("recommended").sum())
    assert (recommended["recommended"] == 1).all()


def test_every_ledger_table_of_an_inline_evaluation_has_its_grain():
    """savings, policy, diagnostics, horizon and state_value: keys unique and not null, codes allowed."""
    config = Config(bootstrap_replicates=20, estimators=("weighted_is", "doubly_robust"))
    steps = _logged_steps(config)
    behavior = CohortCounts(actions=config.actions).fit(steps)
    result = evaluate_candidates(steps, behavior, DAYS, config)
    by_choice = {"fixed": steps, "anchored": steps}
    tables = {
        "savings": result.savings,
        "policy": result.policy,
        "diagnostics": result.diagnostics,
        "horizon": horizon_report(by_choice, config, {"fixed": behavior, "anchored": behavior}),
        "state_value": state_values(steps),
    }
    for table, frame in tables.items():
        _assert_grain(table, frame)
    _assert_savings_rules(result.savings, config)
    assert result.savings.height == 3 * 4 * 2  # candidates x (2 premises, cohort, portfolio) x estimators
    totals = result.policy.group_by("policy_name", "mode", "state_key").agg(pl.col("probability").sum())
    np.testing.assert_allclose(totals["probability"].to_numpy(), 1.0)


def ledger_frame(ledger, table: str) -> pl.DataFrame:
    """Every file of a ledger table, columns united by name (a run's learned rows are a second file)."""
    files = sorted((ledger / table).glob("*/*.parquet"))
    return pl.concat([pl.read_parquet(f, hive_partitioning=False) for f in files], how="diagonal_relaxed")


def test_sample_lake_ledger_tables_have_their_grain_and_consistent_annual_figures(sample_lake_run):
    """On the sample lake's ledger, every evaluated table keeps its grain and every annual figure is its
    per-episode figure times the row's episodes per year (same sign in every row)."""
    config = sample_lake_run.config
    for table in GRAIN:
        _assert_grain(table, ledger_frame(config.ledger_path, table))
    savings = ledger_frame(config.ledger_path, "savings")
    _assert_savings_rules(savings, config)
    assert savings.filter((pl.col("scope") == "premise") & (pl.col("status") == "ok")).height >= 30


def test_an_estimator_outside_the_registry_is_refused_by_name():
    """Settings and the registry accept only registered off-policy estimators, naming the valid ones."""
    with pytest.raises(ValueError, match="must be one of 'ordinary_is'"):
        Config(estimators=("diagnostics",))
    with pytest.raises(estimators.EstimatorInputError, match="not an off-policy estimator; use one of"):
        off_policy_estimator("diagnostics")


# ---------------------------------------------------------------- comfort, bill alone, seasons


def _three_episode_steps() -> pl.DataFrame:
    """THREE with costs and comfort: premise A, last steps 1, 2 and 0 °C-hours, energy costs per step."""
    return (
        THREE.drop("reward", "pi", "b")
        .with_columns(
            pl.Series("cost_usd", [1.0, 1.5, 3.0, 1.0, 1.0, 0.0]),
            pl.Series("recovery_cost_usd", [0.0, 0.3, 0.7, 0.0, 0.0, 0.0]),
            pl.Series("comfort_degree_hours", [0.0, 2.0, 3.0, 0.0, 0.0, 0.0]),
            pl.Series("kwh", [1.0, 1.0, 2.0, 1.0, 1.0, 0.5]),
            pl.lit(0.0).alias("recovery_kwh"),
            pl.lit("A").alias("premise_id"),
            pl.lit("c").alias("cohort"),
        )
        .with_columns(
            (
                -(pl.col("cost_usd") + pl.col("recovery_cost_usd") + 0.1 * pl.col("comfort_degree_hours"))
            ).alias("reward")
        )
    )


def test_comfort_and_bill_alone_are_weighted_is_of_their_own_rewards_by_hand():
    """With weights 4, 0.5 and 1 (THREE), the policy's comfort cost is (4*2 + 0.5*3 + 1*0) / 5.5 °C-hours and
    its bill (4*2.8 + 0.5*3.7 + 1*2) / 5.5 USD; the logged policy's are the plain means (Sutton and Barto
    2018, eq. 5.6, applied to each reward)."""
    steps = _three_episode_steps()
    days = pl.DataFrame({"premise_id": ["A"], "cohort": ["c"], "days_observed": [10]})
    config = Config(estimators=("weighted_is",), bootstrap_replicates=30, min_ess=0.0, max_weight_share=1.0)
    savings, _ = evaluate_policy(steps, THREE["pi"].to_numpy(), THREE["b"].to_numpy(), days, config)
    row = savings.filter(pl.col("scope") == "portfolio").row(0, named=True)
    assert row["comfort_degree_hours_policy"] == pytest.approx((4 * 2 + 0.5 * 3) / 5.5)
    assert row["comfort_degree_hours_behavior"] == pytest.approx(5 / 3)
    assert row["comfort_cost_usd_policy"] == pytest.approx(0.1 * (4 * 2 + 0.5 * 3) / 5.5)
    assert row["comfort_change_degree_hours"] == pytest.approx((4 * 2 + 0.5 * 3) / 5.5 - 5 / 3)
    assert row["bill_usd_policy"] == pytest.approx((4 * 2.8 + 0.5 * 3.7 + 1 * 2) / 5.5)
    assert row["bill_usd_behavior"] == pytest.approx((2.8 + 3.7 + 2) / 3)
    assert row["bill_savings_usd_per_episode"] == pytest.approx(
        row["bill_usd_behavior"] - row["bill_usd_policy"]
    )
    assert row["comfort_degree_hours_ci_low"] <= row["comfort_degree_hours_ci_high"]


@pytest.mark.parametrize("recommended", ["weighted_is", "weighted_per_decision_is", "doubly_robust"])
def test_penalised_savings_are_bill_savings_less_the_priced_comfort_change(recommended):
    """Each estimator is linear in the reward for fixed weights, and the reward is minus the bill minus the
    priced °C-hours (sql/step.sql), so savings = bill savings - price x comfort change, row by row."""
    config = Config(
        bootstrap_replicates=20,
        estimators=("weighted_is", "weighted_per_decision_is", "doubly_robust"),
        recommended_estimator=recommended,
    )
    steps = _logged_steps(config)
    behavior = CohortCounts(actions=config.actions).fit(steps)
    rows = evaluate_candidates(steps, behavior, DAYS, config).savings.filter(
        pl.col("recommended") & (pl.col("status") == "ok")
    )
    assert rows.height > 0
    expected = rows["bill_savings_usd_per_episode"] - 0.10 * rows["comfort_change_degree_hours"]
    np.testing.assert_allclose(rows["savings_usd_per_episode"].to_numpy(), expected.to_numpy(), atol=1e-9)
    others = evaluate_candidates(steps, behavior, DAYS, config).savings.filter(~pl.col("recommended"))
    assert others.select(pl.col("comfort_degree_hours_policy").is_null().all()).item()


def test_heating_episodes_are_annualised_over_the_heating_season_and_the_row_says_so():
    """Annual figures of a mode use that mode's observed days and season length, both on the row:
    60 episodes over 60 heating days are 1 a day, times a 151-day heating season."""
    config = Config(bootstrap_replicates=20, estimators=("weighted_is",))
    steps = _logged_steps(config).with_columns(pl.lit("heat").alias("mode"))
    days = pl.DataFrame(
        {
            "premise_id": ["A", "B", "A", "B"],
            "cohort": "c",
            "mode": ["heat", "heat", "cool", "cool"],
            "days_observed": [30, 30, 90, 90],
        }
    )
    behavior = CohortCounts(actions=config.actions).fit(steps)
    savings = evaluate_candidates(steps, behavior, days, config).savings
    portfolio = savings.filter(pl.col("scope") == "portfolio").row(0, named=True)
    assert portfolio["mode"] == "heat" and portfolio["season_days"] == config.heating_days_per_year == 151
    assert portfolio["days_observed"] == 60
    assert portfolio["episodes_per_year"] == pytest.approx(60 / 60 * 151)
