"""Off-policy estimators of a policy's value from logged decision steps.

Every function takes one polars frame of decision steps sorted by
``(episode_id, t)`` with columns ``episode_id`` (int), ``t`` (int, 0-based step
within the episode), ``reward`` (float, USD per step, costs negative), ``pi``
(target-policy probability of the logged action), ``b`` (behaviour probability
of the logged action) and an optional ``group`` column (premise, cohort). When
``group`` is absent every episode belongs to the single group ``"all"``.

All arithmetic runs on numpy arrays indexed by episode code: cumulative sums
within episodes, ``np.bincount`` over episode codes and ``np.add.reduceat``
over sorted (group, cell) segments, never a Python loop over episodes or steps,
so a cohort of a hundred thousand episodes costs the same few array passes as ten.

The importance-sampling estimators share one form. For group ``g``, with
episode multiplicities ``u_i`` (1 for the point estimate, Poisson(1) draws for
a bootstrap replicate),

    estimate_g = sum_k (sum_{i in g} u_i A_ik) / (sum_{i in g} u_i C_ik)

where the cells ``k`` are a single cell for the trajectory-wise and per-decision
estimators and the decision index ``t`` for weighted per-decision IS. Writing
each estimator as its ``A`` and ``C`` entries lets ``bootstrap_interval``
resample any of them, and the behaviour value beside it, in one vectorised pass.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import polars as pl

__all__ = [
    "ALL_GROUP",
    "EstimatorInputError",
    "bootstrap_interval",
    "bootstrap_replicates",
    "percentile_interval",
    "refit_weighted_is_replicates",
    "diagnostics",
    "doubly_robust",
    "effective_sample_size",
    "every_visit_mc",
    "first_visit_mc",
    "lower_bound",
    "on_policy_value",
    "ordinary_is",
    "per_decision_is",
    "weighted_is",
    "weighted_per_decision_is",
]

ALL_GROUP = "all"
"""Group label used when the steps carry no ``group`` column."""

_STEP_COLUMNS = ("episode_id", "t", "reward")
_PROB_COLUMNS = ("pi", "b")
_MODEL_COLUMNS = ("q_hat", "v_hat")
# exp(709.8) is the largest finite float64; beyond this a weight cannot be represented.
_MAX_LOG_WEIGHT = 700.0
# Bootstrap work per chunk, replicates x entries: about 32 MB of float64 per temporary array.
_CHUNK_ENTRIES = 1 << 22
# Clipping thresholds tried per group, as fractions of the largest held-out weighted return.
_CLIP_GRID = np.geomspace(1e-3, 1.0, 48)


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


@dataclass(frozen=True)
class _Terms:
    """An estimator as a sum over cells of ratios of episode sums (see the module docstring)."""

    episode: np.ndarray
    """(m,) episode code of each entry."""
    cell: np.ndarray
    """(m,) cell of each entry, 0 .. n_cells - 1."""
    numerator: np.ndarray
    """(m,) entries of A."""
    denominator: np.ndarray
    """(m,) entries of C."""
    n_cells: int
    weights: np.ndarray
    """(n_episodes,) trajectory weights reported as ``ess`` and ``max_weight_share``."""
    carry: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    """(episode, cell, value) denominator entries that also count in every later cell."""


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


# ---------------------------------------------------------------- estimator terms


def _scalar_terms(numerator: np.ndarray, denominator: np.ndarray, weights: np.ndarray) -> _Terms:
    """One entry per episode in a single cell: sum_i u_i a_i / sum_i u_i c_i."""
    n = numerator.size
    return _Terms(np.arange(n), np.zeros(n, dtype=np.int64), numerator, denominator, 1, weights)


def _returns(s: _Steps) -> np.ndarray:
    """Discounted return of each episode, USD, shape (n_episodes,)."""
    return _episode_sum(s.discount * s.reward, s)


def _on_policy_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s = _prepare(steps, _STEP_COLUMNS, gamma)
    ones = np.ones(s.n_episodes)
    return s, _scalar_terms(_returns(s), ones, ones)


def _weighted_steps(steps: pl.DataFrame, gamma: float, extra: tuple[str, ...] = ()):
    s = _prepare(steps, _STEP_COLUMNS + _PROB_COLUMNS + extra, gamma)
    pi, b = _probabilities(steps)
    return s, _cumulative_weights(pi, b, s)


def _ordinary_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma)
    rho = w[s.ends]
    return s, _scalar_terms(rho * _returns(s), np.ones(s.n_episodes), rho)


def _weighted_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma)
    rho = w[s.ends]
    return s, _scalar_terms(rho * _returns(s), rho, rho)


def _per_decision_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma)
    # Same expression as the doubly robust term with a zero model, so the two agree bit for bit.
    per_episode = _episode_sum(s.discount * (w * s.reward), s)
    return s, _scalar_terms(per_episode, np.ones(s.n_episodes), w[s.ends])


def _weighted_per_decision_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma)
    n_cells = int(s.lengths.max())
    t = np.arange(w.size) - s.starts[s.episode]
    # An ended episode keeps its final weight in later denominators (it sits in an absorbing
    # state with reward 0); dropping it would estimate E[r_t | still running] instead.
    ended = s.lengths < n_cells
    carry = (np.flatnonzero(ended), s.lengths[ended], w[s.ends][ended])
    terms = _Terms(s.episode, t, s.discount * (w * s.reward), w, n_cells, w[s.ends], carry)
    return s, terms


def _doubly_robust_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma, _MODEL_COLUMNS)
    q_hat = steps["q_hat"].to_numpy().astype(np.float64)
    v_hat = steps["v_hat"].to_numpy().astype(np.float64)
    for name, values in (("q_hat", q_hat), ("v_hat", v_hat)):
        if not np.isfinite(values).all():
            raise EstimatorInputError(f"column {name!r} has non-finite values; refit the Q model")
    step_terms = s.discount * (w * (s.reward - q_hat) + _previous_weights(w, s) * v_hat)
    return s, _scalar_terms(_episode_sum(step_terms, s), np.ones(s.n_episodes), w[s.ends])


def _entry_keys(terms: _Terms, s: _Steps) -> tuple[np.ndarray, np.ndarray]:
    """(group, cell) key of each entry and of each carried entry."""
    key = s.group[terms.episode] * terms.n_cells + terms.cell
    carry_key = np.empty(0, dtype=np.int64)
    if terms.carry is not None:
        carry_key = s.group[terms.carry[0]] * terms.n_cells + terms.carry[1]
    return key, carry_key


def _in_key_order(terms: _Terms, s: _Steps) -> _Terms:
    """The same terms with entries sorted by (group, cell), so sums are contiguous segments."""
    key, carry_key = _entry_keys(terms, s)
    order = np.argsort(key, kind="stable")
    carry = terms.carry
    if carry is not None:
        carry_order = np.argsort(carry_key, kind="stable")
        carry = tuple(part[carry_order] for part in carry)
    return _Terms(
        terms.episode[order],
        terms.cell[order],
        terms.numerator[order],
        terms.denominator[order],
        terms.n_cells,
        terms.weights,
        carry,
    )


def _evaluate(terms: _Terms, s: _Steps, multiplicity: np.ndarray | None = None) -> np.ndarray:
    """Estimates for each row of episode ``multiplicity`` (B, n_episodes), shape (B, n_groups).

    ``None`` means every episode once (the point estimate, B = 1). A group whose
    denominator is zero in some cell, i.e. no episode with non-zero weight, gets NaN.
    """
    key, carry_key = _entry_keys(terms, s)
    if (key[1:] < key[:-1]).any() or (carry_key[1:] < carry_key[:-1]).any():
        terms = _in_key_order(terms, s)
        key, carry_key = _entry_keys(terms, s)
    u = np.ones((1, s.n_episodes)) if multiplicity is None else multiplicity
    rows, n_cells, n_groups = u.shape[0], terms.n_cells, s.n_groups
    n_keys = n_groups * n_cells
    u_entries = u[:, terms.episode]
    numerator = _keyed_sums(key, u_entries * terms.numerator, n_keys).reshape(rows, n_groups, n_cells)
    denominator = _keyed_sums(key, u_entries * terms.denominator, n_keys).reshape(rows, n_groups, n_cells)
    if terms.carry is not None:
        episode, _, value = terms.carry
        carried = _keyed_sums(carry_key, u[:, episode] * value, n_keys)
        denominator += np.cumsum(carried.reshape(rows, n_groups, n_cells), axis=2)
    positive = denominator > 0.0
    ratio = np.divide(numerator, denominator, out=np.zeros_like(numerator), where=positive)
    return np.where(positive.all(axis=2), ratio.sum(axis=2), np.nan)


def _estimate_frame(s: _Steps, terms: _Terms) -> pl.DataFrame:
    _, ess, share = _weight_summary(terms.weights, s.group, s.n_groups)
    return pl.DataFrame(
        {
            "group": s.labels,
            "estimate": _evaluate(terms, s)[0],
            "n_episodes": np.bincount(s.group, minlength=s.n_groups).astype(np.int64),
            "ess": ess,
            "max_weight_share": share,
        }
    )


# ---------------------------------------------------------------- public estimators


def effective_sample_size(weights: np.ndarray) -> float:
    """Kish (1965) effective sample size, (sum w)^2 / sum w^2.

    Parameters
    ----------
    weights : array_like, shape (n,)
        Non-negative episode weights.

    Returns
    -------
    float
        Between 1 and n for weights with a positive sum (n when all are equal,
        1 when only one is non-zero); 0.0 when every weight is zero or n == 0.
    """
    w = np.asarray(weights, dtype=np.float64).ravel()
    if not np.isfinite(w).all() or (w < 0).any():
        raise EstimatorInputError("weights must be finite and non-negative")
    squares = float(np.dot(w, w))
    return float(w.sum()) ** 2 / squares if squares > 0 else 0.0


def on_policy_value(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Average discounted episode return per group: the Monte Carlo value of the logging policy.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD) and optionally ``group``;
        ``pi`` and ``b`` are not used.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        One row per group, sorted by group: ``group``, ``estimate`` (USD per
        episode), ``n_episodes``, ``ess`` (= n_episodes, every weight is 1) and
        ``max_weight_share`` (= 1 / n_episodes).
    """
    return _estimate_frame(*_on_policy_terms(steps, gamma))


