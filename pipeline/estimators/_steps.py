"""Validation of decision-step frames and the array helpers every estimator shares.

A frame becomes flat numpy arrays indexed by episode code (``_Steps``); the
helpers are cumulative sums within episodes, ``np.bincount`` over episode codes
and ``np.add.reduceat`` over sorted segments, never a Python loop over episodes
or steps.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

ALL_GROUP = "all"
"""Group label used when the steps carry no ``group`` column."""

_STEP_COLUMNS = ("episode_id", "t", "reward")
_PROB_COLUMNS = ("pi", "b")
# exp(709.8) is the largest finite float64; beyond this a weight cannot be represented.
_MAX_LOG_WEIGHT = 700.0


class EstimatorInputError(ValueError):
    """Decision steps, or options, that an estimator cannot use as given."""


@dataclass(frozen=True)
class _Steps:
    """Validated decision steps as flat arrays, with episode and group codes."""

    episode: np.ndarray
    """(n_steps,) episode code of each step, 0 .. n_episodes - 1 in frame order."""
    starts: np.ndarray
    """(n_episodes,) row of each episode's first step."""
    lengths: np.ndarray
    """(n_episodes,) number of decision steps in each episode."""
    group: np.ndarray
    """(n_episodes,) group code of each episode, 0 .. n_groups - 1."""
    labels: pl.Series
    """(n_groups,) group label of each code, sorted."""
    discount: np.ndarray
    """(n_steps,) gamma ** t."""
    reward: np.ndarray | None
    """(n_steps,) reward, USD; None when the caller did not ask for it."""

    @property
    def n_episodes(self) -> int:
        return self.starts.size

    @property
    def n_groups(self) -> int:
        return self.labels.len()

    @property
    def ends(self) -> np.ndarray:
        """(n_episodes,) row of each episode's last step."""
        return self.starts + self.lengths - 1


# ---------------------------------------------------------------- validation


def _prepare(
    steps: pl.DataFrame, required: tuple[str, ...], gamma: float, nullable: tuple[str, ...] = ()
) -> _Steps:
    """Check columns, order and group constancy; return the step arrays."""
    if not isinstance(steps, pl.DataFrame):
        raise EstimatorInputError(f"steps must be a polars DataFrame, got {type(steps).__name__}")
    if not (isinstance(gamma, int | float) and 0.0 < gamma <= 1.0):
        raise EstimatorInputError(f"gamma must be a discount factor in (0, 1], got {gamma!r}")
    missing = [c for c in required if c not in steps.columns]
    if missing:
        raise EstimatorInputError(
            f"steps is missing column(s) {missing}; this estimator needs {list(required)} "
            "(see 'Estimator interface' in DESIGN.md)"
        )
    if steps.height == 0:
        raise EstimatorInputError("steps has no rows; there is nothing to estimate")
    for name in required + (("group",) if "group" in steps.columns else ()):
        dtype = steps.schema[name]
        if name in ("episode_id", "t") and not dtype.is_integer():
            raise EstimatorInputError(f"column {name!r} must be an integer column, got {dtype}")
        if name not in ("episode_id", "t", "group") and not dtype.is_numeric():
            raise EstimatorInputError(f"column {name!r} must be numeric, got {dtype}")
        nulls = steps[name].null_count()
        if nulls and name not in nullable:
            raise EstimatorInputError(f"column {name!r} has {nulls} null value(s); drop or fill them first")

    episode_id = steps["episode_id"].to_numpy()
    back = np.flatnonzero(episode_id[1:] < episode_id[:-1])  # no diff: unsigned ids would wrap
    if back.size:
        row = int(back[0]) + 1
        raise EstimatorInputError(
            f"steps must be sorted by (episode_id, t): row {row} has episode_id {episode_id[row]} "
            f"after {episode_id[row - 1]}; call steps.sort(['episode_id', 't'])"
        )
    is_start = np.empty(episode_id.size, dtype=bool)
    is_start[0] = True
    np.not_equal(episode_id[1:], episode_id[:-1], out=is_start[1:])
    starts = np.flatnonzero(is_start)
    episode = np.cumsum(is_start) - 1
    lengths = np.diff(np.append(starts, episode_id.size))
    t = steps["t"].to_numpy().astype(np.int64)
    expected = np.arange(t.size) - starts[episode]
    off = np.flatnonzero(t != expected)
    if off.size:
        row = int(off[0])
        raise EstimatorInputError(
            f"t must count 0, 1, 2, ... within each episode: row {row} (episode_id {episode_id[row]}) "
            f"has t={t[row]} where {expected[row]} was expected; sort by (episode_id, t) and "
            "renumber t from 0 without gaps"
        )

    if "group" in steps.columns:
        column = steps["group"]
        if column.null_count():
            raise EstimatorInputError(f"column 'group' has {column.null_count()} null value(s)")
        first = column.gather(starts)
        varying = np.flatnonzero((column != first.gather(episode)).to_numpy())
        if varying.size:
            row = int(varying[0])
            raise EstimatorInputError(
                f"group must be constant within an episode: episode_id {episode_id[row]} has "
                f"{column[row]!r} at row {row} and {first[int(episode[row])]!r} at its start"
            )
        # Dense ranks give sorted group codes in polars, without numpy object arrays of strings.
        group = first.rank("dense").to_numpy().astype(np.int64) - 1
        representative = np.empty(int(group.max()) + 1, dtype=np.int64)
        representative[group] = np.arange(group.size)
        labels = first.gather(representative).rename("group")
    else:
        group = np.zeros(starts.size, dtype=np.int64)
        labels = pl.Series("group", [ALL_GROUP], dtype=pl.String)

    reward = None
    if "reward" in required:
        reward = steps["reward"].to_numpy().astype(np.float64)
        bad = np.flatnonzero(~np.isfinite(reward))
        if bad.size:
            raise EstimatorInputError(
                f"column 'reward' has {bad.size} non-finite value(s), first at row {int(bad[0])}"
            )
    discount = np.power(float(gamma), t.astype(np.float64))
    return _Steps(episode, starts, lengths, group.astype(np.int64), labels, discount, reward)


