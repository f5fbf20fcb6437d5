"""The recommendation: which policy to send to each home, or why to keep its current behaviour.

Every figure here is measured against the residents' current behaviour (the logged
policy): "savings" are what a home would save by switching from what its residents do
now to the policy, not against a thermostat left alone.

For each premise and mode the candidates (and learned policies the safety test
proposed, on the premises of the scope each was learned for) are judged on the recommended estimator's
premise row of ``savings``, in this order, the first failed check giving the reason:

1. ``no support``: some logged action has no probability under the behaviour model;
2. ``thin evidence``: effective sample size or weight share outside the settings;
3. ``bound not above zero``: the one-sided lower bound on energy-only bill savings
   (``bill_lower_bound_usd``) is not above zero;
4. ``comfort``: the upper end of the interval of the comfort-cost change (°C-hours of
   setback after the return, policy minus current) exceeds
   ``comfort_rise_limit_degree_hours``.

A policy passing all four is eligible; the eligible one with the largest bound is
sent. Otherwise the home keeps its current behaviour, with the reason of the policy
that came nearest (passed the most checks, then the largest bound), named in
``nearest_policy``. Enrolled premises with no evaluated episode keep current
behaviour with reason ``no usable episodes`` and the commonest exclusion in
``reason_detail``.

Totals per cohort and for the program add up the homes that get each policy: the
point figures are exact sums, the intervals a normal approximation from the homes'
intervals (half-width / z as each home's standard error, added in quadrature: the
homes' estimates rest on disjoint episodes and independent bootstrap draws).
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import polars as pl

from pipeline import store
from pipeline.config import Config

SEND, KEEP = "send", "keep current"
REASON_SENT = "largest lower bound"
REASON_NO_SUPPORT = "no support"
REASON_THIN = "thin evidence"
REASON_BOUND = "bound not above zero"
REASON_COMFORT = "comfort"
REASON_NO_EPISODES = "no usable episodes"
REASONS = (REASON_SENT, REASON_NO_SUPPORT, REASON_THIN, REASON_BOUND, REASON_COMFORT, REASON_NO_EPISODES)
"""Every reason a recommendation row can give."""

BASELINE = "current behaviour"
"""What every saving is measured against."""

# Per-home figures carried from the policy's savings row (send rows only).
_FIGURES = [
    "n_episodes",
    "bill_savings_usd_per_episode",
    "bill_ci_low",
    "bill_ci_high",
    "bill_lower_bound_usd",
    "savings_kwh_per_episode",
    "savings_kwh_ci_low",
    "savings_kwh_ci_high",
    "comfort_change_degree_hours",
    "comfort_change_ci_high",
    "days_observed",
    "season_days",
    "episodes_per_year",
    "bill_savings_usd_annual",
    "bill_ci_low_annual",
    "bill_ci_high_annual",
    "savings_kwh_annual",
    "savings_kwh_ci_low_annual",
    "savings_kwh_ci_high_annual",
    "comfort_change_degree_hours_annual",
]
_PER_HOME_ALWAYS = ["n_episodes", "days_observed", "season_days", "episodes_per_year"]

COLUMNS = [
    "premise_id",
    "cohort",
    "mode",
    "decision",
    "policy",
    "reason",
    "reason_detail",
    "nearest_policy",
    "nearest_lower_bound_usd",
    "policies_considered",
    "policies_eligible",
    "estimator",
    "baseline",
    *_FIGURES,
]
"""Columns of the ``recommendation`` table; key (premise_id, mode), mode null for unevaluated homes."""

# Sums over the homes of a group and the interval columns whose half-widths add in quadrature.
_SUMMED = {
    "bill_savings_usd_annual": ("bill_ci_low_annual", "bill_ci_high_annual"),
    "savings_kwh_annual": ("savings_kwh_ci_low_annual", "savings_kwh_ci_high_annual"),
}

TOTAL_COLUMNS = [
    "scope",
    "key",
    "mode",
    "decision",
    "policy",
    "reason",
    "homes",
    "bill_savings_usd_annual",
    "bill_ci_low_annual",
    "bill_ci_high_annual",
    "savings_kwh_annual",
    "savings_kwh_ci_low_annual",
    "savings_kwh_ci_high_annual",
    "comfort_change_degree_hours_annual",
    "baseline",
]
"""Columns of ``recommendation_total``; key (scope, key, mode, decision, policy, reason)."""


LEARNED_SAVINGS, SAFETY_TEST = "improvement_savings", "improvement_safety_test"
"""Warehouse tables of the policy-learning stage, read when present: the learned policies'
held-out savings rows (the columns of ``savings``) and the safety test's outcome per scope
(policy_name, mode, scope, key, outcome)."""


def learned_tables(con: duckdb.DuckDBPyConnection) -> tuple[pl.DataFrame | None, pl.DataFrame | None]:
    """The learned policies' savings rows and safety outcomes from the warehouse, None where absent."""
    present = {
        row[0]
        for row in store.execute(
            con,
            "select table_name from duckdb_tables() where table_name in ($a, $b)",
            {"a": LEARNED_SAVINGS, "b": SAFETY_TEST},
        )
    }
    return tuple(
        store.frame(con, f"select * from {store.quote_identifier(name)}") if name in present else None
        for name in (LEARNED_SAVINGS, SAFETY_TEST)
    )


