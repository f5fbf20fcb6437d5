"""Estimate how residents actually moved their setpoints: the behaviour policy.

Two models, both smoothed action counts, each a class behind one interface
(``BehaviorModel``) and registered under its ``behavior_model`` setting:

**Habit types** (``HabitTypes``, ``"types"``, the default). Homes differ in habit (how deep they set back,
how early they restore), and a premise logs only about 150 decisions a season
over hundreds of states, so its own counts per state are mostly zero or one.
Shrinking them toward the cohort's counts pulls every home toward the cohort's
average habit, which understates the chance of an action that is rare for this
home but common in the cohort. Importance weights are ratios of those
probabilities, so the error does not average out: the homes whose habit differs
most from a candidate get too little weight and the estimate leans toward the
homes that already behave like it. Instead, each premise is modelled as a
mixture of ``n_types`` habit types (a finite mixture of multinomial policies
fitted by expectation-maximisation; Dempster, Laird and Rubin 1977): a type's
table is its (responsibility-weighted) action counts per state, shrunk toward
the same type's counts at the coarse state (setback offset, decisions left),
which are shrunk toward the portfolio's at that coarse state:

    t_z(a|g) = (n_z,g,a + k * p(a|g)) / (n_z,g + k)
    t_z(a|s) = (n_z,s,a + k * t_z(a|g(s))) / (n_z,s + k)
    b_p(a|s) = sum_z r_p,z * t_z(a|s)

with r_p,z the posterior share of type z for premise p given all its decisions.
A premise's whole season of decisions decides its type, so the type tables can
be specific without being fitted to single observations. The number of types is
configured or chosen by held-out likelihood (episodes held out within premises).
A home not seen in the fit takes its cohort's average shares (members weighted
by decisions), or the portfolio's when its cohort is new too; a state no type
logged takes the types' coarse tables.

**Hierarchical counts** (``CohortCounts``, ``"counts"``). Each premise's counts per state are
shrunk toward its cohort's, the cohort's toward the portfolio's and the
portfolio's toward the uniform policy (hierarchical additive smoothing):

    p_portfolio(a|s) = (n_s,a + k / |A|) / (n_s + k)
    p_cohort(a|s)    = (n_c,s,a + k * p_portfolio(a|s)) / (n_c,s + k)
    p_premise(a|s)   = (n_p,s,a + k * p_cohort(a|s)) / (n_p,s + k)

with k = ``prior_strength``. Kept for comparison and for programs whose homes
are known to be alike; on simulated lakes it biases savings toward the
residents' own value (DEVELOPERS.md, "Choosing the behaviour
model and the estimator").

In both, a floor keeps every action's probability positive, so no importance
weight divides by zero; the floor is reported with the table. When the steps
carry a ``mode`` column (cool / heat) everything is fitted apart per mode, so
heating and cooling behaviour are never pooled.

A fitted model is saved as the frames of ``to_tables()`` and rebuilt with
``load_behavior``, which gives the same probabilities, ``table()`` and
``membership()`` as the model that was fitted.
"""

from __future__ import annotations

import inspect
from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import polars as pl

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, action_index


class BehaviorInputError(ValueError):
    """Logged steps or stored tables that cannot be used to estimate or rebuild the behaviour policy."""


REQUIRED = ("premise_id", "cohort", "state_key", "action")
STRENGTH_GRID: tuple[float, ...] = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0)
"""Prior strengths tried when the counts model's strength is chosen by held-out likelihood."""
TYPES_GRID: tuple[int, ...] = (1, 2, 3, 4, 6, 8)
"""Numbers of habit types tried when the number is chosen by held-out likelihood."""
STRENGTHS_FOR_TYPES: tuple[float, ...] = (2.0, 5.0, 10.0, 20.0)
"""Prior strengths tried for the types model when the strength is chosen by held-out likelihood."""
BEHAVIOR_TABLES: tuple[str, ...] = ("policy", "type")
"""Names of the frames ``to_tables()`` returns for every model (ledger ``behavior_<name>``)."""
_ROW_FRAMES = ("premise_", "cohort_", "portfolio_", "types_", "type_coarse_")
"""The habit-type model's stored rows, built from a fit only when first read."""
_MEMBERSHIP = {"premise_id": pl.Utf8, "cohort": pl.Utf8, "habit_type": pl.Int64, "share": pl.Float64}


