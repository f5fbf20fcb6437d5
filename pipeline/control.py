"""Learned setpoint policies from logged episodes: the pure core, without Prefect or I/O.

Two learners over the tabular states of ``pipeline.features`` (the same states and
action columns as evaluation):

* ``mc_control``: off-policy Monte Carlo control with weighted importance sampling
  (Sutton and Barto 2018, section 5.7);
* ``fitted_q_iteration``: fitted Q iteration (Ernst, Geurts and Wehenkel 2005) with
  the tabular regressor, one mean per (state, action).

and two ways to keep what they propose safe to send:

* ``baseline_bootstrapped``: safe policy improvement with baseline bootstrapping
  (Laroche, Trichelair and Tachet des Combes 2019, the Pi_b-SPIBB form): where a
  (state, action) pair was logged too rarely the residents' own probability is kept;
* ``allowed_mask`` and ``restrict``: no probability on a setpoint outside the safety
  band, nor, once the residents are back, outside the premise's comfort limits.

Steps are flat arrays in frame order, sorted by episode and then decision index, as
``pipeline.qmodel.Transitions`` lays them out; action arguments are column indices into
the configured action set (``pipeline.policies.action_index``). All work is whole-array
numpy; the only Python loops run over the decisions-from-the-end of the longest
episode or over the few sweeps of a fixed-point method.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.features import StateSpace
from pipeline.policies import action_index, validate_table
from pipeline.qmodel import Transitions

# Largest log importance weight kept (exp(709.8) is the largest finite float64).
_MAX_LOG_WEIGHT = 700.0


class ControlInputError(ValueError):
    """Steps, tables or settings the learners cannot use as given."""


@dataclass(frozen=True)
class LearnedQ:
    """What a learner found: action values, the evidence behind them and the greedy policy."""

    q: np.ndarray
    """(n_states, n_actions) action values, in the unit of the rewards; NaN where there is no estimate."""
    weight: np.ndarray
    """(n_states, n_actions) C(s, a): the summed importance weights behind each value
    (Sutton and Barto 2018, section 5.7); for fitted Q iteration, the logged steps."""
    visits: np.ndarray
    """(n_states, n_actions) logged steps of each pair, what baseline bootstrapping counts."""
    effective: np.ndarray
    """(n_states, n_actions) Kish effective sample size (sum W)^2 / sum W^2 of the returns behind
    each value (Kish 1965); for fitted Q iteration, the logged steps."""
    greedy: np.ndarray
    """(n_states,) column of the best estimated action; where a state has no estimate, its most
    logged action (the first column where it was never logged)."""
    iterations: int
    """Sweeps run (policy evaluations for ``mc_control``, regressions for ``fitted_q_iteration``)."""
    converged: bool
    """True when the last sweep changed nothing (greedy policy, or Q within tolerance)."""

    def greedy_table(self) -> np.ndarray:
        """The greedy policy as a probability table (n_states, n_actions) of zeros and ones."""
        table = np.zeros(self.q.shape)
        table[np.arange(self.q.shape[0]), self.greedy] = 1.0
        return table


# ---------------------------------------------------------------- inputs


def step_arrays(
    steps: pl.DataFrame, actions: tuple[int, ...]
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(episode, state, action column, reward) arrays from a steps frame sorted by (episode_id, t).

    ``steps`` needs episode_id, state_key, action (°C in the setback direction) and
    reward; actions outside ``actions`` raise ``PolicyError`` from ``action_index``.
    """
    missing = [c for c in ("episode_id", "state_key", "action", "reward") if c not in steps.columns]
    if missing:
        raise ControlInputError(
            f"steps lack column(s) {missing}; the learners need episode_id, state_key, action and reward"
        )
    return (
        steps["episode_id"].to_numpy(),
        steps["state_key"].to_numpy().astype(np.int64),
        action_index(steps["action"].to_numpy(), actions),
        steps["reward"].to_numpy().astype(float),
    )


