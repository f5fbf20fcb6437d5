"""Behaviour policy: hierarchical smoothed counts and the habit-type mixture, on a few inline steps."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.behavior import BehaviorInputError, BehaviorPolicy

STEPS = pl.DataFrame(
    {
        "premise_id": ["A", "A", "A", "B"],
        "cohort": ["c", "c", "c", "c"],
        "state_key": [1, 1, 2, 1],
        "action": [1, 1, 0, 0],
    }
)


def test_premise_probabilities_shrink_toward_cohort_and_portfolio_by_hand():
    """With k = 2: portfolio p(+1|s1) = (2 + 2/3) / 5, cohort (2 + 2 p) / 5, premise A (2 + 2 p_c) / 4."""
    model = BehaviorPolicy(prior_strength=2.0, floor=0.0, actions=(-1, 0, 1)).fit(STEPS)
    portfolio = (2 + 2 / 3) / 5
    cohort = (2 + 2 * portfolio) / 5
    premise_a = (2 + 2 * cohort) / 4
    np.testing.assert_allclose(model.probabilities(STEPS[:1]), [premise_a])
    # Premise B logged 0 once in state 1: (1 + 2 * p_cohort(0|s1)) / 3, p_cohort(0|s1) = (1 + 2 * 5/15) / 5.
    cohort_hold = (1 + 2 * ((1 + 2 / 3) / 5)) / 5
    np.testing.assert_allclose(model.probabilities(STEPS[3:]), [(1 + 2 * cohort_hold) / 3])


def test_every_state_row_is_a_probability_distribution():
    """Probabilities of each (scope, key, state) sum to one and respect the floor."""
    model = BehaviorPolicy(prior_strength=1.0, floor=0.05).fit(STEPS)
    table = model.table()
    sums = table.group_by("scope", "key", "state_key").agg(pl.col("probability").sum())["probability"]
    np.testing.assert_allclose(sums.to_numpy(), 1.0)
    assert table["probability"].min() >= 0.05 / (1 + 3 * 0.05) - 1e-12


def test_unseen_state_falls_back_to_uniform():
    """A state nobody logged gets 1/|A| for every action."""
    model = BehaviorPolicy().fit(STEPS)
    unseen = pl.DataFrame({"premise_id": ["A"], "cohort": ["c"], "state_key": [99], "action": [-1]})
    assert model.probabilities(unseen) == pytest.approx([1 / len(model.actions)])


def test_round_trip_through_the_ledger_table_keeps_probabilities():
    """from_table(table()) gives the same probabilities for the logged steps."""
    model = BehaviorPolicy().fit(STEPS)
    again = BehaviorPolicy.from_table(model.table())
    np.testing.assert_allclose(again.probabilities(STEPS), model.probabilities(STEPS))


def test_actions_outside_the_set_are_refused():
    """A logged action of +3 °C is an input error, not silently clipped."""
    with pytest.raises(BehaviorInputError, match="outside the action set"):
        BehaviorPolicy().fit(STEPS.with_columns(pl.lit(3).alias("action")))


def _opposite_habits(n: int = 400, seed: int = 3) -> pl.DataFrame:
    """Two premises of one cohort with opposite habits in the same state: A sets back 90 %, B 10 %."""
    rng = np.random.default_rng(seed)
    premise = np.where(np.arange(n) < n // 2, "A", "B")
    p_up = np.where(premise == "A", 0.9, 0.1)
    action = np.where(rng.random(n) < p_up, 1, 0)
    return pl.DataFrame(
        {"episode_id": np.arange(n), "premise_id": premise, "cohort": "c", "state_key": 1, "action": action}
    )


def test_held_out_likelihood_prefers_light_pooling_when_premises_differ():
    """Two premises with opposite habits: a weak prior predicts held-out actions better than a strong one."""
    from pipeline.behavior import held_out_log_likelihood

    candidates = {
        "weak": BehaviorPolicy(0.5, 0.01, (-1, 0, 1)),
        "strong": BehaviorPolicy(500.0, 0.01, (-1, 0, 1)),
    }
    scores = dict(held_out_log_likelihood(_opposite_habits(), candidates).iter_rows())
    assert scores["weak"] > scores["strong"]


# Habit-type mixture (the default model). State keys 0 and 24 differ only in price tier, so they
# share one coarse state (offset -1, one decision left) under the default StateSpace.
TYPED = pl.DataFrame(
    {
        "premise_id": ["A", "A", "A", "B"],
        "cohort": ["c", "c", "c", "c"],
        "state_key": [0, 0, 24, 0],
        "action": [1, 1, 0, 0],
    }
)


def test_one_type_is_coarse_then_fine_shrinkage_by_hand():
    """With one type and k = 2 the table is the two-level additive smoothing of the module docstring."""
    model = BehaviorPolicy(2.0, 0.0, (-1, 0, 1), n_types=1).fit(TYPED)
    # Coarse cell: counts (-1, 0, +1) = (0, 2, 2) of 4; portfolio prior (n + 2/3) / 6; type (n + 2 p) / 6.
    portfolio = (np.array([0, 2, 2]) + 2 / 3) / 6
    coarse = (np.array([0, 2, 2]) + 2 * portfolio) / 6
    # Fine state 0: counts (0, 1, 2) of 3; state 24: (0, 1, 0) of 1.
    fine0 = (np.array([0, 1, 2]) + 2 * coarse) / 5
    fine24 = (np.array([0, 1, 0]) + 2 * coarse) / 3
    np.testing.assert_allclose(model.probabilities(TYPED), [fine0[2], fine0[2], fine24[1], fine0[1]])


def test_types_tell_apart_premises_with_opposite_habits():
    """Two types recover each premise's own rate where cohort pooling pulls both toward one half."""
    steps = _opposite_habits()
    typed = BehaviorPolicy(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps)
    shares = typed.membership().pivot(on="habit_type", index="premise_id", values="share")
    assert (shares.drop("premise_id").max_horizontal() > 0.99).all()
    up = steps.with_columns(pl.lit(1).alias("action")).unique("premise_id").sort("premise_id")
    observed = steps.group_by("premise_id").agg((pl.col("action") == 1).mean()).sort("premise_id")
    np.testing.assert_allclose(typed.probabilities(up), observed["action"].to_numpy(), atol=0.03)
    pooled = BehaviorPolicy(500.0, 0.01, (-1, 0, 1)).fit(steps).probabilities(up)
    assert np.abs(pooled - 0.5).max() < 0.15


