"""Validation of decision-step frames and the array helpers every estimator shares.

A frame becomes flat numpy arrays indexed by episode code (``_Steps``); the
helpers are cumulative sums within episodes, ``np.bincount`` over episode codes
and ``np.add.reduceat`` over sorted segments, never a Python loop over episodes
or steps.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np
import polars as pl

ALL_GROUP = "all"
"""Group label used when the steps carry no ``group`` column."""

_ALL_LABELS = pl.Series("group", [ALL_GROUP], dtype=pl.String)
_STEP_COLUMNS = ("episode_id", "t", "reward")
_PROB_COLUMNS = ("pi", "b")
# exp(709.8) is the largest finite float64; beyond this a weight cannot be represented.
_MAX_LOG_WEIGHT = 700.0
_MAX_WEIGHT = float(np.exp(_MAX_LOG_WEIGHT))
# Below this a weight would be a subnormal float64 and lose precision.
_MIN_LOG_WEIGHT = float(np.log(np.finfo(np.float64).tiny))
# The layout by decision index (``_Steps.by_decision``) is used up to this many padded cells per step.
_MAX_PADDED = 2


class EstimatorInputError(ValueError):
    """Decision steps, or options, that an estimator cannot use as given."""


@dataclass(frozen=True)
class _Steps:
    """Validated decision steps as flat arrays, with episode and group codes."""

    starts: np.ndarray
    """(n_episodes,) row of each episode's first step."""
    lengths: np.ndarray
    """(n_episodes,) number of decision steps in each episode."""
    group: np.ndarray
    """(n_episodes,) group code of each episode, 0 .. n_groups - 1."""
    labels: pl.Series
    """(n_groups,) group label of each code, sorted."""
    t: np.ndarray
    """(n_steps,) decision index of each step within its episode, 0, 1, 2, ..."""
    gamma: float
    """Discount per decision step."""
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

    # Built on first use: most estimators need neither, and each costs a pass over every step.
    @cached_property
    def episode(self) -> np.ndarray:
        """(n_steps,) episode code of each step, 0 .. n_episodes - 1 in frame order."""
        # A running count of episode starts; integer marks add faster than a boolean cumsum.
        marks = np.zeros(self.t.size, dtype=np.int64)
        marks[self.starts[1:]] = 1
        return np.cumsum(marks, out=marks)

    @cached_property
    def discount(self) -> np.ndarray:
        """(n_steps,) gamma ** t."""
        return np.power(self.gamma, self.t.astype(np.float64))

    @cached_property
    def by_decision(self) -> np.ndarray | None:
        """(longest, n_episodes) row of step k of each episode, ``n_steps`` past its end.

        Row k holds every episode's k-th step, so a reduction within episodes is a few
        whole-row operations (no per-segment work, which costs more than the arithmetic
        when episodes hold a handful of steps). None when padding every episode to the
        longest would more than double the steps; callers then use the flat helpers.
        """
        longest = int(self.lengths.max())
        if longest * self.n_episodes > _MAX_PADDED * self.t.size:
            return None
        rows = np.add.outer(np.arange(longest), self.starts)
        # Rows below the shortest episode's length have no padding (row 0 never has).
        for k in range(int(self.lengths.min()), longest):
            rows[k][self.lengths <= k] = self.t.size
        return rows


# ---------------------------------------------------------------- validation


