"""The improve stage: learned policies, each home's habit kept where data are thin, the safety test, truth.

External checks: Student's t quantiles from the standard table (NIST/SEMATECH e-Handbook of
Statistical Methods, 1.3.6.7.2); the doubly robust estimator with a zero model is
per-decision importance sampling (Jiang and Li 2016, section 4; Precup, Sutton and Singh
2000); exact least-squares lines; the simulator's on-policy roll-outs as the truth.
"""

from __future__ import annotations

import dataclasses
from types import SimpleNamespace

import numpy as np
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline import control, improve, store, truth
from pipeline.episodes import load_steps
from pipeline.evaluate import COLUMNS
from pipeline.stages import _load_behavior

# ---------------------------------------------------------------- pure pieces


def test_control_variate_recovers_each_premises_exact_line_and_the_pooled_one_for_a_new_home():
    """Noise-free returns on two features: per-premise least squares gives each line exactly."""
    rng = np.random.default_rng(3)
    coef = np.array([[-1.0, -0.2], [-2.0, -0.05], [-0.5, -0.4]])
    premise = np.repeat([0, 1, 2, 3], 40)
    x = rng.uniform(0.5, 3.0, size=(premise.size, 2))
    lines = np.vstack([coef, coef.mean(axis=0)])
    y = np.einsum("nk,nk->n", x, lines[premise])
    learning = premise < 3  # premise 3 has no learning episode: it gets the pooled fit
    fitted = improve.control_variate(premise, x, y, learning, prior_episodes=0.0)
    np.testing.assert_allclose(fitted[learning], y[learning], rtol=1e-10)
    pooled = np.linalg.lstsq(x[learning], y[learning], rcond=None)[0]
    np.testing.assert_allclose(fitted[~learning], x[~learning] @ pooled, rtol=1e-10)


def _reference_doubly_robust(code, reward, ratio, q, v):
    """Plain loop of the step-wise doubly robust estimate minus the return, per episode."""
    out = np.zeros(code.max() + 1)
    for e in range(code.max() + 1):
        w_prev, total, ret = 1.0, 0.0, 0.0
        for i in np.flatnonzero(code == e):
            w = w_prev * ratio[i]
            total += w * reward[i] - (w * q[i] - w_prev * v[i])
            ret += reward[i]
            w_prev = w
        out[e] = total - ret
    return out


def test_doubly_robust_terms_match_a_plain_loop_and_are_per_decision_is_with_a_zero_model():
    rng = np.random.default_rng(5)
    lengths = rng.integers(1, 5, 300)
    code = np.repeat(np.arange(lengths.size), lengths)
    n = code.size
    reward = -rng.uniform(0.0, 1.0, n)
    ratio = np.where(rng.random(n) < 0.1, 0.0, rng.uniform(0.2, 3.0, n))
    q, v = -rng.uniform(0.0, 3.0, n), -rng.uniform(0.0, 3.0, n)
    got = improve.doubly_robust_terms(code, lengths.size, reward, ratio, q, v)
    np.testing.assert_allclose(got, _reference_doubly_robust(code, reward, ratio, q, v), rtol=1e-10)
    # Zero model: DR is per-decision IS, sum_t w_t r_t (Jiang and Li 2016; Precup et al. 2000).
    zero = np.zeros(n)
    pdis = _reference_doubly_robust(code, reward, ratio, zero, zero) + np.bincount(code, reward)
    got = improve.doubly_robust_terms(code, lengths.size, reward, ratio, zero, zero)
    np.testing.assert_allclose(got + np.bincount(code, reward), pdis, rtol=1e-10)


@pytest.mark.parametrize(
    "level, dof, table",
    [(0.95, 10, 1.812), (0.95, 30, 1.697), (0.975, 20, 2.086), (0.99, 60, 2.390), (0.95, 1000, 1.646)],
)
def test_t_quantile_matches_the_published_table(level, dof, table):
    """Student's t upper critical values (NIST/SEMATECH e-Handbook, table 1.3.6.7.2), 3 decimals."""
    assert improve._t_quantile(level, np.array([dof]))[0] == pytest.approx(table, abs=2e-3)


