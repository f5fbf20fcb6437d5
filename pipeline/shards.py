"""The episode stage in shards of premises, each built on its own and kept while its inputs stay the same.

A shard is a run of consecutive premises in premise-id order (``shard_premises`` of them).
Its hourly grid, episodes and decision steps depend only on its own premises' meter and
thermostat rows, the weather and tariffs, and the episode settings, so a worker builds it
from a read-only connection to the warehouse and writes three Parquet files into a folder
of its own, ``<out>/shards/episodes/<shard>-<fingerprint>/``. Nothing a shard writes is
shared with another shard, so shards can run in any order, in parallel, on other machines.

The fingerprint of a shard hashes everything that shapes it: the content hashes of the
landing files that hold its premises' rows, its premises' own rows and numbers, every
weather and tariff file, the settings of the episode stage and the code. A shard whose
folder for its fingerprint is complete (``rows.json``, written last) is reused as it is.

After every shard is built, ``combine`` points the warehouse views ``hourly``, ``episode``
and ``step`` at the shards' files, in one transaction with the stage's build record, so a
reader sees either the old shards or the new ones. Episode ids are the premise's number
(its rank in premise-id order) times ``episodes.EPISODES_PER_PREMISE`` plus the episode's rank within
the premise, so they are the same whatever the shard size.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import time
import uuid
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from pipeline import lineage, store
from pipeline.config import Config
from pipeline.episodes import add_state_keys

SHARD_TABLES: tuple[str, ...] = ("hourly", "episode", "step", "step_alternate")
"""What a shard holds, in build order: each table's SQL reads the ones before it.

``step_alternate`` is the steps under the other choice of decision points (anchored or
fixed), which the learn and evaluate stages compare in their horizon report."""

PREMISE_TABLES: tuple[str, ...] = ("meter_read", "thermostat_event")
"""The typed tables a shard reads only its own premises' rows of."""


@dataclass(frozen=True)
class Shard:
    """One shard of premises: which premises, what its inputs hash to, and where its files go."""

    shard_id: int
    first_premise: str
    last_premise: str
    n_premises: int
    fingerprint: str
    folder: Path

    @property
    def complete(self) -> bool:
        """Whether this fingerprint's files were all written (``rows.json`` is written last)."""
        return (self.folder / "rows.json").exists()

    def path(self, table: str) -> Path:
        return self.folder / f"{table}.parquet"


@dataclass(frozen=True)
class ShardWork:
    """What building one shard did: reused or computed, its row counts and its wall time."""

    shard_id: int
    n_premises: int
    fingerprint: str
    reused: bool
    rows: Mapping[str, int] = field(default_factory=dict)
    seconds: float = 0.0


def shards_folder(config: Config) -> Path:
    return config.out / "shards" / "episodes"


def _literal(value: str) -> str:
    """``value`` as a single-quoted SQL string literal (quotes doubled)."""
    return "'" + value.replace("'", "''") + "'"


