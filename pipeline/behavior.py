"""Estimate how residents actually moved their setpoints: the behaviour policy.

Two models, both smoothed action counts:

**Habit types** (the default). Homes differ in habit (how deep they set back,
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
Cohort and portfolio rows use their members' average shares (the model of a
home not yet seen).

**Hierarchical counts** (``n_types=None``). Each premise's counts per state are
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
"""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, action_index


class BehaviorInputError(ValueError):
    """Logged steps that cannot be used to estimate the behaviour policy."""


REQUIRED = ("premise_id", "cohort", "state_key", "action")
STRENGTH_GRID: tuple[float, ...] = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0)
"""Prior strengths tried when the counts model's strength is chosen by held-out likelihood."""
TYPES_GRID: tuple[int, ...] = (1, 2, 3, 4, 6, 8)
"""Numbers of habit types tried when the number is chosen by held-out likelihood."""


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
        rng = np.random.default_rng(self.seed)
        best = None
        # A few restarts from random memberships: EM finds a local optimum; keep the likeliest.
        for _ in range(restarts if self.n_types > 1 else 1):
            shares = rng.dirichlet(np.ones(self.n_types), n_premises)
            previous = -np.inf
            for _ in range(iterations):
                tables = self._tables(owner, cell_action, count, shares, n_cells)
                shares, loglik = self._memberships(owner, cell_action, count, tables[1], shares, n_premises)
                if loglik - previous < 1e-7 * max(1.0, abs(loglik)):
                    break
                previous = loglik
            if best is None or loglik > best[0]:
                best = (loglik, shares, tables)
        self.loglik_, self.shares_, (self.coarse_tables_, self.tables_, self.counts_) = best
        return self

    def _tables(self, owner, cell_action, count, shares, n_cells):
        """M step: each type's smoothed tables from the share-weighted counts."""
        k, n_actions, n_types = self.strength, self.n_actions, self.n_types
        offsets = (np.arange(n_types) * n_cells * n_actions)[None, :]
        counts = np.bincount(
            (cell_action[:, None] + offsets).ravel(),
            (shares[owner] * count[:, None]).ravel(),
            n_types * n_cells * n_actions,
        ).reshape(n_types, n_cells, n_actions)
        coarse_counts = np.zeros((n_types, self.n_coarse, n_actions))
        np.add.at(coarse_counts, (slice(None), self.cell_coarse_), counts)
        coarse_tables = (coarse_counts + k * self.portfolio_coarse_) / (
            coarse_counts.sum(2, keepdims=True) + k
        )
        tables = (counts + k * coarse_tables[:, self.cell_coarse_]) / (counts.sum(2, keepdims=True) + k)
        return self._floor(coarse_tables), self._floor(tables), counts

    def _floor(self, tables: np.ndarray) -> np.ndarray:
        floored = np.maximum(tables, self.floor)
        return floored / floored.sum(-1, keepdims=True)

    def _memberships(self, owner, cell_action, count, tables, shares, n_premises):
        """E step: each premise's posterior type shares, and the total log-likelihood."""
        log_tables = np.log(tables.reshape(self.n_types, -1))
        log_cell = log_tables[:, cell_action].T * count[:, None]
        offsets = (np.arange(self.n_types) * n_premises)[None, :]
        loglik = (
            np.bincount(
                (owner[:, None] + offsets).ravel(order="F"),
                log_cell.ravel(order="F"),
                self.n_types * n_premises,
            )
            .reshape(self.n_types, n_premises)
            .T
        )
        loglik = loglik + np.log(np.maximum(shares.mean(0), 1e-300))
        top = loglik.max(1, keepdims=True)
        joint = np.exp(loglik - top)
        total = joint.sum(1, keepdims=True)
        return joint / total, float((top + np.log(total)).sum())

    def type_probabilities(self, state: np.ndarray, coarse: np.ndarray) -> np.ndarray:
        """Each type's action probabilities at the given states, (n_types, n, n_actions)."""
        at = np.searchsorted(self.states_, state)
        at = np.minimum(at, self.states_.size - 1)
        seen = self.states_[at] == state
        return np.where(seen[None, :, None], self.tables_[:, at], self.coarse_tables_[:, coarse])

    def predict(self, shares: np.ndarray, state: np.ndarray, coarse: np.ndarray) -> np.ndarray:
        """Mixture probabilities (n, n_actions) for steps with type shares ``shares`` (n, n_types)."""
        return np.einsum("nz,zna->na", shares, self.type_probabilities(state, coarse))