def test_held_out_likelihood_prefers_two_types_when_premises_differ():
    """The held-out choice of the number of types finds the two habits."""
    from pipeline.behavior import held_out_log_likelihood

    candidates = {str(z): BehaviorPolicy(5.0, 0.01, (-1, 0, 1), n_types=z) for z in (1, 2)}
    scores = dict(held_out_log_likelihood(_opposite_habits(), candidates).iter_rows())
    assert scores["2"] > scores["1"]


def test_step_weights_count_like_repeated_rows():
    """Weight 2 on every step (a bootstrap multiplicity) fits the same model as each step logged twice."""
    steps = _opposite_habits(60)
    weighted = BehaviorPolicy(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps, np.full(steps.height, 2.0))
    doubled = BehaviorPolicy(5.0, 0.01, (-1, 0, 1), n_types=2).fit(pl.concat([steps, steps]))
    np.testing.assert_allclose(weighted.probabilities(steps), doubled.probabilities(steps))


def test_types_model_round_trips_and_keeps_modes_apart():
    """Cooling and heating fit apart; every row is a distribution; from_table keeps the probabilities."""
    steps = pl.concat(
        [
            _opposite_habits(80).with_columns(pl.lit("cool").alias("mode")),
            _opposite_habits(80, seed=4).with_columns(
                pl.lit("heat").alias("mode"), pl.col("episode_id") + 80
            ),
        ]
    )
    model = BehaviorPolicy(5.0, 0.05, (-1, 0, 1), n_types=2).fit(steps)
    table = model.table()
    assert set(table["scope"]) == {"premise", "cohort", "portfolio", "type"}
    sums = table.group_by("scope", "key", "mode", "state_key").agg(pl.col("probability").sum())
    np.testing.assert_allclose(sums["probability"].to_numpy(), 1.0)
    assert table["probability"].min() >= 0.05 / (1 + 3 * 0.05) - 1e-12
    assert model.membership().group_by("mode").len().height == 2
    again = BehaviorPolicy.from_table(table, (-1, 0, 1))
    np.testing.assert_allclose(again.probabilities(steps), model.probabilities(steps))