@dataclass(frozen=True)
class Recommendation:
    """The ledger frames of the recommendation."""

    homes: pl.DataFrame
    """One row per premise and mode (``COLUMNS``)."""
    totals: pl.DataFrame
    """Per cohort and for the program (``TOTAL_COLUMNS``)."""


def eligible_rows(savings: pl.DataFrame, premises: pl.DataFrame, safety: pl.DataFrame | None) -> pl.DataFrame:
    """Premise rows of the recommended estimator, less learned policies the safety test did not propose.

    A policy named in ``safety`` (columns policy_name, optionally mode, and ``outcome``:
    'proposed' or another word) is learned; its premise rows (those of the premises of the scope
    it was learned for) count only when a row of it, in the same mode, says 'proposed'. Policies
    not named there are candidates and always count.
    """
    rows = savings.filter((pl.col("scope") == "premise") & pl.col("recommended")).rename(
        {"key": "premise_id"}
    )
    rows = rows.drop("cohort", strict=False).join(
        premises.select("premise_id", "cohort"), on="premise_id", how="left"
    )
    if safety is None or safety.is_empty():
        return rows
    on = ["policy_name", "mode"] if "mode" in safety.columns else ["policy_name"]
    learned = rows.join(safety.select(on).unique(), on=on, how="semi")
    proposed = safety.filter(pl.col("outcome") == "proposed").select(on).unique()
    return pl.concat(
        [
            rows.join(learned.select(on).unique(), on=on, how="anti"),
            learned.join(proposed, on=on, how="semi"),
        ],
        how="vertical_relaxed",
    )


def judge(rows: pl.DataFrame, config: Config) -> pl.DataFrame:
    """Each policy's reason it cannot be sent (null when eligible) and how many checks it passed."""
    unsupported = pl.col("n_unsupported_steps").fill_null(0) > 0
    thin = pl.col("status") != "ok"
    bound = pl.col("bill_lower_bound_usd")
    low_bound = bound.is_null() | bound.is_nan() | (bound <= 0)
    rise = pl.col("comfort_change_ci_high")
    too_warm = rise.is_null() | rise.is_nan() | (rise > config.comfort_rise_limit_degree_hours)
    checks = (
        (unsupported, REASON_NO_SUPPORT),
        (thin, REASON_THIN),
        (low_bound, REASON_BOUND),
        (too_warm, REASON_COMFORT),
    )
    reason = pl.when(checks[0][0]).then(pl.lit(checks[0][1]))
    passed = pl.when(checks[0][0]).then(0)
    for i, (failed, word) in enumerate(checks[1:], start=1):
        reason = reason.when(failed).then(pl.lit(word))
        passed = passed.when(failed).then(i)
    return rows.with_columns(
        reason.otherwise(None).alias("fails"), passed.otherwise(len(checks)).alias("checks_passed")
    )


