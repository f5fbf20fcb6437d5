"""Off-policy evaluation of candidate policies against the logged behaviour.

For each candidate, every logged step gets the target's probability of the
logged action (``pi``) and the behaviour model's (``b``); the estimators in
``pipeline.estimators`` turn those into values per premise, cohort and the
whole portfolio, with a paired bootstrap interval on savings, a high-confidence
lower bound and weight diagnostics. Several estimators are reported side by
side; one is marked recommended, and any estimate whose evidence is too thin
(low effective sample size, one episode carrying the weight, or actions the
residents never took) says so instead of giving a number.

Per-premise savings are also shrunk toward their cohort's (empirical Bayes: the
weight on the premise's own estimate is tau^2 / (tau^2 + se^2), with tau^2 the
between-premise variance left after the sampling variance), and the shrinkage
is reported beside the premise's own figure, in columns of its own.

Every annual figure is its row's per-episode figure times the row's
``episodes_per_year``, so the two can never disagree in sign.
"""

from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist

import numpy as np
import polars as pl

from pipeline import estimators
from pipeline.behavior import BehaviorModel
from pipeline.config import Config
from pipeline.estimators.registry import off_policy_estimator
from pipeline.policies import action_index
from pipeline.qmodel import FittedQ
from pipeline.rules import Candidate, candidates_for

SCOPES = (("premise", "premise_id"), ("cohort", "cohort"), ("portfolio", None))
STATUS_OK, STATUS_THIN = "ok", "insufficient_evidence"


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


def _model_columns(steps: pl.DataFrame, table: np.ndarray, reward: str, config: Config) -> pl.DataFrame:
    """q_hat and v_hat from fitted Q evaluation of the target on ``reward``."""
    fitted = FittedQ(config.state, config.actions).fit(
        steps.with_columns(pl.col(reward).alias("reward")), table
    )
    q_hat, v_hat = fitted.values(steps)
    return pl.DataFrame({"q_hat": q_hat, "v_hat": v_hat})


def behavior_replicates(
    steps: pl.DataFrame, behavior: BehaviorModel, config: Config
) -> tuple[np.ndarray, np.ndarray]:
    """Poisson episode multiplicities and the behaviour model re-fitted on each resample.

    The re-fits are a loop over replicates (each a whole fit of the model); the draws are
    ``estimators.frame_multiplicity``'s, the ones every other interval uses.

    Returns
    -------
    multiplicity : numpy.ndarray, shape (n_replicates, n_episodes)
    probabilities : numpy.ndarray, shape (n_replicates, n_steps)
        Re-fitted behaviour probability of each logged action, per replicate.
    """
    episode = steps["episode_id"].to_numpy()
    code = np.cumsum(np.r_[True, episode[1:] != episode[:-1]]) - 1
    # The same per-episode draws as the plain bootstrap (seeded by run seed and episode id).
    multiplicity = estimators.frame_multiplicity(steps, config.bootstrap_replicates, config.seed).astype(
        float
    )
    probabilities = np.empty((config.bootstrap_replicates, steps.height))
    # One re-fit per replicate: a bounded loop, each fit a handful of columnar group-bys.
    for r in range(config.bootstrap_replicates):
        probabilities[r] = behavior.clone().fit(steps, multiplicity[r, code]).probabilities(steps)
    return multiplicity, probabilities


