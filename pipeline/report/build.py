"""The run report: program, trust and home pages from one run of the ledger, as one HTML file.

``write_report`` reads the run's ledger tables (``ledger_data``), draws the figures
(``figures``), writes each as ``figures/<name>.png`` and the page as ``report.html`` under
``<out>/report/<run_id>/``. A section whose table this run did not write says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from pipeline import progress, store
from pipeline.config import Config
from pipeline.report import figures as fig
from pipeline.report import page
from pipeline.report.ledger_data import (
    COMFORT_COLUMNS,
    ReportError,
    RunData,
    comfort_columns,
    homes_to_show,
    open_run,
    premise_best,
    recommended_rows,
    report_path,
)

CAUTION = (
    "Every figure here is an estimate from logged history, not a measurement of what a policy will do."
    " Local codes, program rules and licensed practice govern what is sent to a device; setpoints are"
    " proposed only inside the configured safety band and the residents' own comfort limits."
)
KEEP = "keep current"


@dataclass
class Report:
    """What ``write_report`` made: the page, the figure files, the charts and the program summary rows."""

    run_id: str
    html: Path
    pngs: list[Path]
    charts: list[fig.Chart] = field(repr=False)
    summary: list[dict] = field(repr=False)
    homes: list[str]


@dataclass
class _Page:
    """Sections of the page being built, and the charts they hold."""

    parts: list[str] = field(default_factory=list)
    charts: list[fig.Chart] = field(default_factory=list)

    def add(self, html: str) -> None:
        self.parts.append(html)

    def chart(self, chart: fig.Chart) -> None:
        self.charts.append(chart)
        png = chart.png()
        self.parts.append(page.figure(png, chart.caption, chart.name))
        progress.advance("report", description=f"report: {chart.caption}")


def _level(data: RunData) -> float:
    return float(data.setting("confidence", 0.95))


# ---- program page --------------------------------------------------------------------------------


def _premises(data: RunData) -> pl.DataFrame:
    """Every home the run's ledger mentions, with its episodes found and used."""
    episodes = data.table("episode_summary")
    frames = []
    if episodes is not None:
        frames.append(
            episodes.group_by("premise_id").agg(
                pl.len().alias("episodes"),
                pl.col("excluded_reason").is_null().sum().alias("used"),
                pl.col("excluded_reason").drop_nulls().mode().first().alias("main_exclusion"),
            )
        )
    for name, column in (("behavior_type", "premise_id"), ("recommendation", "premise_id")):
        rows = data.table(name)
        if rows is not None and column in rows.columns:
            frames.append(rows.select(pl.col(column).alias("premise_id")).unique())
    savings = data.table("savings")
    if savings is not None:
        frames.append(
            savings.filter(pl.col("scope") == "premise").select(pl.col("key").alias("premise_id")).unique()
        )
    if not frames:
        return pl.DataFrame(schema={"premise_id": pl.Utf8, "episodes": pl.UInt32, "used": pl.UInt32})
    ids = pl.concat([f.select("premise_id") for f in frames]).unique()
    if episodes is None:
        return ids.with_columns(
            pl.lit(0).alias("episodes"), pl.lit(0).alias("used"), pl.lit(None).alias("main_exclusion")
        )
    return ids.join(frames[0], on="premise_id", how="left").with_columns(
        pl.col("episodes", "used").fill_null(0)
    )


def _exclusions(data: RunData, homes: pl.DataFrame) -> pl.DataFrame:
    """Homes the run could not give a supported estimate, with the reason."""
    supported = set(premise_best(data)["key"].to_list()) if data.table("savings") is not None else set()
    premise_rows = recommended_rows(data, "premise")
    thin = set(premise_rows["key"].to_list()) if not premise_rows.is_empty() else set()
    reason = (
        pl.when(pl.col("episodes") == 0)
        .then(pl.lit("no away episodes found"))
        .when(pl.col("used") == 0)
        .then(pl.lit("no usable episode: ") + pl.col("main_exclusion").fill_null("excluded"))
        .when(pl.col("premise_id").is_in(list(thin)))
        .then(pl.lit("insufficient evidence for every policy"))
        .otherwise(pl.lit("not evaluated"))
    )
    return homes.filter(~pl.col("premise_id").is_in(list(supported))).with_columns(reason.alias("reason"))


