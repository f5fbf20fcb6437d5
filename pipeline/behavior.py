"""Estimate how residents actually moved their setpoints: the behaviour policy.

Counts of logged actions per (premise, state) are scarce, so each premise's
estimate is shrunk toward its cohort's, the cohort's toward the portfolio's and
the portfolio's toward the uniform policy (hierarchical additive smoothing):

    p_portfolio(a|s) = (n_s,a + k / |A|) / (n_s + k)
    p_cohort(a|s)    = (n_c,s,a + k * p_portfolio(a|s)) / (n_c,s + k)
    p_premise(a|s)   = (n_p,s,a + k * p_cohort(a|s)) / (n_p,s + k)

with k = ``prior_strength``. A floor keeps every action's probability positive,
so no importance weight divides by zero; the floor is reported with the table.
When the steps carry a ``mode`` column (cool / heat) every level is kept apart per
mode, so heating and cooling behaviour are never pooled.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from pipeline.policies import DEFAULT_ACTIONS


class BehaviorInputError(ValueError):
    """Logged steps that cannot be used to estimate the behaviour policy."""


REQUIRED = ("premise_id", "cohort", "state_key", "action")
STRENGTH_GRID: tuple[float, ...] = (0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0)
"""Prior strengths tried when the strength is chosen by held-out likelihood."""


def held_out_log_likelihood(
    steps: pl.DataFrame,
    strengths: tuple[float, ...] = STRENGTH_GRID,
    floor: float = 0.01,
    actions: tuple[int, ...] = DEFAULT_ACTIONS,
    folds: int = 5,
    seed: int = 0,
) -> pl.DataFrame:
    """Mean held-out log-likelihood of the logged actions for each prior strength.

    Episodes (not steps) are assigned to ``folds`` folds at random, so the steps
    of one episode are never split between fitting and scoring.

    Returns
    -------
    polars.DataFrame
        prior_strength, log_likelihood (mean per held-out step, nats).
    """
    episodes = steps["episode_id"].unique().sort()
    fold_of = pl.DataFrame(
        {
            "episode_id": episodes,
            "fold": np.random.default_rng(seed).integers(0, folds, episodes.len()),
        }
    )
    tagged = steps.join(fold_of, on="episode_id")
    scores = []
    for strength in strengths:
        total, count = 0.0, 0
        for fold in range(folds):
            train = tagged.filter(pl.col("fold") != fold)
            test = tagged.filter(pl.col("fold") == fold)
            if train.is_empty() or test.is_empty():
                continue
            model = BehaviorPolicy(strength, floor, actions).fit(train)
            total += float(np.log(model.probabilities(test)).sum())
            count += test.height
        scores.append({"prior_strength": strength, "log_likelihood": total / max(count, 1)})
    return pl.DataFrame(scores)


def choose_strength(steps: pl.DataFrame, floor: float, actions: tuple[int, ...], seed: int) -> float:
    """The prior strength with the best held-out log-likelihood."""
    scores = held_out_log_likelihood(steps, floor=floor, actions=actions, seed=seed)
    return float(scores.sort("log_likelihood", descending=True)["prior_strength"][0])


class BehaviorPolicy:
    """Smoothed, hierarchically shrunk action frequencies per premise and state.

    Parameters
    ----------
    prior_strength : float
        Pseudo-count k pulling each level toward the one above it.
    floor : float
        Smallest probability given to any action, before renormalising.
    actions : tuple of int
        The action set, °C per decision in the setback direction.
    """

    def __init__(
        self, prior_strength: float = 5.0, floor: float = 0.01, actions: tuple[int, ...] = DEFAULT_ACTIONS
    ):
        self.prior_strength = prior_strength
        self.floor = floor
        self.actions = actions

    def fit(self, steps: pl.DataFrame, weight: np.ndarray | None = None) -> BehaviorPolicy:
        """Count logged actions; ``steps`` needs premise_id, cohort, state_key and action columns.

        ``weight`` (n_steps,), optional, counts each step that many times (a bootstrap
        replicate's multiplicities). Sets ``portfolio_``, ``cohort_`` and ``premise_``
        (frames of counts and probabilities).
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
        k = self.prior_strength
        self.split_ = ["mode"] if "mode" in steps.columns else []
        split = self.split_
        grid = pl.DataFrame({"action": list(self.actions)}, schema={"action": steps.schema["action"]})

        def counts(keys: list[str]) -> pl.DataFrame:
            keys = [*split, *keys]
            observed = steps.group_by([*keys, "state_key", "action"]).agg(
                pl.col("_weight").sum().alias("count")
            )
            states = observed.select([*keys, "state_key"]).unique()
            return (
                states.join(grid, how="cross")
                .join(observed, on=[*keys, "state_key", "action"], how="left")
                .with_columns(pl.col("count").fill_null(0))
                .with_columns(pl.col("count").sum().over([*keys, "state_key"]).alias("state_count"))
            )

        portfolio = counts([]).with_columns(
            ((pl.col("count") + k / len(self.actions)) / (pl.col("state_count") + k)).alias("probability")
        )
        cohort = self._shrink(counts(["cohort"]), portfolio, [*split, "state_key", "action"])
        premise_cohort = steps.select("premise_id", "cohort").unique()
        premise = self._shrink(
            counts(["premise_id"]).join(premise_cohort, on="premise_id"),
            cohort,
            [*split, "cohort", "state_key", "action"],
        )
        self.portfolio_ = self._floor(portfolio, [*split])
        self.cohort_ = self._floor(cohort, [*split, "cohort"])
        self.premise_ = self._floor(premise, [*split, "premise_id"])
        return self

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
        portfolio, then the uniform policy.
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
        return out.select(pl.coalesce("p1", "p2", "p3", pl.lit(uniform))).to_series().to_numpy()

    def table(self) -> pl.DataFrame:
        """The ledger's ``behavior_policy`` rows: scope, key, state_key, action, probability, count."""
        self._check_fitted()
        cols = [*self.split_, "state_key", "action", "probability", pl.col("count").cast(pl.Int64)]
        return (
            pl.concat(
                [
                    self.premise_.select(
                        pl.lit("premise").alias("scope"), pl.col("premise_id").alias("key"), *cols
                    ),
                    self.cohort_.select(
                        pl.lit("cohort").alias("scope"), pl.col("cohort").alias("key"), *cols
                    ),
                    self.portfolio_.select(
                        pl.lit("portfolio").alias("scope"), pl.lit("all").alias("key"), *cols
                    ),
                ]
            )
            .sort("scope", "key", *self.split_, "state_key", "action")
            .with_columns(
                pl.lit(self.prior_strength).alias("prior_strength"), pl.lit(self.floor).alias("floor")
            )
        )

    @classmethod
    def from_table(cls, table: pl.DataFrame, actions: tuple[int, ...] = DEFAULT_ACTIONS) -> BehaviorPolicy:
        """Rebuild a fitted policy from the rows ``table()`` produced (as kept in the warehouse)."""
        model = cls(
            prior_strength=float(table["prior_strength"][0]) if "prior_strength" in table.columns else 5.0,
            floor=float(table["floor"][0]) if "floor" in table.columns else 0.01,
            actions=actions,
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


def fit_behavior(steps: pl.DataFrame, config) -> BehaviorPolicy:
    """Fit the behaviour model with the configured strength, or the held-out best when 'auto'."""
    strength = config.behavior_prior_strength
    if strength == "auto":
        strength = choose_strength(steps, config.behavior_floor, config.actions, config.seed)
    return BehaviorPolicy(float(strength), config.behavior_floor, config.actions).fit(steps)
