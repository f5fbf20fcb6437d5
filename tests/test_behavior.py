"""Behaviour models: hierarchical smoothed counts and the habit-type mixture, on a few inline steps."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.behavior import BehaviorInputError, BehaviorModel, CohortCounts, HabitTypes

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
    model = CohortCounts(prior_strength=2.0, floor=0.0, actions=(-1, 0, 1)).fit(STEPS)
    portfolio = (2 + 2 / 3) / 5
    cohort = (2 + 2 * portfolio) / 5
    premise_a = (2 + 2 * cohort) / 4
    np.testing.assert_allclose(model.probabilities(STEPS[:1]), [premise_a])
    # Premise B logged 0 once in state 1: (1 + 2 * p_cohort(0|s1)) / 3, p_cohort(0|s1) = (1 + 2 * 5/15) / 5.
    cohort_hold = (1 + 2 * ((1 + 2 / 3) / 5)) / 5
    np.testing.assert_allclose(model.probabilities(STEPS[3:]), [(1 + 2 * cohort_hold) / 3])


def test_every_state_row_is_a_probability_distribution():
    """Probabilities of each (scope, key, state) sum to one and respect the floor."""
    model = CohortCounts(prior_strength=1.0, floor=0.05).fit(STEPS)
    table = model.table()
    sums = table.group_by("scope", "key", "state_key").agg(pl.col("probability").sum())["probability"]
    np.testing.assert_allclose(sums.to_numpy(), 1.0)
    assert table["probability"].min() >= 0.05 / (1 + 3 * 0.05) - 1e-12


def test_unseen_state_falls_back_to_uniform():
    """A state nobody logged gets 1/|A| for every action."""
    model = CohortCounts().fit(STEPS)
    unseen = pl.DataFrame({"premise_id": ["A"], "cohort": ["c"], "state_key": [99], "action": [-1]})
    assert model.probabilities(unseen) == pytest.approx([1 / len(model.actions)])


def test_round_trip_through_the_ledger_table_keeps_probabilities():
    """from_table(table()) gives the same probabilities for the logged steps."""
    model = CohortCounts().fit(STEPS)
    again = CohortCounts.from_table(model.table())
    np.testing.assert_allclose(again.probabilities(STEPS), model.probabilities(STEPS))


def test_actions_outside_the_set_are_refused():
    """A logged action of +3 °C is an input error, not silently clipped."""
    with pytest.raises(BehaviorInputError, match="outside the action set"):
        CohortCounts().fit(STEPS.with_columns(pl.lit(3).alias("action")))


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
        "weak": CohortCounts(0.5, 0.01, (-1, 0, 1)),
        "strong": CohortCounts(500.0, 0.01, (-1, 0, 1)),
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
    model = HabitTypes(2.0, 0.0, (-1, 0, 1), n_types=1).fit(TYPED)
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
    typed = HabitTypes(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps)
    shares = typed.membership().pivot(on="habit_type", index="premise_id", values="share")
    assert (shares.drop("premise_id").max_horizontal() > 0.99).all()
    up = steps.with_columns(pl.lit(1).alias("action")).unique("premise_id").sort("premise_id")
    observed = steps.group_by("premise_id").agg((pl.col("action") == 1).mean()).sort("premise_id")
    np.testing.assert_allclose(typed.probabilities(up), observed["action"].to_numpy(), atol=0.03)
    pooled = CohortCounts(500.0, 0.01, (-1, 0, 1)).fit(steps).probabilities(up)
    assert np.abs(pooled - 0.5).max() < 0.15


def test_held_out_likelihood_prefers_two_types_when_premises_differ():
    """The held-out choice of the number of types finds the two habits."""
    from pipeline.behavior import held_out_log_likelihood

    candidates = {str(z): HabitTypes(5.0, 0.01, (-1, 0, 1), n_types=z) for z in (1, 2)}
    scores = dict(held_out_log_likelihood(_opposite_habits(), candidates).iter_rows())
    assert scores["2"] > scores["1"]


def test_step_weights_count_like_repeated_rows():
    """Weight 2 on every step (a bootstrap multiplicity) fits the same model as each step logged twice."""
    steps = _opposite_habits(60)
    weighted = HabitTypes(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps, np.full(steps.height, 2.0))
    doubled = HabitTypes(5.0, 0.01, (-1, 0, 1), n_types=2).fit(pl.concat([steps, steps]))
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
    model = HabitTypes(5.0, 0.05, (-1, 0, 1), n_types=2).fit(steps)
    table = model.table()
    assert set(table["scope"]) == {"premise", "cohort", "portfolio", "type", "type_coarse"}
    sums = table.group_by("scope", "key", "mode", "state_key").agg(pl.col("probability").sum())
    np.testing.assert_allclose(sums["probability"].to_numpy(), 1.0)
    assert table["probability"].min() >= 0.05 / (1 + 3 * 0.05) - 1e-12
    assert model.membership().group_by("mode").len().height == 2
    again = HabitTypes.from_table(table, (-1, 0, 1), membership=model.membership())
    np.testing.assert_allclose(again.probabilities(steps), model.probabilities(steps))


def test_a_number_of_types_below_one_is_refused():
    """n_types=0 is an input error naming the setting."""
    with pytest.raises(BehaviorInputError, match="n_types"):
        HabitTypes(n_types=0).fit(TYPED)


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
    model = HabitTypes(5.0, 0.01, (-1, 0, 1), n_types=2).fit(steps, weight)
    assert not model.table()["probability"].is_nan().any()
    assert np.isfinite(model.probabilities(steps)).all()


def _two_modes(seed: int = 11) -> pl.DataFrame:
    """Cooling and heating steps of three premises in two cohorts, over four states in three coarse cells."""
    rng = np.random.default_rng(seed)
    frames = []
    for mode, offset in (("cool", 0), ("heat", 1000)):
        n = 150
        premise = rng.choice(["A", "B", "C"], n)
        p_up = np.select([premise == "A", premise == "B"], [0.8, 0.15], 0.5)
        action = np.where(rng.random(n) < p_up, 1, rng.choice([-1, 0], n))
        frames.append(
            pl.DataFrame(
                {
                    "episode_id": offset + np.arange(n) // 3,
                    "premise_id": premise,
                    "cohort": np.where(premise == "C", "c2", "c1"),
                    "state_key": rng.choice([0, 24, 5, 100], n),
                    "action": action,
                    "mode": mode,
                }
            )
        )
    return pl.concat(frames)


def _every_pair(actions: tuple[int, ...]) -> pl.DataFrame:
    """Every mode, premise (three seen, one new in a seen cohort, one new in a new cohort), state and action.

    States 0, 24, 5 and 100 were logged; 7, 500 and 2303 were logged by nobody.
    """
    premises = pl.DataFrame(
        {"premise_id": ["A", "B", "C", "new", "newer"], "cohort": ["c1", "c1", "c2", "c1", "zz"]}
    )
    return (
        premises.join(pl.DataFrame({"mode": ["cool", "heat"]}), how="cross")
        .join(pl.DataFrame({"state_key": [0, 24, 5, 100, 7, 500, 2303]}), how="cross")
        .join(pl.DataFrame({"action": list(actions)}), how="cross")
    )


def _through_a_warehouse(tables: dict[str, pl.DataFrame]) -> dict[str, pl.DataFrame]:
    """Each frame stored as a DuckDB table and read back, as the learn and evaluate stages do."""
    import duckdb

    con = duckdb.connect()
    out = {}
    for name, frame in tables.items():
        con.register("incoming", frame.to_arrow())
        con.execute(f"create table behavior_{name} as select * from incoming")
        con.unregister("incoming")
        out[name] = con.sql(f"select * from behavior_{name}").pl()
    return out


@pytest.mark.parametrize(
    "model", [HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2, seed=7), CohortCounts(3.0, 0.02, (-1, 0, 1))]
)
def test_a_reloaded_model_is_the_fitted_one(model):
    """Saved and loaded (modes fitted apart): same probabilities everywhere, same table and membership."""
    from polars.testing import assert_frame_equal

    from pipeline.behavior import load_behavior
    from pipeline.features import StateSpace

    fitted = model.fit(_two_modes())
    loaded = load_behavior(_through_a_warehouse(fitted.to_tables()), (-1, 0, 1), StateSpace())
    assert type(loaded) is type(fitted)
    grid = _every_pair((-1, 0, 1))
    np.testing.assert_array_equal(loaded.probabilities(grid), fitted.probabilities(grid))
    assert_frame_equal(loaded.table(), fitted.table())
    assert_frame_equal(loaded.membership(), fitted.membership())
    assert loaded.clone().__dict__ == fitted.clone().__dict__


def test_a_habit_type_table_alone_rebuilds_its_table():
    """from_table(table()) of a habit-type model gives back the same table (it used to raise)."""
    from polars.testing import assert_frame_equal

    fitted = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(_two_modes())
    assert_frame_equal(BehaviorModel.from_table(fitted.table(), (-1, 0, 1)).table(), fitted.table())


def test_a_reloaded_model_pickles():
    """A loaded habit-type model pickles (stages may run in other processes) and answers the same."""
    import pickle

    from pipeline.behavior import load_behavior

    fitted = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(_two_modes())
    loaded = load_behavior(fitted.to_tables(), (-1, 0, 1))
    grid = _every_pair((-1, 0, 1))
    again = pickle.loads(pickle.dumps(loaded))
    np.testing.assert_array_equal(again.probabilities(grid), fitted.probabilities(grid))


def test_unlogged_pairs_mix_the_premise_or_cohort_types_as_a_plain_loop_does():
    """An unlogged state mixes the premise's own types; a new home its cohort's decision-weighted shares."""
    from pipeline.features import StateSpace

    steps = (
        _two_modes()
        .filter((pl.col("mode") == "cool") & ~((pl.col("premise_id") == "C") & (pl.col("state_key") == 100)))
        .drop("mode")
    )
    model = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(steps)
    fine, coarse = {}, {}
    for r in model.table().filter(pl.col("scope").is_in(["type", "type_coarse"])).rows(named=True):
        kept = fine if r["scope"] == "type" else coarse
        kept[(int(r["key"].removeprefix("type-")), r["state_key"], r["action"])] = r["probability"]
    space = StateSpace()

    def expected(shares: dict[int, float], state: int, action: int) -> float:
        f = space.decode(np.array([state]))
        cell = int((f["offset"][0] - space.offset_min) * space.steps_left_cap + f["steps_left"][0] - 1)
        total = 0.0
        for z, share in shares.items():
            total += share * fine.get((z, state, action), coarse[(z, cell, action)])
        return total

    member = model.membership().rows(named=True)
    own = {r["habit_type"]: r["share"] for r in member if r["premise_id"] == "C"}
    decisions = {r["premise_id"]: r["decisions"] for r in member if r["cohort"] == "c1"}
    cohort = {
        z: sum(r["share"] * r["decisions"] for r in member if r["cohort"] == "c1" and r["habit_type"] == z)
        / sum(decisions.values())
        for z in (1, 2)
    }
    queries = pl.DataFrame(
        {
            "premise_id": ["C", "C", "new", "new"],
            "cohort": ["c2", "c2", "c1", "c1"],
            "state_key": [100, 500, 500, 24],
            "action": [1, -1, 0, 1],
        }
    )
    want = [expected(own, 100, 1), expected(own, 500, -1), expected(cohort, 500, 0), expected(cohort, 24, 1)]
    np.testing.assert_allclose(model.probabilities(queries), want, rtol=1e-12)


def test_the_registry_names_each_model_and_fit_behavior_uses_it():
    """BEHAVIOR_MODELS lists 'types' then 'counts'; fit_behavior builds the class the setting names."""
    from dataclasses import replace
    from types import SimpleNamespace

    from pipeline.behavior import BEHAVIOR_MODELS, fit_behavior
    from pipeline.config import Config

    assert BEHAVIOR_MODELS == ("types", "counts")
    config = Config(behavior_types=2, behavior_prior_strength=5.0)
    steps = _opposite_habits(60)
    assert type(fit_behavior(steps, config)) is HabitTypes
    assert type(fit_behavior(steps, replace(config, behavior_model="counts"))) is CohortCounts
    # Config itself refuses an unknown model, so the stand-in carries the same fields unvalidated.
    unchecked = SimpleNamespace(**{**vars(config), "behavior_model": "mixture"})
    with pytest.raises(BehaviorInputError, match="must be one of types, counts"):
        fit_behavior(steps, unchecked)


def test_stored_tables_that_cannot_rebuild_a_model_are_refused():
    """A table without its model column, or fitted on another state space, is an error saying what to do."""
    from pipeline.behavior import load_behavior
    from pipeline.features import StateSpace

    tables = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(_two_modes()).to_tables()
    with pytest.raises(BehaviorInputError, match="run the learn stage again"):
        load_behavior({**tables, "policy": tables["policy"].drop("model")}, (-1, 0, 1))
    with pytest.raises(BehaviorInputError, match="another state space"):
        load_behavior(tables, (-1, 0, 1), StateSpace(offset_max=2))
    with pytest.raises(BehaviorInputError, match=r"\['type'\] are missing"):
        load_behavior({"policy": tables["policy"]}, (-1, 0, 1))


def test_stored_rows_are_the_same_whether_built_before_or_after_predicting():
    """A fit answers alike before and after its stored rows are built, and a second fit replaces them."""
    from polars.testing import assert_frame_equal

    steps, grid = _two_modes(), _every_pair((-1, 0, 1))
    cool_only = steps.filter(pl.col("mode") == "cool")
    predicted_first = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(cool_only)
    probabilities = predicted_first.probabilities(grid)  # heat rows fall back to the stored rows
    tabled_first = HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(cool_only)
    table = tabled_first.table()
    np.testing.assert_array_equal(tabled_first.probabilities(grid), probabilities)
    assert_frame_equal(predicted_first.table(), table)
    refitted = tabled_first.fit(steps)
    assert_frame_equal(refitted.table(), HabitTypes(5.0, 0.02, (-1, 0, 1), n_types=2).fit(steps).table())


def test_auto_settings_take_the_best_held_out_score_of_each_grid_in_turn():
    """'auto' picks the number of types at strength 5, then the strength at that number, each the best
    held-out log-likelihood of its grid (scored here over the whole grids, nothing reused)."""
    from pipeline.behavior import STRENGTHS_FOR_TYPES, TYPES_GRID, held_out_log_likelihood
    from pipeline.config import Config

    config = Config(actions=(-1, 0, 1), behavior_types="auto", behavior_prior_strength="auto", seed=3)
    steps = _two_modes()

    def best(candidates: dict[str, HabitTypes]) -> str:
        scores = held_out_log_likelihood(steps, candidates, seed=config.seed)
        return scores.sort("log_likelihood", descending=True, maintain_order=True)["model"][0]

    def model(n_types: int, k: float) -> HabitTypes:
        return HabitTypes(k, config.behavior_floor, config.actions, n_types=n_types, seed=config.seed)

    n_types = int(best({str(z): model(z, 5.0) for z in TYPES_GRID}))
    strength = float(best({str(k): model(n_types, k) for k in STRENGTHS_FOR_TYPES}))
    tuned = HabitTypes.tuned(steps, config)
    assert (tuned.n_types, tuned.prior_strength) == (n_types, strength)


def test_auto_settings_are_chosen_on_the_drawn_premises_and_the_model_fitted_on_all():
    """With more premises than behavior_tuning_premises, 'auto' is scored on that many premises drawn
    with the seed (the same choice as tuning on exactly their steps), and every premise is fitted."""
    from dataclasses import replace

    from pipeline.behavior import fit_behavior, tuning_steps
    from pipeline.config import Config

    steps = _two_modes()
    config = Config(actions=(-1, 0, 1), behavior_types="auto", behavior_prior_strength=5.0, seed=3)
    assert tuning_steps(steps, config).equals(steps)  # three premises, limit 1,000: all of them
    small = replace(config, behavior_tuning_premises=2)
    drawn = tuning_steps(steps, small)
    assert drawn["premise_id"].n_unique() == 2 and drawn.equals(tuning_steps(steps, small))
    assert set(drawn["premise_id"]) <= set(steps["premise_id"])
    assert drawn.equals(steps.filter(pl.col("premise_id").is_in(drawn["premise_id"].unique().implode())))
    fitted = fit_behavior(steps, small)
    assert fitted.n_types == HabitTypes.tuned(drawn, small).n_types
    assert set(fitted.membership()["premise_id"]) == {"A", "B", "C"}