def evaluate_policy(
    steps: pl.DataFrame,
    pi: np.ndarray,
    b: np.ndarray,
    days: pl.DataFrame,
    config: Config,
    table: np.ndarray | None = None,
    refit: tuple[np.ndarray, np.ndarray] | None = None,
    multiplicity: np.ndarray | None = None,
    behavior_sums: tuple[estimators.ReplicateSums, estimators.ReplicateSums] | None = None,
    season_days: int | None = None,
    behavior_comfort: estimators.ReplicateSums | None = None,
) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Savings rows (one per scope, group and estimator) and diagnostics of one target policy.

    At each scope the episodes of a group (a premise, a cohort, the portfolio) are
    pooled into one estimate. Pooling was checked against stratifying by premise
    (averaging per-premise estimates) on simulated lakes with known truth: with
    about fifty episodes per premise, per-premise self-normalisation is biased
    by more than its bootstrap interval shows, while the pooled weighted
    estimate's interval covered the truth (see DEVELOPERS.md, "Choosing the
    behaviour model and the estimator").

    Each estimator passes over the episodes once, for the premises: their numerator and
    denominator sums, for the point estimate and every bootstrap replicate, are added up
    into each cohort's and the portfolio's (``estimators.combine_sums``), so the pooled
    figures are what a sum over shards of premises gives.

    The recommended estimator's rows also carry the bill alone (energy cost, no comfort
    penalty), the comfort cost (°C-hours of setback in force after the return, and those
    priced at the comfort penalty) and kWh, each with its interval from the same bootstrap
    draws (``_measure_columns``).

    Parameters
    ----------
    steps : polars.DataFrame
        Logged decision steps sorted by (episode_id, t), with state_key, action,
        reward (USD), kwh, recovery_kwh, cost_usd, recovery_cost_usd,
        comfort_degree_hours, premise_id and cohort.
    pi, b : numpy.ndarray
        Target and behaviour probabilities of each logged action, shape (n_steps,).
    days : polars.DataFrame
        premise_id, cohort and days_observed, for annualising.
    table : numpy.ndarray, optional
        The target's probability table (n_states, n_actions), needed for the
        doubly robust estimator's Q model.
    refit : tuple of numpy.ndarray, optional
        ``behavior_replicates`` output; when given, weighted IS intervals come
        from a bootstrap that re-fits the behaviour model in every replicate.
    multiplicity : numpy.ndarray, optional
        (bootstrap_replicates, n_episodes) Poisson draws of the steps' episodes; by default
        ``estimators.frame_multiplicity`` of the steps with the configured seed (pass it to
        draw once for several target policies).
    behavior_sums : tuple of estimators.ReplicateSums, optional
        ``on_policy_sums`` of the same steps and draws (USD, then kWh): the logged policy's
        value does not depend on the target, so several targets can share it.
    season_days : int, optional
        Days of the season annual figures cover (default ``cooling_days_per_year``).
    behavior_comfort : estimators.ReplicateSums, optional
        ``on_policy_comfort_sums`` of the same steps and draws, shared like ``behavior_sums``.
    """
    base = steps.select(
        "episode_id",
        "t",
        "reward",
        "premise_id",
        "cohort",
        (-(pl.col("kwh") + pl.col("recovery_kwh"))).alias("neg_kwh"),
    ).with_columns(pl.Series("pi", pi), pl.Series("b", b))
    chosen = [off_policy_estimator(name) for name in config.estimators]
    names = [e.name for e in chosen if not e.needs_q_model or table is not None]
    usd_base, kwh_base = base, base.with_columns(pl.col("neg_kwh").alias("reward"))
    if any(e.needs_q_model and e.name in names for e in chosen):
        usd_base = pl.concat([base, _model_columns(steps, table, "reward", config)], how="horizontal")
        neg_kwh = steps.with_columns((-(pl.col("kwh") + pl.col("recovery_kwh"))).alias("neg_kwh"))
        kwh_base = pl.concat([kwh_base, _model_columns(neg_kwh, table, "neg_kwh", config)], how="horizontal")
    if multiplicity is None:
        multiplicity = estimators.frame_multiplicity(steps, config.bootstrap_replicates, config.seed)
    returns = base.group_by("episode_id").agg(pl.col("reward").sum())["reward"]
    # Returns are costs (<= 0); the floor assumes no policy costs more than half again
    # the costliest logged episode (stated in the README beside the bound).
    bounds = (1.5 * float(returns.min()), 0.0)
    usd_premise, kwh_premise = _scoped(usd_base, "premise_id"), _scoped(kwh_base, "premise_id")
    recommended = config.recommended_estimator
    sums = {
        name: _premise_sums(usd_premise, kwh_premise, name, multiplicity, name == recommended)
        for name in names
    }
    sums["on_policy_value"] = behavior_sums or on_policy_sums(steps, multiplicity)
    comfort = None
    if recommended in names:
        comfort = (
            _comfort_sums(steps, pi, b, table, multiplicity, config),
            behavior_comfort or on_policy_comfort_sums(steps, multiplicity),
        )
    premise_cohort = steps.select("premise_id", "cohort").unique()
    rows, diags = [], []
    for scope, column in SCOPES:
        key = _scope_key(premise_cohort, column)
        scoped = {
            name: tuple(part if key is None else estimators.combine_sums([part], key) for part in pair)
            for name, pair in sums.items()
        }
        usd_frame = _scoped(usd_base, column)
        behavior_usd, behavior_kwh = scoped["on_policy_value"]
        behavior_values = behavior_usd.values()
        behavior = pl.DataFrame({"group": behavior_usd.labels, "value_behavior_usd": behavior_values[0]})
        kwh_behavior = pl.DataFrame({"group": behavior_kwh.labels, "kwh_behavior": -behavior_kwh.values()[0]})
        bound = estimators.lower_bound(
            usd_frame, return_bounds=bounds, savings=True, level=config.confidence, seed=config.seed
        ).select("group", pl.col("lower_bound").alias("lower_bound_usd"))
        scope_days = _scoped(days, column).group_by("group").agg(pl.col("days_observed").sum())
        diag = estimators.diagnostics(usd_frame)
        measured = None
        if comfort is not None:
            scoped_comfort = tuple(p if key is None else estimators.combine_sums([p], key) for p in comfort)
            measured = _measure_columns(
                scoped[recommended], scoped["on_policy_value"], scoped_comfort, config
            )
        for name in names:
            usd, kwh = scoped[name]
            point = usd.frame()
            savings = usd.values() - behavior_values
            labels, point_savings, replicates = usd.labels, savings[0], savings[1:]
            if refit is not None and name == "weighted_is":
                labels, replicates = estimators.refit_weighted_is_replicates(usd_frame, *refit)
                by_label = dict(zip(usd.labels.to_list(), savings[0].tolist(), strict=True))
                point_savings = np.array([by_label[g] for g in labels])
            interval = _interval_and_bootstrap_bound(labels, point_savings, replicates, config)
            joined = (
                point.rename({"estimate": "value_policy_usd"})
                .join(behavior, on="group")
                .join(pl.DataFrame({"group": kwh.labels, "kwh_policy": -kwh.values()[0]}), on="group")
                .join(kwh_behavior, on="group")
                .join(interval, on="group")
                .join(bound, on="group")
                .join(scope_days, on="group", how="left")
                .join(diag.select("group", "n_unsupported_steps"), on="group", how="left")
                .with_columns(pl.lit(name).alias("estimator"))
            )
            if name == recommended and measured is not None:
                joined = joined.join(measured, on="group", how="left")
            else:
                joined = joined.with_columns(pl.lit(None, pl.Float64).alias(c) for c in MEASURE_COLUMNS)
            rows.append(_with_scope(joined, scope))
        diags.append(_with_scope(diag, scope))
    season = config.cooling_days_per_year if season_days is None else season_days
    return _finish_savings(pl.concat(rows), premise_cohort, config, season), pl.concat(diags)


# What the recommended estimator also reports, from the same draws as its savings interval:
# the energy bill alone, comfort (°C-hours of setback after the return) and kWh.
MEASURE_COLUMNS = [
    "bill_usd_behavior",
    "bill_usd_policy",
    "bill_savings_usd_per_episode",
    "bill_ci_low",
    "bill_ci_high",
    "bill_lower_bound_usd",
    "savings_kwh_ci_low",
    "savings_kwh_ci_high",
    "comfort_degree_hours_behavior",
    "comfort_degree_hours_policy",
    "comfort_degree_hours_ci_low",
    "comfort_degree_hours_ci_high",
    "comfort_change_degree_hours",
    "comfort_change_ci_low",
    "comfort_change_ci_high",
    "comfort_cost_usd_behavior",
    "comfort_cost_usd_policy",
    "comfort_cost_usd_ci_low",
    "comfort_cost_usd_ci_high",
]
"""Columns of the bill alone, kWh interval and comfort cost, filled on the recommended estimator's rows."""