def _bandit_logs(seed: int, n: int):
    """One decision, b uniform over two actions, pi always action 1; returns N(-3.0 | -2.8, 0.5).

    True improvement v_pi - v_b = -2.8 - (-2.9) = +0.1 USD per episode.
    """
    rng = np.random.default_rng(seed)
    action = rng.integers(0, 2, n)
    returns = np.where(action == 1, -2.8, -3.0) + rng.normal(0.0, 0.5, n)
    rho = np.where(action == 1, 2.0, 0.0)
    return rho, returns


@pytest.mark.parametrize("method", ["student_t", "exact"])
def test_safety_bound_lies_below_the_exact_improvement_at_its_level(method):
    """Over 300 logs of 400 episodes with known truth (+0.1) the 95 % bound exceeds it in 5 % + MC error."""
    above = 0
    for seed in range(300):
        rho, returns = _bandit_logs(seed, 400)
        residual = returns + 2.9  # a model fixed in advance (the behaviour's own mean)
        result = improve.improvement_bound(
            rho,
            residual,
            np.arange(rho.size),
            level=0.95,
            method=method,
            residual_range=(-3.0, 3.0),
        )
        above += result["bound"] > 0.1
    assert above / 300 <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / 300)


def test_the_exact_bound_is_void_when_a_residual_leaves_the_stated_range():
    rho, returns = _bandit_logs(1, 400)
    result = improve.improvement_bound(
        rho, returns + 2.9, np.arange(400), level=0.95, method="exact", residual_range=(-0.5, 0.5)
    )
    assert np.isnan(result["bound"]) and result["outside"] > 0


# ---------------------------------------------------------------- the stage on the sample lake


@pytest.fixture(scope="module")
def scored(sample_lake_run):
    """The sample-lake run's ledger, behaviour model, premises, steps and its rows against the truth."""
    config = sample_lake_run.config
    run_id, _, ledger = truth.read_run(config.ledger_path)
    params = truth.lake_params(config.lake, config.seed)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        behavior = _load_behavior(con, "behavior", config)
        premises = store.frame(con, "select premise_id, cohort, comfort_cool_c, comfort_heat_c from premise")
        steps = load_steps(con)
        exogenous = store.query(con, "episode_exogenous")
    rows = truth.policy_truth(config, ledger, behavior, premises, params)
    return SimpleNamespace(
        config=config,
        ledger=ledger,
        behavior=behavior,
        premises=premises,
        steps=steps,
        exogenous=exogenous,
        rows=rows,
        summary=sample_lake_run.summary,
    )


def test_learned_portfolio_policy_beats_the_best_candidate_and_its_interval_covers_the_truth(scored):
    """On the sample lake, by the simulator's roll-out: the learned portfolio policy saves money, more
    than the best default candidate, and its held-out 95 % interval (recommended row) covers it."""
    portfolio = scored.rows.filter(
        (pl.col("scope") == "portfolio") & (pl.col("estimator") == scored.config.recommended_estimator)
    )
    learned = portfolio.filter(pl.col("policy_name") == "learned-portfolio").row(0, named=True)
    best = portfolio.filter(pl.col("kind") == "candidate")["true_savings_usd_per_episode"].max()
    print(f"learned portfolio: {learned}; best candidate's true savings {best:+.3f}")
    assert learned["true_savings_usd_per_episode"] > 0
    assert learned["true_savings_usd_per_episode"] > best
    assert learned["ci_low"] <= learned["true_savings_usd_per_episode"] <= learned["ci_high"]


