"""Learners and safety masks against exact solutions of small MDPs, reference loops and cases by hand."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from pipeline.control import (
    ControlInputError,
    allowed_mask,
    baseline_bootstrapped,
    fitted_q_iteration,
    mc_control,
    restrict,
    step_arrays,
)
from pipeline.features import StateSpace

# ---------------------------------------------------------------- small MDPs built here


def _draw(rng: np.random.Generator, probs: np.ndarray) -> np.ndarray:
    """One index per row of ``probs`` (m, k) by inverse CDF."""
    return np.minimum(
        (rng.random(len(probs))[:, None] >= np.cumsum(probs, axis=1)).sum(axis=1), probs.shape[1] - 1
    )


def _flatten(valid, *arrays):
    episode = np.broadcast_to(np.arange(valid.shape[0])[:, None], valid.shape)
    return (episode[valid], *(a[valid] for a in arrays))


class Chain:
    """Seven positions, actions left / stay / right, a fixed horizon of four decisions.

    The state is (position, decisions left), as the pipeline's states carry steps
    left: state = position * H + (left - 1). The intended move happens with
    probability 0.7, else one of the three moves uniformly; rewards are random per
    (position, action) plus noise.
    """

    n_pos, horizon, n_actions = 7, 4, 3

    def __init__(self, seed: int):
        rng = np.random.default_rng(seed)
        self.reward = rng.uniform(-1.0, 0.0, (self.n_pos, self.n_actions))
        move = np.full((self.n_actions, self.n_actions), 0.1) + 0.7 * np.eye(self.n_actions)
        # move[a, m]: probability that action a moves by m - 1.
        self.move = move
        self.n_states = self.n_pos * self.horizon

    def next_position(self, pos, shift):
        return np.clip(pos + shift - 1, 0, self.n_pos - 1)

    def optimal_q(self) -> np.ndarray:
        """Finite-horizon value iteration (Bellman 1957): Q_k = r + E[max_a Q_{k-1}(s', a)]."""
        q = np.zeros((self.n_pos, self.horizon, self.n_actions))
        v_next = np.zeros(self.n_pos)
        pos = np.arange(self.n_pos)
        for left in range(1, self.horizon + 1):
            expected = sum(
                self.move[:, m][None, :] * v_next[self.next_position(pos, m)][:, None] for m in range(3)
            )
            q[:, left - 1] = self.reward + expected
            v_next = q[:, left - 1].max(axis=1)
        return q.reshape(self.n_states, self.n_actions)

    def episodes(self, behavior: np.ndarray, n: int, seed: int, noise: float = 0.3):
        rng = np.random.default_rng(seed)
        pos = rng.integers(0, self.n_pos, n)
        shape = (n, self.horizon)
        s, a, r, b = (
            np.zeros(shape, dtype=np.int64),
            np.zeros(shape, dtype=np.int64),
            np.zeros(shape),
            np.zeros(shape),
        )
        for t in range(self.horizon):
            state = pos * self.horizon + (self.horizon - t - 1)
            act = _draw(rng, behavior[state])
            s[:, t], a[:, t], b[:, t] = state, act, behavior[state, act]
            r[:, t] = self.reward[pos, act] + noise * rng.standard_normal(n)
            pos = self.next_position(pos, _draw(rng, self.move[act]))
        return _flatten(np.ones(shape, dtype=bool), s, a, r, b)


class Recurrent:
    """Six states, three actions, random stochastic transitions with termination 0.5 to 0.8 per step."""

    n_states, n_actions = 6, 3

    def __init__(self, seed: int):
        rng = np.random.default_rng(seed)
        move = rng.dirichlet(np.full(self.n_states, 0.5), size=(self.n_states, self.n_actions))
        end = rng.uniform(0.5, 0.8, (self.n_states, self.n_actions))
        self.p = np.concatenate([move * (1 - end)[..., None], end[..., None]], axis=2)
        self.reward = rng.uniform(-1.0, 0.0, (self.n_states, self.n_actions))

    def optimal_q(self) -> np.ndarray:
        """Value iteration to its fixed point: Q = r + P max_a Q (termination makes it a contraction)."""
        q = np.zeros_like(self.reward)
        while True:
            new = self.reward + self.p[:, :, : self.n_states] @ q.max(axis=1)
            if np.abs(new - q).max() < 1e-13:
                return new
            q = new

    def episodes(self, behavior: np.ndarray, n: int, seed: int, noise: float = 0.2, t_max: int = 40):
        rng = np.random.default_rng(seed)
        state = rng.integers(0, self.n_states, n)
        alive = np.ones(n, dtype=bool)
        shape = (n, t_max)
        s, a, r, b = (
            np.zeros(shape, dtype=np.int64),
            np.zeros(shape, dtype=np.int64),
            np.zeros(shape),
            np.ones(shape),
        )
        valid = np.zeros(shape, dtype=bool)
        for t in range(t_max):
            act = _draw(rng, behavior[state])
            nxt = _draw(rng, self.p[state, act])
            s[:, t], a[:, t], b[:, t], valid[:, t] = state, act, behavior[state, act], alive
            r[:, t] = self.reward[state, act] + noise * rng.standard_normal(n)
            alive &= nxt < self.n_states
            state = np.where(nxt < self.n_states, nxt, 0)
        assert not alive.any(), "an episode outlived t_max; raise it"
        return _flatten(valid, s, a, r, b)


def _soft_behavior(n_states: int, n_actions: int, seed: int) -> np.ndarray:
    """A random behaviour policy giving every action at least 1/6 (soft, as section 5.7 requires)."""
    rng = np.random.default_rng(seed)
    return 0.5 * rng.dirichlet(np.ones(n_actions), size=n_states) + 0.5 / n_actions


def _gaps(q: np.ndarray) -> np.ndarray:
    top = np.sort(q, axis=1)
    return top[:, -1] - top[:, -2]


# ---------------------------------------------------------------- must-show 3: optimal policies

# A state is checked when every action's value rests on an effective sample of at least this
# many returns, and its best action beats the next by at least MARGIN: a near tie needs far more
# data than any fixed threshold to be decided, by this learner or any other.
ENOUGH, MARGIN = 200, 0.05


def _checked(optimal: np.ndarray, effective: np.ndarray) -> np.ndarray:
    return (effective.min(axis=1) >= ENOUGH) & (_gaps(optimal) >= MARGIN)


@pytest.mark.parametrize("seed", [4, 8, 10])
def test_mc_control_and_fitted_q_find_the_optimal_policy_of_a_finite_horizon_chain(seed):
    """Greedy policies match finite-horizon value iteration (exact) in every state with enough evidence."""
    mdp = Chain(seed=seed)
    optimal = mdp.optimal_q()
    b = _soft_behavior(mdp.n_states, mdp.n_actions, seed=seed + 1)
    episode, state, action, reward, prob = mdp.episodes(b, 20_000, seed=seed + 2)

    mc = mc_control(episode, state, action, reward, prob, mdp.n_states, mdp.n_actions)
    assert mc.converged and mc.iterations <= mdp.horizon + 1  # backward induction over decisions left
    checked = _checked(optimal, mc.effective)
    assert checked.mean() >= 0.2
    assert_array_equal(mc.greedy[checked], optimal.argmax(axis=1)[checked])

    fq = fitted_q_iteration(episode, state, action, reward, mdp.n_states, mdp.n_actions)
    assert fq.converged and fq.iterations <= mdp.horizon + 1
    checked = _checked(optimal, fq.effective)
    assert checked.mean() >= 0.7
    assert_array_equal(fq.greedy[checked], optimal.argmax(axis=1)[checked])
    assert np.abs(fq.q - optimal).max() < 0.1


@pytest.mark.parametrize("seed", [1, 10])
def test_mc_control_and_fitted_q_find_the_optimal_policy_of_a_recurrent_mdp(seed):
    """States recur at any distance from the end; the exact optimum is found where evidence suffices."""
    mdp = Recurrent(seed=seed)
    optimal = mdp.optimal_q()
    b = _soft_behavior(mdp.n_states, mdp.n_actions, seed=seed + 100)
    episode, state, action, reward, prob = mdp.episodes(b, 20_000, seed=seed + 6)

    mc = mc_control(episode, state, action, reward, prob, mdp.n_states, mdp.n_actions)
    checked = _checked(optimal, mc.effective)
    assert checked.sum() >= 3
    assert_array_equal(mc.greedy[checked], optimal.argmax(axis=1)[checked])

    fq = fitted_q_iteration(episode, state, action, reward, mdp.n_states, mdp.n_actions)
    assert fq.converged
    checked = _checked(optimal, fq.effective)
    assert checked.sum() >= 5
    assert_array_equal(fq.greedy[checked], optimal.argmax(axis=1)[checked])
    assert np.abs(fq.q - optimal).max() < 0.05


def _book_mc_control(episode, state, action, reward, prob, n_states, n_actions):
    """Sutton and Barto (2018), section 5.7 pseudo-code, one episode at a time, as printed."""
    q, c = np.zeros((n_states, n_actions)), np.zeros((n_states, n_actions))
    pi = np.zeros(n_states, dtype=np.int64)
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]])
    for start, end in zip(starts, np.r_[starts[1:], episode.size], strict=True):
        g, w = 0.0, 1.0
        for t in range(end - 1, start - 1, -1):
            s, a = state[t], action[t]
            g = g + reward[t]
            c[s, a] += w
            q[s, a] += w / c[s, a] * (g - q[s, a])
            pi[s] = int(np.argmax(q[s]))
            if a != pi[s]:
                break
            w = w / prob[t]
    return pi, c


