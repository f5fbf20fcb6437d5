"""Poisson-bootstrap replicates and percentile intervals of the importance-sampling estimators.

**Draws.** Replicate r gives episode e an independent Poisson(1) multiplicity (the Poisson
bootstrap), and that multiplicity depends only on the seed, the episode's id and r: each
episode has its own stream, output r + 1 of a SplitMix64 generator (Steele, Lea and Flood
2014) whose seed is output ``episode_id`` of a SplitMix64 generator seeded from the run's
seed, turned into Poisson(1) by its inverse distribution function. Episode ids carry the
premise's number (``episodes.EPISODES_PER_PREMISE``), so the draws are seeded per premise:
the same whichever other premises, shards or frames an episode is evaluated with.

**Sums that add up.** Every bootstrappable estimator is a sum over cells of ratios of
episode sums (``importance_sampling``), so what a set of episodes contributes to a group is
its numerator and denominator sums, for the point estimate and for every replicate
(``ReplicateSums``). Sums over disjoint sets of episodes add: a shard of premises computes
its premises' sums alone, and cohorts or the portfolio are those sums added up
(``combine_sums``) before any ratio is taken, so the estimate and its interval do not depend
on how many shards there were.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline.estimators._steps import (
    _MAX_LOG_WEIGHT,
    EstimatorInputError,
    _check_level,
    _group_sums,
    _prepare,
    _Steps,
)
from pipeline.estimators.importance_sampling import (
    _GroupBlocks,
    _on_policy_terms,
    _ratios,
    _sums,
    weighted_is,
)
from pipeline.estimators.registry import terms_of

# Bootstrap work per chunk, replicates x entries: about 32 MB of float64 per temporary array.
_CHUNK_ENTRIES = 1 << 22

# SplitMix64 (Steele, Lea and Flood 2014, as in Vigna's reference splitmix64.c).
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
# P(K <= k) for K ~ Poisson(1), k = 0 .. 19; P(K > 19) < 1e-18 is below a 53-bit uniform's resolution.
_POISSON_CDF = np.cumsum(np.exp(-1.0) / np.cumprod(np.r_[1.0, np.arange(1.0, 20.0)]))
_TOP_BITS = 16
_UNDECIDED = 255


def _poisson_by_top_bits() -> np.ndarray:
    """The inverse distribution function's value for each range of uniforms sharing their top 16 bits.

    Ranges that straddle a step of the distribution function hold ``_UNDECIDED``; their
    uniforms are looked up in full, so the table changes nothing but the speed.
    """
    ulp = 2.0**-53
    width = 2.0**-_TOP_BITS
    low = np.arange(2**_TOP_BITS) * width
    first = np.searchsorted(_POISSON_CDF, low, side="right")
    last = np.searchsorted(_POISSON_CDF, low + width - ulp, side="right")
    return np.where(first == last, first, _UNDECIDED).astype(np.uint8)


_POISSON_TABLE = _poisson_by_top_bits()


def _mix(z: np.ndarray) -> np.ndarray:
    """SplitMix64's output function on uint64 values (in place; wraps modulo 2**64 as specified)."""
    z ^= z >> np.uint64(30)
    z *= _MIX1
    z ^= z >> np.uint64(27)
    z *= _MIX2
    z ^= z >> np.uint64(31)
    return z


def splitmix64(seed: int, n: int) -> np.ndarray:
    """The first ``n`` outputs of a SplitMix64 generator seeded with ``seed`` (uint64, shape (n,))."""
    with np.errstate(over="ignore"):
        return _mix(np.uint64(seed % 2**64) + _GOLDEN * np.arange(1, n + 1, dtype=np.uint64))


def seed_key(seed: int | np.random.Generator) -> int:
    """The 64-bit key of the run's draws: one draw from ``numpy.random.default_rng(seed)``.

    An integer seed and a generator made from it give the same key.
    """
    return int(np.random.default_rng(seed).integers(0, 2**64, dtype=np.uint64))


