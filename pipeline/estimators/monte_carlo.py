"""First- and every-visit Monte Carlo state values of the policy that logged the steps."""

from __future__ import annotations

import polars as pl

from pipeline.estimators._steps import (
    _STEP_COLUMNS,
    EstimatorInputError,
    _episode_sum,
    _prepare,
    _segment_cumsum,
)


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