def _recommendation_section(data: RunData, out: _Page) -> pl.DataFrame | None:
    rec = data.table("recommendation")
    out.add("<h3>What each home is sent</h3>")
    if rec is None or not {"premise_id", "decision"} <= set(rec.columns):
        out.add(
            page.absent(
                "No recommendation table in this run's ledger: the per-home choice of policy is not made in"
                " this run, so no home is counted as sent a policy. Savings below are per policy, against"
                " the residents' current behaviour."
            )
        )
        return None
    if "scope" in rec.columns:
        rec = rec.filter(pl.col("scope") == "premise")
    policy = "policy" if "policy" in rec.columns else "policy_name"
    labelled = rec.with_columns(
        pl.when(pl.col("decision") == "send").then(pl.col(policy)).otherwise(pl.lit(KEEP)).alias("label")
    )
    counts = labelled.group_by("label").agg(pl.col("premise_id").n_unique().alias("homes"))
    out.chart(fig.recommendation_counts(counts))
    if "reason" in rec.columns:
        kept = (
            labelled.filter(pl.col("label") == KEEP)
            .group_by("reason")
            .agg(pl.col("premise_id").n_unique().alias("homes"))
            .sort("homes", "reason", descending=[True, False])
        )
        out.add("<p>Why the other homes keep their current behaviour:</p>")
        out.add(
            page.table(("reason", "homes"), kept.rows())
            if kept.height
            else page.absent("every home is sent a policy")
        )
    return labelled


def _interval(low: str, high: str) -> pl.Expr:
    """Two interval columns as one text cell, 'low to high' (3 decimals), '-' when missing."""
    return (
        pl.when(pl.col(low).is_not_null() & pl.col(high).is_not_null())
        .then(pl.format("{} to {}", pl.col(low).round(3), pl.col(high).round(3)))
        .otherwise(pl.lit("-"))
    )


def _program_totals(totals: pl.DataFrame) -> str:
    """The recommendation's program rows: homes per decision and policy, annual figures with intervals."""
    rows = totals.filter(pl.col("scope") == "program").sort("decision", "policy", "reason", nulls_last=True)
    wanted = {
        "decision": "decision",
        "policy": "policy",
        "reason": "reason",
        "mode": "mode",
        "homes": "homes",
        "bill_savings_usd_annual": "bill USD/year",
        "bill_ci_low_annual": "low USD/year",
        "bill_ci_high_annual": "high USD/year",
        "savings_kwh_annual": "kWh/year",
        "savings_kwh_ci_low_annual": "low kWh/year",
        "savings_kwh_ci_high_annual": "high kWh/year",
    }
    columns = [c for c in wanted if c in rows.columns]
    return (
        "<p>Program totals over the homes the recommendation sends each policy (annual bill and kWh"
        " savings with their intervals, summed over those homes; homes kept on their current behaviour"
        " counted by reason):</p>"
        + page.table([wanted[c] for c in columns], rows.select(columns).rows(), digits=0)
    )


