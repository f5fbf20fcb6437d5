"""The safety test's bound: high-confidence off-policy evaluation (Thomas, Theocharous and Ghavamzadeh 2015).

A learned policy is proposed only if, on episodes it never saw, a one-sided lower
bound at the configured confidence on its improvement over the residents' own
behaviour is above zero. The bound is Theorem 1 of Thomas, Theocharous and
Ghavamzadeh, "High confidence off-policy evaluation", AAAI 2015:

    For n independent X_i >= 0 with E[X_i] <= mu, thresholds c_i > 0 fixed in advance,
    Y_i = min(X_i, c_i) and delta in (0, 1), with probability at least 1 - delta

        mu >= K * [ sum_i Y_i / c_i
                    - 7 n ln(2 / delta) / (3 (n - 1))
                    - sqrt( ln(2 / delta) / (n - 1) * sum_{i,j} (Y_i / c_i - Y_j / c_j) ** 2 ) ],

        K = (sum_i 1 / c_i) ** -1.

With one threshold c for all it is Maurer and Pontil's (2009) empirical Bernstein
bound on the truncated mean, mean(Y) - sqrt(2 S^2 ln(2/delta) / n) - 7 c ln(2/delta)
/ (3 (n - 1)), S^2 the unbiased sample variance of Y (``bounds._bernstein_lower``).
Truncation only lowers the mean, so the bound holds for any c chosen without the
episodes it is computed on. As in the paper, c is chosen on a small first part of
the data, D_pre (1/20 of the episodes), to maximise the bound the rest, D_post,
would give (the formula above with D_pre's mean and variance and D_post's count),
and the bound is then computed on D_post alone. Here D_pre is the *earliest* 1/20
of each group's episodes, so the split is by time and every bound episode comes
after the ones that shaped it.

What is bounded (per episode i, return G_i, importance weight rho_i = prod_t pi/b,
and a stated return range (low, high) that every episode's return lies in under any
policy the test can see, so z_i = (G_i - low) / (high - low) in [0, 1]):

* value:        X_i = rho_i z_i,              E[X] = (v_pi - low) / (high - low);
* improvement:  X_i = 1 + (rho_i - 1) z_i,    E[X] = 1 + (v_pi - v_b) / (high - low).

Both are >= 0 (rho >= 0, z <= 1). The improvement uses per-episode paired
differences rather than a value bound minus an upper bound on the residents' own
mean: since E_b[rho] = 1 when the behaviour covers the target, rho - 1 has mean
zero, so (rho_i - 1) z_i is an unbiased per-episode estimate of the scaled
improvement (the control-variate identity behind per-decision and doubly robust
estimators, e.g. Jiang and Li 2016), and one inequality at level delta does the
work of two at delta / 2 (Thomas et al.'s high-confidence policy improvement,
ICML 2015, compares a bound on the new policy with a known baseline value; here the
baseline is unknown, which would cost the second inequality). Where the target puts
mass the behaviour never takes, E_b[rho z] <= E_pi[z] and the bound stays valid,
only looser. ``tests/test_safety.py`` checks on a known distribution that the
paired form is the tighter of the two.

Assumptions: episodes are independent; the behaviour probabilities ``b`` are the
ones that chose the logged actions (a fitted behaviour model carries its own
error into the guarantee); the return range holds for every episode.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.estimators._steps import EstimatorInputError, _check_level, _returns, _weighted_steps
from pipeline.estimators.bounds import _bernstein_lower, _clipped_moments

PRE_SHARE = 1.0 / 20.0
"""Share of each group's earliest episodes used to choose the truncation level (the paper's 1/20)."""

# Thresholds tried per group, as fractions of the largest X in its D_pre.
_THRESHOLD_GRID = np.geomspace(1e-3, 1.0, 96)


def truncated_bound(x: np.ndarray, c: np.ndarray | float, level: float = 0.95) -> float:
    """Theorem 1 of Thomas, Theocharous and Ghavamzadeh (2015) with thresholds ``c`` (scalar or per X).

    ``x`` (n,) are non-negative; returns the lower bound on their common mean, holding
    with probability ``level`` when ``c`` was fixed without looking at ``x``. NaN when
    n < 2.
    """
    level = _check_level(level)
    x = np.asarray(x, dtype=float)
    if x.ndim != 1 or (x < 0).any() or not np.isfinite(x).all():
        raise EstimatorInputError("x must be a 1-D array of finite, non-negative values")
    c = np.broadcast_to(np.asarray(c, dtype=float), x.shape)
    if not (c > 0).all():
        raise EstimatorInputError("every truncation threshold c must be positive")
    n = x.size
    if n < 2:
        return float("nan")
    log_term = np.log(2.0 / (1.0 - level))
    a = np.minimum(x, c) / c
    # sum_{i,j} (a_i - a_j)^2 = 2 n sum a^2 - 2 (sum a)^2, never negative in exact arithmetic.
    pairs = max(2.0 * n * float(np.sum(a * a)) - 2.0 * float(np.sum(a)) ** 2, 0.0)
    inner = a.sum() - 7.0 * n * log_term / (3.0 * (n - 1)) - np.sqrt(log_term / (n - 1) * pairs)
    return float(inner / np.sum(1.0 / c))


def _time_rank(order: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Rank of each episode within its group by ``order`` (ties in frame order), shape (n_episodes,)."""
    codes = np.unique(order, return_inverse=True)[1].reshape(-1)
    sequence = np.lexsort((np.arange(order.size), codes, group))
    count = np.bincount(group, minlength=n_groups)
    rank = np.empty(order.size, dtype=np.int64)
    rank[sequence] = np.arange(order.size) - (np.cumsum(count) - count)[group[sequence]]
    return rank


