"""Off-policy evaluation of candidate policies against the logged behaviour.

For each candidate, every logged step gets the target's probability of the
logged action (``pi``) and the behaviour model's (``b``); the estimators in
``pipeline.estimators`` turn those into values per premise, cohort and the
whole portfolio, with a paired bootstrap interval on savings, a high-confidence
lower bound and weight diagnostics.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from pipeline import estimators
from pipeline.behavior import BehaviorPolicy
from pipeline.config import Config
from pipeline.policies import action_index

SCOPES = (("premise", "premise_id"), ("cohort", "cohort"), ("portfolio", None))


@dataclass(frozen=True)
class Evaluation:
    """Ledger frames of one evaluation."""

    savings: pl.DataFrame
    policy: pl.DataFrame
    diagnostics: pl.DataFrame


def target_probabilities(steps: pl.DataFrame, table: np.ndarray, config: Config) -> np.ndarray:
    """Target probability of each logged action, shape (n_steps,)."""
    keys = steps["state_key"].to_numpy()
    return table[keys, action_index(steps["action"].to_numpy(), config.actions)]


def _scoped(frame: pl.DataFrame, column: str | None) -> pl.DataFrame:
    group = pl.col(column).cast(pl.Utf8) if column else pl.lit("portfolio")
    return frame.with_columns(group.alias("group"))


def _with_scope(frame: pl.DataFrame, scope: str) -> pl.DataFrame:
    return frame.with_columns(pl.lit(scope).alias("scope"), pl.col("group").alias("key")).drop("group")


def evaluate_policy(
    steps: pl.DataFrame,
    pi: np.ndarray,
    b: np.ndarray,
    days: pl.DataFrame,
    config: Config,
    estimator: str = "weighted_is",
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Savings rows and diagnostics of one target policy at every scope.

    Parameters
    ----------
    steps : polars.DataFrame
        Logged decision steps sorted by (episode_id, t), with reward (USD), kwh,
        recovery_kwh, premise_id and cohort.
    pi, b : numpy.ndarray
        Target and behaviour probabilities of each logged action, shape (n_steps,).
    days : polars.DataFrame
        premise_id, cohort and days_observed, for annualising.
    """
    base = steps.select(
        "episode_id",
        "t",
        "reward",
        "premise_id",
        "cohort",
        (-(pl.col("kwh") + pl.col("recovery_kwh"))).alias("neg_kwh"),
    ).with_columns(pl.Series("pi", pi), pl.Series("b", b))
    fn = getattr(estimators, estimator)
    returns = base.group_by("episode_id").agg(pl.col("reward").sum())["reward"]
    # Returns are costs (<= 0); the floor assumes no policy costs more than half again
    # the costliest logged episode. Stated in the README with the bound.
    bounds = (1.5 * float(returns.min()), 0.0)
    rows, diags = [], []
    for scope, column in SCOPES:
        frame = _scoped(base, column)
        usd = fn(frame)
        behavior = estimators.on_policy_value(frame).select(
            "group", pl.col("estimate").alias("value_behavior_usd")
        )
        kwh_frame = frame.with_columns(pl.col("neg_kwh").alias("reward"))
        kwh_policy = fn(kwh_frame).select("group", (-pl.col("estimate")).alias("kwh_policy"))
        kwh_behavior = estimators.on_policy_value(kwh_frame).select(
            "group", (-pl.col("estimate")).alias("kwh_behavior")
        )
        interval = estimators.bootstrap_interval(
            frame,
            fn,
            savings=True,
            level=config.confidence,
            n_replicates=config.bootstrap_replicates,
            seed=config.seed,
        ).select("group", "ci_low", "ci_high")
        bound = estimators.lower_bound(
            frame, return_bounds=bounds, savings=True, level=config.confidence, seed=config.seed
        ).select("group", pl.col("lower_bound").alias("lower_bound_usd"))
        scope_days = _scoped(days, column).group_by("group").agg(pl.col("days_observed").sum())
        diag = estimators.diagnostics(frame)
        joined = (
            usd.rename({"estimate": "value_policy_usd"})
            .join(behavior, on="group")
            .join(kwh_policy, on="group")
            .join(kwh_behavior, on="group")
            .join(interval, on="group")
            .join(bound, on="group")
            .join(scope_days, on="group", how="left")
            .join(diag.select("group", "n_unsupported_steps"), on="group", how="left")
        )
        per_year = pl.col("n_episodes") / pl.col("days_observed") * config.cooling_days_per_year
        rows.append(
            _with_scope(
                joined.with_columns(
                    (pl.col("value_policy_usd") - pl.col("value_behavior_usd")).alias(
                        "savings_usd_per_episode"
                    ),
                    ((pl.col("ess") >= config.min_ess) & (pl.col("n_unsupported_steps") == 0)).alias(
                        "support_ok"
                    ),
                ).with_columns(
                    (pl.col("savings_usd_per_episode") * per_year).alias("savings_usd_annual"),
                    ((pl.col("kwh_behavior") - pl.col("kwh_policy")) * per_year).alias("savings_kwh_annual"),
                ),
                scope,
            )
        )
        diags.append(_with_scope(diag, scope))
    savings = pl.concat(rows).with_columns(pl.lit(estimator).alias("estimator"))
    return savings, pl.concat(diags)


