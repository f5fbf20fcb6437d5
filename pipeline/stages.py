"""The pipeline's stages as plain functions of a Config and the Run they belong to.

Each stage reads what the previous one left in the warehouse, so a stage can be run
alone from the command line, as a Prefect task, or from a test. A stage hands back an
immutable, picklable result (what it built, the ledger rows it wrote); nothing is
shared between stages but the warehouse, so the same stages run in one process or as
tasks on other workers. ``STAGES`` is the one definition of their order, used by
``run_all`` and by the Prefect flow alike.

Every stage that writes the warehouse does so in one transaction together with its
build record (``pipeline.lineage``): a stage that fails leaves the warehouse as it was,
and a stage whose inputs were built with other settings refuses to run.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from pipeline import convergence, ledger, lineage, rules, schedule, shards, store
from pipeline import evaluate as evaluation
from pipeline import improve as improvement
from pipeline import ingest as ingestion
from pipeline import progress as reporting
from pipeline import recommend as recommending
from pipeline.behavior import BEHAVIOR_TABLES, BehaviorModel, fit_behavior, load_behavior
from pipeline.config import Config
from pipeline.episodes import (
    EpisodeCounts,
    load_steps,
    other_choice,
    sql_params,
)
from pipeline.episodes import (
    counts as episode_counts,
)
from pipeline.ledger import Run
from pipeline.lineage import StageError

__all__ = [
    "STAGES",
    "BehaviorSummary",
    "EpisodeCounts",
    "EvaluationSummary",
    "ImprovementSummary",
    "IngestSummary",
    "RunSummary",
    "StageError",
    "run_all",
]

STAGES: tuple[str, ...] = ("ingest", "episodes", "learn", "improve", "evaluate")
"""The stages of a run, in order; each reads what the ones before it left in the warehouse."""


@dataclass(frozen=True)
class StageWork:
    """Whether a stage reused its last build or computed a new one, and its wall time."""

    stage: str
    reused: bool = False
    seconds: float = 0.0


@dataclass(frozen=True)
class IngestSummary:
    """Per-file ingest results and whether any file was refused."""

    files: pl.DataFrame
    refused: int
    tables: Mapping[str, int] = field(default_factory=dict)
    """Rows per warehouse table after the load."""
    work: StageWork = field(default_factory=lambda: StageWork("ingest"))


@dataclass(frozen=True)
class EpisodeSummary:
    """What the episode stage built, and the ledger rows it wrote."""

    counts: EpisodeCounts
    tables: Mapping[str, int] = field(default_factory=dict)
    work: StageWork = field(default_factory=lambda: StageWork("episodes"))


@dataclass(frozen=True)
class BehaviorSummary:
    """The behaviour model a run fitted: its kind, the settings chosen and its size."""

    model: str
    n_types: int | None
    prior_strength: float
    rows: int
    premises_per_type: tuple[int, ...]
    """Premises whose largest share is each habit type, in type order (empty for the counts model)."""
    tables: Mapping[str, int] = field(default_factory=dict)
    work: StageWork = field(default_factory=lambda: StageWork("learn"))

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
class EvaluationSummary:
    """The savings rows of one evaluation, and the weight spread per decision-point choice."""

    savings: pl.DataFrame
    horizon: pl.DataFrame
    tables: Mapping[str, int] = field(default_factory=dict)
    work: StageWork = field(default_factory=lambda: StageWork("evaluate"))
    recommendation_total: pl.DataFrame = field(default_factory=pl.DataFrame)
    """Homes per policy (or kept on current behaviour, by reason) and their annual totals."""


@dataclass(frozen=True)
class RunSummary:
    """What one whole run did."""

    run_id: str
    ingest: IngestSummary
    episodes: EpisodeCounts
    behavior: BehaviorSummary
    evaluation: EvaluationSummary
    improvement: ImprovementSummary | None = None


def _settings_of(config: Config, names: tuple[str, ...]) -> dict[str, dict[str, Any]]:
    return {name: config.stage_settings(name) for name in names}


def _upstream(stage: str) -> tuple[str, ...]:
    return STAGES[: STAGES.index(stage)]


def _require_warehouse(config: Config, stage: str) -> None:
    if not config.warehouse_path.exists():
        raise StageError(
            f"no warehouse at {config.warehouse_path}: the {stage} stage reads it;"
            f" run `thermal-ledger ingest --lake {config.lake} --out {config.out}` first"
            " (or `thermal-ledger run`)"
        )


def _checked(config: Config, stage: str) -> None:
    """Refuse ``stage`` unless the warehouse holds current inputs built with this run's settings."""
    _require_warehouse(config, stage)
    upstream = _upstream(stage)
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
        lineage.check(con, stage, upstream, _settings_of(config, upstream))