def _annual_totals(data: RunData, labelled: pl.DataFrame | None) -> str:
    totals = data.table("recommendation_total")
    if totals is not None and {"scope", "decision", "homes"} <= set(totals.columns):
        return _program_totals(totals)
    premise = recommended_rows(data, "premise")
    if premise.is_empty():
        return page.absent("No per-home savings rows in this run's ledger.")
    ok = premise.filter(pl.col("status") == "ok")
    if labelled is not None:
        sent = labelled.filter(pl.col("label") != KEEP).select(
            pl.col("premise_id").alias("key"), pl.col("label").alias("policy_name")
        )
        ok = ok.join(sent, on=["key", "policy_name"], how="semi")
        basis = "over the homes the recommendation sends each policy"
    else:
        basis = "if every home with a supported estimate were sent that policy (no recommendation table)"
    totals = (
        ok.group_by("policy_name", "mode")
        .agg(
            pl.col("key").n_unique().alias("homes"),
            pl.col("savings_usd_annual").sum().alias("usd"),
            pl.col("savings_kwh_annual").sum().alias("kwh"),
        )
        .sort("policy_name", "mode")
    )
    rows = [(r[0], r[1], r[2], round(r[3], 0), round(r[4], 0)) for r in totals.rows()]
    return f"<p>Annual totals {page.esc(basis)}:</p>" + page.table(
        ("policy", "mode", "homes", "USD per year", "kWh per year"), rows, digits=0
    )


def program_page(data: RunData, out: _Page) -> None:
    """Homes enrolled, evaluated and excluded; savings per policy; spread over homes; what is sent; totals."""
    level = _level(data)
    out.add('<h2 id="program">Program</h2>')
    homes = _premises(data)
    excluded = _exclusions(data, homes)
    episodes = data.table("episode_summary")
    found = episodes.height if episodes is not None else 0
    used = episodes.filter(pl.col("excluded_reason").is_null()).height if episodes is not None else 0
    out.add(
        page.facts(
            [
                ("homes in this run", homes.height),
                ("homes with a supported estimate", homes.height - excluded.height),
                ("homes excluded", excluded.height),
                ("away episodes found", found),
                ("away episodes used", used),
            ]
        )
    )
    if excluded.height:
        why = (
            excluded.group_by("reason")
            .agg(pl.len().alias("homes"))
            .sort("homes", "reason", descending=[True, False])
        )
        out.add("<h3>Homes without a supported estimate</h3>")
        out.add(page.table(("reason", "homes"), why.rows()))
    if episodes is not None:
        reasons = (
            episodes.filter(pl.col("excluded_reason").is_not_null())
            .group_by("excluded_reason")
            .agg(pl.len().alias("episodes"))
            .sort("episodes", descending=True)
        )
        if reasons.height:
            out.add("<h3>Episodes left out, by reason</h3>")
            out.add(page.table(("reason", "episodes"), reasons.rows()))
    out.add("<h3>Savings per policy, whole program</h3>")
    portfolio = recommended_rows(data, "portfolio")
    if portfolio.is_empty():
        out.add(
            page.absent(
                "No program-level savings rows in this run's ledger (the evaluate stage did not run)."
            )
        )
    else:
        comfort = comfort_columns(portfolio)
        shown = portfolio.with_columns(
            _interval("ci_low", "ci_high").alias("interval"),
            *(
                [_interval("comfort_change_ci_low", "comfort_change_ci_high").alias("comfort_interval")]
                if {"comfort_change_ci_low", "comfort_change_ci_high"} <= set(comfort)
                else []
            ),
        )
        extra = [c for c in comfort if c in ("bill_savings_usd_per_episode", "comfort_change_degree_hours")]
        if "comfort_interval" in shown.columns:
            extra.append("comfort_interval")
        columns = [
            "policy_name",
            "mode",
            "estimator",
            "status",
            "n_episodes",
            "savings_usd_per_episode",
            "interval",
            "lower_bound_usd",
            *extra,
            "savings_usd_annual",
            "savings_kwh_annual",
        ]
        labels = [
            "policy",
            "mode",
            "estimator",
            "status",
            "episodes",
            "savings USD/episode",
            f"{level:.0%} interval USD",
            "lower bound USD",
            *[
                {**COMFORT_COLUMNS, "comfort_interval": f"comfort {level:.0%} interval °C-h"}[c]
                for c in extra
            ],
            "USD/home/year",
            "kWh/home/year",
        ]
        portfolio_rows = shown
        out.add(page.table(labels, portfolio_rows.select(columns).rows(), digits=3))
        if not comfort:
            out.add(
                page.absent(
                    "This run's savings rows carry no comfort-cost columns, so each policy's comfort cost is"
                    " not shown; the savings above already subtract the comfort penalty at the price below."
                )
            )
        out.chart(fig.savings_by_policy(portfolio, level, with_comfort=bool(comfort)))
    out.add("<h3>Savings per home</h3>")
    premise = recommended_rows(data, "premise")
    supported = premise.filter(pl.col("status") == "ok") if not premise.is_empty() else premise
    if supported.is_empty():
        out.add(page.absent("No home has a supported per-home estimate in this run."))
    else:
        out.chart(fig.premise_distribution(premise))
    labelled = _recommendation_section(data, out)
    out.add("<h3>Annual totals</h3>")
    out.add(_annual_totals(data, labelled))


