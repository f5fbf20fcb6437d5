"""The safety test's bound against hand computation, exact means of a known distribution and the old bound."""

from __future__ import annotations

import math

import numpy as np
import polars as pl
import pytest

from pipeline.estimators import (
    EstimatorInputError,
    improvement_lower_bound,
    lower_bound,
    truncated_bound,
    value_lower_bound,
)
from pipeline.estimators.bounds import _bernstein_lower

# ---------------------------------------------------------------- Theorem 1 by hand


def test_theorem_one_by_hand_with_one_threshold():
    """Thomas et al. (2015), Theorem 1, on X = (0.5, 2, 4, 1), c = 2, delta = 0.1, worked by hand.

    Y / c = (0.25, 1, 1, 0.5): sum 2.75, sum of squares 2.3125, so
    sum_{i,j} (a_i - a_j)^2 = 2 * 4 * 2.3125 - 2 * 2.75^2 = 3.375;
    7 n ln(2/delta) / (3 (n - 1)) = 28 ln 20 / 9; sqrt(ln 20 / 3 * 3.375);
    K = 1 / (4 / 2) = 0.5.
    """
    ln20 = math.log(20.0)
    expected = 0.5 * (2.75 - 28.0 * ln20 / 9.0 - math.sqrt(ln20 / 3.0 * 3.375))
    assert truncated_bound(np.array([0.5, 2.0, 4.0, 1.0]), 2.0, level=0.9) == pytest.approx(
        expected, rel=1e-12
    )
    assert expected == pytest.approx(-4.202933, abs=1e-6)


def test_theorem_one_by_hand_with_a_threshold_per_episode():
    """Same X, c = (1, 2, 4, 2): Y / c = (0.5, 1, 1, 0.5), pairs 2 * 4 * 2.5 - 2 * 9 = 2, K = 1 / 2.25."""
    ln20 = math.log(20.0)
    expected = (3.0 - 28.0 * ln20 / 9.0 - math.sqrt(ln20 / 3.0 * 2.0)) / 2.25
    got = truncated_bound(np.array([0.5, 2.0, 4.0, 1.0]), np.array([1.0, 2.0, 4.0, 2.0]), level=0.9)
    assert got == pytest.approx(expected, rel=1e-12)


def test_one_threshold_is_maurer_and_pontils_bound_on_the_truncated_mean():
    """One c: Theorem 1 is mean(Y) - sqrt(2 S^2 L / n) - 7 c L / (3 (n - 1)), L = ln(2/d) (Maurer, Pontil)."""
    x = np.random.default_rng(3).exponential(1.0, 50)
    y = np.minimum(x, 1.7)
    mp = _bernstein_lower(
        np.array(y.mean()), np.array(y.var(ddof=1)), np.array(1.7), np.array(50), math.log(40)
    )
    assert truncated_bound(x, 1.7, level=0.95) == pytest.approx(float(mp), rel=1e-12)


# ---------------------------------------------------------------- a known distribution

# One decision per episode: four setpoint moves, residents' probabilities B and the target's PI.
# Cost of move a is 10 USD times Beta(ALPHA[a], BETA[a]), so every return lies in [-10, 0] and
# the exact means are -10 * ALPHA / (ALPHA + BETA) (the Beta mean, a textbook fact).
B = np.array([0.55, 0.25, 0.15, 0.05])
PI = np.array([0.3, 0.1, 0.55, 0.05])
ALPHA = np.array([2.0, 3.0, 2.0, 5.0])
BETA = np.array([3.0, 3.0, 4.0, 2.0])
MEAN = -10.0 * ALPHA / (ALPHA + BETA)
V_PI, V_B = float(PI @ MEAN), float(B @ MEAN)  # -3.8905 and -4.3071: the target saves 0.4167 USD
RANGE = (-10.0, 0.0)
REPS, N = 400, 500


def _repetitions(seed: int, reps: int = REPS, n: int = N) -> pl.DataFrame:
    """``reps`` independent logs of ``n`` episodes each, one group per repetition."""
    rng = np.random.default_rng(seed)
    move = (rng.random((reps, n))[..., None] >= np.cumsum(B)).sum(axis=-1)
    reward = -10.0 * rng.beta(ALPHA[move], BETA[move])
    return pl.DataFrame(
        {
            "episode_id": np.arange(reps * n),
            "t": np.zeros(reps * n, dtype=np.int64),
            "reward": reward.ravel(),
            "pi": PI[move].ravel(),
            "b": B[move].ravel(),
            "group": np.repeat(np.arange(reps), n).astype(str),
        }
    )


@pytest.fixture(scope="module")
def logs() -> pl.DataFrame:
    return _repetitions(seed=1)