def test_the_stage_writes_one_outcome_per_scope_and_savings_rows_in_the_candidates_columns(scored):
    tests = scored.ledger["safety_test"]
    assert tests.select("mode", "scope", "key").is_duplicated().sum() == 0
    assert set(tests["outcome"]) <= {improve.PROPOSED, improve.NOT_FOUND}
    assert tests.filter(pl.col("reason").is_null()).is_empty()
    learned = scored.ledger["savings"].filter(pl.col("policy_name").str.starts_with("learned-"))
    candidates = scored.ledger["savings"].filter(~pl.col("policy_name").str.starts_with("learned-"))
    assert learned.height and learned.columns == candidates.columns
    assert set(COLUMNS) <= set(learned.columns)
    # Every tested scope has its policy rows, flagged proposed exactly when the test proposed it.
    policy = scored.ledger["policy"].filter(pl.col("learner").is_not_null())
    flags = policy.group_by("policy_name").agg(
        pl.col("proposed").all(), pl.col("proposed").any().alias("any")
    )
    outcome = tests.filter(pl.col("learner").is_not_null()).select(
        "policy_name", (pl.col("outcome") == improve.PROPOSED).alias("expected")
    )
    joined = outcome.join(flags, on="policy_name", how="left")
    assert joined.height == outcome.height and (joined["proposed"] == joined["expected"]).all()
    assert (joined["any"] == joined["expected"]).all()
    # Scopes without enough evidence say so and carry no policy.
    thin = tests.filter(pl.col("learner").is_null())
    assert thin["reason"].str.starts_with("too little evidence").all()
    assert not policy["policy_name"].is_in(thin["policy_name"].implode()).any()


def _tables(scored, name: str):
    """The stage's per-home tables of one learned policy, from the run's ledger rows."""
    config = scored.config
    rows = scored.ledger["policy"].filter(pl.col("policy_name") == name)
    test = scored.ledger["safety_test"].filter(pl.col("policy_name") == name)
    members = truth._members(test, scored.premises, scored.behavior)["premises"][0].to_list()
    own = scored.premises.filter(pl.col("premise_id").is_in(members)).sort("premise_id")
    tables = improve.premise_tables(
        rows,
        own,
        "cool",
        scored.behavior,
        config,
        config.improve_min_count,
        config.improve_epsilon,
        config.improve_min_probability,
    )
    return own, rows, tables


def test_under_sampled_pairs_keep_each_homes_own_behaviour_probabilities(scored):
    """Pi_b-SPIBB (Laroche et al. 2019): pairs the scope logged fewer than improve_min_count times, and
    actions the home takes with probability below improve_min_probability, keep the home's behaviour
    probability (kept to the allowed actions), exactly."""
    config = scored.config
    names = scored.ledger["safety_test"].filter(pl.col("learner").is_not_null())["policy_name"].to_list()
    assert names
    checked = 0
    for name in names:
        own, rows, tables = _tables(scored, name)
        visits = rows.sort("state_key", "action")["visits"].to_numpy().reshape(tables.shape[1:])
        q = rows.sort("state_key", "action")["q_value"].to_numpy().reshape(tables.shape[1:])
        grid = own.select("premise_id", "cohort").join(
            pl.DataFrame({"state_key": np.arange(tables.shape[1], dtype=np.int64)}), how="cross"
        )
        bvec = improve.behavior_vectors(
            grid.with_columns(pl.lit("cool").alias("mode")), scored.behavior, config.actions
        )
        mask = control.allowed_mask(
            config.state,
            config.actions,
            heating=False,
            comfort_cool_c=own["comfort_cool_c"].to_numpy(),
            comfort_heat_c=own["comfort_heat_c"].to_numpy(),
            cool_band_c=config.cool_band_c,
            heat_band_c=config.heat_band_c,
        )
        base = control.restrict(bvec.reshape(tables.shape), mask)
        rare = (visits < config.improve_min_count) | ~np.isfinite(q)
        thin = (rare[None] | (base < config.improve_min_probability)) & mask
        np.testing.assert_allclose(tables[thin], base[thin], rtol=0, atol=1e-12)
        checked += int(thin.sum())
    assert checked > 1000


def _reference_allowed(space, offset, steps_left, action, cool_c, heat_c, band):
    """Plain rules (the safety band, the state's offsets, comfort at the last decision), one action."""
    reach = offset + action
    low, high = max(band[0] - cool_c, space.offset_min), min(band[1] - cool_c, space.offset_max)
    if steps_left == 1:
        low, high = max(low, heat_c - cool_c), min(high, 0)
    return max(low - reach, 0) + max(reach - high, 0)


