"""Setpoint policies as probability tables over (state key, action).

Every policy the pipeline handles, whether written by an analyst, learned, or
estimated from logs, is one array ``probs[state_key, action_index]`` whose rows
sum to one. Candidate rules are deterministic; ``soften`` makes them
epsilon-soft so that importance weights stay bounded.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.features import StateSpace

DEFAULT_ACTIONS: tuple[int, ...] = (-2, -1, 0, 1, 2)


class PolicyError(ValueError):
    """A policy table or rule that cannot be used as given."""


@dataclass(frozen=True)
class SetbackRule:
    """Set back by ``depth_c`` while away, restoring comfort ``lead_steps`` decisions before return.

    Offsets are in the setback direction (raising a cooling setpoint, lowering a
    heating one). At each decision the rule aims for
    ``min(depth_c, (steps_left - 1 - lead_steps) * r)`` (never below zero), where
    ``r`` is the largest restore the action set allows in one decision, and moves
    toward it as far as the action set allows. So with actions -1..+1 it eases
    back one degree per decision, and with -2..+2 a 2 °C setback is held until
    ``lead_steps`` decisions before the last and restored in one move.
    """

    name: str
    depth_c: int = 2
    """How far to set back, whole °C."""
    lead_steps: int = 0
    """Decision steps before return by which comfort is restored."""

    def target_offset(self, steps_left: np.ndarray, max_restore_c: int = 1) -> np.ndarray:
        """Offset the rule aims for at each step, °C, when one decision can restore ``max_restore_c``."""
        return np.clip((np.asarray(steps_left) - 1 - self.lead_steps) * max_restore_c, 0, self.depth_c)

    def actions(
        self, space: StateSpace, keys: np.ndarray, actions: tuple[int, ...] = DEFAULT_ACTIONS
    ) -> np.ndarray:
        """The action (°C change, in the setback direction) the rule takes in each state."""
        f = space.decode(keys)
        gap = self.target_offset(f["steps_left"], max(1, -min(actions))) - f["offset"]
        return np.clip(gap, min(actions), max(actions)).astype(np.int64)

    def table(
        self, space: StateSpace, actions: tuple[int, ...] = DEFAULT_ACTIONS, epsilon: float = 0.0
    ) -> np.ndarray:
        """Probability table (n_states, n_actions), epsilon-soft when ``epsilon`` > 0."""
        chosen = self.actions(space, np.arange(space.n_states), actions)
        index = _action_index(chosen, actions)
        probs = np.zeros((space.n_states, len(actions)))
        probs[np.arange(space.n_states), index] = 1.0
        return soften(probs, epsilon)


def _action_index(values: np.ndarray, actions: tuple[int, ...]) -> np.ndarray:
    """Column index of each action value; clips values beyond the action set."""
    acts = np.asarray(actions)
    clipped = np.clip(values, acts.min(), acts.max())
    idx = np.searchsorted(acts, clipped)
    if not np.array_equal(acts[idx], clipped):
        raise PolicyError(f"actions {sorted(set(clipped.tolist()) - set(actions))} not in {actions}")
    return idx


def action_index(values: np.ndarray, actions: tuple[int, ...] = DEFAULT_ACTIONS) -> np.ndarray:
    """Column index in a policy table of each action value (values clipped to the set)."""
    return _action_index(np.asarray(values, dtype=np.int64), actions)


def soften(probs: np.ndarray, epsilon: float) -> np.ndarray:
    """Mix a policy table with the uniform policy: (1 - epsilon) * probs + epsilon / n_actions."""
    if not 0.0 <= epsilon <= 1.0:
        raise PolicyError(f"epsilon must be in [0, 1], got {epsilon}")
    return (1.0 - epsilon) * probs + epsilon / probs.shape[1]


def validate_table(probs: np.ndarray, n_states: int, n_actions: int) -> np.ndarray:
    """Check shape, range and row sums of a policy table; return it as float64."""
    probs = np.asarray(probs, dtype=float)
    if probs.shape != (n_states, n_actions):
        raise PolicyError(f"policy table has shape {probs.shape}, expected {(n_states, n_actions)}")
    if (probs < 0).any() or not np.allclose(probs.sum(axis=1), 1.0):
        raise PolicyError("policy table rows must be probabilities that sum to 1")
    return probs