class _TypeMixture:
    """Finite mixture of per-state action tables over premises, fitted by EM (one mode's steps).

    Arrays are codes: ``premise`` (n,) in 0..P-1, ``state`` (n,) state keys, ``coarse``
    (n,) in 0..G-1, ``action`` (n,) column index, ``weight`` (n,) step multiplicities.
    """

    def __init__(self, n_types: int, strength: float, floor: float, n_actions: int, n_coarse: int, seed: int):
        self.n_types, self.strength, self.floor = n_types, strength, floor
        self.n_actions, self.n_coarse, self.seed = n_actions, n_coarse, seed

    def fit(
        self,
        premise: np.ndarray,
        state: np.ndarray,
        coarse: np.ndarray,
        action: np.ndarray,
        weight: np.ndarray,
        n_premises: int,
        restarts: int = 3,
        iterations: int = 200,
    ) -> _TypeMixture:
        k, n_actions = self.strength, self.n_actions
        self.states_, cell = np.unique(state, return_inverse=True)
        n_cells = self.states_.size
        self.cell_coarse_ = np.zeros(n_cells, dtype=np.int64)
        self.cell_coarse_[cell] = coarse
        overall = np.bincount(coarse * n_actions + action, weight, self.n_coarse * n_actions)
        overall = overall.reshape(self.n_coarse, n_actions)
        self.portfolio_coarse_ = (overall + k / n_actions) / (overall.sum(1, keepdims=True) + k)
        # EM needs only the weighted count of each (premise, state, action): work on those.
        triple, where = np.unique((premise * n_cells + cell) * n_actions + action, return_inverse=True)
        count = np.bincount(where, weight, triple.size)
        owner, cell_action = triple // (n_cells * n_actions), triple % (n_cells * n_actions)
        layout = _CountLayout.of(owner, cell_action, count)
        rng = np.random.default_rng(self.seed)
        best = None
        # A few restarts from random memberships: EM finds a local optimum; keep the likeliest.
        for _ in range(restarts if self.n_types > 1 else 1):
            shares = rng.dirichlet(np.ones(self.n_types), n_premises)
            previous = -np.inf
            for _ in range(iterations):
                tables = self._tables(layout, shares, n_cells)
                shares, loglik = self._memberships(layout, tables[1], shares, n_premises)
                if loglik - previous < 1e-7 * max(1.0, abs(loglik)):
                    break
                previous = loglik
            if best is None or loglik > best[0]:
                best = (loglik, shares, tables)
        self.loglik_, self.shares_, (self.coarse_tables_, self.tables_, self.counts_) = best
        return self

    def _tables(self, layout: _CountLayout, shares: np.ndarray, n_cells: int):
        """M step: each type's smoothed tables from the share-weighted counts."""
        k, n_actions, n_types = self.strength, self.n_actions, self.n_types
        counts = layout.column_sums(shares.T, n_cells * n_actions).reshape(n_types, n_cells, n_actions)
        # Summed into coarse states by a (coarse x cell) indicator matrix: one small matrix product.
        to_coarse = self.cell_coarse_[None, :] == np.arange(self.n_coarse)[:, None]
        coarse_counts = np.matmul(to_coarse.astype(np.float64), counts)
        coarse_tables = (coarse_counts + k * self.portfolio_coarse_) / (
            coarse_counts.sum(2, keepdims=True) + k
        )
        tables = (counts + k * coarse_tables[:, self.cell_coarse_]) / (counts.sum(2, keepdims=True) + k)
        return self._floor(coarse_tables), self._floor(tables), counts

    def _floor(self, tables: np.ndarray) -> np.ndarray:
        floored = np.maximum(tables, self.floor)
        return floored / floored.sum(-1, keepdims=True)

    def _memberships(self, layout: _CountLayout, tables: np.ndarray, shares: np.ndarray, n_premises: int):
        """E step: each premise's posterior type shares, and the total log-likelihood."""
        log_tables = np.log(tables.reshape(self.n_types, -1))
        loglik = layout.row_sums(log_tables, n_premises).T
        loglik = loglik + np.log(np.maximum(shares.mean(0), 1e-300))
        top = loglik.max(1, keepdims=True)
        joint = np.exp(loglik - top)
        total = joint.sum(1, keepdims=True)
        return joint / total, float((top + np.log(total)).sum())


@dataclass(frozen=True)
class _CountLayout:
    """The weighted count of each logged (premise, column) pair, laid out for the two sums EM needs.

    A sparse premise x column matrix N kept as its non-zero entries, once in premise order and
    once in column order, so that both products are a gather and contiguous segment sums
    (``np.add.reduceat``) with the types along the first axis: ``row_sums(X)`` is X @ N.T
    (per type and premise) and ``column_sums(S)`` is S @ N (per type and column).
    """

    owner: np.ndarray
    """(m,) premise of each entry, non-decreasing."""
    column: np.ndarray
    """(m,) column of each entry (state cell times actions plus action)."""
    count: np.ndarray
    """(m,) weighted count of each entry."""
    owner_first: np.ndarray
    """Index of the first entry of each premise that has entries."""
    column_owner: np.ndarray
    """(m,) premise of each entry, entries in column order."""
    column_count: np.ndarray
    """(m,) count of each entry, entries in column order."""
    column_first: np.ndarray
    """Index, in column order, of the first entry of each column that has entries."""
    columns: np.ndarray
    """The columns that have entries, ascending."""

    @classmethod
    def of(cls, owner: np.ndarray, column: np.ndarray, count: np.ndarray) -> _CountLayout:
        """From entries sorted by premise (as ``np.unique`` of premise-major codes leaves them)."""
        by_column = np.argsort(column, kind="stable")
        ordered = column[by_column]
        column_first = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]])
        return cls(
            owner,
            column,
            count,
            np.flatnonzero(np.r_[True, owner[1:] != owner[:-1]]),
            owner[by_column],
            count[by_column],
            column_first,
            ordered[column_first],
        )

    def row_sums(self, per_column: np.ndarray, n_rows: int) -> np.ndarray:
        """(Z, n_rows): per premise, the sum over its entries of count * per_column[:, column]; (Z, K) in."""
        values = np.take(per_column, self.column, axis=1)
        values *= self.count
        out = np.zeros((per_column.shape[0], n_rows))
        out[:, self.owner[self.owner_first]] = np.add.reduceat(values, self.owner_first, axis=1)
        return out

    def column_sums(self, per_row: np.ndarray, n_columns: int) -> np.ndarray:
        """(Z, n_columns): per column, the sum over its entries of count * per_row[:, owner]; (Z, P) in."""
        values = np.take(per_row, self.column_owner, axis=1)
        values *= self.column_count
        out = np.zeros((per_row.shape[0], n_columns))
        out[:, self.columns] = np.add.reduceat(values, self.column_first, axis=1)
        return out


@dataclass(frozen=True)
class _TypeTables:
    """What a fitted mixture needs to predict (one mode): each type's tables at fine and coarse states.

    ``states`` (S,) sorted state keys the types were fitted on, ``fine`` (n_types, S, n_actions),
    ``coarse`` (n_types, G, n_actions), rows summing to one.
    """

    states: np.ndarray
    fine: np.ndarray
    coarse: np.ndarray

    def type_probabilities(self, state: np.ndarray, coarse: np.ndarray) -> np.ndarray:
        """Each type's action probabilities at the given states, (n_types, n, n_actions)."""
        at = np.searchsorted(self.states, state)
        at = np.minimum(at, self.states.size - 1)
        seen = self.states[at] == state
        return np.where(seen[None, :, None], self.fine[:, at], self.coarse[:, coarse])

    def predict(self, shares: np.ndarray, state: np.ndarray, coarse: np.ndarray) -> np.ndarray:
        """Mixture probabilities (n, n_actions) for steps with type shares ``shares`` (n, n_types)."""
        return np.einsum("nz,zna->na", shares, self.type_probabilities(state, coarse))

    def predict_logged(
        self, shares: np.ndarray, state: np.ndarray, coarse: np.ndarray, action: np.ndarray
    ) -> np.ndarray:
        """Mixture probability (n,) of one action per step (column ``action``), as ``predict`` gives it."""
        at = np.minimum(np.searchsorted(self.states, state), self.states.size - 1)
        seen = self.states[at] == state
        per_type = np.where(seen[None, :], self.fine[:, at, action], self.coarse[:, coarse, action])
        return np.einsum("nz,zn->n", shares, per_type)