def _prepare(
    steps: pl.DataFrame, required: tuple[str, ...], gamma: float, nullable: tuple[str, ...] = ()
) -> _Steps:
    """Check columns, order and group constancy; return the step arrays.

    Each check is one cheap pass over whole arrays; only when it fails is the
    offending row looked up for the message.
    """
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
    schema = steps.schema  # built afresh on each access
    for name in required + (("group",) if "group" in schema else ()):
        dtype = schema[name]
        if name in ("episode_id", "t") and not dtype.is_integer():
            raise EstimatorInputError(f"column {name!r} must be an integer column, got {dtype}")
        if name not in ("episode_id", "t", "group") and not dtype.is_numeric():
            raise EstimatorInputError(f"column {name!r} must be numeric, got {dtype}")
        nulls = steps[name].null_count()
        if nulls and name not in nullable:
            raise EstimatorInputError(f"column {name!r} has {nulls} null value(s); drop or fill them first")

    episode_id = steps["episode_id"].to_numpy()
    t = steps["t"].to_numpy()
    new_episode = episode_id[1:] != episode_id[:-1]
    starts = np.empty(np.count_nonzero(new_episode) + 1, dtype=np.int64)
    starts[0] = 0
    np.add(np.flatnonzero(new_episode), 1, out=starts[1:])
    # Sorted exactly when the ids never fall (they are constant within an episode).
    falls = episode_id[1:] < episode_id[:-1]  # no diff: unsigned ids would wrap
    if falls.any():
        row = int(np.argmax(falls)) + 1
        raise EstimatorInputError(
            f"steps must be sorted by (episode_id, t): row {row} has episode_id {episode_id[row]} "
            f"after {episode_id[row - 1]}; call steps.sort(['episode_id', 't'])"
        )
    lengths = np.empty_like(starts)
    np.subtract(starts[1:], starts[:-1], out=lengths[:-1])
    lengths[-1] = t.size - starts[-1]
    # t counts 0, 1, 2, ... within each episode exactly when the first is 0 and each later t is
    # the one before plus 1 within an episode and 0 where a new one starts.
    if t[0] != 0 or (t[1:] != (t[:-1] + 1) * ~new_episode).any():
        _raise_t_error(episode_id, t, new_episode)
    if "group" in steps.columns:
        column = steps["group"]
        if column.null_count():
            raise EstimatorInputError(f"column 'group' has {column.null_count()} null value(s)")
        # Within an episode the first value unlike its start is also the first unlike the row before.
        varying = np.flatnonzero((column[1:] != column[:-1]).to_numpy() & ~new_episode)
        if varying.size:
            row = int(varying[0]) + 1
            start = int(starts[np.searchsorted(starts, row, side="right") - 1])
            raise EstimatorInputError(
                f"group must be constant within an episode: episode_id {episode_id[row]} has "
                f"{column[row]!r} at row {row} and {column[start]!r} at its start"
            )
        first = column.gather(starts)
        # Codes looked up among the sorted distinct labels: a hash lookup per episode, no sort of
        # every episode's label and no numpy object arrays of strings.
        labels = first.unique().sort().rename("group")
        codes = pl.Series(np.arange(labels.len(), dtype=np.int64))
        group = first.replace_strict(labels, codes).to_numpy()
    else:
        group = np.zeros(starts.size, dtype=np.int64)
        labels = _ALL_LABELS

    reward = None
    if "reward" in required:
        reward = steps["reward"].to_numpy().astype(np.float64, copy=False)
        _check_finite(reward, "reward")
    return _Steps(starts, lengths, group, labels, t, float(gamma), reward)


def _raise_t_error(episode_id: np.ndarray, t: np.ndarray, new_episode: np.ndarray) -> None:
    """Name the first row whose t does not count 0, 1, 2, ... within its episode."""
    starts = np.flatnonzero(np.concatenate(([True], new_episode)))
    expected = np.arange(t.size) - np.repeat(starts, np.diff(np.append(starts, t.size)))
    row = int(np.argmax(t != expected))
    raise EstimatorInputError(
        f"t must count 0, 1, 2, ... within each episode: row {row} (episode_id {episode_id[row]}) "
        f"has t={t[row]} where {expected[row]} was expected; sort by (episode_id, t) and "
        "renumber t from 0 without gaps"
    )


def _check_finite(values: np.ndarray, name: str) -> None:
    # A finite sum rules out every NaN and infinity in one pass; only its failure needs a row.
    if not np.isfinite(values.sum()):
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            raise EstimatorInputError(
                f"column {name!r} has {bad.size} non-finite value(s), first at row {int(bad[0])}"
            )