def poisson_multiplicity(
    episode_id: np.ndarray, n_replicates: int, seed: int | np.random.Generator, first: int = 0
) -> np.ndarray:
    """Poisson(1) multiplicities of replicates ``first`` .. ``first + n_replicates - 1`` of each episode.

    Parameters
    ----------
    episode_id : numpy.ndarray, shape (n_episodes,)
        Integer id of each episode; an episode's draws depend only on its id, the seed and
        the replicate number.
    n_replicates : int
        Replicates (rows) to draw.
    seed : int or numpy.random.Generator
        The run's seed (see ``seed_key``).
    first : int, default 0
        Number of the first replicate drawn, so replicates can be drawn in chunks.

    Returns
    -------
    numpy.ndarray, shape (n_replicates, n_episodes), uint8
    """
    key = np.uint64(seed_key(seed))
    ids = np.asarray(episode_id).astype(np.int64).view(np.uint64)
    out = np.empty((n_replicates, ids.size), dtype=np.uint8)
    with np.errstate(over="ignore"):
        # Each episode's own seed: output number episode_id of the run's stream.
        episode_seed = _mix(key + _GOLDEN * ids)
        chunk = _chunk_rows(0, ids.size)
        for start in range(0, n_replicates, chunk):
            rows = min(chunk, n_replicates - start)
            number = np.arange(first + start + 1, first + start + rows + 1, dtype=np.uint64)
            bits = _mix(episode_seed[None, :] + _GOLDEN * number[:, None])
            # The uniform is (bits >> 11) * 2**-53; most are decided by their top 16 bits alone.
            counts = _POISSON_TABLE[bits >> np.uint64(64 - _TOP_BITS)]
            undecided = np.flatnonzero(counts == _UNDECIDED)
            uniform = (bits.ravel()[undecided] >> np.uint64(11)).astype(np.float64) * 2.0**-53
            counts.ravel()[undecided] = np.searchsorted(_POISSON_CDF, uniform, side="right")
            out[start : start + rows] = counts
    return out


# ---------------------------------------------------------------- sums per group


@dataclass(frozen=True)
class ReplicateSums:
    """An estimator's numerator and denominator sums per group, for the point estimate and each replicate.

    Row 0 of ``numerator`` and ``denominator`` counts every episode once; row r >= 1 is
    bootstrap replicate r - 1. Everything here is a sum (or, for ``weight_max``, a
    maximum) over the group's episodes, so the sums of disjoint sets of episodes combine
    exactly by adding (``combine_sums``).
    """

    labels: pl.Series
    """(n_groups,) group labels, sorted."""
    numerator: np.ndarray
    """(1 + n_replicates, n_groups, n_cells) numerator sums."""
    denominator: np.ndarray
    """(1 + n_replicates, n_groups, n_cells) denominator sums, carried entries included."""
    n_episodes: np.ndarray
    """(n_groups,) episodes of each group."""
    weight_sum: np.ndarray
    """(n_groups,) sum of the episodes' trajectory weights."""
    weight_squares: np.ndarray
    """(n_groups,) sum of their squares."""
    weight_max: np.ndarray
    """(n_groups,) the largest of them."""

    @property
    def n_cells(self) -> int:
        return self.numerator.shape[2]

    def values(self) -> np.ndarray:
        """Estimates (1 + n_replicates, n_groups): row 0 the point estimate, then each replicate."""
        return _ratios(self.numerator, self.denominator)

    def frame(self) -> pl.DataFrame:
        """The point estimate per group, as the estimator function returns it."""
        ess = np.divide(
            self.weight_sum**2,
            self.weight_squares,
            out=np.zeros(self.labels.len()),
            where=self.weight_squares > 0,
        )
        share = np.divide(
            self.weight_max,
            self.weight_sum,
            out=np.full(self.labels.len(), np.nan),
            where=self.weight_sum > 0,
        )
        return pl.DataFrame(
            {
                "group": self.labels,
                "estimate": self.values()[0],
                "n_episodes": self.n_episodes.astype(np.int64),
                "ess": ess,
                "max_weight_share": share,
            }
        )

    def padded(self, n_cells: int) -> ReplicateSums:
        """The same sums over ``n_cells`` cells: later cells hold no rewards and every episode's final weight.

        An episode that ended before a cell counts its final weight in that cell's
        denominator (``weighted_per_decision_is``), so the added cells repeat the last one's
        denominator, which already holds every episode's final weight.
        """
        extra = n_cells - self.n_cells
        if extra <= 0:
            return self
        rows, groups = self.numerator.shape[:2]
        numerator = np.concatenate([self.numerator, np.zeros((rows, groups, extra))], axis=2)
        denominator = np.concatenate(
            [self.denominator, np.repeat(self.denominator[:, :, -1:], extra, axis=2)], axis=2
        )
        return _replace(self, numerator=numerator, denominator=denominator)

    def regroup(self, key: pl.Series) -> ReplicateSums:
        """Sums per coarser group: ``key`` (n_groups,) names the group each of these groups belongs to."""
        if key.len() != self.labels.len() or key.null_count():
            raise EstimatorInputError(
                f"regroup needs one non-null key per group ({self.labels.len()}), got {key.len()}"
            )
        labels = key.cast(pl.String).unique().sort()
        code = key.cast(pl.String).replace_strict(labels, pl.Series(np.arange(labels.len()))).to_numpy()
        order = np.argsort(code, kind="stable")
        first = np.flatnonzero(np.r_[True, code[order][1:] != code[order][:-1]])

        def added(values: np.ndarray, axis: int) -> np.ndarray:
            return np.add.reduceat(np.take(values, order, axis=axis), first, axis=axis)

        return ReplicateSums(
            labels.rename("group"),
            added(self.numerator, 1),
            added(self.denominator, 1),
            added(self.n_episodes, 0),
            added(self.weight_sum, 0),
            added(self.weight_squares, 0),
            np.maximum.reduceat(self.weight_max[order], first),
        )