def _coarse_code(space: StateSpace, state_key: np.ndarray) -> np.ndarray:
    """The coarse state of each key: (setback offset, decisions left), in 0..n_coarse-1."""
    f = space.decode(state_key)
    return (f["offset"] - space.offset_min) * space.steps_left_cap + f["steps_left"] - 1


def _n_coarse(space: StateSpace) -> int:
    return (space.offset_max - space.offset_min + 1) * space.steps_left_cap


def _share_columns(n_types: int) -> list[str]:
    return [f"share_{z}" for z in range(1, n_types + 1)]


def _wide(shares: pl.DataFrame, keys: list[str], n_types: int) -> pl.DataFrame:
    """One row per key with a ``share_<z>`` column per habit type, from long (keys, habit_type, share)."""
    wide = shares.pivot(on="habit_type", index=keys, values="share", sort_columns=True)
    columns = _share_columns(n_types)
    return wide.rename(dict(zip([str(z) for z in range(1, n_types + 1)], columns, strict=True))).select(
        *keys, *columns
    )


def _level_shares(member: pl.DataFrame, level: list[str], n_types: int) -> pl.DataFrame:
    """Habit-type shares per premise, cohort or overall (members weighted by decisions), a column per type."""
    keys = level or ["_all"]
    mass = pl.col("share") * pl.col("decisions")
    shares = (
        member.with_columns(pl.lit("all").alias("_all"))
        .group_by(*keys, "habit_type")
        .agg(
            # A group whose decisions all weigh zero (a bootstrap resample) takes the plain mean.
            pl.when(pl.col("decisions").sum() > 0)
            .then(mass.sum() / pl.col("decisions").sum())
            .otherwise(pl.col("share").mean())
            .alias("share")
        )
    )
    return _wide(shares, keys, n_types).select(*level, *_share_columns(n_types))


def _mode_columns(split: list[str], part_key: tuple) -> list[pl.Expr]:
    return [pl.lit(v).alias(c) for c, v in zip(split, part_key, strict=True)]


def _parts(frame: pl.DataFrame, split: list[str]) -> dict[tuple, pl.DataFrame]:
    """The frame's rows per mode (one part, key (), when there is no mode column)."""
    return frame.partition_by(split, as_dict=True) if split else {(): frame}


def _counts(steps: pl.DataFrame, keys: list[str], actions: tuple[int, ...]) -> pl.DataFrame:
    """Weighted action counts per (keys, state), every action listed, with the state's total."""
    grid = pl.DataFrame({"action": list(actions)}, schema={"action": steps.schema["action"]})
    observed = steps.group_by([*keys, "state_key", "action"]).agg(pl.col("_weight").sum().alias("count"))
    states = observed.select([*keys, "state_key"]).unique()
    return (
        states.join(grid, how="cross")
        .join(observed, on=[*keys, "state_key", "action"], how="left")
        .with_columns(pl.col("count").fill_null(0))
        .with_columns(pl.col("count").sum().over([*keys, "state_key"]).alias("state_count"))
    )


def held_out_log_likelihood(
    steps: pl.DataFrame,
    candidates: dict[str, BehaviorModel] | None = None,
    folds: int = 5,
    seed: int = 0,
) -> pl.DataFrame:
    """Mean held-out log-likelihood of the logged actions under each candidate model.

    Episodes (not steps) are assigned to ``folds`` folds at random, so the steps
    of one episode are never split between fitting and scoring; a premise's other
    episodes stay in the fit, as when the model is used.

    Parameters
    ----------
    candidates : dict of str to BehaviorModel, optional
        Unfitted models by label; default: the counts model at each strength in
        ``STRENGTH_GRID``.

    Returns
    -------
    polars.DataFrame
        model (the label), log_likelihood (mean per held-out step, nats).
    """
    if candidates is None:
        candidates = {str(k): CohortCounts(prior_strength=k) for k in STRENGTH_GRID}
    episodes = steps["episode_id"].unique().sort()
    fold_of = pl.DataFrame(
        {
            "episode_id": episodes,
            "fold": np.random.default_rng(seed).integers(0, folds, episodes.len()),
        }
    )
    tagged = steps.join(fold_of, on="episode_id")
    splits = []
    for fold in range(folds):
        train = tagged.filter(pl.col("fold") != fold)
        test = tagged.filter(pl.col("fold") == fold)
        if not (train.is_empty() or test.is_empty()):
            splits.append((train, test))
    scores = []
    for label, candidate in candidates.items():
        total, count = 0.0, 0
        for train, test in splits:
            model = candidate.clone().fit(train)
            total += float(np.log(model.probabilities(test)).sum())
            count += test.height
        scores.append({"model": label, "log_likelihood": total / max(count, 1)})
    return pl.DataFrame(scores, schema={"model": pl.Utf8, "log_likelihood": pl.Float64})


def _scores(
    steps: pl.DataFrame, candidates: dict[str, BehaviorModel], seed: int, known: Mapping[str, float]
) -> dict[str, float]:
    """Held-out log-likelihood of each candidate, in candidate order; those in ``known`` are not re-fitted."""
    todo = {label: model for label, model in candidates.items() if label not in known}
    scored = dict(known)
    if todo:
        found = held_out_log_likelihood(steps, todo, seed=seed)
        scored |= dict(zip(found["model"], found["log_likelihood"], strict=True))
    return {label: scored[label] for label in candidates}


def _best(
    steps: pl.DataFrame,
    candidates: dict[str, BehaviorModel],
    seed: int,
    known: Mapping[str, float] | None = None,
) -> tuple[str, dict[str, float]]:
    """Label of the candidate with the best held-out log-likelihood (the first of any tie), and every score.

    ``known`` holds scores of candidates already scored on the same steps and seed.
    """
    scores = _scores(steps, candidates, seed, known or {})
    best = max(scores.values())
    return next(label for label, score in scores.items() if score == best), scores