def ingest(config: Config, run: Run, progress: ingestion.Progress | None = None) -> IngestSummary:
    """Load the landing files into the warehouse and record the settings they were checked with.

    When a setting that shapes the checks changed since the last load, every file is read
    again, so no row stays loaded (or quarantined) under the old rules.
    """
    started = time.perf_counter()
    reread = False
    if config.warehouse_path.exists():
        with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
            reread = bool(lineage.changed(con, "ingest", config.stage_settings("ingest")))
    files = ingestion.ingest(config, progress=progress or reporting.counter("ingest"), reread=reread)
    results = ingestion.results_frame(files)
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con, store.transaction(con):
        loaded = store.execute(
            con,
            "select coalesce(string_agg(concat_ws(':', source_file, content_hash, status, rows_loaded),"
            " ';' order by source_file), '') from ingest_log",
        )[0][0]
        lineage.record(con, "ingest", config.stage_settings("ingest"), (), run.run_id, inputs=loaded)
    unchanged = bool((results["status"] == "unchanged").all())
    work = StageWork("ingest", unchanged, time.perf_counter() - started)
    return IngestSummary(results, int((results["status"] == "refused").sum()), work=work)


def plan_episodes(config: Config) -> tuple[shards.Shard, ...]:
    """The episode stage's shards of premises, each with the fingerprint of its inputs."""
    _checked(config, "episodes")
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        plan = shards.plan(con, config, sql_params(config))
    reporting.begin("episodes", len(plan), "episodes: shards of premises")
    return plan


def episode_shard(config: Config, shard: shards.Shard) -> shards.ShardWork:
    """Build (or reuse) one shard's hourly grid, episodes and steps; runs on any worker."""
    work = shards.build_shard(config, shard, sql_params(config))
    reporting.advance("episodes")
    return work


def finish_episodes(
    config: Config, run: Run, plan: tuple[shards.Shard, ...], work: list[shards.ShardWork]
) -> EpisodeSummary:
    """Publish the shards as the warehouse's ``hourly``, ``episode`` and ``step``; write the ledger rows."""
    started = time.perf_counter()
    inputs = ";".join(shard.fingerprint for shard in plan)
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
        with store.transaction(con):
            shards.combine(con, plan, sql_params(config))
            store.replace_table(con, "state_lookup", config.state.lookup())
            counts = episode_counts(con)
            lineage.record(
                con,
                "episodes",
                config.stage_settings("episodes"),
                _upstream("episodes"),
                run.run_id,
                inputs=inputs,
            )
        summary = store.query(con, "episode_summary")
    shards.remove_stale(config, plan)
    reporting.done("episodes")
    tables = {"hourly": counts.hours, "episode": counts.episodes, "step": counts.steps}
    tables |= run.write("episode_summary", summary)
    tables |= run.write("state_lookup", config.state.lookup())
    tables |= run.write("shard_work", shards.work_frame("episodes", work))
    seconds = time.perf_counter() - started + sum(w.seconds for w in work)
    return EpisodeSummary(counts, tables, StageWork("episodes", all(w.reused for w in work), seconds))


def episodes(config: Config, run: Run) -> EpisodeSummary:
    """Rebuild the hourly grid, episodes and steps shard by shard; write ``episode_summary`` to the ledger.

    Shards run one after another here; the Prefect flow maps them over its task runner.
    """
    plan = plan_episodes(config)
    work = [episode_shard(config, shard) for shard in plan]
    return finish_episodes(config, run, plan, work)


def _steps(config: Config) -> pl.DataFrame:
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        steps = load_steps(con)
    if steps.is_empty():
        raise StageError("no usable decision steps: check the episode stage's exclusions (episode_summary)")
    return steps


def _store_behavior(con, model: BehaviorModel, prefix: str) -> None:
    for name, frame in model.to_tables().items():
        store.replace_table(con, f"{prefix}_{name}", frame)