def _check_tables(space, actions, own, tables, band, draw_states):
    for p, s in ((int(p), int(s)) for p, s in draw_states):
        f = space.decode(np.array([s]))
        cool_c, heat_c = float(own["comfort_cool_c"][p]), float(own["comfort_heat_c"][p])
        miss = [
            _reference_allowed(space, int(f["offset"][0]), int(f["steps_left"][0]), a, cool_c, heat_c, band)
            for a in actions
        ]
        for j, a in enumerate(actions):
            if tables[p, s, j] > 0:
                assert miss[j] == min(miss), (p, s, a, tables[p, s], miss)
                if min(miss) == 0:  # reachable: inside the band, and at the return within comfort
                    setpoint = cool_c + f["offset"][0] + a
                    assert band[0] <= setpoint <= band[1]
                    if f["steps_left"][0] == 1:
                        assert heat_c <= setpoint <= cool_c


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_stage_policies_never_leave_the_band_or_the_comfort_limits_at_the_return(scored, data):
    """Property over the stage's own output: any policy, premise and state it would run."""
    config = scored.config
    names = scored.ledger["safety_test"].filter(pl.col("learner").is_not_null())["policy_name"].to_list()
    name = data.draw(st.sampled_from(names))
    own, _, tables = _tables(scored, name)
    picks = data.draw(
        st.lists(
            st.tuples(st.integers(0, own.height - 1), st.integers(0, config.state.n_states - 1)),
            min_size=20,
            max_size=60,
        )
    )
    _check_tables(config.state, config.actions, own, tables, config.cool_band_c, picks)


@settings(max_examples=4, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    low=st.integers(20, 24),
    width=st.integers(3, 8),
    shift=st.integers(-1, 2),
    min_count=st.integers(0, 30),
    epsilon=st.sampled_from([0.0, 0.1, 0.3]),
)
def test_stage_policies_keep_the_rules_under_random_bands_and_comfort(
    scored, low, width, shift, min_count, epsilon
):
    """The stage run again with a random safety band, comfort limits and bootstrapping settings."""
    config = dataclasses.replace(
        scored.config,
        cool_band_c=(float(low), float(low + width)),
        improve_min_count=min_count,
        improve_epsilon=epsilon,
        improve_scopes=("portfolio", "cohort"),
    )
    premises = scored.premises.with_columns(
        (pl.col("comfort_cool_c") + shift).clip(low, low + width).alias("comfort_cool_c")
    ).with_columns(pl.min_horizontal("comfort_heat_c", pl.col("comfort_cool_c") - 1).alias("comfort_heat_c"))
    days = (
        scored.steps.select("premise_id", "cohort").unique().with_columns(pl.lit(30).alias("days_observed"))
    )
    result = improve.improve(scored.steps, scored.behavior, scored.exogenous, premises, days, config)
    tested = result.safety_test.filter(pl.col("learner").is_not_null())
    assert tested.height
    rng = np.random.default_rng(min_count)
    for name in tested["policy_name"].to_list():
        members = truth._members(tested.filter(pl.col("policy_name") == name), premises, scored.behavior)[
            "premises"
        ][0].to_list()
        own = premises.filter(pl.col("premise_id").is_in(members)).sort("premise_id")
        tables = improve.premise_tables(
            result.policy.filter(pl.col("policy_name") == name),
            own,
            "cool",
            scored.behavior,
            config,
            min_count,
            epsilon,
            config.improve_min_probability,
        )
        picks = list(
            zip(rng.integers(0, own.height, 200), rng.integers(0, config.state.n_states, 200), strict=True)
        )
        _check_tables(config.state, config.actions, own, tables, config.cool_band_c, picks)


def test_truth_rows_pair_every_learned_row_with_held_out_episodes_only(scored):
    learned = scored.rows.filter((pl.col("kind") == "learned") & (pl.col("scope") == "portfolio"))
    held = scored.ledger["safety_test"].filter(pl.col("policy_name") == "learned-portfolio")
    assert (learned["n_episodes"] == held["n_held_out_episodes"][0]).all()
    assert scored.rows.filter(pl.col("true_savings_usd_per_episode").is_null()).is_empty()
    line = truth.summary_line(scored.rows)
    assert "learned portfolio policy true savings" in line and "best candidate" in line


def test_truth_refuses_a_lake_the_simulator_did_not_make_and_a_wrong_seed(tmp_path, sample_lake_run):
    with pytest.raises(truth.TruthError, match="thermal-ledger simulate"):
        truth.lake_params(tmp_path, 1)
    with pytest.raises(truth.TruthError, match="--sim-seed"):
        truth.lake_params(sample_lake_run.config.lake, 7)
