"""Fitted Q evaluation on the tabular states: the model half of the doubly robust estimator.

For a target policy pi, Q(s, a) is the expected rest-of-episode return after
taking a in s and following pi. On logged steps it is fitted by repeated
regression onto the one-step target (Ernst et al. 2005; Le, Voloshin and Yue
2019 call the evaluation form fitted Q evaluation):

    Q_{k+1}(s, a) = mean over logged (s, a) of  r + V_k(s'),   V_k(s') = sum_a' pi(a'|s') Q_k(s', a')

with V = 0 after the last step. Tabular means are one ``np.bincount`` per sweep.
Pairs never logged borrow the mean of their state's logged targets, and states
never logged borrow the overall mean per remaining step count, so the model is
defined everywhere the target can go; the doubly robust correction removes the
bias such a model leaves, as long as the behaviour probabilities are right.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, action_index


class QModelInputError(ValueError):
    """Steps that cannot be used to fit the Q model."""


class FittedQ:
    """Tabular fitted Q evaluation of one target policy.

    Parameters
    ----------
    space : StateSpace
        How state keys decode (used for the steps-left fallback).
    actions : tuple of int
        The action set, in table column order.
    sweeps : int
        Regression sweeps; the episode horizon bounds how many are needed.
    """

    def __init__(self, space: StateSpace, actions: tuple[int, ...] = DEFAULT_ACTIONS, sweeps: int = 20):
        self.space = space
        self.actions = actions
        self.sweeps = sweeps

    def fit(self, steps: pl.DataFrame, target: np.ndarray) -> FittedQ:
        """Fit Q for ``target`` (n_states, n_actions) from steps sorted by (episode_id, t).

        ``steps`` needs episode_id, state_key, action and reward (USD). Sets ``q_``
        (n_states, n_actions) and ``v_`` (n_states,), both in USD.
        """
        missing = [c for c in ("episode_id", "state_key", "action", "reward") if c not in steps.columns]
        if missing:
            raise QModelInputError(f"steps lack columns {missing}")
        n_states, n_actions = self.space.n_states, len(self.actions)
        if target.shape != (n_states, n_actions):
            raise QModelInputError(f"target table has shape {target.shape}, expected {(n_states, n_actions)}")
        state = steps["state_key"].to_numpy().astype(np.int64)
        pair = state * n_actions + action_index(steps["action"].to_numpy(), self.actions)
        reward = steps["reward"].to_numpy().astype(float)
        episode = steps["episode_id"].to_numpy()
        last = np.append(episode[1:] != episode[:-1], True)
        next_state = np.where(last, 0, np.roll(state, -1))

        pair_count = np.bincount(pair, minlength=n_states * n_actions)
        state_count = np.bincount(state, minlength=n_states)
        left = self.space.decode(np.arange(n_states))["steps_left"]
        step_left = left[state]
        left_count = np.bincount(step_left, minlength=left.max() + 1)

        q = np.zeros((n_states, n_actions))
        for _ in range(self.sweeps):
            v = (target * q).sum(axis=1)
            y = reward + np.where(last, 0.0, v[next_state])
            pair_mean = _safe_ratio(np.bincount(pair, y, n_states * n_actions), pair_count)
            state_mean = _safe_ratio(np.bincount(state, y, n_states), state_count)
            left_mean = _safe_ratio(np.bincount(step_left, y, left.max() + 1), left_count)
            fallback = np.where(state_count > 0, state_mean, left_mean[left])
            q = np.where(pair_count > 0, pair_mean, np.repeat(fallback, n_actions)).reshape(
                n_states, n_actions
            )
        self.q_ = q
        self.v_ = (target * q).sum(axis=1)
        return self

    def values(self, steps: pl.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        """``q_hat`` of each logged (state, action) and ``v_hat`` of each logged state, shape (n_steps,)."""
        if not hasattr(self, "q_"):
            raise QModelInputError("call fit() before values()")
        state = steps["state_key"].to_numpy().astype(np.int64)
        index = action_index(steps["action"].to_numpy(), self.actions)
        return self.q_[state, index], self.v_[state]


def _safe_ratio(total: np.ndarray, count: np.ndarray) -> np.ndarray:
    return np.divide(total, count, out=np.zeros_like(total, dtype=float), where=count > 0)
