"""Importance-sampling estimators of a target policy's value, and the on-policy value beside them.

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

from pipeline.estimators._steps import (
    _PROB_COLUMNS,
    _STEP_COLUMNS,
    EstimatorInputError,
    _by_decision,
    _checked_probabilities,
    _cumulative_weights,
    _discounted,
    _episode_sum,
    _group_counts,
    _group_sums,
    _prepare,
    _previous_weights,
    _products_stay_normal,
    _ratios_by_decision,
    _returns,
    _row_cumprod,
    _row_sums,
    _Steps,
    _weight_summary,
    _weighted_episodes,
    _weighted_steps,
)

_MODEL_COLUMNS = ("q_hat", "v_hat")


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


TermsBuilder = Callable[[pl.DataFrame, float], tuple[_Steps, _Terms]]
"""Builds an estimator's numerator and denominator entries from steps and a discount."""


# ---------------------------------------------------------------- estimator terms


def _scalar_terms(numerator: np.ndarray, denominator: np.ndarray, weights: np.ndarray) -> _Terms:
    """One entry per episode in a single cell: sum_i u_i a_i / sum_i u_i c_i."""
    n = numerator.size
    return _Terms(np.arange(n), np.zeros(n, dtype=np.int64), numerator, denominator, 1, weights)


def _on_policy_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s = _prepare(steps, _STEP_COLUMNS, gamma)
    ones = np.ones(s.n_episodes)
    return s, _scalar_terms(_returns(s), ones, ones)


def _ordinary_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, rho = _weighted_episodes(steps, gamma)
    return s, _scalar_terms(rho * _returns(s), np.ones(s.n_episodes), rho)


def _weighted_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, rho = _weighted_episodes(steps, gamma)
    return s, _scalar_terms(rho * _returns(s), rho, rho)


def _per_decision_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s = _prepare(steps, _STEP_COLUMNS + _PROB_COLUMNS, gamma)
    pi, b, ranges = _checked_probabilities(steps)
    # The products and sums of the doubly robust term with a zero model, in the same order, so
    # the two agree bit for bit whichever layout each uses.
    if s.by_decision is not None and _products_stay_normal(s, ranges):
        w = _row_cumprod(_ratios_by_decision(pi, b, s))
        step_terms = w * _by_decision(s.reward, s, 0.0)
        if gamma != 1.0:
            step_terms *= np.power(gamma, np.arange(w.shape[0], dtype=np.float64))[:, None]
        return s, _scalar_terms(_row_sums(step_terms), np.ones(s.n_episodes), w[-1])
    w = _cumulative_weights(pi, b, s, ranges)
    per_episode = _episode_sum(_discounted(w * s.reward, s), s)
    return s, _scalar_terms(per_episode, np.ones(s.n_episodes), w[s.ends])


def _weighted_per_decision_is_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma)
    n_cells = int(s.lengths.max())
    # An ended episode keeps its final weight in later denominators (it sits in an absorbing
    # state with reward 0); dropping it would estimate E[r_t | still running] instead.
    ended = s.lengths < n_cells
    carry = (np.flatnonzero(ended), s.lengths[ended], w[s.ends][ended])
    terms = _Terms(s.episode, s.t, _discounted(w * s.reward, s), w, n_cells, w[s.ends], carry)
    return s, terms


def _doubly_robust_terms(steps: pl.DataFrame, gamma: float) -> tuple[_Steps, _Terms]:
    s, w = _weighted_steps(steps, gamma, _MODEL_COLUMNS)
    q_hat = steps["q_hat"].to_numpy().astype(np.float64, copy=False)
    v_hat = steps["v_hat"].to_numpy().astype(np.float64, copy=False)
    for name, values in (("q_hat", q_hat), ("v_hat", v_hat)):
        if not np.isfinite(values.sum()):  # a finite sum has no NaN or infinite term
            raise EstimatorInputError(f"column {name!r} has non-finite values; refit the Q model")
    step_terms = _discounted(w * (s.reward - q_hat) + _previous_weights(w, s) * v_hat, s)
    return s, _scalar_terms(_episode_sum(step_terms, s), np.ones(s.n_episodes), w[s.ends])


def _entry_keys(terms: _Terms, s: _Steps) -> tuple[np.ndarray, np.ndarray]:
    """(group, cell) key of each entry and of each carried entry."""
    key = s.group[terms.episode] * terms.n_cells + terms.cell
    carry_key = np.empty(0, dtype=np.int64)
    if terms.carry is not None:
        carry_key = s.group[terms.carry[0]] * terms.n_cells + terms.carry[1]
    return key, carry_key