class BehaviorModel(ABC):
    """Behaviour probabilities per premise and state, learned from logged steps: the shared interface.

    A model fills ``premise_``, ``cohort_`` and ``portfolio_`` (frames of mode, key,
    state_key, action, probability, count over the states each premise, cohort and
    the portfolio logged) and ``membership_``; the rest of the interface works from
    those. Subclasses register in ``_MODELS`` under their ``kind``, the value of the
    ``behavior_model`` setting.

    Parameters
    ----------
    prior_strength : float
        Pseudo-count k pulling each table toward the one above it.
    floor : float
        Smallest probability given to any action, before renormalising.
    actions : tuple of int
        The action set, °C per decision in the setback direction.
    """

    kind: ClassVar[str]
    """The ``behavior_model`` setting that names this model (stored with its table)."""
    _SETTINGS: ClassVar[dict[str, type]] = {"prior_strength": float, "floor": float}
    """Constructor parameters kept as columns of ``table()``, with their Python type."""

    def __init__(
        self, prior_strength: float = 5.0, floor: float = 0.01, actions: tuple[int, ...] = DEFAULT_ACTIONS
    ):
        self.prior_strength = prior_strength
        self.floor = floor
        self.actions = actions

    def clone(self) -> BehaviorModel:
        """An unfitted model of the same kind with the same parameters."""
        names = [name for name in inspect.signature(type(self)).parameters]
        return type(self)(**{name: getattr(self, name) for name in names})

    @classmethod
    @abstractmethod
    def tuned(cls, steps: pl.DataFrame, config) -> BehaviorModel:
        """An unfitted model with ``config``'s settings, any 'auto' one chosen by held-out likelihood."""

    def fit(self, steps: pl.DataFrame, weight: np.ndarray | None = None) -> BehaviorModel:
        """Estimate from logged steps with premise_id, cohort, state_key and action columns.

        Parameters
        ----------
        steps : polars.DataFrame
            One row per logged decision; an optional ``mode`` column fits each mode apart.
        weight : numpy.ndarray, shape (n_steps,), optional
            Counts each step that many times (a bootstrap replicate's multiplicities).

        Returns
        -------
        self
            With ``split_`` (the mode column, if any), ``premise_``, ``cohort_``,
            ``portfolio_`` and ``membership_`` set, plus the model's own attributes.
        """
        missing = [c for c in REQUIRED if c not in steps.columns]
        if missing:
            raise BehaviorInputError(f"logged steps lack columns {missing}")
        if steps.is_empty():
            raise BehaviorInputError("no logged steps to estimate the behaviour policy from")
        bad = steps.filter(~pl.col("action").is_in(list(self.actions)))
        if bad.height:
            raise BehaviorInputError(f"{bad.height} logged actions outside the action set {self.actions}")
        if self.prior_strength <= 0 or not 0 <= self.floor < 1 / len(self.actions):
            raise BehaviorInputError("prior_strength must be > 0 and floor in [0, 1/|A|)")
        steps = steps.with_columns(
            pl.Series("_weight", np.ones(steps.height) if weight is None else np.asarray(weight, dtype=float))
        )
        self.split_ = ["mode"] if "mode" in steps.columns else []
        self._fit(steps)
        return self

    @abstractmethod
    def _fit(self, steps: pl.DataFrame) -> None:
        """Check the model's own parameters; set learned attributes from steps with a ``_weight`` column."""

    def probabilities(self, steps: pl.DataFrame, column: str = "action") -> np.ndarray:
        """Behaviour probability of the action in ``column`` for each step, shape (n_steps,).

        Steps of a (premise, state) never logged fall back to the cohort, then the
        portfolio, then the uniform policy, unless the model knows better (the
        habit-type model answers from the premise's own types).
        """
        self._check_fitted()
        frame = steps.select(
            *self.split_, "premise_id", "cohort", "state_key", pl.col(column).alias("action")
        )
        return self._predict(frame)

    def _predict(self, frame: pl.DataFrame) -> np.ndarray:
        """Probabilities of the (mode, premise_id, cohort, state_key, action) rows, from stored rows."""
        split = self.split_
        out = (
            frame.with_row_index("_row")
            .join(
                self.premise_.select(
                    *split, "premise_id", "state_key", "action", pl.col("probability").alias("p1")
                ),
                on=[*split, "premise_id", "state_key", "action"],
                how="left",
            )
            .join(
                self.cohort_.select(
                    *split, "cohort", "state_key", "action", pl.col("probability").alias("p2")
                ),
                on=[*split, "cohort", "state_key", "action"],
                how="left",
            )
            .join(
                self.portfolio_.select(*split, "state_key", "action", pl.col("probability").alias("p3")),
                on=[*split, "state_key", "action"],
                how="left",
            )
            .sort("_row")
        )
        uniform = 1.0 / len(self.actions)
        return out.select(pl.coalesce("p1", "p2", "p3", pl.lit(uniform))).to_series().to_numpy().copy()

    def table(self) -> pl.DataFrame:
        """The ledger's ``behavior_policy`` rows: scope, key, state_key, action, probability, count.

        Scopes are premise, cohort and portfolio, plus the model's own (the types
        model's ``type`` and ``type_coarse``); every row also carries the model's
        ``kind`` (column ``model``) and settings, so ``from_table`` can rebuild it.
        """
        self._check_fitted()
        cols = [*self.split_, "state_key", "action", "probability", pl.col("count").round(0).cast(pl.Int64)]
        parts = [
            self.premise_.select(pl.lit("premise").alias("scope"), pl.col("premise_id").alias("key"), *cols),
            self.cohort_.select(pl.lit("cohort").alias("scope"), pl.col("cohort").alias("key"), *cols),
            self.portfolio_.select(pl.lit("portfolio").alias("scope"), pl.lit("all").alias("key"), *cols),
            *self._own_scopes(cols),
        ]
        dtypes = {float: pl.Float64, int: pl.Int64}
        settings = [
            pl.lit(kind(getattr(self, name)), dtype=dtypes[kind]).alias(name)
            for name, kind in self._SETTINGS.items()
        ]
        return (
            pl.concat(parts)
            .sort("scope", "key", *self.split_, "state_key", "action")
            .with_columns(*settings, pl.lit(self.kind).alias("model"))
        )

    def _own_scopes(self, cols: list) -> list[pl.DataFrame]:
        """Rows of scopes only this model has, in ``table()``'s columns (scope, key, *cols)."""
        return []

    def membership(self) -> pl.DataFrame:
        """The ledger's ``behavior_type`` rows: each premise's share of each habit type.

        Columns (mode), premise_id, cohort, habit_type, share, decisions; empty for a
        model without types, so the ledger's view always reads.
        """
        self._check_fitted()
        return self.membership_

    def to_tables(self) -> dict[str, pl.DataFrame]:
        """Everything needed to rebuild the fitted model, by name (see ``BEHAVIOR_TABLES``).

        ``policy`` is ``table()`` and ``type`` is ``membership()``: kept as the
        warehouse's and ledger's ``behavior_policy`` and ``behavior_type``, and read
        back with ``load_behavior``.
        """
        return {"policy": self.table(), "type": self.membership()}

    @classmethod
    def from_table(
        cls,
        table: pl.DataFrame,
        actions: tuple[int, ...] = DEFAULT_ACTIONS,
        space: StateSpace | None = None,
        membership: pl.DataFrame | None = None,
    ) -> BehaviorModel:
        """Rebuild the fitted model whose ``table()`` (and ``membership()``) these are.

        The stored ``model`` column picks the class. With the membership, the model
        answers as the fitted one did for every premise, state and action; without
        it a habit-type model knows no premise's shares and answers only from the
        stored premise, cohort and portfolio rows (right on every logged pair).
        """
        if "model" not in table.columns or table.is_empty():
            raise BehaviorInputError(
                "the stored behaviour table is empty or has no 'model' column: run the learn stage again"
            )
        model_class = _model_class(str(table["model"][0]))
        if not issubclass(model_class, cls):
            raise BehaviorInputError(
                f"the stored behaviour model is {model_class.kind!r}, not a {cls.__name__}"
            )
        settings = {name: kind(table[name][0]) for name, kind in model_class._SETTINGS.items()}
        model = model_class._unfitted(settings, actions, space)
        model.split_ = ["mode"] if "mode" in table.columns else []
        cols = [*model.split_, "state_key", "action", "probability", "count"]
        scoped = {scope: rows for (scope,), rows in table.partition_by("scope", as_dict=True).items()}
        empty = table.clear()
        model.premise_ = scoped.get("premise", empty).select(pl.col("key").alias("premise_id"), *cols)
        model.cohort_ = scoped.get("cohort", empty).select(pl.col("key").alias("cohort"), *cols)
        model.portfolio_ = scoped.get("portfolio", empty).select(*cols)
        model._restore(scoped, empty, _empty_membership(model.split_) if membership is None else membership)
        return model

    @classmethod
    def _unfitted(cls, settings: dict, actions: tuple[int, ...], space: StateSpace | None) -> BehaviorModel:
        """An unfitted model from its stored settings, the action set and the state space."""
        return cls(**settings, actions=actions)

    def _restore(
        self, scoped: dict[str, pl.DataFrame], empty: pl.DataFrame, membership: pl.DataFrame
    ) -> None:
        """Set the model's own learned attributes from its stored scopes and membership."""
        self.membership_ = _empty_membership(self.split_)

    def _check_fitted(self) -> None:
        # membership_ is set last by every fit and by from_table.
        if not hasattr(self, "membership_"):
            raise BehaviorInputError("call fit() before asking for probabilities")