def test_the_books_sequential_loop_reaches_the_same_optimal_policy():
    """The printed per-episode loop finds the same optimum on the chain's data where both have evidence."""
    mdp = Chain(seed=4)
    optimal = mdp.optimal_q().argmax(axis=1)
    b = _soft_behavior(mdp.n_states, mdp.n_actions, seed=5)
    data = mdp.episodes(b, 20_000, seed=6)
    pi, c = _book_mc_control(*data, mdp.n_states, mdp.n_actions)
    batch = mc_control(*data, mdp.n_states, mdp.n_actions)
    book = (c.min(axis=1) >= ENOUGH) & (_gaps(mdp.optimal_q()) >= MARGIN)
    assert book.mean() >= 0.8
    assert_array_equal(pi[book], optimal[book])
    both = book & _checked(mdp.optimal_q(), batch.effective)
    assert both.sum() >= 5
    assert_array_equal(batch.greedy[both], pi[both])


def _reference_mc_control(episode, state, action, reward, prob, n_states, n_actions, max_iterations):
    """Plain loops: the book's backward pass with pi fixed per pass, then greedy improvement, repeated."""
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]])
    ends = np.r_[starts[1:], episode.size]
    visits = np.zeros((n_states, n_actions), dtype=np.int64)
    for s, a in zip(state, action, strict=True):
        visits[s, a] += 1

    def evaluate(pi):
        num, c = np.zeros((n_states, n_actions)), np.zeros((n_states, n_actions))
        for start, end in zip(starts, ends, strict=True):
            g, w = 0.0, 1.0
            for t in range(end - 1, start - 1, -1):
                g += reward[t]
                c[state[t], action[t]] += w
                num[state[t], action[t]] += w * g
                if pi is not None and action[t] != pi[state[t]]:
                    break
                w = w / prob[t]
            # W = 1 everywhere for the first pass (the behaviour's own returns).
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(c > 0, num / c, np.nan), c

    def greedy(q):
        out = np.zeros(n_states, dtype=np.int64)
        for s in range(n_states):
            row = q[s]
            out[s] = int(np.nanargmax(row)) if np.isfinite(row).any() else int(np.argmax(visits[s]))
        return out

    def first_pass():
        num, c = np.zeros((n_states, n_actions)), np.zeros((n_states, n_actions))
        for start, end in zip(starts, ends, strict=True):
            g = 0.0
            for t in range(end - 1, start - 1, -1):
                g += reward[t]
                c[state[t], action[t]] += 1.0
                num[state[t], action[t]] += g
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(c > 0, num / c, np.nan)

    pi = greedy(first_pass())
    for _ in range(max_iterations):
        q, c = evaluate(pi)
        new = greedy(q)
        if np.array_equal(new, pi):
            break
        pi = new
    return q, c, pi