def evaluate_candidates(
    steps: pl.DataFrame, behavior: BehaviorPolicy, days: pl.DataFrame, config: Config
) -> Evaluation:
    """Evaluate every configured candidate rule, per mode (cooling and heating never mix)."""
    visits = steps.group_by("state_key").agg(pl.len().alias("visits"))
    savings, diags, policies = [], [], []
    for rule in config.candidates:
        table = rule.table(config.state, config.actions, config.target_epsilon)
        policies.append(policy_frame(rule.name, table, config).join(visits, on="state_key", how="left"))
        for mode in sorted(steps["mode"].unique()):
            in_mode = steps.filter(pl.col("mode") == mode)
            b = behavior.probabilities(in_mode)
            pi = target_probabilities(in_mode, table, config)
            s, d = evaluate_policy(in_mode, pi, b, days, config)
            tag = (pl.lit(rule.name).alias("policy_name"), pl.lit(mode).alias("mode"))
            savings.append(s.with_columns(*tag))
            diags.append(d.with_columns(*tag))
    columns = [
        "policy_name",
        "mode",
        "scope",
        "key",
        "estimator",
        "n_episodes",
        "value_behavior_usd",
        "value_policy_usd",
        "savings_usd_per_episode",
        "ci_low",
        "ci_high",
        "lower_bound_usd",
        "ess",
        "max_weight_share",
        "support_ok",
        "savings_usd_annual",
        "savings_kwh_annual",
    ]
    savings_frame = (
        pl.concat(savings)
        .select(*columns)
        .with_columns(
            pl.lit(config.comfort_penalty_usd_per_degree_hour).alias("comfort_penalty_usd_per_degree_hour")
        )
    )
    return Evaluation(
        savings=savings_frame,
        policy=pl.concat(policies).with_columns(pl.col("visits").fill_null(0)),
        diagnostics=pl.concat(diags).select(
            "policy_name", "mode", "scope", "key", pl.exclude("policy_name", "mode", "scope", "key")
        ),
    )


def policy_frame(name: str, table: np.ndarray, config: Config) -> pl.DataFrame:
    """Long form of a policy table: one row per (state_key, action) with its probability."""
    n_states, n_actions = table.shape
    return pl.DataFrame(
        {
            "policy_name": name,
            "scope": "portfolio",
            "key": "all",
            "state_key": np.repeat(np.arange(n_states, dtype=np.int64), n_actions),
            "action": np.tile(np.asarray(config.actions, dtype=np.int64), n_states),
            "probability": table.reshape(-1),
            "q_value": np.full(n_states * n_actions, np.nan),
        }
    )


def horizon_report(steps_by_choice: dict[str, pl.DataFrame], config: Config) -> pl.DataFrame:
    """Weight spread of each candidate under each decision-point choice (the curse of horizon).

    Parameters
    ----------
    steps_by_choice : dict of str to polars.DataFrame
        Decision steps built with each choice of decision points ('fixed', 'anchored').

    Returns
    -------
    polars.DataFrame
        decision_points, mode, policy_name, mean_decisions, n_episodes, ess, ess_share,
        max_weight_share and weight_max over the whole portfolio.
    """
    rows = []
    for choice, steps in steps_by_choice.items():
        behavior = BehaviorPolicy(config.behavior_prior_strength, config.behavior_floor, config.actions).fit(
            steps
        )
        for mode in sorted(steps["mode"].unique()):
            in_mode = steps.filter(pl.col("mode") == mode)
            b = behavior.probabilities(in_mode)
            decisions = in_mode.group_by("episode_id").len()["len"].mean()
            for rule in config.candidates:
                table = rule.table(config.state, config.actions, config.target_epsilon)
                frame = in_mode.select("episode_id", "t").with_columns(
                    pl.Series("pi", target_probabilities(in_mode, table, config)), pl.Series("b", b)
                )
                diag = estimators.diagnostics(frame).row(0, named=True)
                rows.append(
                    {
                        "decision_points": choice,
                        "mode": mode,
                        "policy_name": rule.name,
                        "mean_decisions": float(decisions),
                        "n_episodes": diag["n_episodes"],
                        "ess": diag["ess"],
                        "ess_share": diag["ess"] / diag["n_episodes"],
                        "max_weight_share": diag["max_weight_share"],
                        "weight_max": diag["weight_max"],
                    }
                )
    return pl.DataFrame(rows)