def _comfort_frame(steps: pl.DataFrame, pi: np.ndarray, b: np.ndarray) -> pl.DataFrame:
    missing = [c for c in ("comfort_degree_hours",) if c not in steps.columns]
    if missing:
        raise estimators.EstimatorInputError(f"decision steps lack column(s) {missing} (see sql/step.sql)")
    return steps.select(
        "episode_id",
        "t",
        pl.col("premise_id").cast(pl.Utf8).alias("group"),
        pl.col("comfort_degree_hours").alias("reward"),
    ).with_columns(pl.Series("pi", pi), pl.Series("b", b))


def _comfort_sums(
    steps: pl.DataFrame,
    pi: np.ndarray,
    b: np.ndarray,
    table: np.ndarray | None,
    multiplicity: np.ndarray,
    config: Config,
) -> estimators.ReplicateSums:
    """The recommended estimator's sums per premise of the °C-hours of setback after the return."""
    frame = _comfort_frame(steps, pi, b)
    if off_policy_estimator(config.recommended_estimator).needs_q_model:
        frame = pl.concat(
            [frame, _model_columns(steps, table, "comfort_degree_hours", config)], how="horizontal"
        )
    return estimators.replicate_sums(frame, config.recommended_estimator, multiplicity)


def on_policy_comfort_sums(steps: pl.DataFrame, multiplicity: np.ndarray) -> estimators.ReplicateSums:
    """The logged policy's °C-hours of setback after the return, sums per premise with replicates."""
    ones = np.ones(steps.height)
    return estimators.replicate_sums(_comfort_frame(steps, ones, ones), "on_policy_value", multiplicity)