def test_mc_control_equals_a_plain_reference_loop():
    """Vectorised passes over decisions-from-the-end give the same Q, C and policy as the plain loop."""
    mdp = Recurrent(seed=2)
    b = _soft_behavior(mdp.n_states, mdp.n_actions, seed=3)
    data = mdp.episodes(b, 3_000, seed=8)
    got = mc_control(*data, mdp.n_states, mdp.n_actions, max_iterations=6)
    q, c, pi = _reference_mc_control(*data, mdp.n_states, mdp.n_actions, max_iterations=6)
    assert_allclose(got.q, q, rtol=1e-10, atol=1e-12)
    assert_allclose(got.weight, c, rtol=1e-10)
    assert_array_equal(got.greedy, pi)


def test_fitted_q_iteration_equals_a_plain_reference_loop():
    """Each regression is the per-pair mean of r + max_a' Q(s', a'), looped over steps by hand."""
    mdp = Recurrent(seed=5)
    b = _soft_behavior(mdp.n_states, mdp.n_actions, seed=6)
    episode, state, action, reward, _ = mdp.episodes(b, 400, seed=9)
    got = fitted_q_iteration(episode, state, action, reward, mdp.n_states, mdp.n_actions, max_iterations=7)
    q = np.zeros((mdp.n_states, mdp.n_actions))
    logged = np.zeros_like(q, dtype=bool)
    logged[state, action] = True
    for _ in range(7):
        total, count = np.zeros_like(q), np.zeros_like(q)
        for i in range(episode.size):
            y = reward[i]
            if i + 1 < episode.size and episode[i + 1] == episode[i]:
                y += max(q[state[i + 1], a] for a in range(mdp.n_actions) if logged[state[i + 1], a])
            total[state[i], action[i]] += y
            count[state[i], action[i]] += 1
        q = np.divide(total, count, out=np.zeros_like(q), where=count > 0)
    assert_allclose(got.q[logged], q[logged], rtol=1e-12)
    assert np.isnan(got.q[~logged]).all()