def recommend(
    savings: pl.DataFrame,
    premises: pl.DataFrame,
    config: Config,
    safety: pl.DataFrame | None = None,
) -> Recommendation:
    """The recommendation per premise and mode, and its totals per cohort and for the program.

    Parameters
    ----------
    savings : polars.DataFrame
        The ``savings`` frame (candidates, and learned policies' held-out rows when there are any).
    premises : polars.DataFrame
        Every enrolled premise: premise_id, cohort, and ``exclusion`` (the commonest reason its
        episodes were left out, null when none were).
    safety : polars.DataFrame, optional
        The safety test's outcome per scope (policy_name, scope, key, outcome).
    """
    judged = judge(eligible_rows(savings, premises, safety), config)
    ranked = judged.with_columns(pl.col("bill_lower_bound_usd").fill_nan(None).alias("_bound")).sort(
        ["premise_id", "mode", "checks_passed", "_bound", "policy_name"],
        descending=[False, False, True, True, False],
        nulls_last=True,
    )
    counts = judged.group_by("premise_id", "mode").agg(
        pl.len().alias("policies_considered"), pl.col("fails").is_null().sum().alias("policies_eligible")
    )
    best = ranked.unique(["premise_id", "mode"], keep="first", maintain_order=True).join(
        counts, on=["premise_id", "mode"]
    )
    send = pl.col("fails").is_null()
    figure = [
        pl.when(send).then(pl.col(c)).otherwise(None).alias(c) for c in _FIGURES if c not in _PER_HOME_ALWAYS
    ]
    evaluated = best.with_columns(
        pl.when(send).then(pl.lit(SEND)).otherwise(pl.lit(KEEP)).alias("decision"),
        pl.when(send).then(pl.col("policy_name")).otherwise(None).alias("policy"),
        pl.when(send).then(pl.lit(REASON_SENT)).otherwise(pl.col("fails")).alias("reason"),
        pl.lit(None, pl.Utf8).alias("reason_detail"),
        pl.when(send).then(None).otherwise(pl.col("policy_name")).alias("nearest_policy"),
        pl.when(send).then(None).otherwise(pl.col("_bound")).alias("nearest_lower_bound_usd"),
        *figure,
    )
    missing = premises.join(evaluated.select("premise_id"), on="premise_id", how="anti").select(
        "premise_id",
        "cohort",
        pl.lit(None, pl.Utf8).alias("mode"),
        pl.lit(KEEP).alias("decision"),
        pl.lit(None, pl.Utf8).alias("policy"),
        pl.lit(REASON_NO_EPISODES).alias("reason"),
        pl.col("exclusion").fill_null("no away episodes found").alias("reason_detail"),
        pl.lit(0, pl.UInt32).alias("policies_considered"),
        pl.lit(0, pl.UInt32).alias("policies_eligible"),
    )
    homes = (
        pl.concat([evaluated, missing], how="diagonal_relaxed")
        .with_columns(
            pl.lit(config.recommended_estimator).alias("estimator"),
            pl.lit(BASELINE).alias("baseline"),
            pl.col("cohort").cast(pl.Utf8),
        )
        .select(COLUMNS)
        .sort("premise_id", "mode", nulls_last=True)
    )
    return Recommendation(homes, totals(homes))


def totals(homes: pl.DataFrame) -> pl.DataFrame:
    """Homes, annual USD and kWh (with intervals) and comfort change per cohort and program and policy.

    Sums run over the homes that get each policy. A group's interval is its point sum minus
    (plus) the square root of the summed squares of its homes' lower (upper) half-widths: each
    half-width is z standard errors, so this is the sum's z standard errors when the homes'
    estimates are independent (normal approximation).
    """
    parts = []
    for point, (low, high) in _SUMMED.items():
        parts += [
            pl.col(point).sum().alias(point),
            ((pl.col(point) - pl.col(low)) ** 2).sum().sqrt().alias(f"_{low}"),
            ((pl.col(high) - pl.col(point)) ** 2).sum().sqrt().alias(f"_{high}"),
        ]
    keys = ["scope", "key", "mode", "decision", "policy", "reason"]
    frames = []
    for scope, key in (("cohort", pl.col("cohort")), ("program", pl.lit("program"))):
        grouped = homes.with_columns(pl.lit(scope).alias("scope"), key.cast(pl.Utf8).alias("key")).group_by(
            keys
        )
        frames.append(
            grouped.agg(
                pl.len().alias("homes"),
                *parts,
                pl.col("comfort_change_degree_hours_annual")
                .sum()
                .alias("comfort_change_degree_hours_annual"),
            )
        )
    out = pl.concat(frames)
    send = pl.col("decision") == SEND
    intervals = []
    for point, (low, high) in _SUMMED.items():
        intervals += [
            pl.when(send).then(pl.col(point) - pl.col(f"_{low}")).otherwise(None).alias(low),
            pl.when(send).then(pl.col(point) + pl.col(f"_{high}")).otherwise(None).alias(high),
            pl.when(send).then(pl.col(point)).otherwise(None).alias(point),
        ]
    return (
        out.with_columns(*intervals)
        .with_columns(
            pl.when(send)
            .then(pl.col("comfort_change_degree_hours_annual"))
            .otherwise(None)
            .alias("comfort_change_degree_hours_annual"),
            pl.lit(BASELINE).alias("baseline"),
        )
        .select(TOTAL_COLUMNS)
        .sort("scope", "key", "mode", "decision", "policy", "reason", nulls_last=True)
    )
