"""How simulated residents choose setpoint actions while away.

The true behaviour policy is a softmax over the three actions whose utilities
depend only on the observable state (local-hour bucket is unused, degree bin,
price tier, setback offset, steps left) and on two per-home traits: a habitual
setback depth (1, 2 or 3 °C) and a keenness to set back. Residents aim for
``min(depth, steps_left - 1)``, the same target shape as ``SetbackRule`` with
``lead_steps=0``: step toward it when off target, hold when on it, and set
back more readily on hot hours and in the top price tier. Actions that would
leave the safety band or the state's offset range get probability zero and the
rest are renormalised, so the table depends on the home's comfort setpoint.

With the hidden confounder on, a 'feeling hot' day (not in any landing file)
makes setbacks rarer and restores likelier.
"""

from __future__ import annotations

import numpy as np

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS

ACTIONS = np.asarray(DEFAULT_ACTIONS)


def allowed(
    offset_c: np.ndarray, comfort_c: np.ndarray, band_c: tuple[int, int], space: StateSpace
) -> np.ndarray:
    """Which actions keep the setpoint in the band and the offset inside the state space, (..., 3)."""
    nxt = np.asarray(offset_c)[..., None] + ACTIONS
    sp = np.asarray(comfort_c)[..., None] + nxt
    return (nxt >= space.offset_min) & (nxt <= space.offset_max) & (sp >= band_c[0]) & (sp <= band_c[1])


def mask_and_normalise(probs: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """Zero the forbidden actions and renormalise; a row with nothing left holds (action 0)."""
    p = np.where(ok, probs, 0.0)
    total = p.sum(axis=-1, keepdims=True)
    hold = np.zeros_like(p)
    hold[..., 1] = 1.0
    return np.where(total > 0, p / np.where(total > 0, total, 1.0), hold)


def behavior_probs(
    space: StateSpace,
    keys: np.ndarray,
    depth_pref: np.ndarray,
    keenness: np.ndarray,
    comfort_c: np.ndarray,
    band_c: tuple[int, int],
    feeling_hot: np.ndarray | bool = False,
) -> np.ndarray:
    """True action probabilities, broadcasting keys against per-home traits; shape (..., 3)."""
    f = space.decode(np.asarray(keys))
    offset, steps_left = f["offset"], f["steps_left"]
    target = np.minimum(depth_pref, steps_left - 1)
    gap = target - offset
    heat = 0.35 * f["degree_bin"] + 0.6 * (f["price_tier"] == space.price_tiers - 1)
    hot = np.asarray(feeling_hot, dtype=float)
    up = np.select(
        [gap > 0, gap == 0], [0.6 + keenness + heat - 1.5 * hot, -2.8 + 0.5 * heat - 1.0 * hot], -4.0
    )
    down = np.select([gap < 0, gap == 0], [1.0 + 0.6 * hot, -3.0 + 1.2 * hot], -4.0 + 1.5 * hot)
    util = np.stack(np.broadcast_arrays(down, np.zeros_like(up), up), axis=-1)
    expu = np.exp(util - util.max(axis=-1, keepdims=True))
    probs = expu / expu.sum(axis=-1, keepdims=True)
    return mask_and_normalise(probs, allowed(offset, comfort_c, band_c, space))


def behavior_tables(
    space: StateSpace,
    depth_pref: np.ndarray,
    keenness: np.ndarray,
    comfort_c: np.ndarray,
    band_c: tuple[int, int],
    feeling_hot: bool = False,
) -> np.ndarray:
    """Per-home probability tables, (n_homes, n_states, 3)."""
    keys = np.arange(space.n_states)[None, :]
    depth, keen, comfort = (np.asarray(a)[:, None] for a in (depth_pref, keenness, comfort_c))
    return behavior_probs(space, keys, depth, keen, comfort, band_c, feeling_hot)
