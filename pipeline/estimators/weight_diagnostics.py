"""Importance-weight and support diagnostics, and the Kish effective sample size."""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.estimators._steps import (
    _PROB_COLUMNS,
    EstimatorInputError,
    _check_range,
    _episode_sum,
    _prepare,
    _trajectory_weights,
    _weight_summary,
)


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
    w = _trajectory_weights(pi, np.where(unsupported | missing, 1.0, b), s)
    bad_episode = _episode_sum(unsupported.astype(np.float64), s) > 0
    supported = ~bad_episode
    rho = np.where(supported, w, 0.0)

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