def _empty_membership(split: list[str]) -> pl.DataFrame:
    return pl.DataFrame(schema={**dict.fromkeys(split, pl.Utf8), **_MEMBERSHIP, "decisions": pl.Float64})


def _long(
    cells: pl.DataFrame, probs: np.ndarray, actions: tuple[int, ...], action_dtype: pl.DataType
) -> pl.DataFrame:
    """One row per cell and action from a (n_cells, n_actions) probability matrix."""
    n_actions = len(actions)
    return cells[np.repeat(np.arange(cells.height), n_actions)].with_columns(
        pl.Series("action", np.tile(np.asarray(actions), cells.height)).cast(action_dtype),
        pl.Series("probability", probs.ravel()),
    )


class CohortCounts(BehaviorModel):
    """Hierarchical smoothed counts: premise toward cohort, cohort toward portfolio, portfolio toward uniform.

    Parameters are those of ``BehaviorModel``. Learned frames ``portfolio_``,
    ``cohort_`` and ``premise_`` hold, per (mode, key, state_key, action), the
    weighted count, the state's total ``state_count`` and the floored probability.
    """

    kind = "counts"
    n_types = None
    """No habit types (read by the run summary, as for ``HabitTypes``)."""

    @classmethod
    def tuned(cls, steps: pl.DataFrame, config) -> CohortCounts:
        """The configured strength, or the best of ``STRENGTH_GRID`` by held-out likelihood when 'auto'."""
        strength, floor, actions = config.behavior_prior_strength, config.behavior_floor, config.actions
        if strength == "auto":
            grid = {str(k): cls(k, floor, actions) for k in STRENGTH_GRID}
            strength = float(_best(steps, grid, config.seed)[0])
        return cls(float(strength), floor, actions)

    def _fit(self, steps: pl.DataFrame) -> None:
        k, split = self.prior_strength, self.split_
        portfolio = _counts(steps, split, self.actions).with_columns(
            ((pl.col("count") + k / len(self.actions)) / (pl.col("state_count") + k)).alias("probability")
        )
        cohort = self._shrink(
            _counts(steps, [*split, "cohort"], self.actions), portfolio, [*split, "state_key", "action"]
        )
        premise_cohort = steps.select("premise_id", "cohort").unique()
        premise = self._shrink(
            _counts(steps, [*split, "premise_id"], self.actions).join(premise_cohort, on="premise_id"),
            cohort,
            [*split, "cohort", "state_key", "action"],
        )
        self.portfolio_ = self._floor(portfolio, [*split])
        self.cohort_ = self._floor(cohort, [*split, "cohort"])
        self.premise_ = self._floor(premise, [*split, "premise_id"])
        self.membership_ = _empty_membership(split)

    def _shrink(self, counts: pl.DataFrame, parent: pl.DataFrame, on: list[str]) -> pl.DataFrame:
        prior = parent.select(*on, pl.col("probability").alias("prior"))
        return (
            counts.join(prior, on=on, how="left")
            .with_columns(
                (
                    (pl.col("count") + self.prior_strength * pl.col("prior"))
                    / (pl.col("state_count") + self.prior_strength)
                ).alias("probability")
            )
            .drop("prior")
        )

    def _floor(self, table: pl.DataFrame, keys: list[str]) -> pl.DataFrame:
        floored = pl.max_horizontal(pl.col("probability"), pl.lit(self.floor))
        return table.with_columns(floored.alias("probability")).with_columns(
            pl.col("probability") / pl.col("probability").sum().over([*keys, "state_key"])
        )