def split_bound(
    x: np.ndarray,
    rank: np.ndarray,
    group: np.ndarray,
    n_groups: int,
    *,
    level: float = 0.95,
    pre_share: float = PRE_SHARE,
) -> dict[str, np.ndarray]:
    """The paper's procedure per group: c chosen on D_pre (earliest share), Theorem 1 on D_post.

    ``x`` (m,) non-negative, ``rank`` (m,) position of each X in its group's time
    order, ``group`` (m,) codes 0 .. n_groups - 1. Returns arrays (n_groups,):
    ``bound`` (lower bound on E[X], at least 0, NaN where D_pre or D_post has fewer
    than two episodes), ``threshold`` (c), ``n_pre`` and ``n_post``.
    """
    level = _check_level(level)
    if not (isinstance(pre_share, int | float) and 0.0 < pre_share < 1.0):
        raise EstimatorInputError(f"pre_share must be a share in (0, 1), got {pre_share!r}")
    log_term = float(np.log(2.0 / (1.0 - level)))
    count = np.bincount(group, minlength=n_groups)
    n_pre = np.ceil(pre_share * count).astype(np.int64)
    n_post = count - n_pre
    pre = rank < n_pre[group]
    largest = np.zeros(n_groups)
    np.maximum.at(largest, group[pre], x[pre])
    grid = np.maximum(largest, np.finfo(float).tiny)[:, None] * _THRESHOLD_GRID[None, :]
    _, mean, variance = _clipped_moments(x[pre], group[pre], n_groups, grid)
    predicted = _bernstein_lower(mean, variance, grid, n_post[:, None], log_term)
    best = np.argmax(np.where(np.isnan(predicted), -np.inf, predicted), axis=1)
    threshold = grid[np.arange(n_groups), best]
    _, mean, variance = _clipped_moments(x[~pre], group[~pre], n_groups, threshold[:, None])
    bound = _bernstein_lower(mean, variance, threshold[:, None], n_post[:, None], log_term)[:, 0]
    enough = (n_pre >= 2) & (n_post >= 2)
    return {
        "bound": np.where(enough, np.maximum(bound, 0.0), np.nan),
        "threshold": np.where(enough, threshold, np.nan),
        "n_pre": n_pre,
        "n_post": n_post,
    }