def _coarse_code(space: StateSpace, state_key: np.ndarray) -> np.ndarray:
    """The coarse state of each key: (setback offset, decisions left), in 0..n_coarse-1."""
    f = space.decode(state_key)
    return (f["offset"] - space.offset_min) * space.steps_left_cap + f["steps_left"] - 1


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
    wide = shares.pivot(on="habit_type", index=keys, values="share", sort_columns=True)
    columns = [f"share_{z}" for z in range(1, n_types + 1)]
    return wide.rename(dict(zip([str(z) for z in range(1, n_types + 1)], columns, strict=True))).select(
        *level, *columns
    )


def _n_coarse(space: StateSpace) -> int:
    return (space.offset_max - space.offset_min + 1) * space.steps_left_cap


def held_out_log_likelihood(
    steps: pl.DataFrame,
    candidates: dict[str, BehaviorPolicy] | None = None,
    folds: int = 5,
    seed: int = 0,
) -> pl.DataFrame:
    """Mean held-out log-likelihood of the logged actions under each candidate model.

    Episodes (not steps) are assigned to ``folds`` folds at random, so the steps
    of one episode are never split between fitting and scoring; a premise's other
    episodes stay in the fit, as when the model is used.

    Parameters
    ----------
    candidates : dict of str to BehaviorPolicy, optional
        Unfitted models by label; default: the counts model at each strength in
        ``STRENGTH_GRID``.

    Returns
    -------
    polars.DataFrame
        model (the label), log_likelihood (mean per held-out step, nats).
    """
    if candidates is None:
        candidates = {str(k): BehaviorPolicy(prior_strength=k) for k in STRENGTH_GRID}
    episodes = steps["episode_id"].unique().sort()
    fold_of = pl.DataFrame(
        {
            "episode_id": episodes,
            "fold": np.random.default_rng(seed).integers(0, folds, episodes.len()),
        }
    )
    tagged = steps.join(fold_of, on="episode_id")
    scores = []
    for label, candidate in candidates.items():
        total, count = 0.0, 0
        for fold in range(folds):
            train = tagged.filter(pl.col("fold") != fold)
            test = tagged.filter(pl.col("fold") == fold)
            if train.is_empty() or test.is_empty():
                continue
            model = candidate.clone().fit(train)
            total += float(np.log(model.probabilities(test)).sum())
            count += test.height
        scores.append({"model": label, "log_likelihood": total / max(count, 1)})
    return pl.DataFrame(scores)