def test_fitted_q_iteration_on_a_two_step_problem_by_hand():
    """Q(B, a) is a's mean reward in B; Q(A, a) = r(A, a) + max_a' Q(B, a') (Bellman 1957)."""
    # states A = 0, B = 1; actions 0, 1; four two-step episodes
    episode = np.array([1, 1, 2, 2, 3, 3, 4, 4])
    state = np.array([0, 1] * 4)
    action = np.array([1, 0, 1, 1, 0, 0, 0, 1])
    reward = np.array([-1.0, -2.0, -1.0, -4.0, -3.0, -2.0, -3.0, -4.0])
    got = fitted_q_iteration(episode, state, action, reward, 2, 2)
    assert_allclose(got.q[1], [-2.0, -4.0])
    assert_allclose(got.q[0], [-3.0 - 2.0, -1.0 - 2.0])
    assert_array_equal(got.greedy, [1, 0])


def test_step_arrays_read_a_steps_frame_in_the_configured_action_columns():
    """Actions in °C become columns of the action set; the learners accept the frame's arrays."""
    steps = pl.DataFrame(
        {
            "episode_id": [5, 5, 9],
            "t": [0, 1, 0],
            "state_key": [3, 1, 3],
            "action": [2, -1, 0],
            "reward": [-1.0, -0.5, -2.0],
        }
    )
    episode, state, action, reward = step_arrays(steps, (-2, -1, 0, 1, 2))
    assert_array_equal(action, [4, 1, 2])
    got = fitted_q_iteration(episode, state, action, reward, 4, 5)
    assert_allclose(got.q[3, [2, 4]], [-2.0, -1.5])


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"episode": np.array([2, 2, 1])}, "row 2 has episode 1 after 2"),
        ({"state": np.array([0, 7, 1])}, r"state codes must lie in \[0, 3\); row 1 has 7"),
        ({"prob": np.array([0.5, 0.0, 0.5])}, r"row 1 has 0.0"),
        ({"reward": np.array([0.0, np.nan, 1.0])}, "reward has 1 non-finite value"),
    ],
)
def test_bad_steps_are_refused_with_the_row(change, message):
    """Unsorted episodes, codes out of range, zero behaviour probability and NaN rewards name the row."""
    args = {
        "episode": np.array([1, 1, 2]),
        "state": np.array([0, 1, 2]),
        "action": np.array([0, 1, 0]),
        "reward": np.array([0.0, -1.0, 1.0]),
        "prob": np.array([0.5, 0.5, 0.5]),
    } | change
    with pytest.raises(ControlInputError, match=message):
        mc_control(args["episode"], args["state"], args["action"], args["reward"], args["prob"], 3, 2)


# ---------------------------------------------------------------- must-show 4: baseline bootstrapping


def _spibb_case():
    rng = np.random.default_rng(11)
    q = rng.normal(size=(40, 5))
    counts = rng.integers(0, 30, size=(40, 5))
    base = rng.dirichlet(np.ones(5), size=40)
    return q, counts, base