# ---- trust page ----------------------------------------------------------------------------------


TRUTH_COLUMNS = {
    "policy_name": "policy",
    "scope": "scope",
    "key": "key",
    "estimator": "estimator",
    "n_episodes": "episodes",
    "savings_usd_per_episode": "estimate USD",
    "ci_low": "low USD",
    "ci_high": "high USD",
    "lower_bound_usd": "bound USD",
    "true_savings_usd_per_episode": "true USD",
    "covered": "covered",
    "bound_held": "bound held",
}
"""Columns of a truth table the report lists (the rest stay in the ledger)."""


def _truth_table(data: RunData) -> tuple[str, pl.DataFrame] | None:
    names = sorted(p.name for p in data.ledger.iterdir() if p.is_dir() and "truth" in p.name)
    for name in names:
        rows = data.table(name)
        if rows is not None:
            return name, rows
    return None


def _first(columns: list[str], choices: tuple[str, ...]) -> str | None:
    return next((c for c in choices if c in columns), None)


SAFETY_COLUMNS = {
    "policy_name": "policy",
    "mode": "mode",
    "scope": "scope",
    "key": "key",
    "outcome": "outcome",
    "reason": "reason",
    "n_held_out_episodes": "held-out episodes",
    "savings_estimate_usd": "held-out savings USD/episode",
    "lower_bound_usd": "lower bound USD",
    "comfort_change_usd": "comfort change USD",
}


def _safety(rows: pl.DataFrame) -> str:
    """Outcomes counted by reason, then the scopes that had evidence enough to be tested."""
    parts = []
    if {"outcome", "reason"} <= set(rows.columns):
        # Reasons carry their figures ("too little evidence: 36 learning and ..."): count by their kind.
        kind = (
            pl.when(pl.col("outcome") == "proposed")
            .then(pl.lit("bound above zero"))
            .otherwise(pl.col("reason").str.split(":").list.first())
        )
        counts = (
            rows.group_by("outcome", kind.alias("kind"))
            .agg(pl.len().alias("scopes"))
            .sort("scopes", "kind", descending=[True, False])
        )
        parts.append(page.table(("outcome", "why", "scopes"), counts.rows()))
    columns = [c for c in SAFETY_COLUMNS if c in rows.columns]
    if "lower_bound_usd" in rows.columns:
        tested = rows.filter(pl.col("lower_bound_usd").is_not_null())
        if "outcome" in tested.columns:
            tested = tested.sort(pl.col("outcome") != "proposed", "policy_name")
        parts.append("<p>Scopes with a held-out bound:</p>")
        parts.append(
            page.table([SAFETY_COLUMNS[c] for c in columns], tested.select(columns).rows(), digits=3)
        )
        return "".join(parts)
    return "".join(parts) + _generic(rows)