class BehaviorPolicy:
    """Behaviour probabilities per premise and state: habit-type mixture or hierarchical counts.

    Parameters
    ----------
    prior_strength : float
        Pseudo-count k pulling each table toward the one above it.
    floor : float
        Smallest probability given to any action, before renormalising.
    actions : tuple of int
        The action set, °C per decision in the setback direction.
    n_types : int, optional
        Number of habit types; None fits the hierarchical counts model instead.
    space : StateSpace, optional
        How state keys decode (for the coarse state of the types model).
    seed : int
        Seed of the types model's random starting memberships.
    """

    def __init__(
        self,
        prior_strength: float = 5.0,
        floor: float = 0.01,
        actions: tuple[int, ...] = DEFAULT_ACTIONS,
        n_types: int | None = None,
        space: StateSpace | None = None,
        seed: int = 0,
    ):
        self.prior_strength = prior_strength
        self.floor = floor
        self.actions = actions
        self.n_types = n_types
        self.space = space or StateSpace()
        self.seed = seed

    def clone(self) -> BehaviorPolicy:
        """An unfitted model with the same parameters."""
        return BehaviorPolicy(
            self.prior_strength, self.floor, self.actions, self.n_types, self.space, self.seed
        )

    def fit(self, steps: pl.DataFrame, weight: np.ndarray | None = None) -> BehaviorPolicy:
        """Estimate from logged steps with premise_id, cohort, state_key and action columns.

        ``weight`` (n_steps,), optional, counts each step that many times (a bootstrap
        replicate's multiplicities). Sets ``portfolio_``, ``cohort_`` and ``premise_``
        (frames of counts and probabilities); the types model also sets ``types_``
        (each type's table) and ``membership_`` (each premise's type shares).
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
        if self.n_types is not None and not (isinstance(self.n_types, int) and self.n_types >= 1):
            raise BehaviorInputError(f"n_types must be a whole number >= 1 or None, got {self.n_types!r}")

        steps = steps.with_columns(
            pl.Series("_weight", np.ones(steps.height) if weight is None else np.asarray(weight, dtype=float))
        )
        self.split_ = ["mode"] if "mode" in steps.columns else []
        if self.n_types is None:
            self._fit_counts(steps)
        else:
            self._fit_types(steps)
        return self

    def _counts(self, steps: pl.DataFrame, keys: list[str]) -> pl.DataFrame:
        """Weighted action counts per (keys, state), every action listed, with the state's total."""
        keys = [*self.split_, *keys]
        grid = pl.DataFrame({"action": list(self.actions)}, schema={"action": steps.schema["action"]})
        observed = steps.group_by([*keys, "state_key", "action"]).agg(pl.col("_weight").sum().alias("count"))
        states = observed.select([*keys, "state_key"]).unique()
        return (
            states.join(grid, how="cross")
            .join(observed, on=[*keys, "state_key", "action"], how="left")
            .with_columns(pl.col("count").fill_null(0))
            .with_columns(pl.col("count").sum().over([*keys, "state_key"]).alias("state_count"))
        )

    def _fit_counts(self, steps: pl.DataFrame) -> None:
        k, split = self.prior_strength, self.split_
        portfolio = self._counts(steps, []).with_columns(
            ((pl.col("count") + k / len(self.actions)) / (pl.col("state_count") + k)).alias("probability")
        )
        cohort = self._shrink(self._counts(steps, ["cohort"]), portfolio, [*split, "state_key", "action"])
        premise_cohort = steps.select("premise_id", "cohort").unique()
        premise = self._shrink(
            self._counts(steps, ["premise_id"]).join(premise_cohort, on="premise_id"),
            cohort,
            [*split, "cohort", "state_key", "action"],
        )
        self.portfolio_ = self._floor(portfolio, [*split])
        self.cohort_ = self._floor(cohort, [*split, "cohort"])
        self.premise_ = self._floor(premise, [*split, "premise_id"])

    def _fit_types(self, steps: pl.DataFrame) -> None:
        split = self.split_
        parts = steps.partition_by(split, as_dict=True) if split else {(): steps}
        self.mixtures_: dict[tuple, tuple[_TypeMixture, dict[str, int]]] = {}
        frames: dict[str, list[pl.DataFrame]] = {
            name: [] for name in ("premise", "cohort", "portfolio", "types", "member")
        }
        # One fit per mode (cool / heat): at most two passes, each over whole arrays.
        for part_key, part in parts.items():
            mode_cols = [pl.lit(v).alias(c) for c, v in zip(split, part_key, strict=True)]
            premises = part["premise_id"].unique().sort()
            code_of = dict(zip(premises.to_list(), range(premises.len()), strict=True))
            state = part["state_key"].to_numpy().astype(np.int64)
            mixture = _TypeMixture(
                self.n_types,
                self.prior_strength,
                self.floor,
                len(self.actions),
                _n_coarse(self.space),
                self.seed,
            ).fit(
                part["premise_id"].replace_strict(code_of, return_dtype=pl.Int64).to_numpy(),
                state,
                _coarse_code(self.space, state),
                action_index(part["action"].to_numpy(), self.actions),
                part["_weight"].to_numpy(),
                premises.len(),
            )
            self.mixtures_[part_key] = (mixture, code_of)

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
            frames["member"].append(member.with_columns(mode_cols))
            for name, level in (("premise", ["premise_id"]), ("cohort", ["cohort"]), ("portfolio", [])):
                counts = self._counts(part, level).drop(*split)
                cells = counts.select(*level, "state_key").unique().sort(*level, "state_key")
                keys = cells["state_key"].to_numpy().astype(np.int64)
                shares = _level_shares(member, level, self.n_types)
                on_cells = (
                    cells.join(shares, on=level, how="left") if level else cells.join(shares, how="cross")
                )
                probs = mixture.predict(
                    on_cells.select(shares.drop(*level).columns).to_numpy(),
                    keys,
                    _coarse_code(self.space, keys),
                )
                frames[name].append(
                    self._long(cells, probs, part.schema["action"])
                    .join(counts, on=[*level, "state_key", "action"], how="left")
                    .with_columns(pl.col("count").fill_null(0), *mode_cols)
                )
            type_cells = pl.DataFrame(
                {
                    "habit_type": np.repeat(np.arange(1, self.n_types + 1), mixture.states_.size),
                    "state_key": np.tile(mixture.states_, self.n_types),
                }
            ).with_columns(pl.col("state_key").cast(part.schema["state_key"]))
            frames["types"].append(
                self._long(
                    type_cells, mixture.tables_.reshape(-1, len(self.actions)), part.schema["action"]
                ).with_columns(pl.Series("count", mixture.counts_.ravel()), *mode_cols)
            )
        self.premise_, self.cohort_, self.portfolio_, self.types_ = (
            pl.concat(frames[name]) for name in ("premise", "cohort", "portfolio", "types")
        )
        self.membership_ = pl.concat(frames["member"]).select(
            *split, "premise_id", "cohort", "habit_type", "share", "decisions"
        )

    def _long(self, cells: pl.DataFrame, probs: np.ndarray, action_dtype: pl.DataType) -> pl.DataFrame:
        """One row per cell and action from a (n_cells, n_actions) probability matrix."""
        n_actions = len(self.actions)
        return cells[np.repeat(np.arange(cells.height), n_actions)].with_columns(
            pl.Series("action", np.tile(np.asarray(self.actions), cells.height)).cast(action_dtype),
            pl.Series("probability", probs.ravel()),
        )

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

    def probabilities(self, steps: pl.DataFrame, column: str = "action") -> np.ndarray:
        """Behaviour probability of the action in ``column`` for each step, shape (n_steps,).

        Steps of a (premise, state) never logged fall back to the cohort, then the
        portfolio, then the uniform policy (a types model fitted in this process
        answers from the premise's own types instead).
        """
        self._check_fitted()
        split = self.split_
        frame = steps.select(*split, "premise_id", "cohort", "state_key", pl.col(column).alias("action"))
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
        probs = out.select(pl.coalesce("p1", "p2", "p3", pl.lit(uniform))).to_series().to_numpy().copy()
        # A fitted types model knows each premise's shares, so it also answers for states the
        # premise never logged (held-out episodes) from its own types rather than the cohort.
        for part_key, (mixture, code_of) in getattr(self, "mixtures_", {}).items():
            in_part = (
                frame.select(
                    pl.all_horizontal(True, *(pl.col(c) == v for c, v in zip(split, part_key, strict=True)))
                    & pl.col("premise_id").is_in(list(code_of))
                )
                .to_series()
                .to_numpy()
            )
            if not in_part.any():
                continue
            rows = frame.filter(pl.Series(in_part))
            keys = rows["state_key"].to_numpy().astype(np.int64)
            shares = mixture.shares_[rows["premise_id"].replace_strict(code_of).to_numpy()]
            matrix = mixture.predict(shares, keys, _coarse_code(self.space, keys))
            probs[in_part] = matrix[
                np.arange(rows.height), action_index(rows["action"].to_numpy(), self.actions)
            ]
        return probs

    def table(self) -> pl.DataFrame:
        """The ledger's ``behavior_policy`` rows: scope, key, state_key, action, probability, count.

        Scopes are premise, cohort and portfolio, plus one ``type`` scope per habit type
        (key ``type-1``, ...) for the types model, whose counts are expected decisions.
        """
        self._check_fitted()
        cols = [*self.split_, "state_key", "action", "probability", pl.col("count").round(0).cast(pl.Int64)]
        parts = [
            self.premise_.select(pl.lit("premise").alias("scope"), pl.col("premise_id").alias("key"), *cols),
            self.cohort_.select(pl.lit("cohort").alias("scope"), pl.col("cohort").alias("key"), *cols),
            self.portfolio_.select(pl.lit("portfolio").alias("scope"), pl.lit("all").alias("key"), *cols),
        ]
        if self.n_types is not None:
            key = pl.format("type-{}", pl.col("habit_type"))
            parts.append(self.types_.select(pl.lit("type").alias("scope"), key.alias("key"), *cols))
        return (
            pl.concat(parts)
            .sort("scope", "key", *self.split_, "state_key", "action")
            .with_columns(
                pl.lit(self.prior_strength).alias("prior_strength"),
                pl.lit(self.floor).alias("floor"),
                pl.lit(self.n_types, dtype=pl.Int64).alias("n_types"),
            )
        )

    def membership(self) -> pl.DataFrame:
        """The ledger's ``behavior_type`` rows: each premise's share of each habit type.

        Empty (same columns) for the counts model, so the ledger's view always reads.
        """
        self._check_fitted()
        if hasattr(self, "membership_"):
            return self.membership_
        schema = {"premise_id": pl.Utf8, "cohort": pl.Utf8, "habit_type": pl.Int64, "share": pl.Float64}
        return pl.DataFrame(schema={**dict.fromkeys(self.split_, pl.Utf8), **schema, "decisions": pl.Float64})

    @classmethod
    def from_table(
        cls, table: pl.DataFrame, actions: tuple[int, ...] = DEFAULT_ACTIONS, space: StateSpace | None = None
    ) -> BehaviorPolicy:
        """Rebuild a fitted policy from the rows ``table()`` produced (as kept in the warehouse).

        Probabilities come from the stored premise, cohort and portfolio rows, so they
        match the fitted model on every logged (premise, state).
        """
        model = cls(
            prior_strength=float(table["prior_strength"][0]) if "prior_strength" in table.columns else 5.0,
            floor=float(table["floor"][0]) if "floor" in table.columns else 0.01,
            actions=actions,
            n_types=table["n_types"][0] if "n_types" in table.columns else None,
            space=space,
        )
        model.split_ = ["mode"] if "mode" in table.columns else []
        cols = [*model.split_, "state_key", "action", "probability", "count"]
        by_scope = {
            scope: table.filter(pl.col("scope") == scope) for scope in ("premise", "cohort", "portfolio")
        }
        model.premise_ = by_scope["premise"].select(pl.col("key").alias("premise_id"), *cols)
        model.cohort_ = by_scope["cohort"].select(pl.col("key").alias("cohort"), *cols)
        model.portfolio_ = by_scope["portfolio"].select(*cols)
        return model

    def _check_fitted(self) -> None:
        if not hasattr(self, "premise_"):
            raise BehaviorInputError("call fit() before asking for probabilities")