def _bound_frame(
    steps: pl.DataFrame,
    *,
    return_range: tuple[float, float],
    improvement: bool,
    level: float,
    pre_share: float,
    order: str | None,
    gamma: float,
) -> pl.DataFrame:
    level = _check_level(level)
    s, w = _weighted_steps(steps, gamma)
    if order is not None:
        if order not in steps.columns:
            raise EstimatorInputError(f"steps has no column {order!r} to order episodes by time")
        if steps[order].null_count():
            raise EstimatorInputError(f"column {order!r} has {steps[order].null_count()} null value(s)")
    low, high = (float(v) for v in return_range)
    if not (np.isfinite(low) and np.isfinite(high) and low < high):
        raise EstimatorInputError(
            f"return_range must be finite (low, high) with low < high, got {return_range}"
        )
    returns = _returns(s)
    slack = 1e-9 * (high - low)
    outside = np.flatnonzero((returns < low - slack) | (returns > high + slack))
    if outside.size:
        i = int(outside[0])
        raise EstimatorInputError(
            f"{outside.size} episode return(s) fall outside return_range {return_range}, first "
            f"{returns[i]:.4g} (episode_id {steps['episode_id'][int(s.starts[i])]}); the range must "
            "hold for every episode, widen it"
        )
    z = np.clip((returns - low) / (high - low), 0.0, 1.0)
    rho = w[s.ends]
    x = 1.0 + (rho - 1.0) * z if improvement else rho * z
    when = steps[order].to_numpy()[s.starts] if order else np.arange(s.n_episodes)
    rank = _time_rank(when, s.group, s.n_groups)
    out = split_bound(x, rank, s.group, s.n_groups, level=level, pre_share=pre_share)
    scaled = out["bound"]
    usd = (high - low) * (scaled - 1.0) if improvement else low + (high - low) * scaled
    return pl.DataFrame(
        {
            "group": s.labels,
            "lower_bound": usd,
            "level": np.full(s.n_groups, level),
            "n_episodes": np.bincount(s.group, minlength=s.n_groups).astype(np.int64),
            "n_threshold_episodes": out["n_pre"],
            "n_bound_episodes": out["n_post"],
            "threshold": out["threshold"],
            "return_low": np.full(s.n_groups, low),
            "return_high": np.full(s.n_groups, high),
        }
    ).with_columns(pl.col("lower_bound", "threshold").fill_nan(None))


def value_lower_bound(
    steps: pl.DataFrame,
    *,
    return_range: tuple[float, float],
    level: float = 0.95,
    pre_share: float = PRE_SHARE,
    order: str | None = None,
    gamma: float = 1.0,
) -> pl.DataFrame:
    """High-confidence lower bound on the target's value per group (see the module docstring).

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps sorted by (episode_id, t) with ``episode_id``, ``t``,
        ``reward`` (USD), ``pi``, ``b``, optionally ``group`` and the ``order`` column.
    return_range : tuple of float
        (low, high), USD: bounds every episode's discounted return lies in under any
        policy, stated in advance (not read from the episodes bounded).
    level : float, default 0.95
        Confidence 1 - delta.
    pre_share : float, default 1/20
        Share of each group's earliest episodes that choose the truncation level.
    order : str, optional
        Column giving each episode's time (read at its first step), e.g. its start;
        default the frame's episode order.
    gamma : float, default 1.0
        Discount per decision.

    Returns
    -------
    polars.DataFrame
        One row per group: ``group``, ``lower_bound`` (USD per episode, null where a
        part has fewer than two episodes), ``level``, ``n_episodes``,
        ``n_threshold_episodes`` (D_pre), ``n_bound_episodes`` (D_post),
        ``threshold`` (c, in units of the scaled X), ``return_low``, ``return_high``.
    """
    return _bound_frame(
        steps,
        return_range=return_range,
        improvement=False,
        level=level,
        pre_share=pre_share,
        order=order,
        gamma=gamma,
    )


def improvement_lower_bound(
    steps: pl.DataFrame,
    *,
    return_range: tuple[float, float],
    level: float = 0.95,
    pre_share: float = PRE_SHARE,
    order: str | None = None,
    gamma: float = 1.0,
) -> pl.DataFrame:
    """High-confidence lower bound on v_pi - v_b (savings per episode, USD) per group, from paired episodes.

    Same parameters and columns as ``value_lower_bound``; the bound is on the target's
    value minus the logging behaviour's, each episode contributing
    1 + (rho_i - 1) z_i (see the module docstring for why paired).
    """
    return _bound_frame(
        steps,
        return_range=return_range,
        improvement=True,
        level=level,
        pre_share=pre_share,
        order=order,
        gamma=gamma,
    )
