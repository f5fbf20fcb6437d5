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

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import polars as pl

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, action_index


class QModelInputError(ValueError):
    """Steps that cannot be used to fit the Q model."""


@dataclass(frozen=True)
class Transitions:
    """Logged decision steps as the flat arrays of a tabular regression, each (n_steps,), frame order.

    Shared by fitted Q evaluation here and the learners of ``pipeline.control``, so
    every tabular model reads (state, action) pairs and next states the same way.
    """

    state: np.ndarray
    """State key of each step."""
    pair: np.ndarray
    """Cell of each step in a flattened (n_states, n_actions) table: state * n_actions + action column."""
    reward: np.ndarray
    """Reward of each step, USD (or any unit)."""
    last: np.ndarray
    """True at each episode's last step."""
    next_state: np.ndarray
    """State key of the step after; 0 at a last step, where it is never read."""
    n_states: int
    n_actions: int

    @classmethod
    def from_arrays(
        cls,
        episode: np.ndarray,
        state: np.ndarray,
        action_column: np.ndarray,
        reward: np.ndarray,
        n_states: int,
        n_actions: int,
    ) -> Transitions:
        """From steps sorted by episode, then time: episode ids, state keys, action columns, rewards."""
        episode = np.asarray(episode)
        state = np.asarray(state, dtype=np.int64)
        last = np.append(episode[1:] != episode[:-1], True)
        next_state = np.where(last, 0, np.roll(state, -1))
        pair = state * n_actions + np.asarray(action_column, dtype=np.int64)
        return cls(state, pair, np.asarray(reward, dtype=float), last, next_state, n_states, n_actions)

    @classmethod
    def from_steps(cls, steps: pl.DataFrame, n_states: int, actions: tuple[int, ...]) -> Transitions:
        """From a frame sorted by (episode_id, t) with episode_id, state_key, action (°C) and reward."""
        missing = [c for c in ("episode_id", "state_key", "action", "reward") if c not in steps.columns]
        if missing:
            raise QModelInputError(f"steps lack columns {missing}")
        return cls.from_arrays(
            steps["episode_id"].to_numpy(),
            steps["state_key"].to_numpy(),
            action_index(steps["action"].to_numpy(), actions),
            steps["reward"].to_numpy(),
            n_states,
            len(actions),
        )

    @cached_property
    def pair_count(self) -> np.ndarray:
        """Logged steps per (state, action) cell, flattened, shape (n_states * n_actions,)."""
        return np.bincount(self.pair, minlength=self.n_states * self.n_actions)

    def targets(self, next_value: np.ndarray, gamma: float = 1.0) -> np.ndarray:
        """One-step targets r + gamma * V(s'), with V = 0 after each episode's last step, shape (n_steps,)."""
        return self.reward + gamma * np.where(self.last, 0.0, next_value[self.next_state])

    def pair_mean(self, y: np.ndarray) -> np.ndarray:
        """Mean of ``y`` (n_steps,) per cell, flattened; 0 where a cell was never logged."""
        return _safe_ratio(np.bincount(self.pair, y, self.n_states * self.n_actions), self.pair_count)


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
        n_states, n_actions = self.space.n_states, len(self.actions)
        moves = Transitions.from_steps(steps, n_states, self.actions)
        if target.shape != (n_states, n_actions):
            raise QModelInputError(f"target table has shape {target.shape}, expected {(n_states, n_actions)}")
        state = moves.state
        state_count = np.bincount(state, minlength=n_states)
        left = self.space.decode(np.arange(n_states))["steps_left"]
        step_left = left[state]
        left_count = np.bincount(step_left, minlength=left.max() + 1)

        q = np.zeros((n_states, n_actions))
        for _ in range(self.sweeps):
            y = moves.targets((target * q).sum(axis=1))
            pair_mean = moves.pair_mean(y)
            state_mean = _safe_ratio(np.bincount(state, y, n_states), state_count)
            left_mean = _safe_ratio(np.bincount(step_left, y, left.max() + 1), left_count)
            fallback = np.where(state_count > 0, state_mean, left_mean[left])
            q = np.where(moves.pair_count > 0, pair_mean, np.repeat(fallback, n_actions)).reshape(
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