STRENGTHS_FOR_TYPES: tuple[float, ...] = (2.0, 5.0, 10.0, 20.0)
"""Prior strengths tried for the types model when the strength is chosen by held-out likelihood."""


def _best(steps: pl.DataFrame, candidates: dict[str, BehaviorPolicy], seed: int) -> str:
    """Label of the candidate with the best held-out log-likelihood (the first of any tie)."""
    scores = held_out_log_likelihood(steps, candidates, seed=seed)
    return str(scores.sort("log_likelihood", descending=True, maintain_order=True)["model"][0])


def fit_behavior(steps: pl.DataFrame, config) -> BehaviorPolicy:
    """Fit the configured behaviour model; 'auto' settings take the best held-out likelihood.

    For the types model the number of types is chosen first (at the configured
    strength, or 5 when that is 'auto'), then the strength at that number.
    """
    strength, floor, actions = config.behavior_prior_strength, config.behavior_floor, config.actions
    if config.behavior_model == "counts":
        if strength == "auto":
            grid = {str(k): BehaviorPolicy(k, floor, actions) for k in STRENGTH_GRID}
            strength = float(_best(steps, grid, config.seed))
        return BehaviorPolicy(float(strength), floor, actions).fit(steps)

    def types_model(n_types: int, k: float) -> BehaviorPolicy:
        return BehaviorPolicy(k, floor, actions, n_types=n_types, space=config.state, seed=config.seed)

    n_types = config.behavior_types
    start = 5.0 if strength == "auto" else float(strength)
    if n_types == "auto":
        n_types = int(_best(steps, {str(z): types_model(z, start) for z in TYPES_GRID}, config.seed))
    if strength == "auto":
        grid = {str(k): types_model(n_types, k) for k in STRENGTHS_FOR_TYPES}
        strength = float(_best(steps, grid, config.seed))
    return types_model(int(n_types), float(strength)).fit(steps)