def _generic(rows: pl.DataFrame, limit: int = 40) -> str:
    shown = rows.head(limit)
    more = f"<p>{rows.height - limit:,} more rows in the ledger.</p>" if rows.height > limit else ""
    return page.table(shown.columns, shown.rows(), digits=3) + more


def trust_page(data: RunData, out: _Page) -> None:
    """How far to trust the estimates: convergence, weights, estimators, safety test, truth."""
    out.add('<h2 id="trust">Trust</h2>')
    out.add("<h3>Estimates as episodes accumulate</h3>")
    path = data.table("estimate_path")
    if path is None:
        out.add(
            page.absent(
                "No estimate_path table in this run's ledger: ordinary against weighted importance sampling"
                " as episodes accumulate is not recorded by this run."
            )
        )
    else:
        level = f"{_level(data):.0%}"
        out.add(
            "<p>Ordinary against weighted importance sampling over the program's episodes, oldest first,"
            f" with {page.esc(level)} normal-approximation bands (the savings table keeps the bootstrap"
            " intervals). Ordinary IS is unbiased but swings with each large weight; weighted IS settles.</p>"
        )
        out.chart(fig.estimates_by_episodes(path))
    out.add("<h3>Importance weights</h3>")
    diagnostics = data.table("diagnostics")
    if diagnostics is None:
        out.add(page.absent("No diagnostics table in this run's ledger."))
    else:
        out.chart(fig.weight_diagnostics(diagnostics.filter(pl.col("scope") == "premise")))
        wide = diagnostics.filter(pl.col("scope") != "premise").sort("policy_name", "scope", "key")
        out.add(
            page.table(
                (
                    "policy",
                    "mode",
                    "scope",
                    "key",
                    "episodes",
                    "ESS",
                    "largest weight share",
                    "largest weight",
                ),
                wide.select(
                    "policy_name",
                    "mode",
                    "scope",
                    "key",
                    "n_episodes",
                    "ess",
                    "max_weight_share",
                    "weight_max",
                ).rows(),
                digits=3,
            )
        )
    horizon = data.table("horizon")
    if horizon is not None:
        out.add("<p>Weight spread for each choice of decision points (fewer decisions, tamer weights):</p>")
        out.add(
            page.table(
                (
                    "decision points",
                    "mode",
                    "policy",
                    "decisions/episode",
                    "ESS",
                    "ESS share",
                    "largest weight share",
                ),
                horizon.select(
                    "decision_points",
                    "mode",
                    "policy_name",
                    "mean_decisions",
                    "ess",
                    "ess_share",
                    "max_weight_share",
                ).rows(),
                digits=3,
            )
        )
    out.add("<h3>Agreement between estimators</h3>")
    savings = data.table("savings")
    if savings is None:
        out.add(page.absent("No savings table in this run's ledger."))
    else:
        wide = savings.filter(pl.col("scope") != "premise")
        out.chart(fig.estimator_agreement(wide))
        spread = (
            wide.group_by("policy_name", "mode", "scope", "key")
            .agg(
                (pl.col("savings_usd_per_episode").max() - pl.col("savings_usd_per_episode").min()).alias(
                    "spread"
                ),
                pl.col("savings_usd_per_episode").min().alias("lowest"),
                pl.col("savings_usd_per_episode").max().alias("highest"),
            )
            .sort("spread", descending=True, nulls_last=True)
        )
        out.add("<p>Largest gap between estimators per policy and scope, USD per episode:</p>")
        out.add(
            page.table(
                ("policy", "mode", "scope", "key", "gap", "lowest", "highest"),
                spread.head(12).rows(),
                digits=3,
            )
        )
    out.add("<h3>Safety test of learned policies</h3>")
    safety = data.table("safety_test")
    if safety is None:
        out.add(
            page.absent(
                "No safety_test table in this run's ledger: no learned policy was tested in this run."
            )
        )
    else:
        out.add(_safety(safety))
    out.add("<h3>Estimate against truth</h3>")
    truth = _truth_table(data)
    if truth is None:
        out.add(
            page.absent(
                "No truth table beside this run's ledger: the lake was not simulated,"
                " or its truth was not rolled out."
            )
        )
    else:
        name, rows = truth
        estimate = _first(rows.columns, ("savings_usd_per_episode", "estimate", "estimate_usd"))
        true = _first(
            rows.columns, ("true_savings_usd_per_episode", "true_savings_usd", "true_savings", "truth")
        )
        if estimate and true:
            out.chart(fig.estimate_against_truth(rows, estimate, true))
        checks = [
            f"{label} in {int(rows[column].sum()):,} of {rows[column].count():,} rows"
            for column, label in (
                ("covered", "intervals covered the truth"),
                ("bound_held", "lower bounds held"),
            )
            if column in rows.columns
        ]
        shown = rows.filter(pl.col("scope") != "premise") if "scope" in rows.columns else rows
        out.add(
            f"<p>From ledger table {page.esc(name)}: {page.esc('; '.join(checks) or 'no coverage columns')}."
            " Rows other than single homes:</p>"
            + _generic(
                shown.select([pl.col(c).alias(t) for c, t in TRUTH_COLUMNS.items() if c in shown.columns])
            )
        )


