"""The whole pipeline as one Prefect flow, and its stages as tasks.

Each task is one call into ``pipeline.stages``, in the order ``stages.STAGES`` gives;
nothing here transforms data, so every step can be run and tested without Prefect.

The episode stage is mapped over its shards of premises in a subflow whose task runner
the configuration chooses: Prefect's thread pool (``task_runner = "default"``), or
``prefect-dask``'s ``DaskTaskRunner`` (``"dask"``) on a local cluster of ``dask_workers``
processes or on the scheduler at ``dask_address``. Shard tasks read the warehouse
read-only and write only their own shard folder, so a worker on another machine needs
only the same paths (a shared file system) and the package installed.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from prefect import flow, task, unmapped
from prefect.artifacts import create_markdown_artifact, create_table_artifact
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import TaskRunner, ThreadPoolTaskRunner

from pipeline import config as config_module
from pipeline import shards, stages
from pipeline.config import Config, ConfigError
from pipeline.ledger import Run, exclusive_output


@contextmanager
def quiet_tracebacks(errors: tuple[type[BaseException], ...]) -> Iterator[None]:
    """Print failed tasks and flows caused by ``errors`` without their traceback, on the terminal only.

    These are the user's mistakes (settings, files, order of stages), answered in one line by the
    caller; Prefect's API log handler still receives the whole record, so the UI keeps the detail.
    """

    def strip(record: logging.LogRecord) -> bool:
        if record.exc_info and isinstance(record.exc_info[1], errors):
            record.exc_info, record.exc_text = None, None
        return True

    # Prefect 3 puts its console handler on the root logger (older releases on "prefect").
    handlers = logging.getLogger().handlers + logging.getLogger("prefect").handlers
    consoles = [h for h in handlers if isinstance(h, logging.StreamHandler)]
    for handler in consoles:
        handler.addFilter(strip)
    try:
        yield
    finally:
        for handler in consoles:
            handler.removeFilter(strip)


STAGE_TASKS = {
    name: task(stages.STAGE_FUNCTIONS[name], name=name, cache_policy=NO_CACHE) for name in stages.STAGES
}
finish_task = task(stages.finish, name="finish", cache_policy=NO_CACHE)
plan_episodes_task = task(stages.plan_episodes, name="plan-episode-shards", cache_policy=NO_CACHE)
episode_shard_task = task(
    stages.episode_shard,
    name="episode-shard",
    cache_policy=NO_CACHE,
    task_run_name="episode-shard-{shard.shard_id}",
)
finish_episodes_task = task(stages.finish_episodes, name="episodes", cache_policy=NO_CACHE)


# ---- the run report and Prefect's artifacts --------------------------------------------------

SUMMARY_ARTIFACT = "thermal-ledger-program-summary"
"""Key of the table artifact: the program's savings per policy (Prefect keeps one history per key)."""
REPORT_ARTIFACT = "thermal-ledger-report"
"""Key of the markdown artifact that links the run's report file."""


@task(name="report", cache_policy=NO_CACHE)
def report_task(config: Config, run_id: str) -> Any:
    """Write the run's HTML report and figures from the ledger (``pipeline.report.report_run``)."""
    from pipeline.report import report_run

    return report_run(config, run_id)


@task(name="publish-artifacts", cache_policy=NO_CACHE)
def publish_artifacts(report: Any) -> None:
    """The program summary as a table artifact and a markdown artifact linking the report."""
    path = report.html.resolve()
    create_table_artifact(
        key=SUMMARY_ARTIFACT,
        table=report.summary,
        description=f"Savings per policy, whole program, run {report.run_id} (recommended estimator, USD)",
    )
    create_markdown_artifact(
        key=REPORT_ARTIFACT,
        markdown=f"Report of run `{report.run_id}`: [{path}]({path.as_uri()})"
        f" ({len(report.pngs)} figures, PNGs in `{report.html.parent / 'figures'}`)",
        description=f"Run report {report.run_id}",
    )


def task_runner(config: Config) -> TaskRunner:
    """The task runner the configuration asks for the shard tasks."""
    if config.task_runner == "default":
        # Each shard's DuckDB queries use every core already; two at a time overlap their I/O.
        return ThreadPoolTaskRunner(max_workers=2)
    try:
        from prefect_dask import DaskTaskRunner
    except ImportError as error:
        raise ConfigError(
            "task_runner = 'dask' needs the dask extra: pip install 'thermal-ledger[dask]'"
        ) from error
    if config.dask_address:
        return DaskTaskRunner(address=config.dask_address)
    return DaskTaskRunner(
        cluster_kwargs={
            "n_workers": config.dask_workers,
            "threads_per_worker": 1,
            "processes": True,
            "dashboard_address": None,
        }
    )


@flow(name="episode-shards")
def episode_shards(config: Config, plan: tuple[shards.Shard, ...]) -> list[shards.ShardWork]:
    """Build every shard of the episode stage on this flow's task runner; return what each did."""
    futures = episode_shard_task.map(unmapped(config), plan)
    return [future.result() for future in futures]


def episodes_mapped(config: Config, run: Run) -> stages.EpisodeSummary:
    """The episode stage as Prefect tasks: plan the shards, map them, publish them."""
    plan = plan_episodes_task(config)
    work = episode_shards.with_options(task_runner=task_runner(config))(config, plan) if plan else []
    return finish_episodes_task(config, run, plan, work)


@flow(name="thermal-ledger-run", log_prints=True)
def thermal_ledger_run(
    config_path: str | None = None, overrides: dict[str, Any] | None = None
) -> stages.RunSummary:
    """Ingest, build episodes, learn, improve and evaluate; write the ledger for one run, then its report."""
    config = config_module.load(config_path, overrides)
    with exclusive_output(config.out, "(thermal-ledger flow)"):
        run = Run(config)
        results = {}
        for name in stages.STAGES:
            if name == "episodes":
                results[name] = episodes_mapped(config, run)
            else:
                results[name] = STAGE_TASKS[name](config, run)
        finish_task(config, run, results)
        publish_artifacts(report_task(config, run.run_id))
    return stages.summary(run, results)