def _measure_columns(
    policy: tuple[estimators.ReplicateSums, estimators.ReplicateSums],
    logged: tuple[estimators.ReplicateSums, estimators.ReplicateSums],
    comfort: tuple[estimators.ReplicateSums, estimators.ReplicateSums],
    config: Config,
) -> pl.DataFrame:
    """The ``MEASURE_COLUMNS`` per group from (USD, kWh) sums of the policy and the logged policy and
    the (policy, logged) comfort sums, all over the same groups and draws.

    The bill alone is the penalised value plus the priced °C-hours, replicate by replicate: the
    reward is minus the bill minus price x °C-hours (``sql/step.sql``), and every estimator is
    linear in the reward for fixed weights (and, for doubly robust, a Q model linear in it).
    Intervals are percentile intervals of the replicates (the policy's value, or its difference
    from the logged policy's); the bill's one-sided bound is the (1 - confidence) quantile of its
    savings replicates, as for ``lower_bound_bootstrap_usd``.
    """
    price = config.comfort_penalty_usd_per_degree_hour
    labels = policy[0].labels
    comfort_policy, comfort_logged = comfort[0].values(), comfort[1].values()
    bill_policy = policy[0].values() + price * comfort_policy
    bill_logged = logged[0].values() + price * comfort_logged
    kwh_policy, kwh_logged = policy[1].values(), logged[1].values()

    def interval(replicated: np.ndarray, low: str, high: str) -> dict[str, np.ndarray]:
        found = estimators.percentile_interval(labels, replicated[0], replicated[1:], config.confidence)
        return {low: found["ci_low"].to_numpy(), high: found["ci_high"].to_numpy()}

    bill_savings = bill_policy - bill_logged
    bound = _interval_and_bootstrap_bound(labels, bill_savings[0], bill_savings[1:], config)
    policy_comfort = interval(comfort_policy, "comfort_degree_hours_ci_low", "comfort_degree_hours_ci_high")
    columns = {
        "group": labels,
        "bill_usd_behavior": -bill_logged[0],
        "bill_usd_policy": -bill_policy[0],
        "bill_savings_usd_per_episode": bill_savings[0],
        "bill_ci_low": bound["ci_low"].to_numpy(),
        "bill_ci_high": bound["ci_high"].to_numpy(),
        "bill_lower_bound_usd": bound["lower_bound_bootstrap_usd"].to_numpy(),
        # Both kWh values are negated (rewards), so policy minus logged is kWh saved.
        **interval(kwh_policy - kwh_logged, "savings_kwh_ci_low", "savings_kwh_ci_high"),
        "comfort_degree_hours_behavior": comfort_logged[0],
        "comfort_degree_hours_policy": comfort_policy[0],
        **policy_comfort,
        "comfort_change_degree_hours": comfort_policy[0] - comfort_logged[0],
        **interval(comfort_policy - comfort_logged, "comfort_change_ci_low", "comfort_change_ci_high"),
        "comfort_cost_usd_behavior": price * comfort_logged[0],
        "comfort_cost_usd_policy": price * comfort_policy[0],
        "comfort_cost_usd_ci_low": price * policy_comfort["comfort_degree_hours_ci_low"],
        "comfort_cost_usd_ci_high": price * policy_comfort["comfort_degree_hours_ci_high"],
    }
    return pl.DataFrame(columns).select("group", *MEASURE_COLUMNS)


BILL_NOTES = {
    "cool": "electric meter data: the whole bill effect of cooling",
    "heat": "electric meter data only: the gas a furnace burns is not in it, so a gas-heated home's"
    " bill effect is larger than shown",
}
"""What a savings row's USD and kWh cover, per mode (column ``bill_note``)."""


def _premise_sums(
    usd: pl.DataFrame, kwh: pl.DataFrame, name: str, multiplicity: np.ndarray, kwh_replicates: bool = False
) -> tuple[estimators.ReplicateSums, estimators.ReplicateSums]:
    """An estimator's sums per premise: USD for the point and every replicate, kWh for the point only
    (and every replicate too when ``kwh_replicates``, for the recommended estimator's kWh interval)."""
    return (
        estimators.replicate_sums(usd, name, multiplicity),
        estimators.replicate_sums(kwh, name, multiplicity if kwh_replicates else multiplicity[:0]),
    )


def on_policy_sums(
    steps: pl.DataFrame, multiplicity: np.ndarray
) -> tuple[estimators.ReplicateSums, estimators.ReplicateSums]:
    """The logged policy's value sums per premise, USD and kWh, both with replicates."""
    frame = _scoped(
        steps.select(
            "episode_id",
            "t",
            "reward",
            "premise_id",
            (-(pl.col("kwh") + pl.col("recovery_kwh"))).alias("neg_kwh"),
        ),
        "premise_id",
    )
    return _premise_sums(
        frame, frame.with_columns(pl.col("neg_kwh").alias("reward")), "on_policy_value", multiplicity, True
    )