def _checked_moves(
    episode: np.ndarray,
    state: np.ndarray,
    action: np.ndarray,
    reward: np.ndarray,
    n_states: int,
    n_actions: int,
    gamma: float,
) -> Transitions:
    """Validate the step arrays (one pass each) and lay them out as ``Transitions``."""
    if not (isinstance(gamma, int | float) and 0.0 < gamma <= 1.0):
        raise ControlInputError(f"gamma must be a discount factor in (0, 1], got {gamma!r}")
    arrays = {"episode": episode, "state": state, "action": action, "reward": reward}
    arrays = {name: np.asarray(a) for name, a in arrays.items()}
    sizes = {a.shape for a in arrays.values()}
    if len(sizes) != 1 or len(next(iter(sizes))) != 1:
        raise ControlInputError(f"step arrays must be 1-D of one length, got shapes {sorted(sizes)}")
    if arrays["episode"].size == 0:
        raise ControlInputError("no steps to learn from")
    ep = arrays["episode"]
    if (ep[1:] < ep[:-1]).any():
        row = int(np.argmax(ep[1:] < ep[:-1])) + 1
        raise ControlInputError(
            f"steps must be sorted by episode, then decision: row {row} has episode {ep[row]} after "
            f"{ep[row - 1]}"
        )
    for name, size in (("state", n_states), ("action", n_actions)):
        values = arrays[name]
        if not np.issubdtype(values.dtype, np.integer):
            raise ControlInputError(f"{name} must hold integer codes, got dtype {values.dtype}")
        bad = np.flatnonzero((values < 0) | (values >= size))
        if bad.size:
            raise ControlInputError(
                f"{name} codes must lie in [0, {size}); row {int(bad[0])} has {values[bad[0]]}"
            )
    _check_finite(arrays["reward"].astype(float), "reward")
    return Transitions.from_arrays(
        ep, arrays["state"], arrays["action"], arrays["reward"], n_states, n_actions
    )


def _check_finite(values: np.ndarray, name: str) -> None:
    bad = np.flatnonzero(~np.isfinite(values))
    if bad.size:
        raise ControlInputError(f"{name} has {bad.size} non-finite value(s), first at row {int(bad[0])}")


def _layers(last: np.ndarray) -> list[np.ndarray]:
    """Rows grouped by decisions left to their episode's end: element k holds the rows k from the end."""
    ends = np.flatnonzero(last)
    first = np.concatenate(([True], last[:-1]))
    from_end = ends[np.cumsum(first) - 1] - np.arange(last.size)
    order = np.argsort(from_end, kind="stable")
    bounds = np.searchsorted(from_end[order], np.arange(int(from_end.max()) + 2))
    return [order[bounds[k] : bounds[k + 1]] for k in range(bounds.size - 1)]


def _greedy(q: np.ndarray, visits: np.ndarray) -> np.ndarray:
    """Column of the largest finite Q per state (first on ties); else the most logged column."""
    finite = np.isfinite(q)
    best = np.argmax(np.where(finite, q, -np.inf), axis=1)
    return np.where(finite.any(axis=1), best, np.argmax(visits, axis=1))


# ---------------------------------------------------------------- learners


