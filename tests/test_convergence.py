"""Savings as episodes accumulate: running sums against the estimators and a plain loop."""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline import convergence, estimators, store


def _one_step_frame(weight: np.ndarray, ret: np.ndarray) -> pl.DataFrame:
    """One decision per episode with pi / b = weight, so each episode's IS weight is exactly that."""
    n = weight.size
    return pl.DataFrame(
        {
            "episode_id": np.arange(n),
            "t": np.zeros(n, dtype=np.int64),
            "reward": ret,
            "pi": weight * 0.02,
            "b": 0.02,
        }
    )


def test_path_equals_the_estimators_on_every_prefix():
    """At each checkpoint the running OIS and WIS savings equal ordinary_is / weighted_is on that prefix."""
    rng = np.random.default_rng(3)
    weight = rng.lognormal(0.0, 1.0, 300)
    ret = -rng.gamma(2.0, 1.5, 300)
    at = convergence.checkpoints(300, 7)
    found = convergence.path(weight, ret, at)
    for i, n in enumerate(at):
        frame = _one_step_frame(weight[:n], ret[:n])
        behaviour = ret[:n].mean()
        ois = estimators.ordinary_is(frame)["estimate"][0] - behaviour
        wis = estimators.weighted_is(frame)["estimate"][0] - behaviour
        np.testing.assert_allclose(found["ois"][i], ois, rtol=1e-10)
        np.testing.assert_allclose(found["wis"][i], wis, rtol=1e-10)
        np.testing.assert_allclose(found["ess"][i], weight[:n].sum() ** 2 / (weight[:n] ** 2).sum())


def test_standard_errors_equal_a_plain_loop():
    """The running-sum standard errors equal the linearised terms summed one episode at a time."""
    rng = np.random.default_rng(5)
    weight = rng.lognormal(0.0, 0.8, 120)
    ret = -rng.gamma(2.0, 1.0, 120)
    at = np.array([10, 55, 120])
    found = convergence.path(weight, ret, at)
    for i, n in enumerate(at):
        w, g = weight[:n], ret[:n]
        value = sum(wi * gi for wi, gi in zip(w, g, strict=True)) / sum(w)
        mean_w, mean_g = sum(w) / n, sum(g) / n
        total = 0.0
        for wi, gi in zip(w, g, strict=True):
            total += (wi * (gi - value) / mean_w - (gi - mean_g)) ** 2
        np.testing.assert_allclose(found["wis_se"][i], np.sqrt(total) / n, rtol=1e-9)
        e = w * g - g
        np.testing.assert_allclose(found["ois_se"][i], np.sqrt(((e - e.mean()) ** 2).mean() / n), rtol=1e-9)


def test_weighted_band_matches_the_spread_over_repeated_samples():
    """The delta-method standard error of weighted-IS savings (Owen 2013, 9.2) is within 10 % of the
    standard deviation of the estimate over 2,000 simulated data sets of 400 episodes."""
    rng = np.random.default_rng(11)
    estimates, errors = [], []
    at = np.array([400])
    for _ in range(2000):
        weight = rng.lognormal(-0.18, 0.6, 400)
        ret = -rng.gamma(2.0, 1.0, 400) * (1 + 0.3 * (weight > 1))
        found = convergence.path(weight, ret, at)
        estimates.append(found["wis"][0])
        errors.append(found["wis_se"][0])
    spread = np.std(estimates)
    assert abs(np.mean(errors) / spread - 1) < 0.10, (np.mean(errors), spread)


def test_checkpoints_end_at_every_episode():
    """Checkpoints rise, end at n, and number at most the count asked for."""
    assert convergence.checkpoints(2659).tolist()[-1] == 2659
    assert convergence.checkpoints(5, 20).tolist() == [1, 2, 3, 4, 5]
    assert convergence.checkpoints(0).size == 0


def test_final_weighted_point_is_the_ledgers_program_estimate(sample_lake_run):
    """On the sample lake the path's last weighted-IS point is the savings table's portfolio row."""
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    run = sample_lake_run.summary.run_id
    pairs = con.execute(
        "select p.policy_name, p.savings_usd_per_episode, s.savings_usd_per_episode"
        " from estimate_path p join savings s using (run_id, policy_name, mode)"
        " where run_id = $r and p.estimator = 'weighted_is' and s.estimator = 'weighted_is'"
        " and s.scope = 'portfolio' and p.n_episodes = s.n_episodes",
        {"r": run},
    ).fetchall()
    assert len(pairs) == len(sample_lake_run.config.candidates)
    for _, path_value, ledger_value in pairs:
        np.testing.assert_allclose(path_value, ledger_value, rtol=1e-9)