class HabitTypes(BehaviorModel):
    """Each premise a mixture of ``n_types`` habit types fitted by EM (the default model).

    Parameters
    ----------
    prior_strength, floor, actions
        As for ``BehaviorModel``.
    n_types : int
        Number of habit types, >= 1.
    space : StateSpace, optional
        How state keys decode (for the coarse state); default ``StateSpace()``.
    seed : int
        Seed of the random starting memberships.

    Attributes
    ----------
    premise_, cohort_, portfolio_ : polars.DataFrame
        Mixture probabilities at the states each premise, cohort and the portfolio
        logged (cohort and portfolio at their members' average shares), with counts.
    types_, type_coarse_ : polars.DataFrame
        Each type's table per (mode, habit_type, state_key, action) and per coarse
        state (``state_key`` holds the coarse code), with expected decisions ``count``.
    membership_ : polars.DataFrame
        Each premise's share of each type and its decisions (see ``membership``).
    type_tables_ : dict of tuple to _TypeTables
        The types' tables as arrays, per mode key.
    shares_ : dict of str to polars.DataFrame
        ``share_<z>`` columns per premise, per cohort and for the portfolio (key
        ``premise``, ``cohort``, ``portfolio``), per mode.
    """

    kind = "types"
    _SETTINGS: ClassVar[dict[str, type]] = {**BehaviorModel._SETTINGS, "n_types": int, "seed": int}

    def __init__(
        self,
        prior_strength: float = 5.0,
        floor: float = 0.01,
        actions: tuple[int, ...] = DEFAULT_ACTIONS,
        *,
        n_types: int = 2,
        space: StateSpace | None = None,
        seed: int = 0,
    ):
        super().__init__(prior_strength, floor, actions)
        self.n_types = n_types
        self.space = space or StateSpace()
        self.seed = seed

    @classmethod
    def tuned(cls, steps: pl.DataFrame, config) -> HabitTypes:
        """Configured or chosen settings: the number of types first (at the configured
        strength, or 5 when that is 'auto'), then the strength at that number."""
        strength, floor, actions = config.behavior_prior_strength, config.behavior_floor, config.actions

        def model(n_types: int, k: float) -> HabitTypes:
            return cls(k, floor, actions, n_types=n_types, space=config.state, seed=config.seed)

        n_types = config.behavior_types
        start = 5.0 if strength == "auto" else float(strength)
        known: dict[str, float] = {}
        if n_types == "auto":
            label, scores = _best(steps, {str(z): model(z, start) for z in TYPES_GRID}, config.seed)
            n_types = int(label)
            # The chosen size at the starting strength was scored already: not fitted again.
            known = {str(start): scores[label]}
        if strength == "auto":
            grid = {str(k): model(n_types, k) for k in STRENGTHS_FOR_TYPES}
            strength = float(_best(steps, grid, config.seed, known)[0])
        return model(int(n_types), float(strength))

    @classmethod
    def _unfitted(cls, settings: dict, actions: tuple[int, ...], space: StateSpace | None) -> HabitTypes:
        return cls(**settings, actions=actions, space=space)

    def _fit(self, steps: pl.DataFrame) -> None:
        if not (isinstance(self.n_types, int) and self.n_types >= 1):
            raise BehaviorInputError(f"n_types must be a whole number >= 1, got {self.n_types!r}")
        split, n_actions = self.split_, len(self.actions)
        members: list[pl.DataFrame] = []
        self.type_tables_: dict[tuple, _TypeTables] = {}
        share_parts: dict[tuple, dict[str, pl.DataFrame]] = {}
        unbuilt: list[tuple[tuple, pl.DataFrame, _TypeMixture, pl.DataFrame]] = []
        # One fit per mode (cool / heat): at most two passes, each over whole arrays.
        for part_key, part in _parts(steps, split).items():
            premises = part["premise_id"].unique().sort()
            state = part["state_key"].to_numpy().astype(np.int64)
            mixture = _TypeMixture(
                self.n_types,
                self.prior_strength,
                self.floor,
                n_actions,
                _n_coarse(self.space),
                self.seed,
            ).fit(
                # Dense ranks number the premises in sorted order, as ``premises`` lists them.
                part.select(pl.col("premise_id").rank("dense").cast(pl.Int64) - 1).to_series().to_numpy(),
                state,
                _coarse_code(self.space, state),
                action_index(part["action"].to_numpy(), self.actions),
                part["_weight"].to_numpy(),
                premises.len(),
            )
            self.type_tables_[part_key] = _TypeTables(
                mixture.states_, mixture.tables_, mixture.coarse_tables_
            )

            decisions = part.group_by("premise_id").agg(pl.col("_weight").sum().alias("decisions"))
            member = (
                pl.DataFrame(
                    {
                        "premise_id": np.repeat(premises.to_numpy(), self.n_types),
                        "habit_type": np.tile(np.arange(1, self.n_types + 1), premises.len()),
                        "share": mixture.shares_.ravel(),
                    }
                )
                .join(part.select("premise_id", "cohort").unique(), on="premise_id")
                .join(decisions, on="premise_id")
                .sort("premise_id", "habit_type")
            )
            members.append(member.with_columns(_mode_columns(split, part_key)))
            share_parts[part_key] = self._part_shares(member)
            unbuilt.append((part_key, part, mixture, member))
        self.membership_ = pl.concat(members).select(*split, *_MEMBERSHIP, "decisions")
        self._gather_shares(share_parts)
        # The stored rows (premise_, cohort_, portfolio_, types_, type_coarse_) are built on first
        # use: predicting for premises whose shares are known, as held-out scoring does, never needs them.
        for name in _ROW_FRAMES:
            self.__dict__.pop(name, None)
        self._unbuilt = unbuilt

    def __getattr__(self, name: str):
        # Reached only when normal lookup fails: build a fit's stored rows when one is first read.
        unbuilt = self.__dict__.get("_unbuilt")
        if name in _ROW_FRAMES and unbuilt is not None:
            self._build_rows(unbuilt)
            return self.__dict__[name]
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {name!r}")

    def _build_rows(self, unbuilt: list[tuple[tuple, pl.DataFrame, _TypeMixture, pl.DataFrame]]) -> None:
        """``premise_``, ``cohort_``, ``portfolio_``, ``types_`` and ``type_coarse_`` of the last fit."""
        split = self.split_
        frames: dict[str, list[pl.DataFrame]] = {
            name: [] for name in ("premise", "cohort", "portfolio", "types", "coarse")
        }
        for part_key, part, mixture, member in unbuilt:
            mode_cols = _mode_columns(split, part_key)
            tables = self.type_tables_[part_key]
            # The premise rows weigh each premise's shares by its decisions, as the cohort's are.
            row_shares = {
                **self._part_shares(member),
                "premise": _level_shares(member, ["premise_id"], self.n_types),
            }
            for name, level in (("premise", ["premise_id"]), ("cohort", ["cohort"]), ("portfolio", [])):
                counts = _counts(part, [*split, *level], self.actions).drop(*split)
                cells = counts.select(*level, "state_key").unique().sort(*level, "state_key")
                keys = cells["state_key"].to_numpy().astype(np.int64)
                shares = row_shares[name]
                on_cells = (
                    cells.join(shares, on=level, how="left") if level else cells.join(shares, how="cross")
                )
                probs = tables.predict(
                    on_cells.select(shares.drop(*level).columns).to_numpy(),
                    keys,
                    _coarse_code(self.space, keys),
                )
                frames[name].append(
                    _long(cells, probs, self.actions, part.schema["action"])
                    .join(counts, on=[*level, "state_key", "action"], how="left")
                    .with_columns(pl.col("count").fill_null(0), *mode_cols)
                )
            frames["types"].append(
                self._type_rows(mixture.states_, mixture.tables_, mixture.counts_, part.schema).with_columns(
                    mode_cols
                )
            )
            coarse_counts = np.zeros(mixture.coarse_tables_.shape)
            np.add.at(coarse_counts, (slice(None), mixture.cell_coarse_), mixture.counts_)
            frames["coarse"].append(
                self._type_rows(
                    np.arange(_n_coarse(self.space)), mixture.coarse_tables_, coarse_counts, part.schema
                ).with_columns(mode_cols)
            )
        self.premise_, self.cohort_, self.portfolio_, self.types_, self.type_coarse_ = (
            pl.concat(frames[name]) for name in ("premise", "cohort", "portfolio", "types", "coarse")
        )
        del self._unbuilt

    def _type_rows(self, keys: np.ndarray, tables: np.ndarray, counts: np.ndarray, schema) -> pl.DataFrame:
        """Long rows (habit_type, state_key, action, probability, count) of (n_types, n_keys, n_actions)."""
        cells = pl.DataFrame(
            {
                "habit_type": np.repeat(np.arange(1, self.n_types + 1), keys.size),
                "state_key": np.tile(keys, self.n_types),
            }
        ).with_columns(pl.col("state_key").cast(schema["state_key"]))
        return _long(
            cells, tables.reshape(-1, len(self.actions)), self.actions, schema["action"]
        ).with_columns(pl.Series("count", counts.ravel()))

    def _tables_from_rows(self) -> None:
        """``type_tables_`` from the stored type rows, checked against the state space."""
        split, n_actions, n_coarse = self.split_, len(self.actions), _n_coarse(self.space)
        self.type_tables_ = {}
        coarse_parts = _parts(self.type_coarse_, split)
        for part_key, rows in _parts(self.types_, split).items():
            coarse_rows = coarse_parts.get(part_key, self.type_coarse_.clear())
            states = np.unique(rows["state_key"].to_numpy().astype(np.int64))
            codes = coarse_rows["state_key"].to_numpy().astype(np.int64)
            if (
                rows.height != self.n_types * states.size * n_actions
                or coarse_rows.height != (self.n_types * n_coarse * n_actions)
                or codes.max(initial=0) >= n_coarse
            ):
                raise BehaviorInputError(
                    f"the stored habit-type tables for {part_key or 'all modes'} are incomplete or were"
                    " fitted on another state space: run the learn stage again"
                )
            self.type_tables_[part_key] = _TypeTables(
                states,
                self._array(rows, np.searchsorted(states, rows["state_key"].to_numpy()), states.size),
                self._array(coarse_rows, codes, n_coarse),
            )

    def _part_shares(self, member: pl.DataFrame) -> dict[str, pl.DataFrame]:
        """Share columns per premise (its own), per cohort and for the portfolio, of one mode's members."""
        return {
            "premise": _wide(member, ["premise_id"], self.n_types),
            "cohort": _level_shares(member, ["cohort"], self.n_types),
            "portfolio": _level_shares(member, [], self.n_types),
        }

    def _gather_shares(self, parts: dict[tuple, dict[str, pl.DataFrame]]) -> None:
        """``shares_`` from each mode's ``_part_shares``, with the mode columns added."""
        split = self.split_
        columns = dict.fromkeys(_share_columns(self.n_types), pl.Float64)
        keys = {"premise": {"premise_id": pl.Utf8}, "cohort": {"cohort": pl.Utf8}, "portfolio": {}}
        self.shares_ = {}
        for name, key in keys.items():
            empty = pl.DataFrame(schema={**dict.fromkeys(split, pl.Utf8), **key, **columns})
            frames = [
                levels[name].with_columns(_mode_columns(split, part_key)).select(empty.columns)
                for part_key, levels in parts.items()
            ]
            self.shares_[name] = pl.concat([empty, *frames], how="vertical_relaxed")

    def _array(self, rows: pl.DataFrame, cell: np.ndarray, n_cells: int) -> np.ndarray:
        """(n_types, n_cells, n_actions) probabilities from long type rows, whatever their order."""
        out = np.zeros((self.n_types, n_cells, len(self.actions)))
        out[
            rows["habit_type"].to_numpy() - 1,
            cell,
            action_index(rows["action"].to_numpy(), self.actions),
        ] = rows["probability"].to_numpy()
        return out

    def _own_scopes(self, cols: list) -> list[pl.DataFrame]:
        key = pl.format("type-{}", pl.col("habit_type")).alias("key")
        return [
            self.types_.select(pl.lit("type").alias("scope"), key, *cols),
            self.type_coarse_.select(pl.lit("type_coarse").alias("scope"), key, *cols),
        ]

    def _restore(
        self, scoped: dict[str, pl.DataFrame], empty: pl.DataFrame, membership: pl.DataFrame
    ) -> None:
        habit_type = pl.col("key").str.strip_prefix("type-").cast(pl.Int64).alias("habit_type")
        cols = [habit_type, *self.split_, "state_key", "action", "probability", "count"]
        self.types_ = scoped.get("type", empty).select(cols)
        self.type_coarse_ = scoped.get("type_coarse", empty).select(cols)
        self.membership_ = membership.select(*self.split_, *_MEMBERSHIP, "decisions")
        self._tables_from_rows()
        members = _parts(self.membership_, self.split_) if self.membership_.height else {}
        self._gather_shares({part_key: self._part_shares(member) for part_key, member in members.items()})

    def _predict(self, frame: pl.DataFrame) -> np.ndarray:
        """The stored rows' answers, replaced by the mixture wherever the premise's shares are known.

        A premise seen in the fit uses its own shares, any other its cohort's, or
        the portfolio's for a new cohort, at every state: the fitted and the
        reloaded model answer alike even where the premise logged nothing.
        """
        split, columns = self.split_, _share_columns(self.n_types)

        def renamed(name: str) -> list[pl.Expr]:
            return [pl.col(c).alias(f"{name}_{c}") for c in columns]

        shares = (
            frame.with_row_index("_row")
            .join(
                self.shares_["premise"].select(*split, "premise_id", *renamed("premise")),
                on=[*split, "premise_id"],
                how="left",
            )
            .join(
                self.shares_["cohort"].select(*split, "cohort", *renamed("cohort")),
                on=[*split, "cohort"],
                how="left",
            )
        )
        shares = (
            shares.join(self.shares_["portfolio"].select(*split, *renamed("portfolio")), on=split, how="left")
            if split
            else shares.join(self.shares_["portfolio"].select(renamed("portfolio")), how="cross")
        ).sort("_row")
        # Each level's shares are whole rows, so coalescing column by column takes a row from one level.
        shares = shares.select(
            pl.coalesce(f"premise_{c}", f"cohort_{c}", f"portfolio_{c}").alias(c) for c in columns
        )
        probs = np.full(frame.height, np.nan)
        answered = np.zeros(frame.height, dtype=bool)
        for part_key, tables in self.type_tables_.items():
            in_part = (
                frame.select(
                    pl.all_horizontal(True, *(pl.col(c) == v for c, v in zip(split, part_key, strict=True)))
                )
                .to_series()
                .to_numpy()
                & shares[columns[0]].is_not_null().to_numpy()
            )
            if not in_part.any():
                continue
            rows = frame.filter(pl.Series(in_part))
            keys = rows["state_key"].to_numpy().astype(np.int64)
            probs[in_part] = tables.predict_logged(
                shares.filter(pl.Series(in_part)).to_numpy(),
                keys,
                _coarse_code(self.space, keys),
                action_index(rows["action"].to_numpy(), self.actions),
            )
            answered |= in_part
        if not answered.all():
            # Rows of a mode without shares (or a model reloaded without its membership).
            probs[~answered] = super()._predict(frame.filter(pl.Series(~answered)))
        return probs