def _load_behavior(con, prefix: str, config: Config) -> BehaviorModel:
    tables = {
        name: store.frame(con, f"select * from {store.quote_identifier(f'{prefix}_{name}')}")
        for name in BEHAVIOR_TABLES
    }
    return load_behavior(tables, config.actions, config.state)


def learn(config: Config, run: Run) -> BehaviorSummary:
    """Estimate the behaviour policy; keep it in the warehouse and write it to the ledger.

    The same model (its chosen size, no second search) is also fitted on the steps of the
    other choice of decision points, for the evaluate stage's horizon report. When the
    warehouse's model was fitted from the same episodes with the same settings and code
    (its build id is unchanged), it is reused as it is rather than fitted again.
    """
    started = time.perf_counter()
    _checked(config, "learn")
    reporting.begin("learn", None, "learn: fitting the behaviour model")
    build_id = _build_id(config, "learn")
    if build_id is not None:
        with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
            model = _load_behavior(con, "behavior", config)
    else:
        steps = _steps(config)
        model = fit_behavior(steps, config)
        other = other_choice(config)
        with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
            other_steps = load_steps(con, "step_alternate")
        other_model = model.clone().fit(other_steps)
        with store.warehouse(config.warehouse_path, settings=config.duckdb) as con, store.transaction(con):
            _store_behavior(con, model, "behavior")
            _store_behavior(con, other_model, f"behavior_{other.decision_points}")
            lineage.record(con, "learn", config.stage_settings("learn"), _upstream("learn"), run.run_id)
    tables: dict[str, int] = {}
    for name, frame in model.to_tables().items():
        tables |= run.write(f"behavior_{name}", frame)
    membership = model.membership()
    per_type: tuple[int, ...] = ()
    if model.n_types is not None:
        top = membership.sort("share", descending=True).unique(["premise_id", *model.split_], keep="first")
        counts = top.group_by("habit_type").len()
        found = dict(zip(counts["habit_type"].to_list(), counts["len"].to_list(), strict=True))
        per_type = tuple(found.get(z, 0) for z in range(1, model.n_types + 1))
    reporting.done("learn")
    return BehaviorSummary(
        config.behavior_model,
        model.n_types,
        model.prior_strength,
        tables["behavior_policy"],
        per_type,
        tables,
        StageWork("learn", build_id is not None, time.perf_counter() - started),
    )


EVALUATION_TABLES: tuple[str, ...] = (
    "horizon",
    "state_value",
    "savings",
    "policy",
    "diagnostics",
    "schedule",
    "recommendation",
    "recommendation_total",
    "estimate_path",
)
"""The ledger tables the evaluate stage writes, also kept in the warehouse as ``evaluation_<name>``."""


def _build_id(config: Config, stage: str, inputs: str = "") -> str | None:
    """The current build's id of ``stage`` if this run would build it the same, else None."""
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
        build_id = lineage.build_id_for(con, stage, config.stage_settings(stage), _upstream(stage), inputs)
        return build_id if lineage.reusable(con, stage, build_id) else None


def _evaluation_tables(config: Config, candidates: tuple[rules.Candidate, ...]) -> dict[str, pl.DataFrame]:
    """Every frame the evaluate stage publishes, computed from the warehouse's steps and behaviour model."""
    steps = _steps(config)
    other = other_choice(config)
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        behavior = _load_behavior(con, "behavior", config)
        fitted = {
            config.decision_points: behavior,
            other.decision_points: _load_behavior(con, f"behavior_{other.decision_points}", config),
        }
        # Days the thermostat was in each mode: a mode's episodes are annualised over its season.
        days = store.frame(
            con,
            "select premise_id, p.cohort, p.rate_plan_id, h.mode_end as mode,"
            " count(distinct h.local_date) as days_observed"
            " from hourly h join premise p using (premise_id) where h.mode_end in ('cool', 'heat')"
            " group by all",
        )
        by_choice = {config.decision_points: steps, other.decision_points: load_steps(con, "step_alternate")}
        premises = store.query(con, "premise_coverage")
        # Learned policies count only when their stage runs before this one, so lineage keeps them current.
        learned_savings, safety = (
            recommending.learned_tables(con) if "improve" in _upstream("evaluate") else (None, None)
        )
    result = evaluation.evaluate_candidates(steps, behavior, days, config, candidates)
    every_savings = result.savings
    if learned_savings is not None:
        every_savings = pl.concat([result.savings, learned_savings], how="diagonal_relaxed")
    decided = recommending.recommend(every_savings, premises, config, safety)
    frames = {
        "horizon": evaluation.horizon_report(by_choice, config, fitted, candidates, days),
        "state_value": evaluation.state_values(steps),
        "savings": result.savings,
        "policy": result.policy,
        "diagnostics": result.diagnostics,
        "recommendation": decided.homes,
        "recommendation_total": decided.totals,
        # The run report's "estimates as episodes accumulate" (program-wide policies).
        "estimate_path": convergence.estimate_path(steps, behavior, result.policy, config),
    }
    # Schedules: each home's recommended policy, a candidate or a learned one (or, for review,
    # every candidate that applies to it: schedule_for).
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        learned = schedule.learned_policy(con) if "improve" in _upstream("evaluate") else None
        plannable = result.policy if learned is None else pl.concat([result.policy, learned], how="diagonal")
        frames["schedule"] = schedule.for_run(
            con, config, candidates, plannable, frames.get("recommendation")
        )
    return frames