def _scope_key(premise_cohort: pl.DataFrame, column: str | None) -> pl.DataFrame | None:
    """Each premise's group at a scope (columns group, key); None at premise scope (its own group)."""
    if column == "premise_id":
        return None
    key = pl.col(column) if column else pl.lit("portfolio")
    return premise_cohort.select(pl.col("premise_id").alias("group"), key.cast(pl.Utf8).alias("key"))


def _interval_and_bootstrap_bound(
    labels: np.ndarray, point: np.ndarray, replicates: np.ndarray, config: Config
) -> pl.DataFrame:
    """Two-sided percentile interval and the one-sided bootstrap lower bound, per group.

    The one-sided bound is the (1 - confidence) quantile of the savings replicates: the
    approximate high-confidence bound by bootstrap that Thomas, Theocharous and
    Ghavamzadeh (2015, "High confidence policy improvement") use beside their exact
    concentration bound. It is not guaranteed; ``lower_bound_usd`` is.
    """
    interval = estimators.percentile_interval(labels, point, replicates, config.confidence)
    usable = ~np.isnan(replicates).all(axis=0)
    bound = np.full(replicates.shape[1], np.nan)
    if usable.any():
        bound[usable] = estimators.nan_quantiles(replicates[:, usable], [1.0 - config.confidence])[0]
    return interval.select("group", "ci_low", "ci_high").with_columns(
        pl.Series("lower_bound_bootstrap_usd", bound)
    )


# Each per-episode figure and the annual figure made from it (times episodes_per_year).
_ANNUAL = {
    "savings_usd_per_episode": "savings_usd_annual",
    "savings_kwh_per_episode": "savings_kwh_annual",
    "shrunk_savings_usd_per_episode": "shrunk_savings_usd_annual",
    "shrunk_savings_kwh_per_episode": "shrunk_savings_kwh_annual",
    "bill_savings_usd_per_episode": "bill_savings_usd_annual",
    "bill_ci_low": "bill_ci_low_annual",
    "bill_ci_high": "bill_ci_high_annual",
    "savings_kwh_ci_low": "savings_kwh_ci_low_annual",
    "savings_kwh_ci_high": "savings_kwh_ci_high_annual",
    "comfort_change_degree_hours": "comfort_change_degree_hours_annual",
}
# A premise's own figure and its cohort-shrunk counterpart.
_SHRUNK = {
    "savings_usd_per_episode": "shrunk_savings_usd_per_episode",
    "savings_kwh_per_episode": "shrunk_savings_kwh_per_episode",
}


def _finish_savings(
    rows: pl.DataFrame, premise_cohort: pl.DataFrame, config: Config, season_days: int | None = None
) -> pl.DataFrame:
    """Savings, status, recommendation, shrinkage toward the cohort and annual figures.

    ``episodes_per_year`` is the scope's episodes per observed premise-day (``days_observed``,
    summed over the scope's premises) times the season length ``season_days`` (default
    ``cooling_days_per_year``), both kept on the row, and every annual figure is the
    per-episode figure beside it times that. A row with insufficient evidence hides its
    own figures, per episode and annual alike; a premise keeps its cohort-shrunk ones.
    """
    season = config.cooling_days_per_year if season_days is None else season_days
    for column in MEASURE_COLUMNS:
        if column not in rows.columns:
            rows = rows.with_columns(pl.lit(None, pl.Float64).alias(column))
    supported = (
        (pl.col("ess") >= config.min_ess)
        & (pl.col("n_unsupported_steps") == 0)
        & (pl.col("max_weight_share") <= config.max_weight_share)
        & pl.col("value_policy_usd").is_finite()
    )
    rows = rows.with_columns(
        (pl.col("value_policy_usd") - pl.col("value_behavior_usd")).alias("savings_usd_per_episode"),
        (pl.col("kwh_behavior") - pl.col("kwh_policy")).alias("savings_kwh_per_episode"),
        supported.alias("support_ok"),
        pl.when(supported).then(pl.lit(STATUS_OK)).otherwise(pl.lit(STATUS_THIN)).alias("status"),
        (pl.col("estimator") == config.recommended_estimator).alias("recommended"),
    )
    rows = _shrink_to_cohort(rows, premise_cohort, config)
    thin = pl.col("status") == STATUS_THIN
    hidden = [
        "savings_usd_per_episode",
        "ci_low",
        "ci_high",
        "lower_bound_bootstrap_usd",
        "savings_kwh_per_episode",
        *MEASURE_COLUMNS,
    ]
    # Outside premise scope the shrunk figure is the row's own figure, so it is hidden with it.
    hidden_shrunk = thin & (pl.col("scope") != "premise")
    per_year = pl.col("n_episodes") / pl.col("days_observed") * pl.col("season_days")
    return (
        rows.with_columns(pl.lit(season, pl.Int64).alias("season_days"))
        .with_columns(
            *(pl.when(thin).then(None).otherwise(pl.col(c)).alias(c) for c in hidden),
            *(pl.when(hidden_shrunk).then(None).otherwise(pl.col(c)).alias(c) for c in _SHRUNK.values()),
            per_year.alias("episodes_per_year"),
        )
        .with_columns(
            (pl.col(c) * pl.col("episodes_per_year")).alias(annual) for c, annual in _ANNUAL.items()
        )
    )