def ordinary_is(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Ordinary (trajectory-wise) importance sampling: mean over episodes of rho_i G_i.

    rho_i = prod_t pi_t / b_t and G_i = sum_t gamma^t r_t. Unbiased when ``b``
    is the true logging probability; its variance grows with the spread of rho
    and can be infinite (Sutton and Barto 2018, section 5.5).

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b`` and optionally
        ``group``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        One row per group, sorted by group: ``group``, ``estimate`` (expected
        discounted return of the target policy, USD per episode),
        ``n_episodes``, ``ess`` (Kish effective sample size of the rho_i) and
        ``max_weight_share`` (largest rho_i over their sum; NaN if all are 0).
    """
    return _estimate_frame(*_ordinary_is_terms(steps, gamma))


def weighted_is(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Weighted (self-normalised) importance sampling: sum_i rho_i G_i / sum_i rho_i.

    Biased in small samples but consistent, never outside the range of the
    observed returns, and usually of much lower variance than ordinary IS
    (Sutton and Barto 2018, section 5.5).

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b`` and optionally
        ``group``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        As ``ordinary_is``; ``estimate`` is NaN for a group in which no
        episode has a non-zero weight.
    """
    return _estimate_frame(*_weighted_is_terms(steps, gamma))


def per_decision_is(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Per-decision importance sampling (Precup, Sutton and Singh 2000).

    estimate = (1/n) sum_i sum_t gamma^t rho_{i,0:t} r_{i,t}, with
    rho_{i,0:t} = prod_{k<=t} pi_k / b_k: each reward is weighted only by the
    decisions before it. Unbiased, and of lower variance than ordinary IS.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b`` and optionally
        ``group``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        As ``ordinary_is``; ``ess`` and ``max_weight_share`` describe the
        full-trajectory weights rho_{i,0:T-1}, the most dispersed ones used.
    """
    return _estimate_frame(*_per_decision_is_terms(steps, gamma))


def weighted_per_decision_is(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Weighted per-decision importance sampling.

    estimate = sum_t gamma^t (sum_i rho_{i,0:t} r_{i,t}) / (sum_i rho_{i,0:t'}),
    with t' = min(t, T_i - 1): an episode that ended before t keeps its final
    weight in the denominator, as if it sat in an absorbing state with reward 0.
    That keeps the estimator consistent when episode lengths differ.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b`` and optionally
        ``group``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        As ``per_decision_is``; ``estimate`` is NaN for a group in which no
        episode has a non-zero weight.
    """
    return _estimate_frame(*_weighted_per_decision_is_terms(steps, gamma))


def doubly_robust(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Step-wise doubly robust estimator (Jiang and Li 2016).

    estimate = (1/n) sum_i sum_t gamma^t (rho_{i,0:t} (r_{i,t} - q_hat_{i,t})
    + rho_{i,0:t-1} v_hat_{i,t}), with rho_{i,0:-1} = 1. The model terms form a
    control variate of mean zero as long as v_hat(s) = sum_a pi(a|s) q_hat(s, a),
    so the estimate stays unbiased however wrong q_hat is, and its variance falls
    as q_hat improves; a v_hat not matched to q_hat biases it. With
    q_hat = v_hat = 0 it equals ``per_decision_is`` exactly.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b``, ``q_hat`` (model
        value of the logged state and action under the target, USD), ``v_hat``
        (model value of the state under the target, sum_a pi(a|s) q(s, a), USD)
        and optionally ``group``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        As ``per_decision_is``.
    """
    return _estimate_frame(*_doubly_robust_terms(steps, gamma))


def _visit_values(steps: pl.DataFrame, gamma: float, first_only: bool) -> pl.DataFrame:
    s = _prepare(steps, _STEP_COLUMNS + ("state_key",), gamma)
    if (s.discount == 0.0).any():
        raise EstimatorInputError("gamma ** t underflows to 0 in these episodes; use a gamma closer to 1")
    discounted = s.discount * s.reward
    after = _episode_sum(discounted, s)[s.episode] - _segment_cumsum(discounted, s) + discounted
    frame = pl.DataFrame(
        {
            "group": s.labels.gather(s.group[s.episode]),
            "state_key": steps["state_key"],
            "episode": s.episode,
            "return_to_go": after / s.discount,
        }
    )
    if first_only:
        frame = frame.filter(pl.struct("episode", "state_key").is_first_distinct())
    return (
        frame.group_by("group", "state_key")
        .agg(
            value=pl.col("return_to_go").mean(),
            visits=pl.len().cast(pl.Int64),
            n_episodes=pl.col("episode").n_unique().cast(pl.Int64),
        )
        .sort("group", "state_key")
    )


def first_visit_mc(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """First-visit Monte Carlo state values (Sutton and Barto 2018, section 5.1).

    Averages, per state, the return that follows its first visit in each
    episode; an unbiased estimate of the logging policy's state value.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``state_key`` and optionally
        ``group``, logged by the policy being evaluated (``pi`` and ``b`` are
        not used).
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        One row per (group, state_key), sorted: ``group``, ``state_key``,
        ``value`` (mean return from the state on, USD), ``visits`` (returns
        averaged) and ``n_episodes`` (episodes that visit the state).
    """
    return _visit_values(steps, gamma, first_only=True)


def every_visit_mc(steps: pl.DataFrame, gamma: float = 1.0) -> pl.DataFrame:
    """Every-visit Monte Carlo state values (Sutton and Barto 2018, section 5.1).

    Averages, per state, the return that follows every visit to it; biased
    for finite samples when states recur, but consistent.

    Parameters
    ----------
    steps : polars.DataFrame
        As for ``first_visit_mc``.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1]; 1 is undiscounted.

    Returns
    -------
    polars.DataFrame
        As ``first_visit_mc``; ``visits`` counts every visit.
    """
    return _visit_values(steps, gamma, first_only=False)


_TERMS: dict[str, Callable[[pl.DataFrame, float], tuple[_Steps, _Terms]]] = {
    "on_policy_value": _on_policy_terms,
    "ordinary_is": _ordinary_is_terms,
    "weighted_is": _weighted_is_terms,
    "per_decision_is": _per_decision_is_terms,
    "weighted_per_decision_is": _weighted_per_decision_is_terms,
    "doubly_robust": _doubly_robust_terms,
}


# ---------------------------------------------------------------- uncertainty


def _terms_builder(estimator: Callable | str) -> Callable[[pl.DataFrame, float], tuple[_Steps, _Terms]]:
    name = estimator if isinstance(estimator, str) else getattr(estimator, "__name__", repr(estimator))
    if name not in _TERMS or not (isinstance(estimator, str) or estimator is globals()[name]):
        raise EstimatorInputError(f"estimator {name!r} cannot be bootstrapped; use one of {sorted(_TERMS)}")
    return _TERMS[name]


def _paired_values(s: _Steps, terms: _Terms, base: _Terms | None, multiplicity: np.ndarray) -> np.ndarray:
    """Replicate estimates (B, n_groups), minus the behaviour value on the same draw when ``base``."""
    values = _evaluate(terms, s, multiplicity)
    return values if base is None else values - _evaluate(base, s, multiplicity)


def bootstrap_interval(
    steps: pl.DataFrame,
    estimator: Callable | str = weighted_is,
    *,
    savings: bool = False,
    level: float = 0.95,
    n_replicates: int = 1000,
    seed: int | np.random.Generator = 0,
    gamma: float = 1.0,
) -> pl.DataFrame:
    """Percentile bootstrap interval over episodes, for every group at once.

    Each replicate gives every episode an independent Poisson(1) multiplicity
    (the Poisson bootstrap), so replicates of all groups come from one
    (n_replicates, n_episodes) draw without resampling the frame. Episodes,
    not steps, are resampled: steps of one episode are dependent.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), as the chosen estimator needs them.
    estimator : callable or str, default weighted_is
        One of this module's estimators (``on_policy_value``, ``ordinary_is``,
        ``weighted_is``, ``per_decision_is``, ``weighted_per_decision_is``,
        ``doubly_robust``), or its name.
    savings : bool, default False
        If true, the interval is for savings = target estimate minus the
        on-policy value of the logging policy (average return of the logged
        episodes), both computed on the same resampled episodes so that their
        correlation narrows the interval. Savings are positive when the target
        costs less (rewards are negative costs).
    level : float, default 0.95
        Two-sided coverage in (0, 1); the interval runs between the
        (1 - level) / 2 and (1 + level) / 2 quantiles of the replicates.
    n_replicates : int, default 1000
        Bootstrap replicates.
    seed : int or numpy.random.Generator, default 0
        Seed or generator for the Poisson draws; the same seed gives the same
        interval.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1].

    Returns
    -------
    polars.DataFrame
        One row per group: ``group``, ``estimate`` (point estimate on all
        episodes, USD per episode), ``ci_low``, ``ci_high`` (USD per episode)
        and ``level``. Replicates with no episode of non-zero weight are left
        out of the quantiles; a group with none left has NaN bounds.
    """
    level = _check_level(level)
    labels, point, replicates = bootstrap_replicates(
        steps, estimator, savings=savings, n_replicates=n_replicates, seed=seed, gamma=gamma
    )
    return percentile_interval(labels, point, replicates, level)


def percentile_interval(
    labels: np.ndarray, point: np.ndarray, replicates: np.ndarray, level: float = 0.95
) -> pl.DataFrame:
    """Percentile interval per group from bootstrap replicates of shape (n_replicates, n_groups).

    Replicates that are NaN (no episode of non-zero weight) are left out; a group
    with none left has NaN bounds.
    """
    level = _check_level(level)
    n_groups = replicates.shape[1]
    low = np.full(n_groups, np.nan)
    high = np.full(n_groups, np.nan)
    usable = ~np.isnan(replicates).all(axis=0)
    if usable.any():
        tail = (1.0 - level) / 2.0
        quantiles = np.nanquantile(replicates[:, usable], [tail, 1.0 - tail], axis=0)
        low[usable], high[usable] = quantiles[0], quantiles[1]
    return pl.DataFrame(
        {
            "group": labels,
            "estimate": point,
            "ci_low": low,
            "ci_high": high,
            "level": np.full(n_groups, level),
        }
    )


def bootstrap_replicates(
    steps: pl.DataFrame,
    estimator: Callable | str = weighted_is,
    *,
    savings: bool = False,
    n_replicates: int = 1000,
    seed: int | np.random.Generator = 0,
    gamma: float = 1.0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Point estimates and Poisson-bootstrap replicates of an estimator, per group.

    The same draws as ``bootstrap_interval`` (which summarises them); use this to
    combine groups (e.g. strata) replicate by replicate before taking quantiles.

    Returns
    -------
    labels : numpy.ndarray, shape (n_groups,)
    point : numpy.ndarray, shape (n_groups,)
        Estimate (or savings) on all episodes, USD per episode.
    replicates : numpy.ndarray, shape (n_replicates, n_groups)
        NaN where a replicate has no episode of non-zero weight in the group.
    """
    build = _terms_builder(estimator)
    if not (isinstance(n_replicates, int | np.integer) and n_replicates >= 2):
        raise EstimatorInputError(f"n_replicates must be an integer >= 2, got {n_replicates!r}")
    s, terms = build(steps, gamma)
    # Sorted once here so every chunk of replicates sums contiguous segments without re-sorting.
    terms = _in_key_order(terms, s)
    base = _in_key_order(_on_policy_terms(steps, gamma)[1], s) if savings else None
    rng = np.random.default_rng(seed)
    point = _paired_values(s, terms, base, np.ones((1, s.n_episodes)))[0]

    entries = terms.episode.size + (0 if terms.carry is None else terms.carry[0].size) + s.n_episodes
    chunk = max(1, _CHUNK_ENTRIES // entries)
    replicates = np.empty((n_replicates, s.n_groups))
    # Loop over chunks of replicates only, to bound memory; episodes stay vectorised.
    for first in range(0, n_replicates, chunk):
        rows = min(chunk, n_replicates - first)
        multiplicity = rng.poisson(1.0, size=(rows, s.n_episodes)).astype(np.float64)
        replicates[first : first + rows] = _paired_values(s, terms, base, multiplicity)

    return s.labels, point, replicates


def refit_weighted_is_replicates(
    steps: pl.DataFrame, multiplicity: np.ndarray, behavior: np.ndarray, *, savings: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """Bootstrap replicates of weighted IS where every replicate brings its own behaviour model.

    When the behaviour probabilities are estimated from the same episodes, a
    bootstrap that keeps them fixed leaves their estimation error out of the
    interval. Here each replicate r has episode multiplicities ``multiplicity[r]``
    and the behaviour probabilities ``behavior[r]`` re-estimated on that resample,
    and weighted IS (and the paired on-policy value) is recomputed from both.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps sorted by (episode_id, t) with ``episode_id``, ``t``,
        ``reward`` (USD), ``pi`` and optionally ``group``.
    multiplicity : numpy.ndarray, shape (n_replicates, n_episodes)
        Episode multiplicities, episodes in frame order.
    behavior : numpy.ndarray, shape (n_replicates, n_steps)
        Behaviour probability of each logged action in each replicate, all > 0.

    Returns
    -------
    labels : numpy.ndarray, shape (n_groups,)
    replicates : numpy.ndarray, shape (n_replicates, n_groups)
        Savings (or values, when ``savings`` is false), USD per episode; NaN where
        a replicate has no weight in a group.
    """
    s = _prepare(steps, ("episode_id", "t", "reward", "pi"), 1.0)
    pi = steps["pi"].to_numpy().astype(np.float64)
    behavior = np.asarray(behavior, dtype=np.float64)
    multiplicity = np.asarray(multiplicity, dtype=np.float64)
    if behavior.shape[1:] != pi.shape or multiplicity.shape != (behavior.shape[0], s.n_episodes):
        raise EstimatorInputError(
            f"behavior must be (n_replicates, {pi.size}) and multiplicity (n_replicates, {s.n_episodes})"
        )
    if not (behavior > 0).all():
        raise EstimatorInputError("re-estimated behaviour probabilities must all be > 0")
    positive = pi > 0
    log_ratio = np.where(positive, np.log(np.where(positive, pi, 1.0)), -np.inf) - np.log(behavior)
    log_rho = np.add.reduceat(log_ratio, s.starts, axis=1)
    rho = np.exp(np.minimum(log_rho, _MAX_LOG_WEIGHT))
    episode_return = np.add.reduceat(s.reward, s.starts)
    member = np.zeros((s.n_episodes, s.n_groups))
    member[np.arange(s.n_episodes), s.group] = 1.0
    weight = multiplicity * rho
    with np.errstate(invalid="ignore", divide="ignore"):
        value = ((weight * episode_return) @ member) / (weight @ member)
        if savings:
            value = value - ((multiplicity * episode_return) @ member) / (multiplicity @ member)
    return np.asarray(s.labels), value


def _clipped_moments(
    x: np.ndarray, group: np.ndarray, n_groups: int, clip: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Count, mean and unbiased variance of min(x, c) per group for each threshold.

    ``x`` (m,), ``group`` (m,), ``clip`` (n_groups, J); returns (n_groups,),
    (n_groups, J), (n_groups, J), NaN where a group has too few values.
    """
    columns = clip.shape[1]
    y = np.minimum(x[:, None], clip[group])
    key = group[:, None] * columns + np.arange(columns)[None, :]
    first = np.bincount(key.ravel(), weights=y.ravel(), minlength=n_groups * columns)
    second = np.bincount(key.ravel(), weights=(y * y).ravel(), minlength=n_groups * columns)
    count = np.bincount(group, minlength=n_groups).astype(np.float64)
    n = count[:, None]
    mean = np.divide(first.reshape(n_groups, columns), n, out=np.full(clip.shape, np.nan), where=n > 0)
    spread = second.reshape(n_groups, columns) - n * np.nan_to_num(mean) ** 2
    variance = np.divide(spread, n - 1.0, out=np.full(clip.shape, np.nan), where=n > 1)
    return count, mean, np.maximum(variance, 0.0)


def _bernstein_lower(
    mean: np.ndarray, variance: np.ndarray, clip: np.ndarray, n: np.ndarray, log_term: float
) -> np.ndarray:
    """Maurer-Pontil lower bound on E[min(X, c)] from n samples; NaN where n < 2."""
    n = np.broadcast_to(n, mean.shape).astype(np.float64)
    enough = n > 1
    safe_n = np.where(enough, n, 2.0)
    bound = mean - np.sqrt(2.0 * variance * log_term / safe_n) - 7.0 * clip * log_term / (3.0 * (safe_n - 1))
    return np.where(enough, bound, np.nan)


def lower_bound(
    steps: pl.DataFrame,
    *,
    return_bounds: tuple[float, float],
    savings: bool = False,
    level: float = 0.95,
    clip: float | None = None,
    split: float = 0.2,
    seed: int | np.random.Generator = 0,
    gamma: float = 1.0,
) -> pl.DataFrame:
    """High-confidence lower bound on the target value, or on savings, per group.

    In the spirit of Thomas, Theocharous and Ghavamzadeh (2015, "High confidence
    off-policy evaluation"): per-episode importance-weighted returns, scaled
    into [0, 1] with known return bounds, clipped at a threshold c and fed to an
    empirical Bernstein inequality.

    Per episode i, with G_i its discounted return and (low, high) =
    ``return_bounds``, let z_i = (G_i - low) / (high - low) in [0, 1] and

    * value:   X_i = rho_i z_i,                E[X] = (v_pi - low) / (high - low);
    * savings: X_i = rho_i z_i + (1 - z_i),    E[X] = 1 + (v_pi - v_b) / (high - low),

    where rho_i = prod_t pi/b and v_b is the logging policy's value. Both are
    non-negative with unbounded range. Clipping rule: Y_i = min(X_i, c); since
    Y_i <= X_i, any lower bound on E[Y] is one on E[X], whatever c, as long as c
    does not depend on the episodes the bound is computed from.

    Inequality (Maurer and Pontil 2009, Theorem 4, applied to Y / c in [0, 1]):
    for n independent Y_i in [0, c], with probability at least 1 - delta,

        E[Y] >= mean(Y) - sqrt(2 S^2 ln(2 / delta) / n) - 7 c ln(2 / delta) / (3 (n - 1)),

    with S^2 the unbiased sample variance of Y and delta = 1 - level. Thomas et
    al. derive their inequality from this one, allowing a threshold per
    episode; here one threshold serves a whole group. As in their method, c is
    chosen on a random held-out share ``split`` of each group's episodes (the
    threshold on a grid that maximises the bound predicted for the remaining
    episodes' count) and the bound is computed on the remaining episodes only.
    The value bound is at least ``low`` and the savings bound at least
    low - high (the trivial bounds).

    Assumptions: episodes are independent; every episode's return lies in
    ``return_bounds`` under both policies (e.g. horizon x per-step reward
    bounds); ``b`` is the true logging probability. When ``b`` comes from a
    fitted behaviour model the guarantee holds only as far as that model does.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``reward`` (USD), ``pi``, ``b`` and optionally
        ``group``.
    return_bounds : tuple of float
        (low, high): known bounds on any episode's discounted return, USD.
    savings : bool, default False
        Bound v_pi - v_b instead of v_pi.
    level : float, default 0.95
        Confidence 1 - delta, in (0, 1).
    clip : float, optional
        Fixed threshold c on the scaled X (>0). If given, no episodes are held
        out and c is used for all of them.
    split : float, default 0.2
        Share of each group's episodes held out to choose c, in (0, 1).
    seed : int or numpy.random.Generator, default 0
        Seed or generator for the held-out split.
    gamma : float, default 1.0
        Discount per decision step, in (0, 1].

    Returns
    -------
    polars.DataFrame
        One row per group: ``group``, ``lower_bound`` (USD per episode),
        ``level``, ``n_episodes``, ``n_bound_episodes`` (episodes the bound
        uses) and ``clip_threshold`` (c, in the scaled units of X).
    """
    level = _check_level(level)
    s, w = _weighted_steps(steps, gamma)
    low, high = (float(v) for v in return_bounds)
    if not (np.isfinite(low) and np.isfinite(high) and low < high):
        raise EstimatorInputError(
            f"return_bounds must be finite (low, high) with low < high, got {return_bounds}"
        )
    returns = _returns(s)
    slack = 1e-9 * (high - low)
    outside = np.flatnonzero((returns < low - slack) | (returns > high + slack))
    if outside.size:
        i = int(outside[0])
        raise EstimatorInputError(
            f"{outside.size} episode return(s) fall outside return_bounds {return_bounds}, first "
            f"{returns[i]:.4g} USD (episode code {i}); widen the bounds, they must hold for every episode"
        )
    z = np.clip((returns - low) / (high - low), 0.0, 1.0)
    rho = w[s.ends]
    x = rho * z + (1.0 - z) if savings else rho * z
    # A threshold no lower than the largest possible mean keeps c sensible when it cannot be tuned.
    default_clip = 2.0 if savings else 1.0
    log_term = float(np.log(2.0 / (1.0 - level)))
    n_groups = s.n_groups
    count = np.bincount(s.group, minlength=n_groups)

    if clip is not None:
        if not (isinstance(clip, int | float) and clip > 0):
            raise EstimatorInputError(f"clip must be a positive threshold, got {clip!r}")
        threshold = np.full(n_groups, float(clip))
        held_out = np.zeros(s.n_episodes, dtype=bool)
    else:
        if not (isinstance(split, int | float) and 0.0 < split < 1.0):
            raise EstimatorInputError(f"split must be a share in (0, 1), got {split!r}")
        rng = np.random.default_rng(seed)
        order = np.lexsort((rng.random(s.n_episodes), s.group))
        rank = np.empty(s.n_episodes, dtype=np.int64)
        rank[order] = np.arange(s.n_episodes) - (np.cumsum(count) - count)[s.group[order]]
        n_held = np.floor(split * count).astype(np.int64)
        held_out = rank < n_held[s.group]
        largest = np.full(n_groups, default_clip)
        np.maximum.at(largest, s.group[held_out], x[held_out])
        grid = largest[:, None] * _CLIP_GRID[None, :]
        _, mean, variance = _clipped_moments(x[held_out], s.group[held_out], n_groups, grid)
        predicted = _bernstein_lower(mean, variance, grid, (count - n_held)[:, None], log_term)
        tuned = ~np.isnan(predicted).all(axis=1)
        best = np.argmax(np.where(np.isnan(predicted), -np.inf, predicted), axis=1)
        threshold = np.where(tuned, grid[np.arange(n_groups), best], default_clip)

    used = ~held_out
    n_used, mean, variance = _clipped_moments(x[used], s.group[used], n_groups, threshold[:, None])
    bound = _bernstein_lower(mean, variance, threshold[:, None], n_used[:, None], log_term)[:, 0]
    bound = np.maximum(np.nan_to_num(bound, nan=0.0), 0.0)
    usd = (high - low) * (bound - 1.0) if savings else low + (high - low) * bound
    return pl.DataFrame(
        {
            "group": s.labels,
            "lower_bound": usd,
            "level": np.full(n_groups, level),
            "n_episodes": count.astype(np.int64),
            "n_bound_episodes": n_used.astype(np.int64),
            "clip_threshold": threshold,
        }
    )


def diagnostics(steps: pl.DataFrame) -> pl.DataFrame:
    """Importance-weight and support diagnostics per group.

    A step has a support problem when the target may take the logged action
    (pi > 0) but the behaviour model gives it no probability (b == 0 or b
    missing): its importance weight is undefined and every estimator here would
    refuse the frame. Episodes with such a step are counted and left out of the
    weight statistics.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, shape (n_steps, ...), sorted by (episode_id, t), with
        ``episode_id``, ``t``, ``pi``, ``b`` (may be null) and optionally ``group``.

    Returns
    -------
    polars.DataFrame
        One row per group: ``group``, ``n_episodes``, ``ess`` and
        ``max_weight_share`` of the trajectory weights rho_i = prod_t pi/b,
        ``weight_mean`` and ``weight_max`` (of rho over supported episodes;
        under correct support the mean is near 1), ``n_unsupported_steps``,
        ``n_unsupported_episodes`` and ``n_nonzero_weight_episodes``.
    """
    s = _prepare(steps, ("episode_id", "t", *_PROB_COLUMNS), 1.0, nullable=("b",))
    pi = steps["pi"].to_numpy().astype(np.float64)
    b = steps["b"].to_numpy().astype(np.float64)
    _check_range(pi, "pi", "target", allow_zero=True)
    missing = np.isnan(b)
    _check_range(np.where(missing, 1.0, b), "b", "behaviour", allow_zero=True)
    unsupported = (pi > 0.0) & (missing | (b == 0.0))
    w = _cumulative_weights(pi, np.where(unsupported | missing, 1.0, b), s)
    bad_episode = _episode_sum(unsupported.astype(np.float64), s) > 0
    supported = ~bad_episode
    rho = np.where(supported, w[s.ends], 0.0)

    n_groups = s.n_groups
    total, ess, share = _weight_summary(rho, s.group, n_groups)
    n_supported = np.bincount(s.group, weights=supported, minlength=n_groups)
    largest = np.zeros(n_groups)
    np.maximum.at(largest, s.group, rho)
    mean = np.divide(total, n_supported, out=np.full(n_groups, np.nan), where=n_supported > 0)
    return pl.DataFrame(
        {
            "group": s.labels,
            "n_episodes": np.bincount(s.group, minlength=n_groups).astype(np.int64),
            "ess": ess,
            "max_weight_share": share,
            "weight_mean": mean,
            "weight_max": np.where(n_supported > 0, largest, np.nan),
            "n_unsupported_steps": np.bincount(
                s.group[s.episode], weights=unsupported, minlength=n_groups
            ).astype(np.int64),
            "n_unsupported_episodes": np.bincount(s.group, weights=bad_episode, minlength=n_groups).astype(
                np.int64
            ),
            "n_nonzero_weight_episodes": np.bincount(s.group, weights=rho > 0, minlength=n_groups).astype(
                np.int64
            ),
        }
    )