def _replace(sums: ReplicateSums, **changes: np.ndarray) -> ReplicateSums:
    fields = {name: getattr(sums, name) for name in ReplicateSums.__dataclass_fields__}
    return ReplicateSums(**(fields | changes))


def combine_sums(parts: Sequence[ReplicateSums], key: pl.DataFrame | None = None) -> ReplicateSums:
    """Add up the sums of parts computed apart (shards), optionally into coarser groups.

    Parameters
    ----------
    parts : sequence of ReplicateSums
        Sums over disjoint sets of episodes with the same replicates (same seed and count);
        a group found in several parts has its sums added.
    key : polars.DataFrame, optional
        Columns ``group`` and ``key``: the coarser group (a cohort, the portfolio) of every
        group of the parts. Without it the parts' own groups are kept.
    """
    if not parts:
        raise EstimatorInputError("combine_sums needs at least one part")
    rows = {part.numerator.shape[0] for part in parts}
    if len(rows) > 1:
        raise EstimatorInputError(
            f"parts have different numbers of replicates: {sorted(r - 1 for r in rows)}"
        )
    n_cells = max(part.n_cells for part in parts)
    padded = [part.padded(n_cells) for part in parts]

    def joined_array(name: str, axis: int) -> np.ndarray:
        return np.concatenate([getattr(part, name) for part in padded], axis=axis)

    joined = ReplicateSums(
        pl.concat([part.labels.cast(pl.String) for part in padded]).rename("group"),
        joined_array("numerator", 1),
        joined_array("denominator", 1),
        *(joined_array(name, 0) for name in ("n_episodes", "weight_sum", "weight_squares", "weight_max")),
    )
    if key is None:
        return joined.regroup(joined.labels)
    found = pl.DataFrame({"group": joined.labels}).join(
        key.select(pl.col("group").cast(pl.String), pl.col("key").cast(pl.String)),
        on="group",
        how="left",
        maintain_order="left",
    )
    missing = found.filter(pl.col("key").is_null())
    if missing.height:
        raise EstimatorInputError(f"no key for group(s) {missing['group'].head(3).to_list()}")
    return joined.regroup(found["key"])


