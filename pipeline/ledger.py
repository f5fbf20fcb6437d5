"""The run record and the ledger tables it groups.

A run has one id; every ledger table written during it carries that id and is
stored under ``ledger/<table>/run_date=YYYY-MM-DD/<run_id>.parquet``.
"""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import uuid
from dataclasses import dataclass, field
from pathlib import Path

import duckdb
import polars as pl

from pipeline import store
from pipeline.config import Config


@dataclass(frozen=True)
class Run:
    """One pipeline run's identity. Immutable and picklable: stages on other workers share it.

    What a stage writes comes back to the caller as row counts (``write`` returns them), and
    ``finish`` records the counts it is handed, so no stage mutates shared state.
    """

    config: Config
    run_id: str = ""
    started_at: dt.datetime = field(default_factory=lambda: dt.datetime.now(dt.UTC))

    def __post_init__(self) -> None:
        if not self.run_id:
            object.__setattr__(self, "run_id", f"{self.started_at:%Y%m%dT%H%M%SZ}-{uuid.uuid4().hex[:6]}")

    @property
    def run_date(self) -> dt.date:
        """Partition date of this run's ledger files."""
        return self.started_at.date()

    def write(self, table: str, frame: pl.DataFrame, part: str = "") -> dict[str, int]:
        """Write one ledger table stamped with this run's id; return ``{table: rows}``.

        ``part`` writes a second file of the table for this run (see ``store.write_ledger``).
        """
        stamped = frame.select(pl.lit(self.run_id).alias("run_id"), pl.all())
        store.write_ledger(self.config.ledger_path, table, stamped, self.run_id, self.run_date, part)
        return {f"{table}-{part}" if part else table: stamped.height}

    def finish(self, row_counts: dict[str, int], con: duckdb.DuckDBPyConnection | None = None) -> Path:
        """Write the ``run`` table: configuration, code version, data watermark and row counts."""
        watermark = None
        if con is not None:
            watermark = con.execute("select max(interval_start_utc) from meter_read").fetchall()[0][0]
        record = pl.DataFrame(
            {
                "started_at": [self.started_at],
                "finished_at": [dt.datetime.now(dt.UTC)],
                "config": [self.config.to_json()],
                "code_version": [code_version()],
                "data_watermark": [watermark],
                "row_counts": [json.dumps(dict(sorted(row_counts.items())))],
            },
            schema_overrides={"data_watermark": pl.Datetime("us", "UTC")},
        )
        return store.write_ledger(
            self.config.ledger_path,
            "run",
            record.select(pl.lit(self.run_id).alias("run_id"), pl.all()),
            self.run_id,
            self.run_date,
        )


def code_version() -> str:
    """Package version plus the git commit when run from a checkout."""
    from pipeline import __version__

    try:
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"],
            capture_output=True,
            text=True,
            check=True,
            cwd=Path(__file__).resolve().parent,
        ).stdout.strip()
    except (OSError, subprocess.CalledProcessError):
        return __version__
    return f"{__version__}+{commit}"
