"""Program savings estimates as episodes accumulate: ordinary against weighted importance sampling.

For each program-wide policy (scope ``portfolio`` of the evaluated ``policy`` rows) and mode,
the mode's episodes are taken in the order they happened; after the first n of them (at up to
``checkpoints`` values of n) the table ``estimate_path`` holds the savings over the residents'
own behaviour by ordinary IS, (1/n) sum (w_i G_i - G_i), and by weighted IS,
sum w_i G_i / sum w_i - (1/n) sum G_i (Sutton and Barto 2018, 5.5), with w_i the episode's
importance weight (prod pi / b over its decisions) and G_i its return in USD.

The bands are normal-approximation intervals at the run's confidence level: for ordinary IS
the standard error of the mean of w_i G_i - G_i; for weighted IS the delta-method
(linearised) standard error of the self-normalised ratio (Owen 2013, "Monte Carlo theory,
methods and examples", 9.2), paired with the behaviour's mean:
d_i = w_i (G_i - V) / mean(w) - (G_i - mean(G)), se = sqrt(sum d_i^2) / n. They show how
the estimate settles, not the ledger's bootstrap interval, which the savings table keeps.
Every figure comes from running sums over the ordered episodes (numpy cumulative sums).
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import polars as pl

from pipeline.behavior import BehaviorModel
from pipeline.config import Config
from pipeline.policies import action_index

CHECKPOINTS = 20
"""Points of the path per policy and mode (the last is every episode)."""

COLUMNS = (
    "policy_name",
    "mode",
    "estimator",
    "n_episodes",
    "through_utc",
    "savings_usd_per_episode",
    "ci_low",
    "ci_high",
    "ess",
)


def _table(rows: pl.DataFrame, config: Config) -> np.ndarray:
    """A policy's probability table, shape (n_states, n_actions), from its ledger rows."""
    table = np.zeros((config.state.n_states, len(config.actions)))
    columns = action_index(rows["action"].to_numpy(), config.actions)
    table[rows["state_key"].to_numpy(), columns] = rows["probability"].to_numpy()
    return table


def checkpoints(n: int, count: int = CHECKPOINTS) -> np.ndarray:
    """Episode counts at which the path is reported: evenly spaced, ending at ``n``."""
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    return np.unique(np.ceil(np.arange(1, count + 1) * n / count).astype(np.int64))


def episode_arrays(steps: pl.DataFrame, pi: np.ndarray, b: np.ndarray) -> dict[str, np.ndarray]:
    """Per episode, in the order the episodes started: weight, return (USD), start and id.

    ``steps`` sorted by (episode_id, t); ``pi`` and ``b`` the target's and behaviour's
    probabilities of each logged action, shape (n_steps,).
    """
    episode = steps["episode_id"].to_numpy()
    starts = np.flatnonzero(np.r_[True, episode[1:] != episode[:-1]])
    with np.errstate(divide="ignore"):
        log_ratio = np.log(pi) - np.log(b)
    weight = np.exp(np.add.reduceat(log_ratio, starts))
    ret = np.add.reduceat(steps["reward"].to_numpy().astype(float), starts)
    began = steps["step_start_utc"].to_numpy()[starts]
    order = np.lexsort((episode[starts], began))
    return {
        "weight": weight[order],
        "return": ret[order],
        "start": began[order],
        "episode_id": episode[starts][order],
    }


def path(weight: np.ndarray, ret: np.ndarray, at: np.ndarray) -> dict[str, np.ndarray]:
    """Ordinary and weighted IS savings after the first ``at`` episodes, with their normal bands.

    ``weight`` and ``ret`` per episode in time order, shape (n,); returns arrays of shape
    (len(at),) keyed ``ois``, ``ois_se``, ``wis``, ``wis_se`` and ``ess`` (Kish).
    """
    n = at.astype(float)
    pick = at - 1

    def running(values: np.ndarray) -> np.ndarray:
        return np.cumsum(values)[pick]

    w, g = weight, ret
    s_w, s_g, s_wg = running(w), running(g), running(w * g)
    s_w2, s_g2 = running(w * w), running(g * g)
    s_w2g, s_w2g2, s_wg2 = running(w * w * g), running(w * w * g * g), running(w * g * g)
    e = w * g - g
    s_e, s_e2 = running(e), running(e * e)
    ois = s_e / n
    ois_se = np.sqrt(np.maximum(s_e2 / n - ois**2, 0.0) / n)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = s_wg / s_w
        mean_g, mean_w = s_g / n, s_w / n
        sum_a2 = (s_w2g2 - 2 * value * s_w2g + value**2 * s_w2) / mean_w**2
        sum_ac = (s_wg2 - (mean_g + value) * s_wg + value * mean_g * s_w) / mean_w
        sum_c2 = s_g2 - n * mean_g**2
        wis_se = np.sqrt(np.maximum(sum_a2 - 2 * sum_ac + sum_c2, 0.0)) / n
        ess = s_w**2 / s_w2
    return {"ois": ois, "ois_se": ois_se, "wis": value - mean_g, "wis_se": wis_se, "ess": ess}


def estimate_path(
    steps: pl.DataFrame, behavior: BehaviorModel, policy: pl.DataFrame, config: Config
) -> pl.DataFrame:
    """The ``estimate_path`` ledger rows of every program-wide policy and mode (see the module text)."""
    z = NormalDist().inv_cdf(0.5 + config.confidence / 2)
    programme = policy.filter(pl.col("scope") == "portfolio")
    parts = []
    for mode in sorted(steps["mode"].unique()):
        in_mode = steps.filter(pl.col("mode") == mode)
        b = behavior.probabilities(in_mode)
        rows = programme.filter(pl.col("mode") == mode)
        for name in sorted(rows["policy_name"].unique()):
            table = _table(rows.filter(pl.col("policy_name") == name), config)
            pi = table[
                in_mode["state_key"].to_numpy(), action_index(in_mode["action"].to_numpy(), config.actions)
            ]
            episodes = episode_arrays(in_mode, pi, b)
            at = checkpoints(len(episodes["weight"]))
            found = path(episodes["weight"], episodes["return"], at)
            through = episodes["start"][at - 1]
            for estimator, key in (("ordinary_is", "ois"), ("weighted_is", "wis")):
                estimate, se = found[key], found[f"{key}_se"]
                parts.append(
                    pl.DataFrame(
                        {
                            "policy_name": name,
                            "mode": mode,
                            "estimator": estimator,
                            "n_episodes": at,
                            "through_utc": through,
                            "savings_usd_per_episode": estimate,
                            "ci_low": estimate - z * se,
                            "ci_high": estimate + z * se,
                            "ess": found["ess"],
                        }
                    )
                )
    if not parts:
        return pl.DataFrame(
            schema={
                "policy_name": pl.Utf8,
                "mode": pl.Utf8,
                "estimator": pl.Utf8,
                "n_episodes": pl.Int64,
                "through_utc": pl.Datetime("us", "UTC"),
                "savings_usd_per_episode": pl.Float64,
                "ci_low": pl.Float64,
                "ci_high": pl.Float64,
                "ess": pl.Float64,
            }
        )
    return (
        pl.concat(parts)
        .with_columns(pl.col(pl.Float64).fill_nan(None), pl.col("through_utc").dt.replace_time_zone("UTC"))
        .select(COLUMNS)
    )