def _chunk_rows(terms_entries: int, n_episodes: int) -> int:
    return max(1, _CHUNK_ENTRIES // max(1, terms_entries + n_episodes))


def replicate_sums(
    steps: pl.DataFrame,
    estimator: Callable | str,
    multiplicity: np.ndarray,
    *,
    gamma: float = 1.0,
) -> ReplicateSums:
    """Numerator and denominator sums per group of ``steps`` for every episode once and every replicate.

    Parameters
    ----------
    steps : polars.DataFrame
        Decision steps, sorted by (episode_id, t), as the estimator needs them.
    estimator : callable or str
        A bootstrappable registered estimator (see ``bootstrap_replicates``), or its name.
    multiplicity : numpy.ndarray, shape (n_replicates, n_episodes)
        Each replicate's episode multiplicities, episodes in frame order (e.g.
        ``poisson_multiplicity`` of the frame's episode ids).
    gamma : float, default 1.0
        Discount per decision step, in (0, 1].
    """
    s, terms = terms_of(estimator)(steps, gamma)
    multiplicity = np.asarray(multiplicity)
    if multiplicity.ndim != 2 or multiplicity.shape[1] != s.n_episodes:
        raise EstimatorInputError(
            f"multiplicity must be (n_replicates, {s.n_episodes}), a column per episode;"
            f" got {multiplicity.shape}"
        )
    return _replicate_sums(s, terms, multiplicity)


def _replicate_sums(s: _Steps, terms, multiplicity: np.ndarray) -> ReplicateSums:
    n_replicates = multiplicity.shape[0]
    point = _sums(terms, s)
    numerator = np.empty((1 + n_replicates, s.n_groups, terms.n_cells))
    denominator = np.empty_like(numerator)
    numerator[:1], denominator[:1] = point
    if n_replicates:
        # Every replicate at once, as matrix products over blocks of groups.
        _GroupBlocks.of(terms, s, n_replicates).replicate(multiplicity, numerator[1:], denominator[1:])
    weights = terms.weights
    largest = np.zeros(s.n_groups)
    np.maximum.at(largest, s.group, weights)
    return ReplicateSums(
        s.labels,
        numerator,
        denominator,
        np.bincount(s.group, minlength=s.n_groups),
        _group_sums(weights, s.group, s.n_groups),
        _group_sums(weights * weights, s.group, s.n_groups),
        largest,
    )


def frame_multiplicity(steps: pl.DataFrame, n_replicates: int, seed: int | np.random.Generator) -> np.ndarray:
    """``poisson_multiplicity`` of the episodes of a frame sorted by (episode_id, t), in frame order."""
    episode_id = steps["episode_id"].to_numpy()
    starts = np.flatnonzero(np.r_[True, episode_id[1:] != episode_id[:-1]])
    return poisson_multiplicity(episode_id[starts], n_replicates, seed)


# ---------------------------------------------------------------- intervals


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
    (the Poisson bootstrap, drawn per episode from the seed and its id; see the
    module docstring), so replicates of all groups come from one
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


def nan_quantiles(values: np.ndarray, quantiles: Sequence[float]) -> np.ndarray:
    """``numpy.nanquantile(values, quantiles, axis=0)`` (linear method) for every column at once.

    ``values`` (n, m) with at least one non-NaN value per column; returns (len(quantiles), m).
    Each column is sorted once (NaN last) and interpolated as numpy's linear method does,
    between the order statistics at floor and ceiling of (count - 1) * q.
    """
    ordered = np.sort(values, axis=0)
    count = (~np.isnan(values)).sum(axis=0)
    columns = np.arange(values.shape[1])
    out = np.empty((len(quantiles), values.shape[1]))
    for i, q in enumerate(quantiles):
        virtual = (count - 1) * q
        below = np.floor(virtual).astype(np.intp)
        # At the top the two order statistics are both the largest value.
        above_bounds = virtual >= count - 1
        below = np.where(above_bounds, count - 1, below)
        upper = np.where(above_bounds, count - 1, below + 1)
        gamma = virtual - np.floor(virtual)
        a, b = ordered[below, columns], ordered[upper, columns]
        difference = b - a
        # numpy's _lerp: from the lower value below one half, from the upper one above.
        out[i] = np.where(gamma >= 0.5, b - difference * (1 - gamma), a + difference * gamma)
    return out


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
        low[usable], high[usable] = nan_quantiles(replicates[:, usable], [tail, 1.0 - tail])
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
    multiplicity = poisson_multiplicity(steps["episode_id"].to_numpy()[s.starts], n_replicates, seed)
    values = _replicate_sums(s, terms, multiplicity).values()
    if savings:
        values = values - _replicate_sums(s, _on_policy_terms(steps, gamma)[1], multiplicity).values()
    return s.labels, values[0], values[1:]


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