def _probabilities(steps: pl.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """``pi`` in [0, 1] and ``b`` in (0, 1], as float arrays (n_steps,)."""
    pi, b, _ = _checked_probabilities(steps)
    return pi, b


def _checked_probabilities(steps: pl.DataFrame) -> tuple[np.ndarray, np.ndarray, tuple[float, ...]]:
    """``pi`` and ``b`` as ``_probabilities`` gives them, and (min pi, max pi, min b, max b)."""
    pi = steps["pi"].to_numpy().astype(np.float64, copy=False)
    b = steps["b"].to_numpy().astype(np.float64, copy=False)
    ranges = (
        *_check_range(pi, "pi", "target", allow_zero=True),
        *_check_range(b, "b", "behaviour", allow_zero=False),
    )
    return pi, b, ranges


def _check_range(p: np.ndarray, name: str, role: str, allow_zero: bool) -> tuple[float, float]:
    """Refuse values outside [0, 1] (or (0, 1]); return the smallest and largest."""
    # min and max pass over the array once each; NaN fails both comparisons and reaches the search.
    low, high = p.min(), p.max()
    if ((low >= 0.0) if allow_zero else (low > 0.0)) and high <= 1.0:
        return float(low), float(high)
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
    return float(low), float(high)


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
    """Sum of ``values`` (n_steps,) per episode, shape (n_episodes,).

    Added in step order within each episode, as a plain loop adds them (the bincount adds
    each bin's values in frame order; the layout by decision adds its rows in order).
    """
    if s.by_decision is None:
        return np.bincount(s.episode, weights=values, minlength=s.n_episodes)
    return _row_sums(_by_decision(values, s, 0.0))


def _padded(n_steps: int, fill: float) -> np.ndarray:
    """A buffer of ``n_steps`` values plus one ``fill`` at index n_steps, where padding reads."""
    out = np.empty(n_steps + 1)
    out[n_steps] = fill
    return out


def _by_decision(values: np.ndarray, s: _Steps, fill: float) -> np.ndarray:
    """``values`` (n_steps,) laid out as ``s.by_decision`` (longest, n_episodes), ``fill`` past each end."""
    padded = _padded(values.size, fill)
    padded[:-1] = values
    return np.take(padded, s.by_decision)


def _from_decisions(laid_out: np.ndarray, s: _Steps) -> np.ndarray:
    """The (n_steps,) values of a (longest, n_episodes) layout; padding lands in a spare cell."""
    flat = np.empty(s.t.size + 1)
    flat[s.by_decision] = laid_out  # an index assignment; numpy.put is slower here
    return flat[:-1]


def _row_sums(laid_out: np.ndarray) -> np.ndarray:
    """Sum over decision indices of a (longest, n_episodes) layout, row 0 first."""
    total = laid_out[0].copy()
    for row in laid_out[1:]:
        total += row
    return total


def _row_cumprod(laid_out: np.ndarray) -> np.ndarray:
    """Running product over decision indices of a layout, in place (row k times row k - 1, in order)."""
    for k in range(1, laid_out.shape[0]):
        laid_out[k] *= laid_out[k - 1]
    return laid_out


def _ratios_by_decision(pi: np.ndarray, b: np.ndarray, s: _Steps) -> np.ndarray:
    """pi / b laid out by decision index, 1 past each episode's end (so products carry through)."""
    padded = _padded(pi.size, 1.0)
    np.divide(pi, b, out=padded[:-1])
    return np.take(padded, s.by_decision)


def _group_sums(values: np.ndarray, group: np.ndarray | None, n_groups: int) -> np.ndarray:
    """Sums of ``values`` (m,) by ``group`` code (m,), shape (n_groups,).

    One group is a plain sum (``group`` may then be None): a bincount into a single bin
    waits on every add in turn.
    """
    return np.array([values.sum()]) if n_groups == 1 else np.bincount(group, values, n_groups)


def _group_counts(group: np.ndarray, n_groups: int) -> np.ndarray:
    """How many of the codes ``group`` fall in each group, shape (n_groups,), int64."""
    if n_groups == 1:
        return np.array([group.size], dtype=np.int64)
    return np.bincount(group, minlength=n_groups).astype(np.int64, copy=False)


def _discounted(values: np.ndarray, s: _Steps) -> np.ndarray:
    """gamma ** t * ``values`` (n_steps,); the values themselves when gamma is 1, as 1.0 * x == x."""
    return values if s.gamma == 1.0 else s.discount * values


def _products_stay_normal(s: _Steps, ranges: tuple[float, ...]) -> bool:
    """Whether no running product of pi / b can leave the normal float64 range, from the ranges alone.

    Every ratio lies in [min pi / max b, max pi / min b], so every running product lies
    between min(1, low) ** L and max(1, high) ** L, L the longest episode's length.
    """
    pi_low, pi_high, b_low, b_high = ranges
    if not (pi_low > 0.0 and b_low > 0.0):
        return False
    longest = float(s.lengths.max())
    with np.errstate(over="ignore"):
        low, high = pi_low / b_high, pi_high / b_low
    return bool(
        np.isfinite(high)
        and longest * np.log(max(1.0, high)) <= _MAX_LOG_WEIGHT
        and longest * np.log(min(1.0, low)) >= _MIN_LOG_WEIGHT
    )


def _cumulative_weights(
    pi: np.ndarray, b: np.ndarray, s: _Steps, ranges: tuple[float, ...] | None = None
) -> np.ndarray:
    """rho_{0:t} = prod_{k <= t} pi_k / b_k within each episode, shape (n_steps,).

    Multiplied directly when every pi is positive and no product leaves the
    normal float64 range; otherwise summed in log space (``_log_space_weights``).
    ``ranges`` (min pi, max pi, min b, max b), when known, can show that without a look
    at the products.
    """
    if ranges is not None and _products_stay_normal(s, ranges):
        if s.by_decision is not None:
            return _from_decisions(_row_cumprod(_ratios_by_decision(pi, b, s)), s)
        return _segment_cumprod(np.divide(pi, b), s, in_place=True)
    if pi.min() > 0.0:
        weights = _segment_cumprod(np.divide(pi, b), s, in_place=True)
        if np.finfo(np.float64).tiny <= weights.min() and weights.max() <= _MAX_WEIGHT:
            return weights
    return _log_space_weights(pi, b, s)


def _trajectory_weights(
    pi: np.ndarray, b: np.ndarray, s: _Steps, ranges: tuple[float, ...] | None = None
) -> np.ndarray:
    """rho_i = prod_t pi_t / b_t over each whole episode, shape (n_episodes,).

    One segment product per episode when no running product can leave the normal float64
    range (``_products_stay_normal``); otherwise the last of ``_cumulative_weights``.
    ``ranges`` (min pi, max pi, min b, max b), when known, saves passes over the arrays.
    """
    if _products_stay_normal(s, ranges or (pi.min(), pi.max(), b.min(), b.max())):
        if s.by_decision is not None:
            # Left to right, as the loop multiplies; the padding's 1s change no product.
            return _row_cumprod(_ratios_by_decision(pi, b, s))[-1]
        return np.multiply.reduceat(np.divide(pi, b), s.starts)
    return _cumulative_weights(pi, b, s)[s.ends]


def _segment_cumprod(values: np.ndarray, s: _Steps, in_place: bool = False) -> np.ndarray:
    """Inclusive cumulative product of ``values`` (n_steps,) restarting at each episode.

    A scan over decision indices: pass k multiplies step k of every episode that reaches
    it by its running product at step k - 1, so the products are formed left to right as
    a plain loop forms them, and pass k touches only the episodes still running (the
    passes together touch each step once). ``in_place`` overwrites ``values``.
    """
    out = values if in_place else values.copy()
    running = np.flatnonzero(s.lengths > 1)
    k = 1
    while running.size:
        rows = s.starts[running] + k
        out[rows] *= out[rows - 1]
        k += 1
        running = running[s.lengths[running] > k]
    return out


def _log_space_weights(pi: np.ndarray, b: np.ndarray, s: _Steps) -> np.ndarray:
    """rho_{0:t} summed in log space, so long episodes do not under- or overflow midway.

    A step with ``pi == 0`` zeroes the rest of its episode without taking log(0).
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
    total = _group_sums(weights, group, n_groups)
    squares = _group_sums(weights * weights, group, n_groups)
    if n_groups == 1:
        largest = np.array([weights.max()])
    else:
        largest = np.zeros(n_groups)
        np.maximum.at(largest, group, weights)
    ess = np.divide(total * total, squares, out=np.zeros(n_groups), where=squares > 0)
    share = np.divide(largest, total, out=np.full(n_groups, np.nan), where=total > 0)
    return total, ess, share


def _returns(s: _Steps) -> np.ndarray:
    """Discounted return of each episode, USD, shape (n_episodes,)."""
    return _episode_sum(_discounted(s.reward, s), s)


def _weighted_steps(
    steps: pl.DataFrame, gamma: float, extra: tuple[str, ...] = ()
) -> tuple[_Steps, np.ndarray]:
    """Validated steps with reward, pi and b (and ``extra`` columns), and their weights rho_{0:t}."""
    s = _prepare(steps, _STEP_COLUMNS + _PROB_COLUMNS + extra, gamma)
    pi, b, ranges = _checked_probabilities(steps)
    return s, _cumulative_weights(pi, b, s, ranges)


def _weighted_episodes(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, np.ndarray]:
    """Validated steps with reward, pi and b, and each episode's trajectory weight rho_i (n_episodes,)."""
    s = _prepare(steps, _STEP_COLUMNS + _PROB_COLUMNS, gamma)
    pi, b, ranges = _checked_probabilities(steps)
    return s, _trajectory_weights(pi, b, s, ranges)
