"""Evaluation wiring: target probabilities, scopes and savings arithmetic."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline import estimators
from pipeline.config import Config
from pipeline.evaluate import evaluate_policy, target_probabilities
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


def test_target_equal_to_behaviour_gives_zero_savings_at_every_scope():
    """When pi equals b every estimate is the on-policy average, so savings are exactly zero."""
    rng = np.random.default_rng(7)
    n_episodes, horizon = 40, 3
    steps = pl.DataFrame(
        {
            "episode_id": np.repeat(np.arange(n_episodes), horizon),
            "t": np.tile(np.arange(horizon), n_episodes),
            "reward": -rng.uniform(0.1, 1.0, n_episodes * horizon),
            "kwh": rng.uniform(0.5, 2.0, n_episodes * horizon),
            "recovery_kwh": np.zeros(n_episodes * horizon),
            "premise_id": np.repeat(np.where(np.arange(n_episodes) < 20, "A", "B"), horizon),
            "cohort": "c",
        }
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
    """Weight on a premise's own estimate is tau^2 / (tau^2 + se^2) (method of moments, e.g. Efron 2010)."""
    from statistics import NormalDist

    from pipeline.evaluate import _shrink_to_cohort

    z = NormalDist().inv_cdf(0.975)
    own = [1.0, -1.0, 3.0, -3.0]
    se = 1.0
    rows = pl.DataFrame(
        {
            "scope": ["premise"] * 4 + ["cohort"],
            "key": ["A", "B", "C", "D", "c"],
            "estimator": "weighted_is",
            "savings_usd_per_episode": [*own, 0.5],
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
        out["savings_shrunk_usd_per_episode"].to_numpy(), [weight * s + (1 - weight) * 0.5 for s in own]
    )


@pytest.mark.parametrize("n_types", [None, 2])
def test_bootstrap_that_refits_the_behaviour_model_gives_an_interval_around_the_estimate(n_types):
    """With the re-fitting bootstrap on (either model), weighted IS rows carry finite, ordered intervals."""
    from pipeline.behavior import BehaviorPolicy
    from pipeline.evaluate import evaluate_candidates

    rng = np.random.default_rng(11)
    config = Config(bootstrap_replicates=40, bootstrap_refit_behavior=True, estimators=("weighted_is",))
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
            "reward": -rng.uniform(0.1, 1.0, n_episodes * horizon),
            "kwh": rng.uniform(0.5, 2.0, n_episodes * horizon),
            "recovery_kwh": 0.0,
            "premise_id": np.repeat(np.where(np.arange(n_episodes) % 2 == 0, "A", "B"), horizon),
            "cohort": "c",
            "mode": "cool",
        }
    )
    behavior = BehaviorPolicy(actions=config.actions, n_types=n_types, space=config.state).fit(steps)
    days = pl.DataFrame({"premise_id": ["A", "B"], "cohort": ["c", "c"], "days_observed": [30, 30]})
    savings = evaluate_candidates(steps, behavior, days, config).savings.filter(pl.col("status") == "ok")
    assert savings.height > 0
    inside = (pl.col("ci_low") <= pl.col("ci_high")) & pl.col("ci_low").is_finite()
    assert savings.select(inside.all()).item()