def test_a_number_of_types_below_one_is_refused():
    """n_types=0 is an input error naming the setting."""
    with pytest.raises(BehaviorInputError, match="n_types"):
        BehaviorPolicy(n_types=0).fit(TYPED)


def test_em_step_matches_a_plain_loop():
    """One EM iteration (M step, then E step) equals the same sums written as loops over steps."""
    from pipeline.behavior import _TypeMixture

    rng = np.random.default_rng(5)
    n, n_premises, n_types, n_actions, n_coarse, k, floor = 200, 6, 3, 3, 4, 2.0, 0.02
    premise = rng.integers(0, n_premises, n)
    state = rng.choice([3, 7, 11, 20, 21], n)
    coarse = state % n_coarse
    action = rng.integers(0, n_actions, n)
    weight = rng.poisson(1.0, n).astype(float)
    fitted = _TypeMixture(n_types, k, floor, n_actions, n_coarse, seed=9).fit(
        premise, state, coarse, action, weight, n_premises, restarts=1, iterations=1
    )

    shares = np.random.default_rng(9).dirichlet(np.ones(n_types), n_premises)
    states = sorted(set(state.tolist()))
    overall = np.zeros((n_coarse, n_actions))
    for i in range(n):
        overall[coarse[i], action[i]] += weight[i]
    portfolio = (overall + k / n_actions) / (overall.sum(1, keepdims=True) + k)

    def floored(row):
        row = np.maximum(row, floor)
        return row / row.sum()

    tables = np.zeros((n_types, len(states), n_actions))
    for z in range(n_types):
        by_coarse = np.zeros((n_coarse, n_actions))
        by_state = np.zeros((len(states), n_actions))
        for i in range(n):
            by_coarse[coarse[i], action[i]] += shares[premise[i], z] * weight[i]
            by_state[states.index(state[i]), action[i]] += shares[premise[i], z] * weight[i]
        coarse_table = (by_coarse + k * portfolio) / (by_coarse.sum(1, keepdims=True) + k)
        for c, s in enumerate(states):
            prior = coarse_table[s % n_coarse]
            tables[z, c] = floored((by_state[c] + k * prior) / (by_state[c].sum() + k))
    loglik = np.log(shares.mean(0))[None, :].repeat(n_premises, 0)
    for i in range(n):
        for z in range(n_types):
            loglik[premise[i], z] += weight[i] * np.log(tables[z, states.index(state[i]), action[i]])
    posterior = np.exp(loglik - loglik.max(1, keepdims=True))
    posterior /= posterior.sum(1, keepdims=True)

    np.testing.assert_allclose(fitted.tables_, tables, rtol=1e-12)
    np.testing.assert_allclose(fitted.shares_, posterior, rtol=1e-9)


def test_a_premise_whose_steps_all_weigh_zero_still_gets_probabilities():
    """A resample may drop all of a premise's episodes: its rows use the mixing shares, never NaN."""
    steps = _opposite_habits(100)
    weight = np.where(steps["premise_id"] == "A", 0.0, 1.0)
    model = BehaviorPolicy(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps, weight)
    assert not model.table()["probability"].is_nan().any()
    assert np.isfinite(model.probabilities(steps)).all()