def _allowed_misses(level: float) -> float:
    """Misses a bound at ``level`` may have in REPS repetitions: the expected share plus 3 binomial sd."""
    p = 1.0 - level
    return REPS * p + 3.0 * math.sqrt(REPS * p * (1.0 - p))


def test_the_bounds_hold_at_their_confidence_over_many_repetitions(logs):
    """Value and improvement bounds lie below the exact truth in 95 % of 400 seeded logs, MC error allowed."""
    value = value_lower_bound(logs, return_range=RANGE)
    saving = improvement_lower_bound(logs, return_range=RANGE)
    assert value.height == saving.height == REPS
    assert (value["lower_bound"] > V_PI).sum() <= _allowed_misses(0.95)
    assert (saving["lower_bound"] > V_PI - V_B).sum() <= _allowed_misses(0.95)
    # The split is the paper's: 25 episodes choose c, 475 give the bound.
    assert (saving["n_threshold_episodes"] == 25).all() and (saving["n_bound_episodes"] == 475).all()


def test_the_bound_is_tighter_than_the_old_empirical_bernstein_bound(logs):
    """Same logs, range and level: the 1/20 split bound beats ``lower_bound`` on average and in most logs."""
    new = improvement_lower_bound(logs, return_range=RANGE).select("group", "lower_bound")
    old = lower_bound(logs, return_bounds=RANGE, savings=True).select(
        "group", pl.col("lower_bound").alias("old")
    )
    both = new.join(old, on="group")
    gain = both["lower_bound"] - both["old"]
    assert gain.mean() > 0.05  # USD per episode; 0.13 measured
    assert (gain > 0).mean() >= 0.7  # 84 % measured


def test_paired_differences_beat_a_value_bound_minus_a_behaviour_bound(logs):
    """The chosen improvement form is tighter than LB(v_pi, d/2) - UB(v_b, d/2) on the same logs."""
    half = value_lower_bound(logs, return_range=RANGE, level=0.975).select("group", "lower_bound")
    log_term = math.log(2.0 / 0.025)
    on_policy = (
        logs.with_columns(((pl.col("reward") - RANGE[0]) / (RANGE[1] - RANGE[0])).alias("z"))
        .group_by("group")
        .agg(pl.col("z").mean().alias("m"), pl.col("z").var().alias("s2"), pl.len().alias("n"))
        .with_columns(
            # Maurer and Pontil (2009) upper bound on the mean of z in [0, 1], in USD.
            (
                RANGE[0]
                + (RANGE[1] - RANGE[0])
                * (
                    pl.col("m")
                    + (2.0 * pl.col("s2") * log_term / pl.col("n")).sqrt()
                    + 7.0 * log_term / (3.0 * (pl.col("n") - 1))
                )
            ).alias("upper_b")
        )
    )
    unpaired = half.join(on_policy, on="group").select(pl.col("lower_bound") - pl.col("upper_b"))
    paired = improvement_lower_bound(logs, return_range=RANGE)["lower_bound"]
    assert paired.mean() > unpaired.to_series().mean() + 0.3  # -1.22 against -2.02 measured


# ---------------------------------------------------------------- the split and bad input


def test_the_truncation_level_is_chosen_on_the_earliest_episodes():
    """D_pre is the first 1/20 by the order column, whatever the frame order of the episodes."""
    logs = _repetitions(seed=4, reps=1, n=400).drop("group")
    start = np.random.default_rng(5).permutation(400)
    timed = logs.with_columns(pl.Series("start", start))
    by_time = timed.sort("start").with_columns(pl.int_range(pl.len()).alias("episode_id"))
    got = improvement_lower_bound(timed, return_range=RANGE, order="start")
    want = improvement_lower_bound(by_time.drop("start"), return_range=RANGE)
    assert got["lower_bound"][0] == pytest.approx(want["lower_bound"][0], rel=1e-12)
    assert got["threshold"][0] == pytest.approx(want["threshold"][0], rel=1e-12)


def test_too_few_episodes_give_no_bound():
    """Fewer than two episodes in either part give no bound (null): too little evidence."""
    logs = _repetitions(seed=6, reps=1, n=3).drop("group")
    got = improvement_lower_bound(logs, return_range=RANGE)
    assert got["lower_bound"].null_count() == 1 and got["n_threshold_episodes"][0] == 1


def test_a_return_outside_the_stated_range_is_refused():
    """The range must hold for every episode, else Theorem 1's X >= 0 fails: the error names the episode."""
    logs = _repetitions(seed=7, reps=1, n=40).drop("group")
    with pytest.raises(EstimatorInputError, match=r"outside return_range \(-5.0, 0.0\).*episode_id"):
        improvement_lower_bound(logs, return_range=(-5.0, 0.0))