def evaluate(config: Config, run: Run) -> EvaluationSummary:
    """Evaluate the behaviour policy and every candidate; write savings, policy and diagnostics.

    The frames are kept in the warehouse with the stage's build record, so a run whose
    steps, behaviour model, settings and code are unchanged republishes them without
    evaluating again.
    """
    started = time.perf_counter()
    # The rule file is read first, so a mistake in it is reported before any work.
    candidates = rules.candidates_for(config)
    _checked(config, "evaluate")
    reporting.begin("evaluate", None, "evaluate: candidate policies")
    build_id = _build_id(config, "evaluate", rules.digest(candidates))
    if build_id is not None:
        with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
            frames = {
                name: store.frame(con, f"select * from {store.quote_identifier(f'evaluation_{name}')}")
                for name in EVALUATION_TABLES
            }
    else:
        frames = _evaluation_tables(config, candidates)
        with store.warehouse(config.warehouse_path, settings=config.duckdb) as con, store.transaction(con):
            for name in EVALUATION_TABLES:
                store.replace_table(con, f"evaluation_{name}", frames[name])
            lineage.record(
                con,
                "evaluate",
                config.stage_settings("evaluate"),
                _upstream("evaluate"),
                run.run_id,
                rules.digest(candidates),
            )
    tables: dict[str, int] = {}
    for name in EVALUATION_TABLES:
        tables |= run.write(name, frames[name])
    reporting.done("evaluate")
    work = StageWork("evaluate", build_id is not None, time.perf_counter() - started)
    return EvaluationSummary(
        frames["savings"], frames["horizon"], tables, work, frames["recommendation_total"]
    )


# ---- improve: learned policies and their safety test (pipeline/improve.py) ----

IMPROVEMENT_TABLES: tuple[str, ...] = ("policy", "savings", "safety_test")
"""Frames the improve stage publishes, kept in the warehouse as ``improvement_<name>``."""


@dataclass(frozen=True)
class ImprovementSummary:
    """The safety test's outcome per scope, and the learned policies' held-out savings rows."""

    safety_test: pl.DataFrame
    savings: pl.DataFrame
    tables: Mapping[str, int] = field(default_factory=dict)
    work: StageWork = field(default_factory=lambda: StageWork("improve"))

    def describe(self) -> str:
        """One line for the run summary."""
        tested = self.safety_test.filter(pl.col("learner").is_not_null())
        proposed = tested.filter(pl.col("outcome") == improvement.PROPOSED)
        return (
            f"learned policies: {tested.height} scopes tested on held-out episodes,"
            f" {proposed.height} proposed;"
            f" {self.safety_test.height - tested.height} with too little evidence"
        )


def _improvement_tables(config: Config) -> dict[str, pl.DataFrame]:
    steps = _steps(config)
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        behavior = _load_behavior(con, "behavior", config)
        exogenous = store.query(con, "episode_exogenous")
        premises = store.frame(con, "select premise_id, cohort, comfort_cool_c, comfort_heat_c from premise")
        days = store.query(con, "held_out_days", {"share": config.improve_holdout_share})
    result = improvement.improve(steps, behavior, exogenous, premises, days, config)
    return {"policy": result.policy, "savings": result.savings, "safety_test": result.safety_test}


