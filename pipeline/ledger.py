"""The run record and the ledger tables it groups.

A run has one id; every ledger table written during it carries that id and is
stored under ``ledger/<table>/run_date=YYYY-MM-DD/<run_id>.parquet``.

A run is published by its ``run`` record, written last: the analyst views read only
the rows of runs that have one, so a run killed part-way leaves nothing a query
returns. The next run to finish removes such a run's files and lists it in its
``abandoned_run`` table. One process at a time writes an output folder: it holds an
exclusive lock on ``<out>/.thermal-ledger.lock`` (released by the system even when
the process is killed), and a second run refuses with the holder's pid and run.
"""

from __future__ import annotations

import datetime as dt
import fcntl
import json
import os
import subprocess
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
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


class OutputInUseError(RuntimeError):
    """Another process is writing the same output folder."""


LOCK_NAME = ".thermal-ledger.lock"

_held: dict[Path, tuple[int, int]] = {}
"""Locks this process holds: lock file -> (descriptor, nesting depth)."""


@contextmanager
def exclusive_output(out: Path, holder: str = "") -> Iterator[None]:
    """Hold the output folder's lock while the body runs; refuse at once if another process holds it.

    Re-entrant within a process (a command that starts the flow holds it once). The lock
    is an ``flock`` on a file in the folder, so the system drops it when the holder dies.
    """
    path = (Path(out) / LOCK_NAME).resolve()
    if path in _held:
        fd, depth = _held[path]
        _held[path] = (fd, depth + 1)
        try:
            yield
        finally:
            _held[path] = (fd, _held[path][1] - 1)
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        who = os.pread(fd, 400, 0).decode("utf-8", "replace").strip() or "another process"
        os.close(fd)
        raise OutputInUseError(
            f"{path.parent} is being written by {who}; wait for that run to finish or give another --out"
        ) from None
    os.ftruncate(fd, 0)
    since = f"{dt.datetime.now(dt.UTC):%Y-%m-%d %H:%M:%SZ}"
    os.pwrite(fd, f"pid {os.getpid()} since {since} {holder}".encode(), 0)
    _held[path] = (fd, 1)
    try:
        yield
    finally:
        del _held[path]
        os.close(fd)


def sweep_abandoned(ledger: Path, keep: str) -> pl.DataFrame:
    """Remove ledger files of runs that never wrote their run record (killed part-way); list them.

    Call only while holding the output lock, so no other run is writing. ``keep`` is the
    calling run's id. Half-written ``.tmp`` files are removed too. One row per abandoned run.
    """
    ledger = Path(ledger)
    published = {p.stem for p in ledger.glob("run/run_date=*/*.parquet")}
    found: dict[str, list[Path]] = {}
    for path in ledger.glob("*/run_date=*/*.parquet*"):
        if path.name.endswith(".tmp"):
            stem = path.name.split(".", 1)[0]
            if not _of_runs(stem, {keep}):
                owner = next((r for r in published if _of_runs(stem, {r})), stem)
                found.setdefault(owner, []).append(path)
        elif not _of_runs(path.stem, published | {keep}):
            found.setdefault(_run_of(path), []).append(path)
    rows = []
    for run_id, paths in sorted(found.items()):
        tables = sorted({p.parent.parent.name for p in paths})
        for p in paths:
            p.unlink(missing_ok=True)
        if run_id not in published:
            rows.append({"abandoned_run_id": run_id, "tables": ",".join(tables), "files_removed": len(paths)})
    return pl.DataFrame(
        rows, schema={"abandoned_run_id": pl.Utf8, "tables": pl.Utf8, "files_removed": pl.Int64}
    )


def _of_runs(stem: str, run_ids: set[str]) -> bool:
    """Whether a ledger file named ``stem`` belongs to one of ``run_ids`` (``<run>`` or ``<run>-<part>``)."""
    return stem in run_ids or any(stem.startswith(f"{run_id}-") for run_id in run_ids)


def _run_of(path: Path) -> str:
    """The run id a ledger file is stamped with (its name's when it cannot be read)."""
    try:
        ids = pl.read_parquet(path, columns=["run_id"], n_rows=1)["run_id"]
    except Exception:  # noqa: BLE001 - a damaged leftover is still swept, under its file name
        return path.stem
    return str(ids[0]) if len(ids) else path.stem


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