_MODELS: dict[str, type[BehaviorModel]] = {model.kind: model for model in (HabitTypes, CohortCounts)}
"""Behaviour models by the value of the ``behavior_model`` setting."""
BEHAVIOR_MODELS: tuple[str, ...] = tuple(_MODELS)
"""The values the ``behavior_model`` setting may take (the first is the default)."""


def _model_class(kind: str) -> type[BehaviorModel]:
    try:
        return _MODELS[kind]
    except KeyError:
        raise BehaviorInputError(
            f"unknown behaviour model {kind!r}: behavior_model must be one of {', '.join(BEHAVIOR_MODELS)}"
        ) from None


def tuning_steps(steps: pl.DataFrame, config) -> pl.DataFrame:
    """The steps 'auto' settings are chosen on: all of them, or those of ``behavior_tuning_premises``
    premises drawn with the seed when there are more.

    Choosing among a few numbers of types and strengths needs far fewer premises than a
    large portfolio has, and every candidate costs five fits (one per fold); the chosen
    model is then fitted on every premise.
    """
    premises = steps["premise_id"].unique().sort()
    limit = config.behavior_tuning_premises
    if premises.len() <= limit:
        return steps
    chosen = np.sort(np.random.default_rng(config.seed).choice(premises.len(), limit, replace=False))
    return steps.filter(pl.col("premise_id").is_in(premises.gather(chosen).implode()))