def test_under_sampled_pairs_keep_the_behaviour_probability_exactly():
    """Laroche et al. (2019), Pi_b-SPIBB: pi = pi_b on pairs logged fewer than N times; rows sum to one."""
    q, counts, base = _spibb_case()
    for epsilon in (0.0, 0.1):
        pi = baseline_bootstrapped(q, counts, base, 10, epsilon=epsilon)
        thin = counts < 10
        assert_array_equal(pi[thin], base[thin])
        assert_allclose(pi.sum(axis=1), 1.0, rtol=0, atol=1e-12)
        assert (pi >= 0).all()


def test_the_moving_mass_goes_to_the_best_well_sampled_action():
    """By hand: bootstrapped actions 0 and 2 keep 0.1 and 0.3; the rest (0.6) goes to action 3."""
    q = np.array([[5.0, 1.0, 9.0, 2.0, -1.0]])
    counts = np.array([[1, 50, 2, 40, 60]])
    base = np.array([[0.1, 0.2, 0.3, 0.15, 0.25]])
    assert_allclose(baseline_bootstrapped(q, counts, base, 5), [[0.1, 0.0, 0.3, 0.6, 0.0]])
    # epsilon 0.3 spreads 0.18 over the three well-sampled supported actions (0.06 each).
    assert_allclose(baseline_bootstrapped(q, counts, base, 5, epsilon=0.3), [[0.1, 0.06, 0.3, 0.48, 0.06]])
    # An action the behaviour never takes gets no softening mass: 0.18 goes to actions 3 and 4 only.
    never = np.array([[0.1, 0.0, 0.3, 0.35, 0.25]])
    assert_allclose(baseline_bootstrapped(q, counts, never, 5, epsilon=0.3), [[0.1, 0.0, 0.3, 0.51, 0.09]])


def test_min_count_zero_is_greedy_and_a_huge_min_count_is_the_behaviour():
    """The two ends of SPIBB: no pair bootstrapped gives argmax Q; every pair bootstrapped gives pi_b."""
    q, counts, base = _spibb_case()
    greedy = np.zeros_like(base)
    greedy[np.arange(len(q)), q.argmax(axis=1)] = 1.0
    assert_array_equal(baseline_bootstrapped(q, counts, base, 0), greedy)
    assert_array_equal(baseline_bootstrapped(q, counts, base, 10**9), base)


def test_pairs_without_an_estimate_are_bootstrapped_and_forbidden_actions_get_nothing():
    """NaN Q keeps pi_b; a forbidden action's mass moves to the best allowed pair, else to allowed ones."""
    q = np.array([[np.nan, 1.0, 3.0], [np.nan, np.nan, np.nan]])
    counts = np.array([[9, 9, 9], [9, 9, 9]])
    base = np.array([[0.2, 0.3, 0.5], [0.2, 0.3, 0.5]])
    allowed = np.array([[True, True, False], [True, True, False]])
    pi = baseline_bootstrapped(q, counts, base, 1, allowed=allowed)
    assert_allclose(pi[0], [0.2, 0.8, 0.0])
    assert_allclose(pi[1], [0.4, 0.6, 0.0])


# ---------------------------------------------------------------- must-show 4: the safety band and comfort


def test_allowed_actions_on_a_hand_computed_cooling_premise():
    """Comfort 24 °C, band 22 to 30 °C: offsets -1..4 of the state space; at the last decision -1..0."""
    space = StateSpace()
    actions = (-2, -1, 0, 1, 2)
    mask = allowed_mask(
        space,
        actions,
        heating=False,
        comfort_cool_c=24.0,
        comfort_heat_c=20.0,
        cool_band_c=(22, 30),
        heat_band_c=(13, 23),
    )
    keys = space.encode([9, 9, 9], [2.0, 2.0, 2.0], [0, 0, 0], [3, 3, 0], [3, 1, 1])
    assert_array_equal(mask[keys[0]], [True, True, True, True, False])  # 3 + 2 = 5 leaves the state space
    assert_array_equal(
        mask[keys[1]], [True, False, False, False, False]
    )  # 3 - 2 = 1: as near as one move gets
    assert_array_equal(mask[keys[2]], [False, True, True, False, False])


def test_conflicting_comfort_setpoints_and_empty_masks_are_refused():
    """Heating comfort above cooling comfort leaves no legal return setpoint; a row allowing nothing fails."""
    with pytest.raises(ControlInputError, match="no setpoint satisfies"):
        allowed_mask(
            StateSpace(),
            (-1, 0, 1),
            heating=np.array([False, False]),
            comfort_cool_c=np.array([24.0, 21.0]),
            comfort_heat_c=np.array([20.0, 22.0]),
            cool_band_c=(18, 30),
            heat_band_c=(13, 23),
        )
    with pytest.raises(ControlInputError, match="at least one action"):
        restrict(np.full((2, 3), 1 / 3), np.array([[True, False, False], [False, False, False]]))