def _shrink_to_cohort(rows: pl.DataFrame, premise_cohort: pl.DataFrame, config: Config) -> pl.DataFrame:
    """Empirical-Bayes shrinkage of each premise's savings toward its cohort's (same estimator).

    The weight comes from the USD estimate and its interval; the kWh estimate is mixed
    with the cohort's in the same proportion, so both shrunk figures lean on the cohort
    equally (``shrinkage``).
    """
    z = NormalDist().inv_cdf(0.5 + config.confidence / 2)
    keys = ["cohort", "estimator"]
    savings = pl.col("savings_usd_per_episode")
    se2 = ((pl.col("ci_high") - pl.col("ci_low")) / (2 * z)) ** 2
    premises = (
        rows.filter(pl.col("scope") == "premise")
        .join(premise_cohort.select(pl.col("premise_id").alias("key"), "cohort"), on="key", how="left")
        .with_columns(se2.alias("se2"))
        .with_columns((savings.is_finite() & pl.col("se2").is_finite()).alias("usable"))
    )
    # Between-premise variance beyond what sampling noise explains (method of moments).
    spread = (
        premises.filter("usable")
        .group_by(keys)
        .agg((savings.var() - pl.col("se2").mean()).clip(lower_bound=0.0).alias("tau2"))
    )
    cohort_savings = rows.filter(pl.col("scope") == "cohort").select(
        pl.col("key").alias("cohort"), "estimator", *(pl.col(c).alias(f"cohort_{c}") for c in _SHRUNK)
    )
    weight = (
        pl.when(pl.col("usable"))
        .then(pl.col("tau2") / (pl.col("tau2") + pl.col("se2")))
        .otherwise(0.0)
        .fill_null(0.0)
        .fill_nan(0.0)
    )
    own = pl.col("own_weight")
    shrunk = (
        premises.join(spread, on=keys, how="left")
        .join(cohort_savings, on=keys, how="left")
        .with_columns(weight.alias("own_weight"))
        .with_columns(
            *(
                pl.when(own > 0)
                .then(own * pl.col(c) + (1 - own) * pl.col(f"cohort_{c}"))
                .otherwise(pl.col(f"cohort_{c}"))
                .alias(target)
                for c, target in _SHRUNK.items()
            ),
            (1 - own).alias("shrinkage"),
        )
        .drop("se2", "usable", "tau2", "own_weight", "cohort", *(f"cohort_{c}" for c in _SHRUNK))
    )
    others = rows.filter(pl.col("scope") != "premise").with_columns(
        *(pl.col(c).alias(target) for c, target in _SHRUNK.items()), pl.lit(0.0).alias("shrinkage")
    )
    return pl.concat([shrunk, others], how="diagonal_relaxed")


COLUMNS = [
    "policy_name",
    "mode",
    "scope",
    "key",
    "estimator",
    "recommended",
    "status",
    "n_episodes",
    "value_behavior_usd",
    "value_policy_usd",
    "savings_usd_per_episode",
    "ci_low",
    "ci_high",
    "lower_bound_usd",
    "lower_bound_bootstrap_usd",
    "shrunk_savings_usd_per_episode",
    "shrinkage",
    "ess",
    "max_weight_share",
    "support_ok",
    "n_unsupported_steps",
    "savings_kwh_per_episode",
    "shrunk_savings_kwh_per_episode",
    *MEASURE_COLUMNS,
    "days_observed",
    "season_days",
    "episodes_per_year",
    "savings_usd_annual",
    "savings_kwh_annual",
    "shrunk_savings_usd_annual",
    "shrunk_savings_kwh_annual",
    "bill_savings_usd_annual",
    "bill_ci_low_annual",
    "bill_ci_high_annual",
    "savings_kwh_ci_low_annual",
    "savings_kwh_ci_high_annual",
    "comfort_change_degree_hours_annual",
]