def improve(config: Config, run: Run) -> ImprovementSummary:
    """Learn setpoint policies per scope, test them on held-out episodes; write policy, savings, safety_test.

    Learned rows go into the run's ``policy`` and ``savings`` tables as a second file
    (``<run_id>-learned.parquet``), beside the candidates' rows, in the same columns (plus
    ``bootstrapped``, ``learner`` and ``proposed`` in ``policy``). Reused like evaluate's
    frames when nothing it reads changed.
    """
    started = time.perf_counter()
    _checked(config, "improve")
    reporting.begin("improve", None, "improve: learning policies, safety test")
    build_id = _build_id(config, "improve")
    if build_id is not None:
        with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
            kept = {row[0] for row in store.execute(con, "select table_name from duckdb_tables()")}
            # A frame with no columns (no scope had savings to learn from) is stored as no table.
            frames = {
                name: store.frame(con, f"select * from {store.quote_identifier(f'improvement_{name}')}")
                if f"improvement_{name}" in kept
                else pl.DataFrame()
                for name in IMPROVEMENT_TABLES
            }
    else:
        frames = _improvement_tables(config)
        with store.warehouse(config.warehouse_path, settings=config.duckdb) as con, store.transaction(con):
            for name in IMPROVEMENT_TABLES:
                if frames[name].width:
                    store.replace_table(con, f"improvement_{name}", frames[name])
                else:
                    store.execute(
                        con, f"drop table if exists {store.quote_identifier(f'improvement_{name}')}"
                    )
            lineage.record(con, "improve", config.stage_settings("improve"), _upstream("improve"), run.run_id)
    tables: dict[str, int] = {}
    tables |= run.write("policy", frames["policy"], part="learned")
    if frames["savings"].height:
        tables |= run.write("savings", frames["savings"], part="learned")
    tables |= run.write("safety_test", frames["safety_test"])
    reporting.done("improve")
    work = StageWork("improve", build_id is not None, time.perf_counter() - started)
    return ImprovementSummary(frames["safety_test"], frames["savings"], tables, work)


def schedule_folder(config: Config, run: Run) -> Path:
    """Where a published run's schedule files for operations teams go: one CSV per rate plan."""
    return config.out / "schedules" / f"run_date={run.run_date:%Y-%m-%d}" / run.run_id


def finish(config: Config, run: Run, results: Mapping[str, Any]) -> str:
    """Write the run record with the row counts the stages' results report; return its file's path."""
    row_counts: dict[str, int] = {}
    for result in results.values():
        row_counts |= dict(result.tables)
    row_counts |= run.write("stage_work", stage_work_frame([result.work for result in results.values()]))
    row_counts |= run.write("abandoned_run", ledger.sweep_abandoned(config.ledger_path, run.run_id))
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        record = str(run.finish(row_counts, con))
        enrolled = schedule.programs(con)
    if "evaluate" in results:
        # Operations teams' files appear only once the run record has published the run.
        written = (
            config.ledger_path / "schedule" / f"run_date={run.run_date:%Y-%m-%d}" / f"{run.run_id}.parquet"
        )
        plans = pl.read_parquet(written).drop("run_id")
        schedule.write_program_files(plans, schedule_folder(config, run), enrolled)
    return record


def stage_work_frame(work: list[StageWork]) -> pl.DataFrame:
    """The run record's rows of what each stage did: reused or computed, and its seconds."""
    return pl.DataFrame(
        {
            "stage": [w.stage for w in work],
            "status": ["reused" if w.reused else "computed" for w in work],
            "seconds": [w.seconds for w in work],
        },
        schema={"stage": pl.Utf8, "status": pl.Utf8, "seconds": pl.Float64},
    )


STAGE_FUNCTIONS: dict[str, Callable[[Config, Run], Any]] = {
    "ingest": ingest,
    "episodes": episodes,
    "learn": learn,
    "evaluate": evaluate,
    "improve": improve,
}
"""Each stage's function, keyed as in ``STAGES``."""


def summary(run: Run, results: Mapping[str, Any]) -> RunSummary:
    """The run summary from every stage's result."""
    return RunSummary(
        run.run_id,
        results["ingest"],
        results["episodes"].counts,
        results["learn"],
        results["evaluate"],
        results.get("improve"),
    )


def run_all(config: Config) -> RunSummary:
    """Every stage in order, without Prefect."""
    with ledger.exclusive_output(config.out, "(thermal-ledger run)"):
        run = Run(config)
        results = {name: STAGE_FUNCTIONS[name](config, run) for name in STAGES}
        finish(config, run, results)
    return summary(run, results)