def _probabilities(steps: pl.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """``pi`` in [0, 1] and ``b`` in (0, 1], as float arrays (n_steps,)."""
    pi = steps["pi"].to_numpy().astype(np.float64)
    b = steps["b"].to_numpy().astype(np.float64)
    _check_range(pi, "pi", "target", allow_zero=True)
    _check_range(b, "b", "behaviour", allow_zero=False)
    return pi, b


def _check_range(p: np.ndarray, name: str, role: str, allow_zero: bool) -> None:
    inside = ((p >= 0.0) if allow_zero else (p > 0.0)) & (p <= 1.0)
    bad = np.flatnonzero(~inside)
    if bad.size:
        row = int(bad[0])
        interval = "[0, 1]" if allow_zero else "(0, 1]"
        hint = (
            " A logged action the behaviour model gives no probability breaks importance sampling:"
            " run diagnostics() and smooth the behaviour model."
            if not allow_zero and p[row] == 0.0
            else ""
        )
        raise EstimatorInputError(
            f"column {name!r} must hold {role} probabilities in {interval}; {bad.size} row(s) fall "
            f"outside, first at row {row} ({name}={p[row]}).{hint}"
        )


def _check_level(level: float) -> float:
    if not (isinstance(level, int | float) and 0.0 < level < 1.0):
        raise EstimatorInputError(f"level must be a probability in (0, 1), e.g. 0.95; got {level!r}")
    return float(level)


# ---------------------------------------------------------------- array helpers


def _segment_cumsum(values: np.ndarray, s: _Steps) -> np.ndarray:
    """Inclusive cumulative sum of ``values`` (n_steps,) restarting at each episode.

    One running sum over the frame minus its value before each episode: rounding
    grows with the frame-wide total (about 1e-16 of it), far below what matters
    for log-weights and returns of a few decisions.
    """
    total = np.cumsum(values)
    before = total[s.starts] - values[s.starts]
    return total - before[s.episode]


def _episode_sum(values: np.ndarray, s: _Steps) -> np.ndarray:
    """Sum of ``values`` (n_steps,) per episode, shape (n_episodes,)."""
    return np.bincount(s.episode, weights=values, minlength=s.n_episodes)


def _keyed_sums(key: np.ndarray, values: np.ndarray, n_keys: int) -> np.ndarray:
    """Sums of ``values`` (B, m) by ``key`` (m,), shape (B, n_keys); ``key`` must be non-decreasing."""
    out = np.zeros((values.shape[0], n_keys))
    if key.size:
        first = np.flatnonzero(np.concatenate(([True], key[1:] != key[:-1])))
        out[:, key[first]] = np.add.reduceat(values, first, axis=1)
    return out


def _cumulative_weights(pi: np.ndarray, b: np.ndarray, s: _Steps) -> np.ndarray:
    """rho_{0:t} = prod_{k <= t} pi_k / b_k within each episode, shape (n_steps,).

    Summed in log space so long episodes do not under- or overflow midway; a
    step with ``pi == 0`` zeroes the rest of its episode without taking log(0).
    """
    takes = pi > 0.0
    log_ratio = np.log(np.where(takes, pi, 1.0)) - np.log(np.where(takes, b, 1.0))
    cut = _segment_cumsum((~takes).astype(np.float64), s) > 0.0
    log_weight = np.where(cut, 0.0, _segment_cumsum(log_ratio, s))
    if log_weight.max() > _MAX_LOG_WEIGHT:
        row = int(np.argmax(log_weight))
        raise EstimatorInputError(
            f"importance weight exp({log_weight[row]:.0f}) at row {row} overflows float64; shorten "
            "episodes (fewer decisions) or make the target policy epsilon-soft"
        )
    return np.where(cut, 0.0, np.exp(log_weight))


def _previous_weights(weights: np.ndarray, s: _Steps) -> np.ndarray:
    """rho_{0:t-1}, with rho_{0:-1} = 1 at each episode's first step, shape (n_steps,)."""
    previous = np.empty_like(weights)
    previous[1:] = weights[:-1]
    previous[s.starts] = 1.0
    return previous


def _weight_summary(weights: np.ndarray, group: np.ndarray, n_groups: int) -> tuple[np.ndarray, ...]:
    """Per group: sum, Kish ESS and largest share of the episode ``weights`` (n_episodes,)."""
    total = np.bincount(group, weights=weights, minlength=n_groups)
    squares = np.bincount(group, weights=weights * weights, minlength=n_groups)
    largest = np.zeros(n_groups)
    np.maximum.at(largest, group, weights)
    ess = np.divide(total * total, squares, out=np.zeros(n_groups), where=squares > 0)
    share = np.divide(largest, total, out=np.full(n_groups, np.nan), where=total > 0)
    return total, ess, share


def _returns(s: _Steps) -> np.ndarray:
    """Discounted return of each episode, USD, shape (n_episodes,)."""
    return _episode_sum(s.discount * s.reward, s)


def _weighted_steps(
    steps: pl.DataFrame, gamma: float, extra: tuple[str, ...] = ()
) -> tuple[_Steps, np.ndarray]:
    """Validated steps with reward, pi and b (and ``extra`` columns), and their weights rho_{0:t}."""
    s = _prepare(steps, _STEP_COLUMNS + _PROB_COLUMNS + extra, gamma)
    pi, b = _probabilities(steps)
    return s, _cumulative_weights(pi, b, s)
