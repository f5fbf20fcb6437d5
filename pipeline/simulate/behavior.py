"""How simulated residents choose setpoint actions at the decision points of an away episode.

The true behaviour policy is a softmax over the actions whose utilities depend
only on the observable state (degree bin, price tier, setback offset, steps
left; the local-hour bucket is unused) and on three per-home traits: a
habitual setback depth (1, 2 or 3 °C), a keenness to set back, and whether the
home restores comfort one decision early. Residents aim for their depth while
the return is far off and for comfort once it is near:

* at departure most set back toward their depth, some not at all, and more
  (or deeper) on hot hours and at the price peak;
* at intermediate decisions they mostly hold, stepping further only when
  short of their depth;
* at the restore decision (the last one, or the one before for early
  restorers) many go all the way back, some part of the way, and the keen ones
  often keep the setback until they walk in.

A share of every row is spread evenly over the allowed actions, so each one has
probability of at least ``SUPPORT_FLOOR`` in every state. Actions that would
leave the safety band or the state's offset range get probability zero and the
rest are renormalised, so the table depends on the home's comfort setpoint.

With the hidden confounder on, a 'feeling hot' day (not in any landing file)
makes setbacks shallower and restores likelier.
"""

from __future__ import annotations

import numpy as np

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS

ACTIONS = np.asarray(DEFAULT_ACTIONS)
HOLD = int(np.flatnonzero(ACTIONS == 0)[0])
SUPPORT_FLOOR = 0.03
"""Smallest probability of an allowed action when all of them are allowed."""


def allowed(
    offset_c: np.ndarray, comfort_c: np.ndarray, band_c: tuple[int, int], space: StateSpace
) -> np.ndarray:
    """Which actions keep the setpoint in the band and the offset inside the state space, (..., n_actions)."""
    nxt = np.asarray(offset_c)[..., None] + ACTIONS
    sp = np.asarray(comfort_c)[..., None] + nxt
    return (nxt >= space.offset_min) & (nxt <= space.offset_max) & (sp >= band_c[0]) & (sp <= band_c[1])


def mask_and_normalise(probs: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Zero the forbidden actions and renormalise; a row with nothing left holds (action 0)."""
    p = np.where(ok, probs, 0.0)
    total = p.sum(axis=-1, keepdims=True)
    hold = np.zeros_like(p)
    hold[..., HOLD] = 1.0
    return np.where(total > 0, p / np.where(total > 0, total, 1.0), hold)


def behavior_probs(
    space: StateSpace,
    keys: np.ndarray,
    depth_pref: np.ndarray,
    keenness: np.ndarray,
    restore_lead: np.ndarray,
    comfort_c: np.ndarray,
    band_c: tuple[int, int],
    feeling_hot: np.ndarray | bool = False,
) -> np.ndarray:
    """True action probabilities, broadcasting keys against per-home traits; shape (..., n_actions)."""
    f = space.decode(np.asarray(keys))
    offset, steps_left = f["offset"], f["steps_left"]
    hot = np.asarray(feeling_hot, dtype=float)
    restoring = steps_left <= 1 + np.asarray(restore_lead)
    heat = 0.3 * f["degree_bin"] + 0.5 * (f["price_tier"] == space.price_tiers - 1)
    new = offset[..., None] + ACTIONS
    hold = ACTIONS == 0
    # Away from the return: close in on the habitual depth, like holding still once there, and lean
    # toward deeper setbacks on hot or peak hours.
    pull = (np.asarray(keenness) + heat - 1.0 * hot)[..., None]
    bonus = np.where(offset == 0, 0.6, 2.2)[..., None]
    away = (
        -np.where(offset == 0, 2.2, 1.2)[..., None] * np.abs(new - np.asarray(depth_pref)[..., None])
        + bonus * hold
        + 0.5 * pull * np.clip(new, 0, None)
    )
    # Near the return: all the way back, part of the way, or keep the setback (the keen more often).
    keep = (-1.5 + 0.6 * np.asarray(keenness) - 0.8 * hot)[..., None]
    back = np.select(
        [new == 0, hold, (new > 0) & (new < offset[..., None]), new < 0],
        [np.zeros_like(keep), keep + np.zeros(new.shape), np.full(new.shape, -1.2), np.full(new.shape, -3.0)],
        -3.5,
    )
    util = np.where(restoring[..., None], back, away)
    ok = allowed(offset, comfort_c, band_c, space)
    util = np.where(ok, util, -np.inf)
    expu = np.exp(util - util.max(axis=-1, keepdims=True))
    soft = expu / expu.sum(axis=-1, keepdims=True)
    uniform = ok / np.maximum(ok.sum(axis=-1, keepdims=True), 1)
    probs = (1.0 - len(ACTIONS) * SUPPORT_FLOOR) * soft + len(ACTIONS) * SUPPORT_FLOOR * uniform
    return mask_and_normalise(probs, ok)


def behavior_tables(
    space: StateSpace,
    depth_pref: np.ndarray,
    keenness: np.ndarray,
    restore_lead: np.ndarray,
    comfort_c: np.ndarray,
    band_c: tuple[int, int],
    feeling_hot: bool = False,
) -> np.ndarray:
    """Per-home probability tables, (n_homes, n_states, n_actions)."""
    keys = np.arange(space.n_states)[None, :]
    traits = (depth_pref, keenness, restore_lead, comfort_c)
    depth, keen, lead, comfort = (np.asarray(a)[:, None] for a in traits)
    return behavior_probs(space, keys, depth, keen, lead, comfort, band_c, feeling_hot)
