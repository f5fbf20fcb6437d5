"""What each stage's warehouse tables were built from: their settings and upstream builds.

A stage that reads another stage's tables must use exactly the settings those tables were
built with, and the tables it reads must be the ones its own inputs were made from. When
either is not so, it stops with a message naming the setting or stage to rerun, instead of
silently giving the old numbers while the run record shows the new settings.
"""

from __future__ import annotations

import datetime as dt
import functools
import hashlib
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb

from pipeline import store


class StageError(RuntimeError):
    """A stage cannot run: an earlier stage has not produced its input, or built it otherwise."""


@dataclass(frozen=True)
class Build:
    """One stage's newest build as recorded in the warehouse."""

    stage: str
    build_id: str
    run_id: str
    settings: dict[str, Any]
    upstream: dict[str, str]
    """Build id of each earlier stage this build read."""


def _normal(value: Any) -> Any:
    # Tuples and lists, ints and floats compare as JSON would store them.
    return json.loads(json.dumps(value, default=str))


def builds(con: duckdb.DuckDBPyConnection) -> dict[str, Build]:
    """Every stage's newest build, by stage name."""
    store.run_sql(con, "stage_build")
    rows = store.execute(con, "select stage, build_id, run_id, settings, upstream from stage_build")
    return {
        stage: Build(stage, build_id, run_id, json.loads(settings), json.loads(upstream))
        for stage, build_id, run_id, settings, upstream in rows
    }


NOT_SHAPING: frozenset[str] = frozenset({"simulate", "bench.py", "cli.py", "cron.py", "views.sql"})
"""Sources that shape no warehouse table (the simulator, the commands, the analysts' views)."""


@functools.cache
def code_fingerprint() -> str:
    """Hash of the Python and SQL sources that shape tables: a build made by other code is not reused.

    Sources in ``NOT_SHAPING`` are left out, so editing the simulator or a command's printing
    does not make a monthly run recompute everything.
    """
    package = Path(__file__).resolve().parent
    sources = [*package.rglob("*.py"), *store.SQL_DIR.glob("*.sql")]
    digest = hashlib.sha256()
    for path in sorted(sources):
        parts = path.relative_to(package).parts if path.is_relative_to(package) else (path.name,)
        if NOT_SHAPING.intersection(parts) or path.name.startswith("bench_"):
            continue
        digest.update(path.name.encode())
        digest.update(path.read_bytes())
    return digest.hexdigest()


def build_id_for(
    con: duckdb.DuckDBPyConnection,
    stage: str,
    settings: dict[str, Any],
    upstream: tuple[str, ...],
    inputs: str = "",
) -> str:
    """The id a build of ``stage`` gets from these settings, the current upstream builds and ``inputs``.

    Equal ids mean equal tables: the id hashes everything that shapes them (settings, the
    upstream builds' ids, a digest of the stage's own inputs, and the code), so a stage
    whose id is unchanged since its last build can reuse that build.
    """
    current = builds(con)
    parts = {
        "stage": stage,
        "settings": _normal(settings),
        "upstream": {name: current[name].build_id for name in upstream if name in current},
        "inputs": inputs,
        "code": code_fingerprint(),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:32]


def reusable(con: duckdb.DuckDBPyConnection, stage: str, build_id: str) -> bool:
    """Whether the warehouse's current build of ``stage`` is ``build_id`` (so it need not be rebuilt)."""
    build = builds(con).get(stage)
    return build is not None and build.build_id == build_id


def record(
    con: duckdb.DuckDBPyConnection,
    stage: str,
    settings: dict[str, Any],
    upstream: tuple[str, ...],
    run_id: str,
    inputs: str = "",
) -> str:
    """Record a new build of ``stage`` made from the current builds of ``upstream``; return its id.

    Call inside the transaction that wrote the stage's tables, so the record and the tables
    appear together or not at all. ``inputs`` digests what the stage read besides upstream
    builds (files, shards); see ``build_id_for``.
    """
    current = builds(con)
    build_id = build_id_for(con, stage, settings, upstream, inputs)
    store.execute(con, "delete from stage_build where stage = $stage", {"stage": stage})
    store.execute(
        con,
        "insert into stage_build values ($stage, $build_id, $run_id, $built_at, $settings, $upstream)",
        {
            "stage": stage,
            "build_id": build_id,
            "run_id": run_id,
            "built_at": dt.datetime.now(dt.UTC),
            "settings": json.dumps(_normal(settings), sort_keys=True),
            "upstream": json.dumps({name: current[name].build_id for name in upstream if name in current}),
        },
    )
    return build_id


def changed(con: duckdb.DuckDBPyConnection, stage: str, settings: dict[str, Any]) -> list[str]:
    """Settings whose values differ from those ``stage``'s current build was made with (none if unbuilt)."""
    build = builds(con).get(stage)
    if build is None:
        return []
    return sorted(k for k, v in settings.items() if build.settings.get(k, object()) != _normal(v))


def _shown(value: Any) -> str:
    return json.dumps(_normal(value))


def check(
    con: duckdb.DuckDBPyConnection,
    stage: str,
    upstream: tuple[str, ...],
    settings_of: dict[str, dict[str, Any]],
) -> None:
    """Refuse to run ``stage`` unless every upstream build exists, matches and is current.

    ``settings_of`` maps each upstream stage to the settings this run would build it with.
    """
    current = builds(con)
    for name in upstream:
        build = current.get(name)
        if build is None:
            raise StageError(
                f"the {stage} stage needs the {name} stage's tables, which this warehouse does not have:"
                f" run `thermal-ledger {name}` first (or `thermal-ledger run` for every stage)"
            )
        for key, value in settings_of[name].items():
            if key not in build.settings or _normal(value) != build.settings[key]:
                was = _shown(build.settings[key]) if key in build.settings else "no such setting"
                raise StageError(
                    f"setting {key} = {_shown(value)} shapes the {name} stage, whose tables were built with"
                    f" {was}: rerun `thermal-ledger {name}` with it and the stages after it"
                    f" (or `thermal-ledger run`), or drop the setting"
                )
        for before, build_id in build.upstream.items():
            if before in current and current[before].build_id != build_id:
                raise StageError(
                    f"the {name} stage's tables were made from an earlier {before} build:"
                    f" rerun `thermal-ledger {name}` (or `thermal-ledger run`) before the {stage} stage"
                )