def fit_behavior(steps: pl.DataFrame, config) -> BehaviorModel:
    """Fit the model ``config.behavior_model`` names on every step; 'auto' settings take the best
    held-out likelihood on ``tuning_steps``."""
    return _model_class(config.behavior_model).tuned(tuning_steps(steps, config), config).fit(steps)


def load_behavior(
    tables: Mapping[str, pl.DataFrame],
    actions: tuple[int, ...] = DEFAULT_ACTIONS,
    space: StateSpace | None = None,
) -> BehaviorModel:
    """Rebuild a fitted model from the frames of its ``to_tables()`` (as kept in the warehouse or ledger).

    Parameters
    ----------
    tables : mapping of str to polars.DataFrame
        ``policy`` (the ``behavior_policy`` rows) and ``type`` (the ``behavior_type`` rows);
        extra columns such as the ledger's run_id are ignored.
    actions, space
        The action set and state space of the run (as in the config it was fitted with).

    Returns
    -------
    BehaviorModel
        Of the stored kind, giving the fitted model's probabilities, ``table()`` and ``membership()``.
    """
    missing = [name for name in BEHAVIOR_TABLES if name not in tables]
    if missing:
        raise BehaviorInputError(f"behaviour tables {missing} are missing: run the learn stage again")
    return BehaviorModel.from_table(tables["policy"], actions, space, tables["type"])
