"""A high-confidence lower bound on a target policy's value or savings."""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.estimators._steps import EstimatorInputError, _check_level, _returns, _weighted_episodes

# Clipping thresholds tried per group, as fractions of the largest held-out weighted return.
_CLIP_GRID = np.geomspace(1e-3, 1.0, 48)


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
    s, rho = _weighted_episodes(steps, gamma)
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
