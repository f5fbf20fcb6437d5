"""Tests for pipeline.estimators.

Three kinds of check: every vectorised estimator against a plain reference loop
on random inputs; published examples (Sutton and Barto 2018, Examples 5.4 and
5.5; Kish 1965); and exact values of a small tabular problem from its Bellman
linear system. Repeated-run checks simulate many independent runs at once and
put each run in its own ``group``, so one estimator call covers all of them.
"""

from __future__ import annotations

from fractions import Fraction
from functools import cache

import numpy as np
import polars as pl
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from pipeline import estimators as est
from pipeline.estimators import (
    EstimatorInputError,
    bootstrap_interval,
    diagnostics,
    doubly_robust,
    effective_sample_size,
    every_visit_mc,
    first_visit_mc,
    lower_bound,
    on_policy_value,
    ordinary_is,
    per_decision_is,
    weighted_is,
    weighted_per_decision_is,
)

OFF_POLICY = (ordinary_is, weighted_is, per_decision_is, weighted_per_decision_is, doubly_robust)


# ---------------------------------------------------------------- frames


def _frame(columns: dict[str, np.ndarray]) -> pl.DataFrame:
    """A steps frame from equal-length arrays, sorted by (episode_id, t)."""
    order = np.lexsort((columns["t"], columns["episode_id"]))
    return pl.DataFrame({name: np.asarray(values)[order] for name, values in columns.items()})


def random_steps(seed: int, n_episodes: int = 60) -> pl.DataFrame:
    """Random decision steps: uneven lengths, three groups, some pi exactly 0."""
    rng = np.random.default_rng(seed)
    lengths = rng.integers(1, 7, n_episodes)
    n = int(lengths.sum())
    episode = np.repeat(np.arange(n_episodes) * 3 + 5, lengths)  # ids need not be 0..n-1
    t = np.concatenate([np.arange(k) for k in lengths])
    pi = np.where(rng.random(n) < 0.1, 0.0, rng.uniform(0.05, 1.0, n))
    names = np.array(["north", "south", "east"])
    return _frame(
        {
            "episode_id": episode,
            "t": t,
            "reward": rng.normal(-1.0, 0.7, n),
            "pi": pi,
            "b": rng.uniform(0.1, 1.0, n),
            "q_hat": rng.normal(-1.0, 0.5, n),
            "v_hat": rng.normal(-1.0, 0.5, n),
            "state_key": rng.integers(0, 4, n),
            "group": np.repeat(names[rng.integers(0, 3, n_episodes)], lengths),
        }
    )


# ---------------------------------------------------------------- reference loops


def _episodes_by_group(steps: pl.DataFrame) -> dict:
    """{group: [episode rows as a list of dicts]}, by walking the rows one at a time."""
    out: dict = {}
    current = None
    for row in steps.iter_rows(named=True):
        group = row.get("group", est.ALL_GROUP)
        if current is None or row["episode_id"] != current[0]["episode_id"]:
            current = []
            out.setdefault(group, []).append(current)
        current.append(row)
    return out


def _ratio(row) -> float:
    return row["pi"] / row["b"]


def ref_estimate(steps: pl.DataFrame, name: str, gamma: float) -> dict:
    """Plain per-episode loops, one estimator formula each, written the way the papers state them."""
    result = {}
    for group, episodes in _episodes_by_group(steps).items():
        n = len(episodes)
        if name == "on_policy_value":
            total = 0.0
            for episode in episodes:
                total += sum(gamma ** r["t"] * r["reward"] for r in episode)
            result[group] = total / n
        elif name in ("ordinary_is", "weighted_is"):
            numerator = denominator = 0.0
            for episode in episodes:
                rho = 1.0
                for r in episode:
                    rho *= _ratio(r)
                numerator += rho * sum(gamma ** r["t"] * r["reward"] for r in episode)
                denominator += rho
            if name == "ordinary_is":
                result[group] = numerator / n
            else:
                result[group] = numerator / denominator if denominator > 0 else np.nan
        elif name in ("per_decision_is", "doubly_robust"):
            total = 0.0
            for episode in episodes:
                rho = 1.0
                for r in episode:
                    before = rho
                    rho *= _ratio(r)
                    if name == "per_decision_is":
                        total += gamma ** r["t"] * rho * r["reward"]
                    else:
                        total += gamma ** r["t"] * (rho * (r["reward"] - r["q_hat"]) + before * r["v_hat"])
            result[group] = total / n
        elif name == "weighted_per_decision_is":
            weights = []
            for episode in episodes:
                rho, w = 1.0, []
                for r in episode:
                    rho *= _ratio(r)
                    w.append(rho)
                weights.append(w)
            horizon = max(len(e) for e in episodes)
            total, defined = 0.0, True
            for t in range(horizon):
                numerator = denominator = 0.0
                for episode, w in zip(episodes, weights, strict=True):
                    if t < len(episode):
                        numerator += w[t] * episode[t]["reward"]
                    denominator += w[min(t, len(episode) - 1)]
                if denominator == 0:
                    defined = False
                else:
                    total += gamma**t * numerator / denominator
            result[group] = total if defined else np.nan
    return result


def ref_visit_values(steps: pl.DataFrame, gamma: float, first_only: bool) -> dict:
    """{(group, state_key): (value, visits)} by walking each episode backwards (Sutton and Barto 5.1)."""
    returns: dict = {}
    for group, episodes in _episodes_by_group(steps).items():
        for episode in episodes:
            g = 0.0
            for k in range(len(episode) - 1, -1, -1):
                g = gamma * g + episode[k]["reward"]
                state = episode[k]["state_key"]
                if first_only and any(r["state_key"] == state for r in episode[:k]):
                    continue
                returns.setdefault((group, state), []).append(g)
    return {key: (np.mean(v), len(v)) for key, v in returns.items()}


def _by_group(frame: pl.DataFrame, column: str = "estimate") -> dict:
    return dict(zip(frame["group"].to_list(), frame[column].to_list(), strict=True))


# ---------------------------------------------------------------- vectorised == reference


