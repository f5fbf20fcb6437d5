"""The pipeline's stages as plain functions of a Config (and the Run they belong to).

Each stage reads what the previous one left in the warehouse, so a stage can be
run alone from the command line, as a Prefect task, or from a test.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import polars as pl

from pipeline import evaluate as evaluation
from pipeline import ingest as ingestion
from pipeline import store
from pipeline.behavior import BehaviorPolicy, fit_behavior
from pipeline.config import Config
from pipeline.episodes import EpisodeCounts, build, episode_summary, load_episodes, load_steps, steps_for
from pipeline.ledger import Run

__all__ = ["BehaviorSummary", "EpisodeCounts", "EvaluationSummary", "IngestSummary", "RunSummary"]


class StageError(RuntimeError):
    """A stage cannot run because an earlier one has not produced its input."""


@dataclass(frozen=True)
class IngestSummary:
    """Per-file ingest results and whether any file was refused."""

    files: pl.DataFrame
    refused: int


@dataclass(frozen=True)
class EvaluationSummary:
    """The savings rows of one evaluation, and the weight spread per decision-point choice."""

    savings: pl.DataFrame
    horizon: pl.DataFrame


@dataclass(frozen=True)
class BehaviorSummary:
    """The behaviour model a run fitted: its kind, the settings chosen and its size."""

    model: str
    n_types: int | None
    prior_strength: float
    rows: int
    premises_per_type: tuple[int, ...]
    """Premises whose largest share is each habit type, in type order (empty for the counts model)."""

    def describe(self) -> str:
        """One line for the run summary."""
        if self.n_types is None:
            return f"behaviour model: cohort-shrunk counts (k={self.prior_strength:g})"
        homes = ", ".join(str(n) for n in self.premises_per_type)
        return (
            f"behaviour model: {self.n_types} habit types (k={self.prior_strength:g});"
            f" premises per type {homes}"
        )


@dataclass(frozen=True)
class RunSummary:
    """What one whole run did."""

    run_id: str
    ingest: IngestSummary
    episodes: EpisodeCounts
    behavior: BehaviorSummary
    evaluation: EvaluationSummary


def ingest(config: Config) -> IngestSummary:
    """Load the landing files into the warehouse."""
    results = ingestion.results_frame(ingestion.ingest(config))
    return IngestSummary(results, int((results["status"] == "refused").sum()))


def episodes(config: Config, run: Run) -> EpisodeCounts:
    """Rebuild the hourly grid, episodes and steps; write ``episode_summary`` to the ledger."""
    with store.warehouse(config.warehouse_path) as con:
        counts = build(con, config)
        steps = load_steps(con)
        episodes_frame = load_episodes(con)
    run.row_counts.update(hourly=counts.hours, episode=counts.episodes, step=counts.steps)
    run.write("episode_summary", episode_summary(episodes_frame, steps))
    run.write("state_lookup", config.state.lookup())
    return counts


def _steps(config: Config) -> pl.DataFrame:
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        steps = load_steps(con)
    if steps.is_empty():
        raise StageError("no usable decision steps: check the episode stage's exclusions")
    return steps


def learn(config: Config, run: Run) -> BehaviorSummary:
    """Estimate the behaviour policy; keep it in the warehouse and write it to the ledger."""
    steps = _steps(config)
    model = fit_behavior(steps, config)
    table = model.table()
    with store.warehouse(config.warehouse_path) as con:
        con.register("behavior_frame", table.to_arrow())
        store.frame(con, "create or replace table behavior_policy as select * from behavior_frame")
        con.unregister("behavior_frame")
    run.write("behavior_policy", table)
    membership = model.membership()
    run.write("behavior_type", membership)
    per_type: tuple[int, ...] = ()
    if model.n_types is not None:
        top = membership.sort("share", descending=True).unique(["premise_id", *model.split_], keep="first")
        counts = top.group_by("habit_type").len()
        found = dict(zip(counts["habit_type"].to_list(), counts["len"].to_list(), strict=True))
        per_type = tuple(found.get(z, 0) for z in range(1, model.n_types + 1))
    return BehaviorSummary(config.behavior_model, model.n_types, model.prior_strength, table.height, per_type)


def evaluate(config: Config, run: Run) -> EvaluationSummary:
    """Evaluate the behaviour policy and every candidate; write savings, policy and diagnostics."""
    steps = _steps(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        behavior = BehaviorPolicy.from_table(
            store.frame(con, "select * from behavior_policy"), config.actions, config.state
        )
        days = store.frame(
            con,
            "select premise_id, p.cohort, count(distinct h.local_date) as days_observed"
            " from hourly h join premise p using (premise_id) group by all",
        )
        by_choice = {
            choice: steps_for(con, dataclasses.replace(config, decision_points=choice))
            for choice in ("fixed", "anchored")
        }
    result = evaluation.evaluate_candidates(steps, behavior, days, config)
    horizon = evaluation.horizon_report(by_choice, config, {config.decision_points: behavior})
    run.write("horizon", horizon)
    run.write("state_value", evaluation.state_values(steps))
    run.write("savings", result.savings)
    run.write("policy", result.policy)
    run.write("diagnostics", result.diagnostics)
    return EvaluationSummary(result.savings, horizon)


def finish(config: Config, run: Run) -> str:
    """Write the run record; return the path of its file."""
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        return str(run.finish(con))


def run_all(config: Config) -> RunSummary:
    """Every stage in order, without Prefect."""
    run = Run(config)
    ingested = ingest(config)
    counts = episodes(config, run)
    behavior = learn(config, run)
    evaluated = evaluate(config, run)
    finish(config, run)
    return RunSummary(run.run_id, ingested, counts, behavior, evaluated)
