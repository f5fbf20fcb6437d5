"""Behaviour policy: hierarchical smoothed counts, computed by hand on a few steps."""

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


def test_held_out_likelihood_prefers_light_pooling_when_premises_differ():
    """Two premises with opposite habits: a weak prior predicts held-out actions better than a strong one."""
    from pipeline.behavior import held_out_log_likelihood

    rng = np.random.default_rng(3)
    n = 400
    premise = np.where(np.arange(n) < n // 2, "A", "B")
    p_up = np.where(premise == "A", 0.9, 0.1)
    action = np.where(rng.random(n) < p_up, 1, 0)
    steps = pl.DataFrame(
        {"episode_id": np.arange(n), "premise_id": premise, "cohort": "c", "state_key": 1, "action": action}
    )
    scores = held_out_log_likelihood(steps, strengths=(0.5, 500.0), floor=0.01, actions=(-1, 0, 1))
    weak, strong = scores.sort("prior_strength")["log_likelihood"].to_list()
    assert weak > strong