def applicable_premises(candidate: Candidate, days: pl.DataFrame) -> pl.Series | None:
    """Premise ids a candidate applies to, from ``days`` (premise_id, cohort, rate_plan_id); None: all."""
    if not candidate.scoped:
        return None
    return days.filter(pl.Series(candidate.applies(days)))["premise_id"]


def _restricted(bundle: tuple, premises: pl.Series) -> tuple:
    """A mode's shared inputs (steps, b, refit, draws, ``_logged_sums``) kept to the steps of ``premises``.

    The draws are per episode (seeded by the episode id), so keeping an episode's column keeps
    exactly the draws a frame of the kept episodes alone would get.
    """
    in_mode, b, refit, draws, _ = bundle
    keep = in_mode["premise_id"].is_in(premises.implode()).to_numpy()
    steps = in_mode.filter(pl.Series(keep))
    if steps.height == 0:
        return (steps, b[keep], None, draws[:, :0], None)
    episode = in_mode["episode_id"].to_numpy()
    kept_episodes = keep[np.r_[True, episode[1:] != episode[:-1]]]
    kept_draws = draws[:, kept_episodes]
    kept_refit = None if refit is None else (refit[0][:, kept_episodes], refit[1][:, keep])
    return steps, b[keep], kept_refit, kept_draws, _logged_sums(steps, kept_draws)


def _logged_sums(steps: pl.DataFrame, draws: np.ndarray) -> tuple:
    """The logged policy's (USD, kWh) sums and its comfort sums: every candidate of a mode shares them."""
    return on_policy_sums(steps, draws), on_policy_comfort_sums(steps, draws)


def season_days(config: Config, mode: str) -> int:
    """The configured season length annual figures of ``mode``'s episodes cover, days."""
    return config.heating_days_per_year if mode == "heat" else config.cooling_days_per_year


def days_in_mode(days: pl.DataFrame, mode: str) -> pl.DataFrame:
    """Each premise's observed days in ``mode`` when ``days`` has a mode column, else ``days`` as given."""
    if "mode" not in days.columns:
        return days
    return days.filter(pl.col("mode") == mode).drop("mode")


def evaluate_candidates(
    steps: pl.DataFrame,
    behavior: BehaviorModel,
    days: pl.DataFrame,
    config: Config,
    candidates: tuple[Candidate, ...] | None = None,
) -> Evaluation:
    """Evaluate every candidate, per mode (cooling and heating never mix).

    ``candidates`` default to the run's (``rules.candidates_for``). A candidate that applies
    to some cohorts or rate plans only is scored on the episodes of the premises it applies
    to (``applicable_premises``; ``days`` then needs rate_plan_id when it names rate plans):
    its cohort and portfolio rows pool those premises alone. ``days`` holds premise_id,
    cohort and days_observed, optionally per ``mode`` (the days the thermostat was in that
    mode), for annualising over the mode's season.
    """
    candidates = candidates_for(config) if candidates is None else candidates
    visits = steps.group_by("mode", "state_key").agg(pl.len().alias("visits"))
    savings, diags, policies = [], [], []
    # What every candidate of a mode shares: its steps, behaviour probabilities and bootstrap draws.
    modes = {}
    for mode in sorted(steps["mode"].unique()):
        in_mode = steps.filter(pl.col("mode") == mode)
        refit = behavior_replicates(in_mode, behavior, config) if config.bootstrap_refit_behavior else None
        draws = estimators.frame_multiplicity(in_mode, config.bootstrap_replicates, config.seed)
        logged = _logged_sums(in_mode, draws)
        modes[mode] = (in_mode, behavior.probabilities(in_mode), refit, draws, logged)
    for rule in candidates:
        table = rule.table
        premises = applicable_premises(rule, days)
        rule_days = days if premises is None else days.filter(pl.col("premise_id").is_in(premises.implode()))
        for mode, bundle in modes.items():
            in_mode, b, refit, draws, logged = bundle if premises is None else _restricted(bundle, premises)
            if in_mode.height == 0:
                continue
            q_model = FittedQ(config.state, config.actions).fit(in_mode, table)
            policies.append(
                policy_frame(rule.name, table, config, q_model.q_)
                .with_columns(pl.lit(mode).alias("mode"))
                .join(visits, on=["mode", "state_key"], how="left")
            )
            pi = target_probabilities(in_mode, table, config)
            s, d = evaluate_policy(
                in_mode,
                pi,
                b,
                days_in_mode(rule_days, mode),
                config,
                table,
                refit,
                draws,
                logged[0],
                season_days(config, mode),
                logged[1],
            )
            tag = (pl.lit(rule.name).alias("policy_name"), pl.lit(mode).alias("mode"))
            savings.append(s.with_columns(*tag))
            diags.append(d.with_columns(*tag))
    savings_frame = (
        pl.concat(savings)
        .select(*COLUMNS)
        .with_columns(
            pl.lit(config.comfort_penalty_usd_per_degree_hour).alias("comfort_penalty_usd_per_degree_hour"),
            pl.col("mode")
            .replace_strict(BILL_NOTES, default=None, return_dtype=pl.String)
            .alias("bill_note"),
        )
        .sort("policy_name", "mode", "scope", "key", "estimator")
    )
    return Evaluation(
        savings=savings_frame,
        policy=pl.concat(policies)
        .with_columns(pl.col("visits").fill_null(0))
        .select(
            "policy_name", "mode", "scope", "key", "state_key", "action", "probability", "q_value", "visits"
        ),
        diagnostics=pl.concat(diags).select(
            "policy_name", "mode", "scope", "key", pl.exclude("policy_name", "mode", "scope", "key")
        ),
    )