# ---- home pages ----------------------------------------------------------------------------------


def _mean_action(rows: pl.DataFrame | None, lookup: pl.DataFrame) -> pl.DataFrame:
    """Mean setpoint change (°C) per hour bucket and outdoor bin, over states with no setback yet."""
    if rows is None or rows.is_empty():
        return pl.DataFrame()
    start = lookup.filter(pl.col("offset") == 0).select("state_key", "hour_bucket", "degree_bin")
    per_state = rows.group_by("state_key").agg(
        (pl.col("action") * pl.col("probability")).sum() / pl.col("probability").sum()
    )
    return (
        per_state.rename({"action": "mean_action"})
        .join(start, on="state_key")
        .group_by("hour_bucket", "degree_bin")
        .agg(pl.col("mean_action").mean())
        .sort("hour_bucket", "degree_bin")
    )


def _scoped(table: pl.DataFrame | None, premise: str, cohort: str | None, policy: str | None = None):
    """The rows of the most specific scope that covers the premise (premise, cohort, then program)."""
    if table is None:
        return None, None
    if policy is not None:
        table = table.filter(pl.col("policy_name") == policy)
    for scope, key in (("premise", premise), ("cohort", cohort)):
        part = table.filter((pl.col("scope") == scope) & (pl.col("key") == key))
        if part.height:
            return part, scope
    part = table.filter(pl.col("scope") == "portfolio")
    if part.height:
        return part, "program"
    # A learned policy of another scope (a habit type): its one table.
    if policy is not None and table.height:
        scope, key = table.row(0, named=True)["scope"], table.row(0, named=True)["key"]
        return table.filter((pl.col("scope") == scope) & (pl.col("key") == key)), f"{scope} {key}"
    return None, None