def mc_control(
    episode: np.ndarray,
    state: np.ndarray,
    action: np.ndarray,
    reward: np.ndarray,
    behavior_prob: np.ndarray,
    n_states: int,
    n_actions: int,
    gamma: float = 1.0,
    max_iterations: int | None = None,
) -> LearnedQ:
    """Off-policy Monte Carlo control with weighted importance sampling (Sutton and Barto 2018, 5.7).

    The book's loop takes one episode at a time backward, t = T-1 ... 0::

        G <- gamma G + R_{t+1};  C(S_t, A_t) += W;  Q(S_t, A_t) += W / C(S_t, A_t) (G - Q(S_t, A_t))
        pi(S_t) <- argmax_a Q(S_t, a);  stop the episode if A_t != pi(S_t);  W <- W / b(A_t | S_t)

    so, with pi held fixed, Q(s, a) is the weighted mean sum W G / sum W over the
    visits of (s, a), with W_t = prod_{k > t} 1[A_k = pi(S_k)] / b(A_k | S_k): the
    incremental update is that running weighted mean, and a zero in the product is
    the exit from the episode's backward pass. What the book's loop converges to is a
    pair (Q, pi) with pi greedy in Q and Q the weighted importance sampling value of
    pi. That fixed point is computed here on the whole batch, in an order that does
    not depend on the order of the episodes: evaluate the current greedy policy over
    every episode at once (one numpy pass per decision-from-the-end, all episodes
    together), make the policy greedy in the result, and repeat until it no longer
    changes. The first policy is greedy in the behaviour's own returns (W = 1).

    When the state carries the decisions left (``StateSpace.steps_left``), the
    greedy action k decisions from the end depends only on the layers below it, so
    the policy is final after k + 1 evaluations (backward induction): the default
    ``max_iterations`` is the longest episode's length plus one. Where states recur
    at different distances from the end (the steps-left cap, general MDPs) the
    fixed point is checked, not assumed: ``converged`` says whether it was reached.

    Parameters
    ----------
    episode, state, action, reward : numpy.ndarray
        Logged steps, shape (n_steps,), sorted by episode then decision: episode ids,
        state keys in [0, n_states), action columns in [0, n_actions), rewards.
    behavior_prob : numpy.ndarray
        b(A_t | S_t) of each logged action, in (0, 1], shape (n_steps,).
    n_states, n_actions : int
        Table sizes.
    gamma : float, default 1.0
        Discount per decision, in (0, 1].
    max_iterations : int, optional
        Cap on policy evaluations; default longest episode + 1.

    Returns
    -------
    LearnedQ
        ``q`` (NaN where no visit has weight), ``weight`` (C), ``visits``, ``effective``
        (Kish ESS of each value's weights), ``greedy``.
    """
    moves = _checked_moves(episode, state, action, reward, n_states, n_actions, gamma)
    b = np.asarray(behavior_prob, dtype=float)
    if b.shape != moves.state.shape:
        raise ControlInputError(f"behavior_prob has shape {b.shape}, expected {moves.state.shape}")
    bad = np.flatnonzero(~((b > 0.0) & (b <= 1.0)))
    if bad.size:
        raise ControlInputError(
            f"behavior_prob must be a probability in (0, 1]; row {int(bad[0])} has {b[bad[0]]} (a logged "
            "action the behaviour model gives no probability cannot be reweighted)"
        )
    layers = _layers(moves.last)
    if max_iterations is None:
        max_iterations = len(layers) + 1
    if not (isinstance(max_iterations, int) and max_iterations >= 1):
        raise ControlInputError(f"max_iterations must be a whole number >= 1, got {max_iterations!r}")

    # Returns G_t, one pass per layer from the end: G_t = R_t + gamma G_{t+1}.
    ret = moves.reward.copy()
    for rows in layers[1:]:
        ret[rows] += gamma * ret[rows + 1]
    log_inv_b = -np.log(b)
    column = moves.pair - moves.state * n_actions
    visits = moves.pair_count.reshape(n_states, n_actions)
    cells = n_states * n_actions

    def evaluate(policy: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        # log W_t, -inf once a later action is not the policy's; W = 1 at each last step.
        log_w = np.zeros(moves.state.size)
        if policy is not None:
            factor = np.where(column == policy[moves.state], log_inv_b, -np.inf)
            for rows in layers[1:]:
                log_w[rows] = log_w[rows + 1] + factor[rows + 1]
        if log_w.max() > _MAX_LOG_WEIGHT:
            row = int(np.argmax(log_w))
            raise ControlInputError(
                f"importance weight exp({log_w[row]:.0f}) at row {row} overflows; episodes are too long for "
                "the behaviour probabilities logged (fewer decisions, or a smoother behaviour model)"
            )
        w = np.exp(log_w)
        c = np.bincount(moves.pair, w, cells)
        total = np.bincount(moves.pair, w * ret, cells)
        q = np.divide(total, c, out=np.full(cells, np.nan), where=c > 0)
        squares = np.bincount(moves.pair, w * w, cells)
        ess = np.divide(c * c, squares, out=np.zeros(cells), where=squares > 0)
        return (
            q.reshape(n_states, n_actions),
            c.reshape(n_states, n_actions),
            ess.reshape(n_states, n_actions),
        )

    q, c, ess = evaluate(None)
    policy = _greedy(q, visits)
    converged, iterations = False, 0
    while iterations < max_iterations:
        q, c, ess = evaluate(policy)
        iterations += 1
        improved = _greedy(q, visits)
        if np.array_equal(improved, policy):
            converged = True
            break
        policy = improved
    return LearnedQ(q, c, visits, ess, policy, iterations, converged)


def fitted_q_iteration(
    episode: np.ndarray,
    state: np.ndarray,
    action: np.ndarray,
    reward: np.ndarray,
    n_states: int,
    n_actions: int,
    gamma: float = 1.0,
    max_iterations: int = 100,
    tolerance: float = 1e-9,
) -> LearnedQ:
    """Fitted Q iteration (Ernst, Geurts and Wehenkel 2005) with the tabular regressor.

    From Q_0 = 0, each iteration regresses the one-step targets of every logged step
    onto its (state, action) pair::

        Q_{N+1}(s, a) = mean over logged (s, a) of  r + gamma * max_a' Q_N(s', a'),

    with nothing added after an episode's last step. The tabular regressor is the
    mean per pair, one ``np.bincount``; pairs never logged have no estimate (NaN) and
    the max runs over the pairs that have one (every next state was logged, as the
    state of the following step). With the steps left in the state the iteration
    reaches its fixed point after the longest episode's length; it stops when no
    value moves by more than ``tolerance`` or after ``max_iterations``.

    Parameters
    ----------
    episode, state, action, reward : numpy.ndarray
        Logged steps, shape (n_steps,), sorted by episode then decision.
    n_states, n_actions : int
        Table sizes.
    gamma : float, default 1.0
        Discount per decision, in (0, 1].
    max_iterations : int, default 100
        Cap on regressions.
    tolerance : float, default 1e-9
        Largest change of any Q value that counts as converged, in the rewards' unit.

    Returns
    -------
    LearnedQ
        ``q`` (NaN where never logged), ``weight``, ``visits`` and ``effective`` (all the
        logged steps), ``greedy``.
    """
    moves = _checked_moves(episode, state, action, reward, n_states, n_actions, gamma)
    if not (isinstance(max_iterations, int) and max_iterations >= 1):
        raise ControlInputError(f"max_iterations must be a whole number >= 1, got {max_iterations!r}")
    logged = moves.pair_count.reshape(n_states, n_actions) > 0
    q = np.where(logged, 0.0, np.nan)
    converged, iterations = False, 0
    while iterations < max_iterations:
        best = np.max(np.where(logged, q, -np.inf), axis=1)
        new = np.where(logged, moves.pair_mean(moves.targets(best, gamma)).reshape(logged.shape), np.nan)
        iterations += 1
        change = np.max(np.abs(new[logged] - q[logged]))
        q = new
        if change <= tolerance:
            converged = True
            break
    visits = moves.pair_count.reshape(n_states, n_actions)
    steps = visits.astype(float)
    return LearnedQ(q, steps, visits, steps, _greedy(q, visits), iterations, converged)


# ---------------------------------------------------------------- staying where the data can speak


def baseline_bootstrapped(
    q: np.ndarray,
    counts: np.ndarray,
    behavior_table: np.ndarray,
    min_count: int,
    *,
    allowed: np.ndarray | None = None,
    epsilon: float = 0.0,
) -> np.ndarray:
    """Safe policy improvement with baseline bootstrapping, Pi_b-SPIBB form.

    Laroche, Trichelair and Tachet des Combes (2019), "Safe policy improvement with
    baseline bootstrapping": with B the bootstrapped pairs, those logged fewer than
    ``min_count`` times, the policy keeps the baseline there, pi(a|s) = pi_b(a|s) for
    (s, a) in B, and gives the rest of the state's mass, 1 - sum_{a in B} pi_b(a|s),
    to the best action by Q among the pairs not in B.

    Pairs without an estimate (NaN in ``q``) count as bootstrapped whatever their
    count. With ``allowed`` (from ``allowed_mask``), forbidden actions get nothing:
    the baseline's mass on them joins the mass that moves, and the best action is
    sought among allowed pairs only; a state with no allowed pair outside B spreads
    that mass over its allowed bootstrapped actions in proportion to the baseline
    (uniformly if the baseline gives them nothing). ``epsilon`` > 0 keeps share
    epsilon of the moving mass spread uniformly over the well-sampled allowed
    actions the baseline supports (pi_b > 0), so the policy is soft only where it
    moved and only on actions whose importance weights stay finite; bootstrapped
    pairs keep exactly pi_b.

    Parameters
    ----------
    q : numpy.ndarray
        (n_states, n_actions) action values, NaN where not estimated.
    counts : numpy.ndarray
        (n_states, n_actions) logged steps per pair.
    behavior_table : numpy.ndarray
        (n_states, n_actions) baseline probabilities; rows sum to one.
    min_count : int
        Pairs logged fewer times keep the baseline (N_wedge in the paper), >= 0.
    allowed : numpy.ndarray, optional
        (n_states, n_actions) bool; default all allowed.
    epsilon : float, default 0.0
        Softening share of the mass that moves, in [0, 1].

    Returns
    -------
    numpy.ndarray
        (n_states, n_actions) probabilities; each row sums to one. With ``min_count``
        0 and every pair estimated it is the greedy policy; with ``min_count`` above
        every count it is the baseline.
    """
    q = np.asarray(q, dtype=float)
    n_states, n_actions = q.shape if q.ndim == 2 else (0, 0)
    if q.ndim != 2:
        raise ControlInputError(f"q must be a (n_states, n_actions) table, got shape {q.shape}")
    counts = np.asarray(counts)
    if counts.shape != q.shape:
        raise ControlInputError(f"counts has shape {counts.shape}, expected {q.shape}")
    try:
        base = validate_table(behavior_table, n_states, n_actions)
    except ValueError as err:
        raise ControlInputError(f"behavior_table: {err}") from err
    if not (isinstance(min_count, int | np.integer) and min_count >= 0):
        raise ControlInputError(f"min_count must be a whole number >= 0, got {min_count!r}")
    if not (isinstance(epsilon, int | float) and 0.0 <= epsilon <= 1.0):
        raise ControlInputError(f"epsilon must be in [0, 1], got {epsilon!r}")
    ok = np.ones(q.shape, dtype=bool) if allowed is None else np.asarray(allowed, dtype=bool)
    if ok.shape != q.shape:
        raise ControlInputError(f"allowed has shape {ok.shape}, expected {q.shape}")

    boot = ((counts < min_count) | ~np.isfinite(q)) & ok
    keep = np.where(boot, base, 0.0)
    moving = 1.0 - keep.sum(axis=1)
    free = ok & ~boot
    has_free = free.any(axis=1)
    best = np.argmax(np.where(free, q, -np.inf), axis=1)
    target = np.zeros(q.shape)
    target[np.arange(n_states), best] = 1.0
    soft = free & (base > 0.0)
    n_soft = soft.sum(axis=1, keepdims=True)
    spread = np.divide(soft, n_soft, out=np.zeros(q.shape), where=n_soft > 0)
    target = np.where(n_soft > 0, (1.0 - epsilon) * target + epsilon * spread, target)
    moved = keep + moving[:, None] * target
    # No allowed pair outside B: the mass stays with the allowed bootstrapped actions, as it is
    # unless some of the baseline's mass sat on forbidden actions and must be shared out.
    kept = keep.sum(axis=1, keepdims=True)
    uniform = ok / np.maximum(ok.sum(axis=1, keepdims=True), 1)
    shared = np.divide(keep, kept, out=uniform.astype(float), where=kept > 0)
    lost = np.where(ok, 0.0, base).sum(axis=1, keepdims=True)
    stay = np.where(lost > 0, shared, keep)
    return np.where(has_free[:, None], moved, stay)


# ---------------------------------------------------------------- the safety band and comfort limits


def allowed_mask(
    space: StateSpace,
    actions: tuple[int, ...],
    *,
    heating: np.ndarray | bool,
    comfort_cool_c: np.ndarray | float,
    comfort_heat_c: np.ndarray | float,
    cool_band_c: tuple[float, float],
    heat_band_c: tuple[float, float],
) -> np.ndarray:
    """Which actions each state allows, for premises given by broadcastable arrays.

    Offsets are in the setback direction from the premise's comfort setpoint of the
    mode, as in the step table: cooling setpoint = comfort_cool_c + offset, heating
    setpoint = comfort_heat_c - offset. An action is allowed when the offset it
    leads to, offset + action,

    * stays inside the state space (``offset_min`` .. ``offset_max``), so the policy
      never reaches a setpoint its states cannot describe;
    * keeps the setpoint inside the safety band of the mode (``cool_band_c`` or
      ``heat_band_c``);
    * at the last decision of an episode (``steps_left`` 1, whose setpoint is in force
      when the residents return) keeps the setpoint within the premise's comfort
      limits, comfort_heat_c .. comfort_cool_c, i.e. offset + action in
      [comfort_heat_c - comfort_cool_c, 0] in either mode.

    Where no action reaches the allowed offsets from a state's offset (a state
    beyond them, which only a resident's own change can cause), the actions that
    come nearest are allowed, so every row allows at least one action.

    Parameters
    ----------
    space : StateSpace
        Decodes each state's offset and steps left.
    actions : tuple of int
        Action set, °C in the setback direction, in column order.
    heating : bool or numpy.ndarray
        True for heating-mode premises (or episodes), shape (m,) or scalar.
    comfort_cool_c, comfort_heat_c : float or numpy.ndarray
        Each premise's comfort setpoints, °C, broadcastable with ``heating``.
    cool_band_c, heat_band_c : tuple of float
        Safety bands (low, high), °C.

    Returns
    -------
    numpy.ndarray
        bool, shape (*broadcast shape, n_states, n_actions).
    """
    heat = np.asarray(heating, dtype=bool)
    cool_c = np.asarray(comfort_cool_c, dtype=float)
    warm_c = np.asarray(comfort_heat_c, dtype=float)
    heat, cool_c, warm_c = np.broadcast_arrays(heat, cool_c, warm_c)
    _check_finite(np.concatenate([cool_c.ravel(), warm_c.ravel()]), "comfort setpoints")
    for name, band in (("cool_band_c", cool_band_c), ("heat_band_c", heat_band_c)):
        if not (len(band) == 2 and band[0] < band[1]):
            raise ControlInputError(f"{name} must be (low, high) °C with low < high, got {band}")
    # Offsets that keep the setpoint inside the band, per premise.
    band_low = np.where(heat, warm_c - heat_band_c[1], cool_band_c[0] - cool_c)
    band_high = np.where(heat, warm_c - heat_band_c[0], cool_band_c[1] - cool_c)
    low = np.maximum(band_low, space.offset_min)
    high = np.minimum(band_high, space.offset_max)
    occupied_low = np.maximum(low, warm_c - cool_c)
    occupied_high = np.minimum(high, 0.0)
    empty = (low > high) | (occupied_low > occupied_high)
    if empty.any():
        where = np.argwhere(empty)[0]
        raise ControlInputError(
            f"premise {tuple(int(i) for i in where)}: no setpoint satisfies the safety band, the state "
            f"space's offsets ({space.offset_min}..{space.offset_max} °C) and the comfort limits "
            f"({warm_c[tuple(where)]} .. {cool_c[tuple(where)]} °C); check the comfort setpoints"
        )
    f = space.decode(np.arange(space.n_states))
    reach = (f["offset"][:, None] + np.asarray(actions)[None, :]).astype(float)  # (S, A)
    last = (f["steps_left"] == 1)[:, None]
    lo = np.where(last, occupied_low[..., None, None], low[..., None, None])
    hi = np.where(last, occupied_high[..., None, None], high[..., None, None])
    miss = np.maximum(lo - reach, 0.0) + np.maximum(reach - hi, 0.0)
    return miss <= miss.min(axis=-1, keepdims=True)


def restrict(probs: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    """Zero the forbidden actions of a policy table and renormalise each row.

    ``probs`` (n_states, n_actions) broadcasts against ``allowed`` (..., n_states,
    n_actions), e.g. one scope's policy against each premise's mask. A row whose
    allowed actions had no probability becomes uniform over them.
    """
    probs = np.asarray(probs, dtype=float)
    ok = np.asarray(allowed, dtype=bool)
    if probs.shape[-2:] != ok.shape[-2:]:
        raise ControlInputError(f"policy table {probs.shape} and mask {ok.shape} do not match")
    if not ok.any(axis=-1).all():
        raise ControlInputError("every state must allow at least one action")
    kept = np.where(ok, probs, 0.0)
    total = kept.sum(axis=-1, keepdims=True)
    uniform = ok / ok.sum(axis=-1, keepdims=True)
    return np.divide(kept, total, out=uniform.astype(float), where=total > 0)
