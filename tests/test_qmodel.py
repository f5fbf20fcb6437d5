"""Fitted Q evaluation against values computed by hand from the Bellman equation."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from pipeline.features import StateSpace
from pipeline.qmodel import FittedQ

SPACE = StateSpace()
ACTIONS = (-1, 0, 1)
A = int(SPACE.encode([8], [5.0], [0], [0], [2])[0])  # two decisions left
B = int(SPACE.encode([9], [5.0], [0], [1], [1])[0])  # last decision


def _steps():
    # Four two-step episodes; in B the reward depends on the action only.
    return pl.DataFrame(
        {
            "episode_id": [1, 1, 2, 2, 3, 3, 4, 4],
            "t": [0, 1] * 4,
            "state_key": [A, B] * 4,
            "action": [1, 0, 1, 1, 0, 0, 0, 1],
            "reward": [-1.0, -2.0, -1.0, -4.0, -3.0, -2.0, -3.0, -4.0],
        }
    )


def test_fitted_q_matches_the_bellman_equation_on_a_two_step_problem():
    """Q(B,a) = mean reward of a in B; Q(A,a) = r(A,a) + sum_a' pi(a'|B) Q(B,a') (Bellman, 1957)."""
    target = np.full((SPACE.n_states, 3), 1 / 3)
    target[B] = [0.0, 0.25, 0.75]
    model = FittedQ(SPACE, ACTIONS).fit(_steps(), target)
    v_b = 0.25 * -2.0 + 0.75 * -4.0
    assert model.q_[B, 1] == pytest.approx(-2.0) and model.q_[B, 2] == pytest.approx(-4.0)
    assert model.q_[A, 2] == pytest.approx(-1.0 + v_b)
    assert model.q_[A, 1] == pytest.approx(-3.0 + v_b)
    q_hat, v_hat = model.values(_steps())
    assert q_hat[0] == pytest.approx(-1.0 + v_b) and v_hat[1] == pytest.approx(v_b)


def test_unlogged_action_borrows_its_state_mean():
    """Action -1 was never taken in B: its Q is the mean target over B's logged steps."""
    target = np.full((SPACE.n_states, 3), 1 / 3)
    model = FittedQ(SPACE, ACTIONS).fit(_steps(), target)
    assert model.q_[B, 0] == pytest.approx(np.mean([-2.0, -4.0, -2.0, -4.0]))