def _setpoint(offset, heating, cool_c, heat_c):
    return heat_c - offset if heating else cool_c + offset


@settings(max_examples=150, deadline=None)
@given(
    data=st.data(),
    heating=st.booleans(),
    offset_min=st.integers(-3, 0),
    offset_max=st.integers(0, 6),
    spread=st.integers(1, 4),
)
def test_no_allowed_policy_puts_mass_outside_the_band_or_comfort(
    data, heating, offset_min, offset_max, spread
):
    """Random bands, comfort, actions, state spaces and policies: no mass on a setpoint outside the limits."""
    space = StateSpace(
        offset_min=offset_min,
        offset_max=offset_max,
        hour_bucket_hours=12,
        price_tiers=1,
        degree_bin_edges_c=(),
        steps_left_cap=3,
    )
    actions = tuple(range(-spread, spread + 1))
    cool_low = data.draw(st.floats(18.0, 26.0))
    cool_band = (cool_low, cool_low + data.draw(st.floats(0.5, 10.0)))
    heat_low = data.draw(st.floats(8.0, 18.0))
    heat_band = (heat_low, heat_low + data.draw(st.floats(0.5, 10.0)))
    band = heat_band if heating else cool_band
    own = data.draw(st.floats(*band))  # the mode's comfort setpoint, inside its band as ingest requires
    other = data.draw(st.floats(own - 6.0, own)) if not heating else data.draw(st.floats(own, own + 6.0))
    cool_c, heat_c = (other, own) if heating else (own, other)
    mask = allowed_mask(
        space,
        actions,
        heating=heating,
        comfort_cool_c=cool_c,
        comfort_heat_c=heat_c,
        cool_band_c=cool_band,
        heat_band_c=heat_band,
    )
    rng = np.random.default_rng(data.draw(st.integers(0, 2**32 - 1)))
    probs = rng.dirichlet(np.full(len(actions), 0.3), size=space.n_states)
    f = space.decode(np.arange(space.n_states))
    reach = f["offset"][:, None] + np.array(actions)[None, :]
    sp = _setpoint(reach, heating, cool_c, heat_c)
    returning = (f["steps_left"] == 1)[:, None]
    legal = (sp >= band[0] - 1e-9) & (sp <= band[1] + 1e-9) & (reach >= offset_min) & (reach <= offset_max)
    legal &= ~returning | ((sp >= heat_c - 1e-9) & (sp <= cool_c + 1e-9))
    q = rng.normal(size=probs.shape)
    counts = rng.integers(0, 10, size=probs.shape)
    for policy in (
        restrict(probs, mask),
        baseline_bootstrapped(q, counts, restrict(probs, mask), 5, allowed=mask, epsilon=0.1),
    ):
        assert_allclose(policy.sum(axis=1), 1.0, atol=1e-12)
        reachable = legal.any(axis=1)
        # States from which a legal setpoint can be reached put all their mass on legal ones.
        assert (policy[reachable][~legal[reachable]] == 0).all()
        # The others (only a resident's own change leads there) lie wholly on one side of the legal
        # offsets, which include 0 (comfort itself): they move as far back toward it as one action can.
        nearest = np.abs(reach) == np.abs(reach).min(axis=1, keepdims=True)
        assert (policy[~reachable][~nearest[~reachable]] == 0).all()


def test_masks_broadcast_over_premises_and_restrict_renormalises():
    """One mask per premise; a scope's policy restricted per premise keeps rows summing to one."""
    space = StateSpace()
    mask = allowed_mask(
        space,
        (-2, -1, 0, 1, 2),
        heating=np.array([False, True]),
        comfort_cool_c=np.array([24.0, 26.0]),
        comfort_heat_c=np.array([20.0, 21.0]),
        cool_band_c=(22, 30),
        heat_band_c=(13, 23),
    )
    assert mask.shape == (2, space.n_states, 5)
    table = np.full((space.n_states, 5), 0.2)
    per_premise = restrict(table, mask)
    assert per_premise.shape == (2, space.n_states, 5)
    assert_allclose(per_premise.sum(axis=-1), 1.0)
    assert (per_premise[~mask] == 0).all()