def _digest(*parts: object) -> str:
    text = json.dumps(parts, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def plan(con: duckdb.DuckDBPyConnection, config: Config, params: Mapping[str, object]) -> tuple[Shard, ...]:
    """Cut the premises into shards of ``config.shard_premises`` and fingerprint each one's inputs."""
    rows = store.execute(con, store.sql_text("shard_plan"), {"shard_premises": config.shard_premises})
    shared = store.execute(
        con,
        "select coalesce(string_agg(source_file || ':' || content_hash, ';' order by source_file), '')"
        " from ingest_log where folder in ('weather', 'tariffs', 'prices')",
    )[0][0]
    base = (config.stage_settings("episodes"), dict(params), lineage.code_fingerprint(), shared)
    folder = shards_folder(config).resolve()
    shards = []
    for shard_id, first, last, n_premises, premise_rows, files in rows:
        digest = _digest(base, premise_rows, files)[:20]
        shards.append(Shard(shard_id, first, last, n_premises, digest, folder / f"{shard_id:05d}-{digest}"))
    return tuple(shards)


def build_shard(config: Config, shard: Shard, params: Mapping[str, object]) -> ShardWork:
    """Build one shard's hourly grid, episodes and steps into its folder, or reuse them if complete.

    Reads the warehouse through a read-only connection, in which temporary views of the
    premise-keyed tables hold only the shard's premises, so the stage's SQL runs unchanged.
    Files are written to a temporary folder that is renamed into place when whole.
    """
    if shard.complete:
        rows = json.loads((shard.folder / "rows.json").read_text())
        return ShardWork(shard.shard_id, shard.n_premises, shard.fingerprint, True, rows)
    started = time.perf_counter()
    staging = shard.folder.with_name(f".{shard.folder.name}-{uuid.uuid4().hex[:8]}")
    staging.mkdir(parents=True)
    rows: dict[str, int] = {}
    try:
        with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
            database = store.quote_identifier(con.execute("select current_database()").fetchone()[0])
            within = f"premise_id between {_literal(shard.first_premise)} and {_literal(shard.last_premise)}"
            for table in PREMISE_TABLES:
                name = store.quote_identifier(table)
                store.execute(
                    con, f"create temp view {name} as select * from {database}.main.{name} where {within}"
                )
            for table in SHARD_TABLES:
                target = staging / f"{table}.parquet"
                if table.startswith("step"):
                    choice = dict(params)
                    if table == "step_alternate":
                        choice["anchored"] = not choice["anchored"]
                    steps = add_state_keys(store.query(con, "step", choice), config)
                    steps.sort("episode_id", "t").write_parquet(target)
                    rows[table] = steps.height
                else:
                    rows[table] = store.build_table(con, table, dict(params), temp=True)
                    order = "premise_id, hour_utc" if table == "hourly" else "episode_id"
                    store.execute(
                        con,
                        f"copy (select * from {store.quote_identifier(table)} order by {order})"
                        f" to {_literal(str(target))} (format parquet)",
                    )
                store.fault_point("shard-file-write")
        (staging / "rows.json").write_text(json.dumps(rows))
        if shard.folder.exists():
            shutil.rmtree(shard.folder)
        store.fault_point("shard-rename")
        staging.rename(shard.folder)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return ShardWork(
        shard.shard_id, shard.n_premises, shard.fingerprint, False, rows, time.perf_counter() - started
    )


def combine(con: duckdb.DuckDBPyConnection, shards: Iterable[Shard], params: Mapping[str, object]) -> None:
    """Point the views ``hourly``, ``episode``, ``step`` and ``step_alternate`` at the shards' files.

    With no premises to shard, the tables are built empty (with their columns) in the warehouse.
    """
    shards = tuple(shards)
    for table in SHARD_TABLES:
        name = store.quote_identifier(table)
        existing = store.execute(
            con,
            "select table_type from information_schema.tables"
            " where table_schema = 'main' and table_name = $t",
            {"t": table},
        )
        if existing:
            kind = "view" if existing[0][0] == "VIEW" else "table"
            store.execute(con, f"drop {kind} {name}")
        if not shards:
            if table == "step_alternate":
                store.execute(con, "create table step_alternate as select * from step limit 0")
            else:
                store.build_table(con, table, dict(params))
            continue
        files = ", ".join(_literal(str(shard.path(table))) for shard in shards)
        store.execute(con, f"create view {name} as select * from read_parquet([{files}])")


def remove_stale(config: Config, shards: Iterable[Shard]) -> list[str]:
    """Delete shard folders that no current shard uses (after ``combine`` committed); return their names."""
    keep = {shard.folder.name for shard in shards}
    root = shards_folder(config)
    stale = [p for p in root.iterdir() if p.is_dir() and p.name not in keep] if root.exists() else []
    for path in stale:
        shutil.rmtree(path, ignore_errors=True)
    return sorted(p.name for p in stale)


def work_frame(stage: str, work: Iterable[ShardWork]) -> pl.DataFrame:
    """The run record's rows for one sharded stage: one per shard, reused or computed."""
    work = sorted(work, key=lambda w: w.shard_id)
    return pl.DataFrame(
        {
            "stage": [stage] * len(work),
            "shard_id": [w.shard_id for w in work],
            "n_premises": [w.n_premises for w in work],
            "fingerprint": [w.fingerprint for w in work],
            "status": ["reused" if w.reused else "computed" for w in work],
            "seconds": [w.seconds for w in work],
            "rows": [sum(w.rows.values()) for w in work],
        },
        schema={
            "stage": pl.Utf8,
            "shard_id": pl.Int64,
            "n_premises": pl.Int64,
            "fingerprint": pl.Utf8,
            "status": pl.Utf8,
            "seconds": pl.Float64,
            "rows": pl.Int64,
        },
    )