def home_page(data: RunData, out: _Page, premise: str, why: str, number: int) -> None:
    """One home: its estimates, the proposed policy over states, its schedule and its episodes."""
    slug = f"{number:02d}"
    out.add(f'<h3 id="home-{slug}">Home {page.esc(premise)} <small>({page.esc(why)})</small></h3>')
    rows = (
        recommended_rows(data, "premise").filter(pl.col("key") == premise)
        if data.table("savings") is not None
        else pl.DataFrame()
    )
    if rows.is_empty():
        out.add(page.absent("No savings rows for this home in this run's ledger."))
    else:
        out.add(
            page.table(
                (
                    "policy",
                    "mode",
                    "status",
                    "episodes",
                    "savings USD/episode",
                    "low USD",
                    "high USD",
                    "lower bound USD",
                    "USD/year",
                ),
                rows.select(
                    "policy_name",
                    "mode",
                    "status",
                    "n_episodes",
                    "savings_usd_per_episode",
                    "ci_low",
                    "ci_high",
                    "lower_bound_usd",
                    "savings_usd_annual",
                ).rows(),
                digits=3,
            )
        )
    rec = data.table("recommendation")
    chosen = None
    if rec is not None and "premise_id" in rec.columns:
        mine = rec.filter(pl.col("premise_id") == premise)
        if "scope" in mine.columns:
            mine = mine.filter(pl.col("scope") == "premise")
        if mine.height:
            row = mine.row(0, named=True)
            policy = row.get("policy") or row.get("policy_name")
            out.add(
                f"<p>Recommendation: <b>{page.esc(row.get('decision'))}</b>"
                f" {page.esc(policy or '')} ({page.esc(row.get('reason') or '')})</p>"
            )
            chosen = policy if row.get("decision") == "send" else None
    best = premise_best(data)
    if chosen is None and not best.is_empty():
        mine = best.filter(pl.col("key") == premise)
        chosen = mine["policy_name"][0] if mine.height else None
    if chosen is None and not rows.is_empty():
        chosen = rows["policy_name"][0]
    cohort = None
    types = data.table("behavior_type")
    if types is not None:
        found = types.filter(pl.col("premise_id") == premise)["cohort"]
        cohort = found[0] if found.len() else None
    lookup = data.table("state_lookup")
    if lookup is not None and chosen is not None:
        policy_rows, scope = _scoped(data.table("policy"), premise, cohort, chosen)
        behaviour_rows, bscope = _scoped(data.table("behavior_policy"), premise, cohort)
        hours = lookup.select("hour_bucket", "hour_from").unique().sort("hour_bucket")["hour_from"].to_list()
        bins = (
            lookup.select("degree_bin", "degrees_from_c", "degrees_to_c").unique().sort("degree_bin").rows()
        )
        labels = [f"{lo:g}-{hi:g}" if hi != float("inf") else f"{lo:g}+" for _, lo, hi in bins]
        panels = [
            (f"{chosen} ({scope} table)", _mean_action(policy_rows, lookup)),
            (f"residents ({bscope} habit)", _mean_action(behaviour_rows, lookup)),
        ]
        out.chart(fig.policy_over_states(panels, hours, labels, slug))
    else:
        out.add(page.absent("No policy rows or state lookup for this home in this run's ledger."))
    schedule = data.table("schedule")
    if schedule is None and data.wrote("schedule"):
        out.add(
            page.absent(
                "The run's schedule table is empty: no home is sent a policy, so no hourly setpoints are"
                " computed. The residents' own hourly setpoints are not in the ledger."
            )
        )
    elif schedule is None or "premise_id" not in schedule.columns:
        out.add(
            page.absent(
                "No schedule table in this run's ledger: the hourly setpoints this home would be sent"
                " are not computed in this run."
            )
        )
    else:
        mine = schedule.filter(pl.col("premise_id") == premise)
        name = "policy_name" if "policy_name" in mine.columns else "policy"
        if mine.is_empty() or not {"day_type", "hour", "setpoint_c"} <= set(mine.columns):
            out.add(page.absent("The schedule table holds no hourly setpoints for this home."))
        else:
            plans = (
                mine.group_by(name, "day_type", "hour")
                .agg(pl.col("setpoint_c").mean())
                .rename({name: "plan"})
            )
            out.chart(fig.schedule_lines(plans, slug))
            out.add(
                page.absent(
                    "Setpoints are the mean over price tiers and outdoor bands where the plan depends on them"
                    " (the schedule table has each); residents' own hourly setpoints aren't in the ledger."
                )
            )
    episodes = data.table("episode_summary")
    mine = episodes.filter(pl.col("premise_id") == premise) if episodes is not None else None
    if mine is None or mine.is_empty():
        out.add(page.absent("No away episodes of this home in this run's ledger."))
    else:
        out.chart(fig.episode_costs(mine, slug))


