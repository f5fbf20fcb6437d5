"""Poisson-bootstrap replicates and percentile intervals of the importance-sampling estimators."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import polars as pl

from pipeline.estimators._steps import _MAX_LOG_WEIGHT, EstimatorInputError, _check_level, _prepare, _Steps
from pipeline.estimators.importance_sampling import (
    _evaluate,
    _in_key_order,
    _on_policy_terms,
    _Terms,
    weighted_is,
)
from pipeline.estimators.registry import terms_of

# Bootstrap work per chunk, replicates x entries: about 32 MB of float64 per temporary array.
_CHUNK_ENTRIES = 1 << 22


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
        A registered estimator that can be bootstrapped (``on_policy_value``,
        ``ordinary_is``, ``weighted_is``, ``per_decision_is``,
        ``weighted_per_decision_is``, ``doubly_robust``; see ``REGISTRY``), or its name.
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
    build = terms_of(estimator)
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