def policy_frame(name: str, table: np.ndarray, config: Config, q: np.ndarray | None = None) -> pl.DataFrame:
    """Long form of a policy table: one row per (state_key, action) with its probability.

    ``q`` (n_states, n_actions), optional, is the fitted Q value of each pair under the
    policy (USD, rest of the episode), reported as ``q_value``.
    """
    n_states, n_actions = table.shape
    return pl.DataFrame(
        {
            "policy_name": name,
            "scope": "portfolio",
            "key": "all",
            "state_key": np.repeat(np.arange(n_states, dtype=np.int64), n_actions),
            "action": np.tile(np.asarray(config.actions, dtype=np.int64), n_states),
            "probability": table.reshape(-1),
            "q_value": np.full(n_states * n_actions, np.nan) if q is None else q.reshape(-1),
        }
    )


def state_values(steps: pl.DataFrame) -> pl.DataFrame:
    """First- and every-visit Monte Carlo values of the behaviour policy per state, at every scope.

    Returns
    -------
    polars.DataFrame
        mode, scope, key, method ('first_visit' / 'every_visit'), state_key, value
        (mean return from the state on, USD), visits and n_episodes.
    """
    frames = []
    for mode in sorted(steps["mode"].unique()):
        in_mode = steps.filter(pl.col("mode") == mode).select(
            "episode_id", "t", "reward", "state_key", "premise_id", "cohort"
        )
        for scope, column in SCOPES:
            frame = _scoped(in_mode, column)
            for method, fn in (
                ("first_visit", estimators.first_visit_mc),
                ("every_visit", estimators.every_visit_mc),
            ):
                frames.append(
                    _with_scope(fn(frame), scope).with_columns(
                        pl.lit(mode).alias("mode"), pl.lit(method).alias("method")
                    )
                )
    return pl.concat(frames).select(
        "mode", "scope", "key", "method", "state_key", "value", "visits", "n_episodes"
    )


def horizon_report(
    steps_by_choice: dict[str, pl.DataFrame],
    config: Config,
    fitted: dict[str, BehaviorModel],
    candidates: tuple[Candidate, ...] | None = None,
    days: pl.DataFrame | None = None,
) -> pl.DataFrame:
    """Weight spread of each candidate under each decision-point choice (the curse of horizon).

    Parameters
    ----------
    steps_by_choice : dict of str to polars.DataFrame
        Decision steps built with each choice of decision points ('fixed', 'anchored').
    fitted : dict of str to BehaviorModel
        The behaviour model fitted (by the learn stage) on each choice's steps.
    candidates : tuple of Candidate, optional
        Default: the run's. With ``days``, a scoped candidate is weighed on its premises only.

    Returns
    -------
    polars.DataFrame
        decision_points, mode, policy_name, mean_decisions, n_episodes, ess, ess_share,
        max_weight_share and weight_max over the whole portfolio.
    """
    candidates = candidates_for(config) if candidates is None else candidates
    rows = []
    for choice, steps in steps_by_choice.items():
        behavior = fitted[choice]
        for mode in sorted(steps["mode"].unique()):
            in_mode = steps.filter(pl.col("mode") == mode)
            b = behavior.probabilities(in_mode)
            decisions = in_mode.group_by("episode_id").len()["len"].mean()
            for rule in candidates:
                premises = None if days is None else applicable_premises(rule, days)
                keep = np.ones(in_mode.height, dtype=bool)
                if premises is not None:
                    keep = in_mode["premise_id"].is_in(premises.implode()).to_numpy()
                if not keep.any():
                    continue
                kept = in_mode.filter(pl.Series(keep))
                frame = kept.select("episode_id", "t").with_columns(
                    pl.Series("pi", target_probabilities(kept, rule.table, config)), pl.Series("b", b[keep])
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