@pytest.mark.parametrize("gamma", [1.0, 0.9])
@pytest.mark.parametrize(
    "estimator",
    [on_policy_value, ordinary_is, weighted_is, per_decision_is, weighted_per_decision_is, doubly_robust],
)
def test_estimator_matches_reference_loop(estimator, gamma):
    """Each vectorised estimator equals its plain per-episode loop on random steps."""
    for seed in range(3):
        steps = random_steps(seed)
        got = _by_group(estimator(steps, gamma=gamma))
        want = ref_estimate(steps, estimator.__name__, gamma)
        assert sorted(got) == sorted(want)
        groups = sorted(want)
        assert_allclose([got[g] for g in groups], [want[g] for g in groups], rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("gamma", [1.0, 0.95])
@pytest.mark.parametrize("estimator", OFF_POLICY)
def test_long_episodes_with_groups_match_reference_loop(estimator, gamma):
    """Episodes of up to 40 steps in many groups, all pi > 0, take the direct product of ratios
    (six doubling passes) and still equal the plain loop."""
    rng = np.random.default_rng(17)
    lengths = rng.integers(1, 41, 150)
    n = int(lengths.sum())
    names = np.array([f"home-{k:02d}" for k in range(12)])
    steps = _frame(
        {
            "episode_id": np.repeat(np.arange(150) * 2, lengths),
            "t": np.concatenate([np.arange(k) for k in lengths]),
            "reward": rng.normal(-1.0, 0.7, n),
            "pi": rng.uniform(0.6, 1.0, n),
            "b": rng.uniform(0.6, 1.0, n),
            "q_hat": rng.normal(-1.0, 0.5, n),
            "v_hat": rng.normal(-1.0, 0.5, n),
            "group": np.repeat(names[rng.integers(0, 12, 150)], lengths),
        }
    )
    got = _by_group(estimator(steps, gamma=gamma))
    want = ref_estimate(steps, estimator.__name__, gamma)
    groups = sorted(want)
    assert sorted(got) == groups
    assert_allclose([got[g] for g in groups], [want[g] for g in groups], rtol=1e-12, atol=1e-12)


def _positive_steps(lengths: np.ndarray, seed: int) -> pl.DataFrame:
    """Steps of the given episode lengths in five groups, every pi and b positive."""
    rng = np.random.default_rng(seed)
    n = int(lengths.sum())
    names = np.array([f"home-{k}" for k in range(5)])
    return _frame(
        {
            "episode_id": np.repeat(np.arange(lengths.size) * 7 + 3, lengths),
            "t": np.concatenate([np.arange(k) for k in lengths]),
            "reward": rng.normal(-1.0, 0.7, n),
            "pi": rng.uniform(0.05, 1.0, n),
            "b": rng.uniform(0.05, 1.0, n),
            "q_hat": rng.normal(-1.0, 0.5, n),
            "v_hat": rng.normal(-1.0, 0.5, n),
            "group": np.repeat(names[rng.integers(0, 5, lengths.size)], lengths),
        }
    )


@pytest.mark.parametrize("gamma", [1.0, 0.9])
@pytest.mark.parametrize("by_decision", [True, False])
@pytest.mark.parametrize("estimator", OFF_POLICY)
def test_both_step_layouts_match_the_reference_loop(estimator, by_decision, gamma):
    """Short episodes are summed row by row of the layout by decision index, one long episode among
    short ones (padding would more than double the steps) over the flat steps; both equal the plain
    loop, and doubly robust with a zero model equals per-decision IS bit for bit in each."""
    rng = np.random.default_rng(5)
    lengths = rng.integers(1, 5, 300)
    if not by_decision:
        lengths[17] = 200
    steps = _positive_steps(lengths, seed=6)
    prepared = est._steps._prepare(steps, ("episode_id", "t", "reward"), 1.0)
    assert (prepared.by_decision is not None) == by_decision
    # Products of ratios taken directly, not in log space.
    assert est._steps._products_stay_normal(prepared, est._steps._checked_probabilities(steps)[2])
    got = _by_group(estimator(steps, gamma=gamma))
    want = ref_estimate(steps, estimator.__name__, gamma)
    groups = sorted(want)
    assert sorted(got) == groups
    assert_allclose([got[g] for g in groups], [want[g] for g in groups], rtol=1e-12, atol=1e-12)
    zero_model = steps.with_columns(q_hat=pl.lit(0.0), v_hat=pl.lit(0.0))
    assert_array_equal(
        doubly_robust(zero_model, gamma=gamma)["estimate"].to_numpy(),
        per_decision_is(zero_model, gamma=gamma)["estimate"].to_numpy(),
    )


def test_weights_that_underflow_midway_are_summed_in_log_space():
    """A running weight that dips below the float64 range and recovers keeps its exact final value
    (1e-200 * 1e-200 * 1e150 * 1e150 = 1e-100), where a direct product would stick at 0."""
    steps = pl.DataFrame(
        {
            "episode_id": [0, 0, 0, 0],
            "t": [0, 1, 2, 3],
            "reward": [0.0, 0.0, 0.0, 1.0],
            "pi": [1e-200, 1e-200, 1.0, 1.0],
            "b": [1.0, 1.0, 1e-150, 1e-150],
        }
    )
    exact = Fraction(1, 10**100)  # product of the four ratios, times the one reward of 1
    assert ordinary_is(steps)["estimate"].item() == pytest.approx(float(exact), rel=1e-12, abs=0.0)
    assert per_decision_is(steps)["estimate"].item() == pytest.approx(float(exact), rel=1e-12, abs=0.0)


def test_weights_columns_match_kish_of_reference_trajectory_weights():
    """ess, max_weight_share and n_episodes describe the trajectory weights rho_i = prod pi/b."""
    steps = random_steps(7)
    frame = ordinary_is(steps)
    for group, episodes in _episodes_by_group(steps).items():
        rho = np.array([np.prod([_ratio(r) for r in episode]) for episode in episodes])
        row = frame.filter(pl.col("group") == group).row(0, named=True)
        assert row["n_episodes"] == len(episodes)
        assert_allclose(row["ess"], effective_sample_size(rho), rtol=1e-10)
        assert_allclose(row["max_weight_share"], rho.max() / rho.sum(), rtol=1e-10)


@pytest.mark.parametrize("gamma", [1.0, 0.8])
@pytest.mark.parametrize("first_only", [True, False])
def test_visit_values_match_reference_loop(gamma, first_only):
    """First- and every-visit Monte Carlo equal the backward-return loop on random steps."""
    steps = random_steps(3)
    frame = (first_visit_mc if first_only else every_visit_mc)(steps, gamma=gamma)
    want = ref_visit_values(steps, gamma, first_only)
    got = {(r["group"], r["state_key"]): (r["value"], r["visits"]) for r in frame.iter_rows(named=True)}
    assert sorted(got) == sorted(want)
    keys = sorted(want)
    assert_allclose([got[k][0] for k in keys], [want[k][0] for k in keys], rtol=1e-10)
    assert [got[k][1] for k in keys] == [want[k][1] for k in keys]


def test_first_and_every_visit_on_a_hand_computed_example():
    """Two episodes, states A=0 and B=1, undiscounted; values worked out by hand beside each."""
    steps = pl.DataFrame(
        {
            "episode_id": [0, 0, 0, 1],
            "t": [0, 1, 2, 0],
            "state_key": [0, 1, 0, 0],
            "reward": [1.0, 2.0, 3.0, -2.0],
        }
    )
    # Returns to go: episode 0 -> 6, 5, 3; episode 1 -> -2.
    first = first_visit_mc(steps)
    assert first["value"].to_list() == [2.0, 5.0]  # A: (6 - 2) / 2; B: 5
    assert first["visits"].to_list() == [2, 1]
    every = every_visit_mc(steps)
    assert_allclose(every["value"].to_numpy(), [7.0 / 3.0, 5.0])  # A: (6 + 3 - 2) / 3
    assert every["visits"].to_list() == [3, 1]
    assert every["group"].to_list() == [est.ALL_GROUP] * 2


def test_doubly_robust_with_zero_model_equals_per_decision_is_exactly():
    """Jiang and Li (2016): with q_hat = v_hat = 0 the step-wise DR estimator is PDIS."""
    steps = random_steps(11).with_columns(q_hat=pl.lit(0.0), v_hat=pl.lit(0.0))
    for gamma in (1.0, 0.95):
        assert_array_equal(
            doubly_robust(steps, gamma=gamma)["estimate"].to_numpy(),
            per_decision_is(steps, gamma=gamma)["estimate"].to_numpy(),
        )


def test_bootstrap_replicates_equal_estimators_on_resampled_frames():
    """A Poisson multiplicity k replays an episode k times: replicate values equal the public
    estimator on the explicitly resampled frame, paired savings included."""
    steps = random_steps(5, n_episodes=30)
    multiplicity = np.random.default_rng(1).poisson(1.0, size=(4, 30)).astype(float)
    episode_rows = steps.with_row_index("row").group_by("episode_id", maintain_order=True).agg("row")["row"]
    base = est.replicate_sums(steps, "on_policy_value", multiplicity).values()[1:]
    for estimator in (ordinary_is, weighted_is, weighted_per_decision_is, doubly_robust):
        sums = est.replicate_sums(steps, estimator, multiplicity)
        values = sums.values()[1:] - base
        for b, counts in enumerate(multiplicity):
            parts = []
            for i, k in enumerate(counts.astype(int)):
                for copy in range(k):
                    part = steps[episode_rows[i].to_list()]
                    parts.append(part.with_columns(episode_id=pl.lit(1000 * i + copy)))
            resampled = pl.concat(parts)
            want = _by_group(estimator(resampled))
            behaviour = _by_group(on_policy_value(resampled))
            labels = sums.labels.to_list()
            expected = [want.get(g, np.nan) - behaviour.get(g, np.nan) for g in labels]
            assert_allclose(values[b], expected, rtol=1e-10)


# ---------------------------------------------------------------- Kish (1965)


def test_effective_sample_size_on_hand_computed_weights():
    """Kish (1965) (sum w)^2 / sum w^2 on weights worked out by hand."""
    assert effective_sample_size([1.0] * 50 + [2.0] * 50) == pytest.approx(90.0)  # 150^2 / 250
    assert effective_sample_size(np.full(37, 0.4)) == pytest.approx(37.0)  # equal weights: n
    assert effective_sample_size([0.0, 0.0, 5.0, 0.0]) == pytest.approx(1.0)  # one non-zero weight
    assert effective_sample_size(np.zeros(3)) == 0.0
    with pytest.raises(EstimatorInputError, match="non-negative"):
        effective_sample_size([1.0, -1.0])


# ---------------------------------------------------------------- Sutton and Barto, Example 5.4


BLACKJACK_TRUE_VALUE = -0.2772042  # exact enumeration with fractions; the book quotes about -0.27726
BLACKJACK_OIS_VARIANCE = 10.156  # Var_b(rho G) from the same enumeration, so OIS MSE is about 10.2 / n


def _blackjack_enumeration() -> tuple[Fraction, Fraction]:
    """Exact target value and Var_b(rho G) of Example 5.4's state, by recursion over card values."""
    cards = [(v, Fraction(4, 13) if v == 10 else Fraction(1, 13)) for v in range(1, 11)]

    def add(total, usable, card):
        ace_as_eleven = card == 1 and total + 11 <= 21
        total, usable = total + (11 if ace_as_eleven else card), usable or ace_as_eleven
        return (total - 10, False) if total > 21 and usable else (total, usable)

    @cache
    def dealer(total, usable):  # distribution of the dealer's final total, 22 meaning bust
        if total >= 17:
            return {min(total, 22): Fraction(1)}
        out: dict = {}
        for card, p in cards:
            for final, q in dealer(*add(total, usable, card)).items():
                out[final] = out.get(final, 0) + p * q
        return out

    final: dict = {}
    for card, p in cards:
        for k, q in dealer(*add(2, False, card)).items():
            final[k] = final.get(k, 0) + p * q

    def stick(player):  # expected reward and second moment of sticking on ``player``
        reward = {k: (1 if k == 22 or player > k else 0 if player == k else -1) for k in final}
        return sum(q * reward[k] for k, q in final.items()), sum(q * reward[k] ** 2 for k, q in final.items())

    @cache
    def value(total, usable):  # target: stick on 20 or 21, otherwise hit
        if total > 21:
            return Fraction(-1)
        if total >= 20:
            return stick(total)[0]
        return sum(p * value(*add(total, usable, card)) for card, p in cards)

    @cache
    def second_moment(total, usable):  # E_b[(rho G)^2]; each agreeing decision has rho factor 2
        if total > 21:
            return Fraction(1)
        if total >= 20:
            return Fraction(1, 2) * 4 * stick(total)[1]
        return Fraction(1, 2) * 4 * sum(p * second_moment(*add(total, usable, card)) for card, p in cards)

    v = value(13, True)
    return v, second_moment(13, True) - v * v


def test_blackjack_check_values_come_from_exact_enumeration():
    """The constants used below: exact value -0.2772042 (the book quotes about -0.27726 from
    simulation) and Var_b(rho G) = 10.156, recomputed here with fractions."""
    value, variance = _blackjack_enumeration()
    assert float(value) == pytest.approx(BLACKJACK_TRUE_VALUE, abs=1e-7)
    assert float(variance) == pytest.approx(BLACKJACK_OIS_VARIANCE, abs=1e-3)


def _draw_cards(rng: np.random.Generator, n: int) -> np.ndarray:
    """Infinite deck: 1 (ace) to 10 with face cards counting 10."""
    return np.minimum(rng.integers(1, 14, n), 10)


def _add_card(total: np.ndarray, usable: np.ndarray, card: np.ndarray):
    """Add a card to hands whose total counts a usable ace as 11."""
    ace_as_eleven = (card == 1) & (total + 11 <= 21)
    total = total + np.where(ace_as_eleven, 11, card)
    usable = usable | ace_as_eleven
    soften = (total > 21) & usable
    return np.where(soften, total - 10, total), usable & ~soften


def _dealer_totals(rng: np.random.Generator, n: int) -> np.ndarray:
    """Final dealer totals with 2 showing; the dealer hits below 17 and sticks on 17 or more."""
    total, usable = _add_card(np.full(n, 2), np.zeros(n, dtype=bool), _draw_cards(rng, n))
    while (total < 17).any():  # bounded: each pass adds at least 1 to every drawing hand
        drawing = total < 17
        new_total, new_usable = _add_card(total, usable, _draw_cards(rng, n))
        total, usable = np.where(drawing, new_total, total), np.where(drawing, new_usable, usable)
    return total


def blackjack_steps(n: int, seed: int) -> pl.DataFrame:
    """Example 5.4 episodes from player sum 13 with a usable ace, dealer showing 2.

    Behaviour hits or sticks with probability 1/2; the target sticks only on 20
    or 21. Reward +1 win, 0 draw, -1 loss, at the last decision.
    """
    rng = np.random.default_rng(seed)
    total, usable = np.full(n, 13), np.ones(n, dtype=bool)
    live = np.arange(n)
    parts, t = [], 0
    while live.size:  # one pass per decision, for all live episodes at once
        sticks = rng.random(live.size) < 0.5
        target_sticks = total[live] >= 20
        reward = np.zeros(live.size)
        dealer = _dealer_totals(rng, live.size)
        player = total[live]
        outcome = np.sign(player - np.where(dealer > 21, 0, dealer))
        reward[sticks] = outcome[sticks]
        new_total, new_usable = _add_card(player, usable[live], _draw_cards(rng, live.size))
        bust = ~sticks & (new_total > 21)
        reward[bust] = -1.0
        parts.append(
            {
                "episode_id": live,
                "t": np.full(live.size, t),
                "reward": reward,
                "pi": (sticks == target_sticks).astype(float),
                "b": np.full(live.size, 0.5),
            }
        )
        total[live], usable[live] = new_total, new_usable
        live = live[~sticks & ~bust]
        t += 1
    return _frame({k: np.concatenate([p[k] for p in parts]) for k in parts[0]})


@pytest.fixture(scope="module")
def blackjack() -> pl.DataFrame:
    return blackjack_steps(100_000, seed=54)


def test_blackjack_ois_and_wis_converge_to_the_exact_value(blackjack):
    """Sutton and Barto (2018), Example 5.4: both estimators approach -0.2772042 at 100,000 episodes."""
    standard_error = np.sqrt(BLACKJACK_OIS_VARIANCE / 100_000)
    for estimator in (ordinary_is, weighted_is):
        value = estimator(blackjack)["estimate"].item()
        assert abs(value - BLACKJACK_TRUE_VALUE) < 1e-3 + 3 * standard_error, estimator.__name__


def _runs(steps: pl.DataFrame, per_run: int) -> pl.DataFrame:
    """Split consecutive episodes into independent runs of ``per_run`` episodes, one group each."""
    return steps.with_columns(group=pl.col("episode_id") // per_run)


def test_blackjack_wis_has_lower_error_than_ois_at_ten_episodes(blackjack):
    """Sutton and Barto (2018), Figure 5.3: over 10,000 runs of 10 episodes, WIS has lower MSE."""
    runs = _runs(blackjack, 10)
    ois = ordinary_is(runs)["estimate"].to_numpy()
    # The book takes WIS as 0 when no episode agrees with the target (0/0).
    wis = np.nan_to_num(weighted_is(runs)["estimate"].to_numpy(), nan=0.0)
    mse_ois = np.mean((ois - BLACKJACK_TRUE_VALUE) ** 2)
    mse_wis = np.mean((wis - BLACKJACK_TRUE_VALUE) ** 2)
    assert mse_wis < 0.75 * mse_ois  # measured here: about 0.52 against 1.0


def test_blackjack_ois_error_falls_as_one_over_n(blackjack):
    """OIS is unbiased with MSE = Var_b(rho G) / n, about 10.2 / n here (exact enumeration)."""
    for per_run in (10, 100):
        ois = ordinary_is(_runs(blackjack, per_run))["estimate"].to_numpy()
        mse = np.mean((ois - BLACKJACK_TRUE_VALUE) ** 2)
        assert 0.7 < mse * per_run / BLACKJACK_OIS_VARIANCE < 1.3, per_run


# ---------------------------------------------------------------- Sutton and Barto, Example 5.5


def one_state_steps(n: int, seed: int) -> pl.DataFrame:
    """Example 5.5: 'left' loops back with p 0.9 or ends with +1 with p 0.1; 'right' ends with 0.

    Behaviour picks left or right with probability 1/2; the target always goes left.
    """
    rng = np.random.default_rng(seed)
    live = np.arange(n)
    parts, t = [], 0
    while live.size:
        left = rng.random(live.size) < 0.5
        ends_with_one = left & (rng.random(live.size) < 0.1)
        parts.append(
            {
                "episode_id": live,
                "t": np.full(live.size, t),
                "reward": ends_with_one.astype(float),
                "pi": left.astype(float),
                "b": np.full(live.size, 0.5),
            }
        )
        live = live[left & ~ends_with_one]
        t += 1
    return _frame({k: np.concatenate([p[k] for p in parts]) for k in parts[0]})


def test_one_state_wis_is_exactly_one_once_a_target_episode_is_seen():
    """Sutton and Barto (2018), Example 5.5: true value 1; WIS is exactly 1 when any weight is non-zero."""
    runs = _runs(one_state_steps(20_000, seed=55), 4)
    wis = weighted_is(runs)
    seen = diagnostics(runs)["n_nonzero_weight_episodes"].to_numpy() > 0
    assert 0 < seen.mean() < 1  # both cases occur
    estimate = wis["estimate"].to_numpy()
    assert (estimate[seen] == 1.0).all()
    assert np.isnan(estimate[~seen]).all()


def test_one_state_ois_sample_variance_keeps_growing():
    """Sutton and Barto (2018), Example 5.5: Var_b(rho G) is infinite, so the sample variance of the
    importance-weighted returns keeps growing with n instead of settling."""
    n_runs, n = 6, 100_000
    steps = one_state_steps(n_runs * n, seed=5)
    # One group per episode: ordinary IS of a single episode is its weighted return rho_i G_i.
    per_episode = ordinary_is(steps.with_columns(group=pl.col("episode_id")))["estimate"].to_numpy()
    per_episode = per_episode.reshape(n_runs, n)
    sizes = (100, 1_000, 10_000, 100_000)
    medians = [np.median(per_episode[:, :k].var(axis=1, ddof=1)) for k in sizes]
    assert all(a < b for a, b in zip(medians, medians[1:], strict=False)), medians
    assert medians[-1] > 10 * medians[0], medians


# ---------------------------------------------------------------- exact values of a small tabular problem

REWARD = np.array([[-0.2, -0.6], [-0.9, -0.4]])  # USD per decision, REWARD[state, action]
NEXT = np.array(  # NEXT[state, action, next] over next in (state 0, state 1, episode ends)
    [
        [[0.6, 0.2, 0.2], [0.1, 0.6, 0.3]],
        [[0.3, 0.4, 0.3], [0.5, 0.1, 0.4]],
    ]
)
START = np.array([0.7, 0.3])
HORIZON = 4  # at most four decisions, so returns lie in [4 * -0.9, -0.2] USD
RETURN_BOUNDS = (HORIZON * REWARD.min(), REWARD.max())
BEHAVIOUR = np.array([[0.5, 0.5], [0.6, 0.4]])
TARGET = np.array([[0.8, 0.2], [0.3, 0.7]])


def exact_values(policy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """v[state, t] and q[state, action, t] of ``policy`` from the Bellman linear system.

    Unknowns are v over (state, step) pairs: v(s, t) = sum_a policy(a|s) (R(s, a)
    + sum_s' P(s'|s, a) v(s', t + 1)), with v(., HORIZON) = 0; solved with
    numpy.linalg.solve.
    """
    n_states = REWARD.shape[0]
    size = n_states * HORIZON
    system, rhs = np.eye(size), np.zeros(size)
    for t in range(HORIZON):
        for s in range(n_states):
            row = t * n_states + s
            rhs[row] = policy[s] @ REWARD[s]
            if t + 1 < HORIZON:
                system[row, (t + 1) * n_states : (t + 2) * n_states] -= policy[s] @ NEXT[s, :, :n_states]
    v = np.linalg.solve(system, rhs).reshape(HORIZON, n_states).T
    later = np.concatenate([v[:, 1:], np.zeros((n_states, 1))], axis=1)
    q = REWARD[:, :, None] + np.einsum("san,nt->sat", NEXT[:, :, :n_states], later)
    return v, q


V_TARGET, Q_TARGET = exact_values(TARGET)
V_BEHAVIOUR, _ = exact_values(BEHAVIOUR)
TRUE_TARGET = float(START @ V_TARGET[:, 0])
TRUE_SAVINGS = TRUE_TARGET - float(START @ V_BEHAVIOUR[:, 0])


def tabular_steps(
    n: int,
    seed: int,
    logging: np.ndarray = BEHAVIOUR,
    target: np.ndarray = TARGET,
    per_run: int | None = None,
) -> pl.DataFrame:
    """Episodes logged by ``logging`` with ``pi`` from ``target`` and the target's exact Q model."""
    rng = np.random.default_rng(seed)
    v, q = exact_values(target)
    state = rng.choice(2, size=n, p=START)
    live = np.arange(n)
    parts = []
    for t in range(HORIZON):  # one pass per decision step, for all live episodes at once
        s = state[live]
        a = (rng.random(live.size) < logging[s, 1]).astype(np.int64)
        parts.append(
            {
                "episode_id": live,
                "t": np.full(live.size, t),
                "state_key": s * HORIZON + t,
                "action": a,
                "reward": REWARD[s, a],
                "pi": target[s, a],
                "b": logging[s, a],
                "q_hat": q[s, a, t],
                "v_hat": v[s, t],
            }
        )
        cumulative = np.cumsum(NEXT[s, a], axis=1)
        following = (rng.random(live.size)[:, None] > cumulative).sum(axis=1)
        state[live] = np.minimum(following, 1)
        live = live[following < 2]
    steps = _frame({k: np.concatenate([p[k] for p in parts]) for k in parts[0]})
    return steps if per_run is None else _runs(steps, per_run)


def test_exact_values_satisfy_a_direct_backward_recursion():
    """The linear solve agrees with the finite-horizon recursion computed step by step."""
    v = np.zeros(2)
    for _ in range(HORIZON):
        v = np.einsum("sa,sa->s", TARGET, REWARD + NEXT[:, :, :2] @ v)
    assert_allclose(V_TARGET[:, 0], v, rtol=1e-12)
    assert_allclose(np.einsum("sa,sat->st", TARGET, Q_TARGET), V_TARGET, rtol=1e-12)


@pytest.fixture(scope="module")
def tabular_runs() -> pl.DataFrame:
    return tabular_steps(20_000, seed=3, per_run=40)


@pytest.mark.parametrize("estimator", [ordinary_is, per_decision_is, doubly_robust])
def test_unbiased_estimators_average_to_the_exact_value(tabular_runs, estimator):
    """OIS, PDIS (Precup et al. 2000) and DR (Jiang and Li 2016) are unbiased: the mean over 500
    runs of 40 episodes lies within 3 standard errors of the Bellman value."""
    values = estimator(tabular_runs)["estimate"].to_numpy()
    standard_error = values.std(ddof=1) / np.sqrt(values.size)
    assert abs(values.mean() - TRUE_TARGET) < 3 * standard_error


def test_doubly_robust_stays_unbiased_with_a_wrong_model_and_gains_with_a_good_one(tabular_runs):
    """DR with the exact model has lower variance than PDIS. With a wrong Q model (the behaviour
    policy's Q) it stays unbiased, as long as v_hat is that model's average under the target."""
    pdis = per_decision_is(tabular_runs)["estimate"].to_numpy()
    exact = doubly_robust(tabular_runs)["estimate"].to_numpy()
    assert exact.var() < 0.5 * pdis.var()
    _, q_wrong = exact_values(BEHAVIOUR)
    v_wrong = np.einsum("sa,sat->st", TARGET, q_wrong)
    key = tabular_runs["state_key"].to_numpy()
    s, t, a = key // HORIZON, key % HORIZON, tabular_runs["action"].to_numpy()
    wrong = tabular_runs.with_columns(q_hat=q_wrong[s, a, t], v_hat=v_wrong[s, t])
    assert abs(wrong["q_hat"] - tabular_runs["q_hat"]).max() > 0.1
    values = doubly_robust(wrong)["estimate"].to_numpy()
    assert abs(values.mean() - TRUE_TARGET) < 3 * values.std(ddof=1) / np.sqrt(values.size)


@pytest.mark.parametrize("estimator", OFF_POLICY)
def test_all_estimators_are_consistent(estimator):
    """At 100,000 episodes every estimator is within 0.02 USD of the Bellman value."""
    steps = tabular_steps(100_000, seed=4)
    assert abs(estimator(steps)["estimate"].item() - TRUE_TARGET) < 0.02


def test_target_equal_to_behaviour_reduces_to_the_on_policy_average():
    """With pi = b every weight is 1 and each estimator is the Monte Carlo average return; DR too
    when its model is a function of the state alone (q_hat = v_hat), which then cancels."""
    steps = tabular_steps(2_000, seed=8, target=BEHAVIOUR, per_run=100)
    steps = steps.with_columns(q_hat=pl.col("v_hat"))
    want = on_policy_value(steps)["estimate"].to_numpy()
    for estimator in OFF_POLICY:
        assert_allclose(estimator(steps)["estimate"].to_numpy(), want, rtol=1e-12, err_msg=estimator.__name__)
    assert_allclose(want.mean(), START @ V_BEHAVIOUR[:, 0], atol=0.03)


def test_first_visit_values_match_the_bellman_solution_on_policy():
    """First-visit Monte Carlo of on-policy episodes recovers v(s, t) for every (state, step)."""
    steps = tabular_steps(40_000, seed=9, logging=TARGET, target=TARGET)
    frame = first_visit_mc(steps)
    keys = frame["state_key"].to_numpy()
    exact = V_TARGET[keys // HORIZON, keys % HORIZON]
    assert_allclose(frame["value"].to_numpy(), exact, atol=0.03)


# ---------------------------------------------------------------- bootstrap


def test_bootstrap_is_reproducible_for_a_seed():
    """Same seed, same interval; a different seed moves it."""
    steps = tabular_steps(500, seed=10, per_run=100)
    first = bootstrap_interval(steps, weighted_is, n_replicates=200, seed=42)
    again = bootstrap_interval(steps, "weighted_is", n_replicates=200, seed=np.random.default_rng(42))
    other = bootstrap_interval(steps, weighted_is, n_replicates=200, seed=43)
    assert first.equals(again)
    assert not first.equals(other)
    assert first.columns == ["group", "estimate", "ci_low", "ci_high", "level"]
    assert_allclose(first["estimate"].to_numpy(), weighted_is(steps)["estimate"].to_numpy())
    assert (first["ci_low"] <= first["estimate"]).all() and (first["estimate"] <= first["ci_high"]).all()


def test_paired_savings_interval_is_zero_when_the_target_is_the_behaviour():
    """Savings use the same resampled episodes for both values: with pi = b they cancel exactly."""
    steps = tabular_steps(600, seed=12, target=BEHAVIOUR, per_run=200)
    frame = bootstrap_interval(steps, ordinary_is, savings=True, n_replicates=100, seed=1)
    assert_allclose(frame.select("estimate", "ci_low", "ci_high").to_numpy(), 0.0, atol=1e-12)


@pytest.mark.parametrize(
    ("estimator", "savings", "truth"),
    [
        (weighted_is, False, TRUE_TARGET),
        (per_decision_is, False, TRUE_TARGET),
        (ordinary_is, True, TRUE_SAVINGS),
    ],
)
def test_bootstrap_covers_the_exact_value_near_its_nominal_rate(estimator, savings, truth):
    """Over 200 independent runs of 100 episodes the 90 % percentile interval covers the Bellman
    value (or exact savings) in roughly 90 % of runs."""
    runs = tabular_steps(20_000, seed=13, per_run=100)
    frame = bootstrap_interval(runs, estimator, savings=savings, level=0.9, n_replicates=400, seed=2)
    covered = ((frame["ci_low"] <= truth) & (truth <= frame["ci_high"])).mean()
    assert 0.8 <= covered <= 0.97, covered  # measured here: 0.865 to 0.895 across bootstrap seeds 2 to 4


def test_splitmix64_gives_the_published_sequence_and_a_plain_loop_does_too():
    """SplitMix64 (Steele, Lea and Flood 2014) from seed 1234567: the first five outputs quoted by the
    Rosetta Code task "Pseudo-random numbers/Splitmix64", and a plain loop over Python integers."""
    published = [
        6457827717110365317,
        3203168211198807973,
        9817491932198370423,
        4593380528125082431,
        16408922859458223821,
    ]
    assert est.bootstrap.splitmix64(1234567, 5).tolist() == published
    state, mask, loop = 1234567, 2**64 - 1, []
    for _ in range(300):
        state = (state + 0x9E3779B97F4A7C15) & mask
        z = state
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & mask
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & mask
        loop.append(z ^ (z >> 31))
    assert est.bootstrap.splitmix64(1234567, 300).tolist() == loop


def test_poisson_multiplicities_follow_poisson_one_and_depend_only_on_the_episode():
    """Counts 0..4 occur at rates e^-1 / k! (Poisson pmf) within 5 standard errors; an episode's draws
    are the same whatever other episodes are drawn with it and however the replicates are chunked."""
    from math import exp, factorial

    ids = np.arange(100_001, 100_401)
    draws = est.poisson_multiplicity(ids, 2_000, seed=9)
    n = draws.size
    for k in range(5):
        rate = exp(-1.0) / factorial(k)
        assert abs((draws == k).mean() - rate) < 5 * np.sqrt(rate * (1 - rate) / n), k
    assert abs(draws.mean() - 1.0) < 5 / np.sqrt(n) and abs(draws.var() - 1.0) < 0.02
    # Neighbouring episodes and replicates are uncorrelated.
    assert abs(np.corrcoef(draws[:, :-1].ravel(), draws[:, 1:].ravel())[0, 1]) < 0.01
    assert abs(np.corrcoef(draws[:-1].ravel(), draws[1:].ravel())[0, 1]) < 0.01
    alone = est.poisson_multiplicity(ids[[7, 3]], 2_000, seed=9)
    assert_array_equal(alone, draws[:, [7, 3]])
    later = est.poisson_multiplicity(ids, 500, seed=9, first=1_500)
    assert_array_equal(later, draws[1_500:])
    assert not np.array_equal(est.poisson_multiplicity(ids, 50, seed=10), draws[:50])


def test_poisson_multiplicities_are_the_inverse_distribution_function_of_each_episodes_stream():
    """Each draw is the smallest k with P(K <= k) above the uniform (bits >> 11) * 2**-53, bits the
    SplitMix64 stream (Steele, Lea and Flood 2014) seeded by the episode's output of the run's stream;
    the Poisson(1) distribution function summed from e^-1 / k! with Python floats, so the fast lookup
    by top bits must agree with a plain inverse-CDF draw on every uniform."""
    from math import exp, factorial

    ids = np.array([1, 2, 5, 17, 40, 99])
    n_replicates = 1_500
    draws = est.poisson_multiplicity(ids, n_replicates, seed=3)
    key = est.bootstrap.seed_key(3)
    cdf, total = [], 0.0
    for k in range(20):
        total += exp(-1.0) / factorial(k)
        cdf.append(total)
    for column, episode in enumerate(ids):
        episode_seed = int(est.bootstrap.splitmix64(key, int(episode))[-1])
        bits = est.bootstrap.splitmix64(episode_seed, n_replicates).tolist()
        expected = [next(k for k, c in enumerate(cdf) if (b >> 11) * 2.0**-53 < c) for b in bits]
        assert draws[:, column].tolist() == expected, episode


def test_nan_quantiles_equal_numpy_nanquantile():
    """The vectorised quantiles equal numpy.nanquantile (linear method) bit for bit, NaNs included."""
    rng = np.random.default_rng(4)
    values = rng.normal(size=(401, 300))
    values[rng.random(values.shape) < 0.2] = np.nan
    values[:400, 5] = np.nan  # a column with one value left
    values[:, 7] = 3.0  # ties
    qs = [0.0, 0.025, 0.05, 0.5, 0.95, 0.975, 1.0]
    assert_array_equal(est.nan_quantiles(values, qs), np.nanquantile(values, qs, axis=0))


def _premise_steps(seed: int) -> pl.DataFrame:
    """Random steps of 40 premises in four cohorts, ids premise number x 100,000 + episode rank."""
    rng = np.random.default_rng(seed)
    frames = []
    for p in range(40):
        n_episodes = int(rng.integers(3, 12))
        # The last premises' episodes run longer, so parts differ in their longest episode.
        lengths = rng.integers(1, 4 if p < 30 else 7, n_episodes)
        n = int(lengths.sum())
        frames.append(
            pl.DataFrame(
                {
                    "episode_id": np.repeat(p * 100_000 + np.arange(1, n_episodes + 1), lengths),
                    "t": np.concatenate([np.arange(k) for k in lengths]),
                    "reward": -rng.uniform(0.0, 2.0, n),
                    "pi": rng.uniform(0.05, 1.0, n),
                    "b": rng.uniform(0.05, 1.0, n),
                    "q_hat": -rng.uniform(0.0, 2.0, n),
                    "v_hat": -rng.uniform(0.0, 2.0, n),
                    "group": f"home-{p:03d}",
                    "cohort": f"c{p % 4}",
                }
            )
        )
    return pl.concat(frames)


@pytest.mark.parametrize("estimator", ["weighted_is", "weighted_per_decision_is", "doubly_robust"])
def test_pooled_estimates_and_intervals_do_not_depend_on_how_premises_are_split(estimator):
    """Premise sums computed in one part or in three (different longest episodes) add up to the same
    cohort and portfolio estimate, interval and weight spread; and to the estimator run on the frame
    grouped by cohort, with the replicates bootstrap_replicates draws for it."""
    steps = _premise_steps(6)
    key = steps.select("group", "cohort").unique()
    n_replicates = 200

    def sums(frame: pl.DataFrame, name: str) -> est.ReplicateSums:
        return est.replicate_sums(frame, name, est.frame_multiplicity(frame, n_replicates, seed=5))

    parts = [
        steps.filter(pl.col("group").is_in([f"home-{p:03d}" for p in chosen]))
        for chosen in (range(0, 12), range(12, 31), range(31, 40))
    ]
    assert len({int(part["t"].max()) for part in parts}) == 3
    results = {}
    for label, frames in (("one part", [steps]), ("three parts", parts)):
        for scope, scope_key in (
            ("cohort", key.rename({"cohort": "key"})),
            ("portfolio", key.select("group", pl.lit("all").alias("key"))),
        ):
            target = est.combine_sums([sums(f, estimator) for f in frames], scope_key)
            base = est.combine_sums([sums(f, "on_policy_value") for f in frames], scope_key)
            savings = target.values() - base.values()
            interval = est.percentile_interval(target.labels, savings[0], savings[1:])
            results[label, scope] = (target.frame(), interval)
    for scope in ("cohort", "portfolio"):
        (frame, interval), (frame_parts, interval_parts) = (
            results["one part", scope],
            results["three parts", scope],
        )
        assert frame["group"].to_list() == frame_parts["group"].to_list()
        for column in ("estimate", "ess", "max_weight_share"):
            assert_allclose(frame_parts[column].to_numpy(), frame[column].to_numpy(), rtol=1e-12)
        for column in ("estimate", "ci_low", "ci_high"):
            assert_allclose(interval_parts[column].to_numpy(), interval[column].to_numpy(), rtol=1e-12)
    by_cohort = steps.with_columns(pl.col("cohort").alias("group"))
    direct = getattr(est, estimator)(by_cohort)
    assert_allclose(results["three parts", "cohort"][0]["estimate"].to_numpy(), direct["estimate"].to_numpy())
    labels, point, replicates = est.bootstrap_replicates(
        by_cohort, estimator, savings=True, n_replicates=n_replicates, seed=5
    )
    interval = est.percentile_interval(labels, point, replicates)
    assert_allclose(results["three parts", "cohort"][1]["ci_low"].to_numpy(), interval["ci_low"].to_numpy())


# ---------------------------------------------------------------- high-confidence lower bound


@pytest.mark.parametrize("savings", [False, True])
def test_lower_bound_is_below_the_truth_at_least_at_its_level(savings):
    """Thomas et al. (2015) style bound: over 300 seeded runs of 200 episodes the 95 % lower bound
    lies below the Bellman value (or exact savings) in at least 95 % of runs."""
    truth = TRUE_SAVINGS if savings else TRUE_TARGET
    runs = tabular_steps(60_000, seed=21, per_run=200)
    frame = lower_bound(runs, return_bounds=RETURN_BOUNDS, savings=savings, level=0.95, seed=3)
    below = (frame["lower_bound"] <= truth).mean()
    assert below >= 0.95, below
    assert frame["n_bound_episodes"].to_list() == [160] * 300  # 20 % held out to choose the threshold


def test_lower_bound_tightens_with_data_and_is_never_above_the_trivial_range():
    """With many episodes the bound comes within reach of the truth; it never leaves the return range."""
    steps = tabular_steps(50_000, seed=22)
    value = lower_bound(steps, return_bounds=RETURN_BOUNDS, seed=4).row(0, named=True)
    assert RETURN_BOUNDS[0] < value["lower_bound"] < TRUE_TARGET
    assert TRUE_TARGET - value["lower_bound"] < 0.25
    fixed = lower_bound(steps, return_bounds=RETURN_BOUNDS, clip=2.0).row(0, named=True)
    assert fixed["n_bound_episodes"] == 50_000 and fixed["clip_threshold"] == 2.0
    assert RETURN_BOUNDS[0] < fixed["lower_bound"] < TRUE_TARGET
    few = lower_bound(steps.filter(pl.col("episode_id") < 3), return_bounds=RETURN_BOUNDS)
    assert few["lower_bound"].item() == RETURN_BOUNDS[0]  # too little data: the trivial bound


def test_lower_bound_refuses_returns_outside_the_stated_bounds():
    """Return bounds are an assumption of the guarantee; data that break them are refused."""
    steps = tabular_steps(100, seed=23)
    with pytest.raises(EstimatorInputError, match="outside return_bounds"):
        lower_bound(steps, return_bounds=(-1.0, 0.0))


# ---------------------------------------------------------------- diagnostics


def test_diagnostics_count_support_problems_and_weights():
    """Hand-built steps: one step with b == 0 and one with b missing while pi > 0."""
    steps = pl.DataFrame(
        {
            "episode_id": [1, 1, 2, 3, 3, 4],
            "t": [0, 1, 0, 0, 1, 0],
            "pi": [0.5, 1.0, 0.9, 0.0, 1.0, 0.4],
            "b": [0.25, 0.5, 0.0, 0.5, None, 0.8],
            "group": ["a", "a", "a", "b", "b", "b"],
        }
    )
    rows = {r["group"]: r for r in diagnostics(steps).iter_rows(named=True)}
    # Group a: episode 1 weight 2 * 2 = 4; episode 2 unsupported (b == 0).
    assert rows["a"]["n_unsupported_steps"] == 1 and rows["a"]["n_unsupported_episodes"] == 1
    assert rows["a"]["weight_mean"] == 4.0 and rows["a"]["weight_max"] == 4.0
    assert rows["a"]["ess"] == 1.0 and rows["a"]["n_nonzero_weight_episodes"] == 1
    # Group b: episode 3 has pi == 0 first (weight 0) then b missing with pi > 0; episode 4 weight 0.5.
    assert rows["b"]["n_unsupported_steps"] == 1 and rows["b"]["n_unsupported_episodes"] == 1
    assert rows["b"]["weight_mean"] == 0.5 and rows["b"]["max_weight_share"] == 1.0
    assert rows["b"]["n_episodes"] == 2


def test_diagnostics_weights_match_a_reference_loop():
    """Weight mean, max, ESS and non-zero count equal a per-episode loop on random steps."""
    steps = random_steps(4)
    frame = diagnostics(steps)
    for group, episodes in _episodes_by_group(steps).items():
        rho = np.array([np.prod([_ratio(r) for r in episode]) for episode in episodes])
        row = frame.filter(pl.col("group") == group).row(0, named=True)
        assert_allclose(
            [row["weight_mean"], row["weight_max"], row["ess"]],
            [rho.mean(), rho.max(), effective_sample_size(rho)],
            rtol=1e-10,
        )
        assert row["n_nonzero_weight_episodes"] == int((rho > 0).sum())
        assert row["n_unsupported_steps"] == 0


# ---------------------------------------------------------------- input errors


def _small() -> pl.DataFrame:
    return pl.DataFrame(
        {
            "episode_id": [0, 0, 1],
            "t": [0, 1, 0],
            "reward": [-1.0, -2.0, -1.5],
            "pi": [0.5, 1.0, 0.2],
            "b": [0.5, 0.5, 0.4],
        }
    )


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda f: f.drop("b"), r"missing column\(s\) \['b'\]"),
        (lambda f: f.reverse(), "sorted by \\(episode_id, t\\)"),
        (lambda f: f.with_columns(t=pl.Series([0, 2, 0])), "t must count 0, 1, 2"),
        (lambda f: f.with_columns(pi=pl.Series([0.5, 1.5, 0.2])), "target probabilities in \\[0, 1\\]"),
        (lambda f: f.with_columns(b=pl.Series([0.5, 0.0, 0.4])), "diagnostics\\(\\)"),
        (lambda f: f.with_columns(b=pl.Series([0.5, None, 0.4])), "null"),
        (lambda f: f.with_columns(group=pl.Series(["x", "y", "y"])), "constant within an episode"),
        (lambda f: f.with_columns(reward=pl.Series([1.0, np.inf, 0.0])), "non-finite"),
        (lambda f: f.clear(), "no rows"),
    ],
)
def test_unusable_steps_raise_a_specific_error(change, message):
    """Each kind of unusable frame raises EstimatorInputError saying what to fix."""
    with pytest.raises(EstimatorInputError, match=message):
        weighted_is(change(_small()))


def test_order_and_group_errors_name_the_first_offending_row():
    """The messages point at the first bad row and the value expected there."""
    steps = _small()
    with pytest.raises(EstimatorInputError, match=r"row 1 \(episode_id 0\) has t=2 where 1 was expected"):
        weighted_is(steps.with_columns(t=pl.Series([0, 2, 0])))
    with pytest.raises(EstimatorInputError, match=r"row 2 \(episode_id 1\) has t=1 where 0 was expected"):
        weighted_is(steps.with_columns(t=pl.Series([0, 1, 1])))
    three = pl.concat([steps, steps.tail(1).with_columns(t=pl.lit(1, dtype=pl.Int64))])
    with pytest.raises(EstimatorInputError, match="episode_id 1 has 'y' at row 3 and 'x' at its start"):
        weighted_is(three.with_columns(group=pl.Series(["z", "z", "x", "y"])))
    with pytest.raises(EstimatorInputError, match="row 2 has episode_id 0 after 1"):
        weighted_is(three.with_columns(episode_id=pl.Series([0, 1, 0, 0])))


def test_unusable_options_raise_a_specific_error():
    """Bad options and missing model or state columns raise EstimatorInputError."""
    steps = _small()
    with pytest.raises(EstimatorInputError, match="gamma"):
        ordinary_is(steps, gamma=0.0)
    with pytest.raises(EstimatorInputError, match="q_hat"):
        doubly_robust(steps)
    with pytest.raises(EstimatorInputError, match="cannot be bootstrapped"):
        bootstrap_interval(steps, len)
    with pytest.raises(EstimatorInputError, match="level"):
        bootstrap_interval(steps, level=95)
    with pytest.raises(EstimatorInputError, match="state_key"):
        first_visit_mc(steps)


def test_zero_target_probabilities_give_zero_weights_without_warnings():
    """pi == 0 cuts an episode's weight to 0 without log(0) (warnings are errors in this suite)."""
    steps = _small().with_columns(pi=pl.Series([0.0, 1.0, 0.0]))
    assert ordinary_is(steps)["estimate"].item() == 0.0
    assert np.isnan(weighted_is(steps)["estimate"].item())
    assert diagnostics(steps)["n_nonzero_weight_episodes"].item() == 0


def test_refit_replicates_equal_the_plain_bootstrap_when_the_behaviour_model_does_not_move():
    """With the same b in every replicate, re-fit replicates of WIS savings equal the plain bootstrap's."""
    rng = np.random.default_rng(5)
    n_episodes, horizon = 30, 3
    steps = pl.DataFrame(
        {
            "episode_id": np.repeat(np.arange(n_episodes), horizon),
            "t": np.tile(np.arange(horizon), n_episodes),
            "reward": -rng.uniform(0.0, 1.0, n_episodes * horizon),
            "pi": rng.uniform(0.1, 0.9, n_episodes * horizon),
            "b": rng.uniform(0.1, 0.9, n_episodes * horizon),
            "group": np.repeat(np.where(np.arange(n_episodes) < 15, "a", "b"), horizon),
        }
    )
    multiplicity = rng.poisson(1.0, (20, n_episodes)).astype(float)
    behavior = np.tile(steps["b"].to_numpy(), (20, 1))
    labels, replicates = est.refit_weighted_is_replicates(steps, multiplicity, behavior)
    assert list(labels) == ["a", "b"]
    for r in range(3):
        resampled = steps.filter(pl.Series(np.repeat(multiplicity[r], horizon) > 0))
        weights = np.repeat(multiplicity[r], horizon)[np.repeat(multiplicity[r], horizon) > 0]
        rho = (resampled["pi"] / resampled["b"]).to_numpy().reshape(-1, horizon).prod(axis=1)
        returns = resampled["reward"].to_numpy().reshape(-1, horizon).sum(axis=1)
        m = weights[::horizon]
        group = resampled["group"].to_numpy()[::horizon]
        for g, label in enumerate(("a", "b")):
            sel = group == label
            expected = (m * rho * returns)[sel].sum() / (m * rho)[sel].sum() - (m * returns)[sel].sum() / m[
                sel
            ].sum()
            np.testing.assert_allclose(replicates[r, g], expected)


# ---------------------------------------------------------------- the registry


def test_registry_names_every_published_estimator_with_its_public_function():
    """REGISTRY holds the names published in DESIGN.md ("Estimator interface") and each maps to the
    function importable from pipeline.estimators under that name."""
    published = {
        "ordinary_is",
        "weighted_is",
        "per_decision_is",
        "weighted_per_decision_is",
        "doubly_robust",
        "first_visit_mc",
        "every_visit_mc",
    }
    assert set(est.REGISTRY) == published | {"on_policy_value"}
    for name, entry in est.REGISTRY.items():
        assert entry.name == name and entry.function is getattr(est, name)
    assert est.OFF_POLICY_NAMES == (
        "ordinary_is",
        "weighted_is",
        "per_decision_is",
        "weighted_per_decision_is",
        "doubly_robust",
    )
    assert [n for n, e in est.REGISTRY.items() if e.needs_q_model] == ["doubly_robust"]


def test_default_settings_name_registered_off_policy_estimators():
    """The default estimators and recommended_estimator settings are in OFF_POLICY_NAMES."""
    from pipeline.config import Config

    config = Config()
    assert set(config.estimators) <= set(est.OFF_POLICY_NAMES)
    assert config.recommended_estimator in est.OFF_POLICY_NAMES


@pytest.mark.parametrize("name", sorted(est.REGISTRY))
def test_bootstrap_takes_a_registered_estimator_by_name_or_function_alike(name):
    """A bootstrappable entry gives the same replicates by name and by function; the others are refused."""
    steps = random_steps(3, n_episodes=20).with_columns(q_hat=pl.lit(-0.5), v_hat=pl.lit(-0.4))
    entry = est.REGISTRY[name]
    if not entry.bootstrappable:
        with pytest.raises(EstimatorInputError, match="cannot be bootstrapped"):
            est.bootstrap_replicates(steps, name)
        return
    _, by_name, replicates_by_name = est.bootstrap_replicates(steps, name, n_replicates=5)
    _, by_function, replicates_by_function = est.bootstrap_replicates(steps, entry.function, n_replicates=5)
    assert_array_equal(by_name, by_function)
    assert_array_equal(replicates_by_name, replicates_by_function)
    assert_allclose(by_name, entry.function(steps)["estimate"].to_numpy())