def _sums(terms: _Terms, s: _Steps) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator sums per group and cell, every episode once: (1, n_groups, n_cells).

    Carried entries are already added into the later cells' denominators, so sums over
    disjoint sets of episodes add up.
    """
    n_cells, n_groups = terms.n_cells, s.n_groups
    n_keys = n_groups * n_cells
    # With a single key (one group, one cell) every entry sums into it: no keys to build.
    key, carry_key = _entry_keys(terms, s) if n_keys > 1 else (None, None)
    # Every multiplicity is 1: entries are summed by key in any order, with no sort.
    numerator = _group_sums(terms.numerator, key, n_keys).reshape(1, n_groups, n_cells)
    denominator = _group_sums(terms.denominator, key, n_keys).reshape(1, n_groups, n_cells)
    if terms.carry is not None:
        carried = _group_sums(terms.carry[2], carry_key, n_keys).reshape(1, n_groups, n_cells)
        denominator += np.cumsum(carried, axis=2)
    return numerator, denominator


# Bytes of float64 multiplicities one block of groups may gather at a time (bounds memory).
_BLOCK_BYTES = 1 << 25


@dataclass(frozen=True)
class _GroupBlocks:
    """An estimator's entries as one row per episode, laid out group by group for matrix products.

    Each episode's numerator and denominator entries per cell form a row of ``values``
    (n_episodes + 1, 2 * n_cells; carried entries already in the later cells' denominators;
    the extra last row is zeros). Groups are taken in blocks of similar size, each group's
    episodes padded with that zero row to the block's largest group, so the sums of a
    block's groups for every replicate are one stacked matrix product
    (``numpy.matmul``), with no pass over the entries per replicate.
    """

    values: np.ndarray
    n_groups: int
    n_cells: int
    blocks: tuple[tuple[np.ndarray, np.ndarray], ...]
    """Per block: its groups (g,) and their episodes (g, width), padded with n_episodes."""

    @classmethod
    def of(cls, terms: _Terms, s: _Steps, n_replicates: int) -> _GroupBlocks:
        n_episodes, n_cells = s.n_episodes, terms.n_cells
        values = np.zeros((n_episodes + 1, 2 * n_cells))
        cell = terms.episode * n_cells + terms.cell
        size = n_episodes * n_cells
        values[:-1, :n_cells] = np.bincount(cell, terms.numerator, size).reshape(n_episodes, n_cells)
        values[:-1, n_cells:] = np.bincount(cell, terms.denominator, size).reshape(n_episodes, n_cells)
        if terms.carry is not None:
            episode, at, value = terms.carry
            carried = np.bincount(episode * n_cells + at, value, size).reshape(n_episodes, n_cells)
            values[:-1, n_cells:] += np.cumsum(carried, axis=1)
        # Episodes in group order, and the groups from largest to smallest so blocks pad little.
        count = np.bincount(s.group, minlength=s.n_groups)
        by_group = np.argsort(s.group, kind="stable")
        start = np.cumsum(count) - count
        order = np.argsort(-count, kind="stable")
        budget = max(1, _BLOCK_BYTES // (8 * max(1, n_replicates)))
        blocks, i = [], 0
        while i < order.size:
            width = int(count[order[i]])
            groups = order[i : i + max(1, budget // max(1, width))]
            position = np.arange(width)
            rows = start[groups][:, None] + position[None, :]
            inside = position[None, :] < count[groups][:, None]
            episodes = np.where(inside, by_group[np.minimum(rows, n_episodes - 1)], n_episodes)
            blocks.append((groups, episodes))
            i += groups.size
        return cls(values, s.n_groups, n_cells, tuple(blocks))

    def replicate(self, multiplicity: np.ndarray, numerator: np.ndarray, denominator: np.ndarray) -> None:
        """Sums into ``numerator`` and ``denominator`` (B, n_groups, n_cells) for each row of episode
        ``multiplicity`` (B, n_episodes)."""
        rows, n_cells = multiplicity.shape[0], self.n_cells
        # Episodes along the first axis, with a zero column for the padding episode.
        per_episode = np.zeros((multiplicity.shape[1] + 1, rows), dtype=multiplicity.dtype)
        per_episode[:-1] = multiplicity.T
        sums = np.empty((self.n_groups, 2 * n_cells, rows))
        for groups, episodes in self.blocks:
            u = per_episode[episodes].astype(np.float64)  # (g, width, B)
            sums[groups] = np.matmul(self.values[episodes].transpose(0, 2, 1), u)
        numerator[...] = sums[:, :n_cells].transpose(2, 0, 1)
        denominator[...] = sums[:, n_cells:].transpose(2, 0, 1)


def _ratios(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """Estimates (B, n_groups) from sums (B, n_groups, n_cells): the sum over cells of their ratios.

    A group whose denominator is zero in some cell, i.e. no episode with non-zero weight, gets NaN.
    """
    positive = denominator > 0.0
    ratio = np.divide(numerator, denominator, out=np.zeros_like(numerator), where=positive)
    return np.where(positive.all(axis=2), ratio.sum(axis=2), np.nan)


def _evaluate(terms: _Terms, s: _Steps) -> np.ndarray:
    """The point estimate per group, shape (1, n_groups); NaN where a group has no weight in some cell."""
    return _ratios(*_sums(terms, s))


def _estimate_frame(s: _Steps, terms: _Terms) -> pl.DataFrame:
    _, ess, share = _weight_summary(terms.weights, s.group, s.n_groups)
    # From named series: a dict of arrays costs polars more per call.
    return pl.DataFrame(
        [
            s.labels,
            pl.Series("estimate", _evaluate(terms, s)[0]),
            pl.Series("n_episodes", _group_counts(s.group, s.n_groups)),
            pl.Series("ess", ess),
            pl.Series("max_weight_share", share),
        ]
    )


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
