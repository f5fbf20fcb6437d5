"""The whole pipeline as one Prefect flow, and its stages as tasks.

Each task is one call into ``pipeline.stages``, in the order ``stages.STAGES`` gives;
nothing here transforms data, so every step can be run and tested without Prefect.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from prefect import flow, task
from prefect.cache_policies import NO_CACHE

from pipeline import config as config_module
from pipeline import stages
from pipeline.ledger import Run


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


@flow(name="thermal-ledger-run", log_prints=True)
def thermal_ledger_run(
    config_path: str | None = None, overrides: dict[str, Any] | None = None
) -> stages.RunSummary:
    """Ingest, build episodes, learn and evaluate; write the ledger for one run."""
    config = config_module.load(config_path, overrides)
    run = Run(config)
    results = {name: STAGE_TASKS[name](config, run) for name in stages.STAGES}
    finish_task(config, run, results)
    return stages.summary(run, results)