# ---- the whole report ----------------------------------------------------------------------------


def _header(data: RunData) -> str:
    price = data.setting("comfort_penalty_usd_per_degree_hour")
    basis = data.setting("comfort_penalty_basis")
    finished = page.number(data.run.get("finished_at"))
    watermark = page.number(data.run.get("data_watermark"))
    return (
        f"<h1>Thermal Ledger run report</h1><p>Run {page.esc(data.run_id)}, finished {page.esc(finished)};"
        f" code {page.esc(data.run.get('code_version'))}; data up to {page.esc(watermark)}.</p>"
        f'<p class="caution"><b>Caution.</b> {page.esc(CAUTION)}</p>'
        f"<p>Comfort penalty priced at <b>{page.esc(page.number(price, 2))} USD per °C-hour</b>"
        f" (basis: {page.esc(basis)}) of setback still in force after the residents return; every"
        f" savings figure is net of it. Savings are measured against the residents' current behaviour.</p>"
        '<nav><a href="#program">Program</a><a href="#trust">Trust</a><a href="#homes">Homes</a></nav>'
    )


def summary_rows(data: RunData) -> list[dict]:
    """The program summary (one row per policy and mode, recommended estimator), for Prefect's UI."""
    rows = recommended_rows(data, "portfolio")
    if rows.is_empty():
        return []
    return rows.select(
        pl.col("policy_name").alias("policy"),
        "mode",
        "estimator",
        "status",
        pl.col("n_episodes").alias("episodes"),
        pl.col("savings_usd_per_episode", "ci_low", "ci_high", "lower_bound_usd").round(3),
        pl.col("savings_usd_annual").round(2).alias("usd_per_home_year"),
    ).to_dicts()


def write_report(
    ledger: Path,
    out: Path,
    run_id: str | None = None,
    premises: tuple[str, ...] = (),
    few: int = 3,
    settings=None,
) -> Report:
    """Write ``<out>/report/<run_id>/report.html`` and its figures as PNGs; return what was written."""
    if few < 0:
        raise ReportError(f"--homes {few}: give a count of 0 or more")
    data = open_run(Path(ledger), run_id, settings)
    try:
        homes = homes_to_show(data, few, tuple(premises))
        progress.begin("report", total=4 + 3 * len(homes), description="report")
        built = _Page()
        program_page(data, built)
        trust_page(data, built)
        built.add('<h2 id="homes">Homes</h2>')
        if not homes:
            built.add(page.absent("No home has a supported estimate in this run, and none was asked for."))
        for i, (premise, why) in enumerate(homes, start=1):
            home_page(data, built, premise, why, i)
        folder = report_path(out, data.run_id).parent
        (folder / "figures").mkdir(parents=True, exist_ok=True)
        pngs = []
        for chart in built.charts:
            path = folder / "figures" / f"{chart.name}.png"
            path.write_bytes(chart.png())
            pngs.append(path)
        html = page.document(f"Thermal Ledger run {data.run_id}", _header(data), "".join(built.parts))
        target = report_path(out, data.run_id)
        tmp = target.with_suffix(".html.tmp")
        tmp.write_text(html, encoding="utf-8")
        store.fault_point("report-write")
        tmp.replace(target)
        return Report(data.run_id, target, pngs, built.charts, summary_rows(data), [h for h, _ in homes])
    finally:
        progress.done("report")
        data.con.close()


def report_run(config: Config, run_id: str | None = None, premises: tuple[str, ...] = ()) -> Report:
    """The report of one run (default: the newest) with the configuration's homes and premises."""
    asked = tuple(dict.fromkeys((*config.report_premises, *premises)))
    return write_report(config.ledger_path, config.out, run_id, asked, config.report_homes, config.duckdb)
