"""The one place that owns paths, the DuckDB connection and Parquet writes.

SQL that builds a table lives in ``sql/<table>.sql`` at the project root and is
loaded by name; values always go in as bound parameters.
"""

from __future__ import annotations

import datetime as dt
import io
import os
import re
import signal
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import polars as pl


def _sql_dir() -> Path:
    # An installed wheel carries the SQL files as pipeline/sql/; a checkout keeps them at the top.
    here = Path(__file__).resolve().parent
    installed = here / "sql"
    return installed if installed.is_dir() else here.parent / "sql"


SQL_DIR = _sql_dir()


class StoreError(RuntimeError):
    """The warehouse or ledger cannot be read or written as asked."""


def sql_text(name: str) -> str:
    """The text of ``sql/<name>.sql``."""
    path = SQL_DIR / f"{name}.sql"
    if not path.exists():
        raise StoreError(f"no SQL file {path}")
    return path.read_text()


@dataclass(frozen=True)
class DuckDBSettings:
    """DuckDB's resources for a connection (``Config.duckdb``); they shape no result."""

    threads: int = 0
    """Threads DuckDB may use; 0 leaves its default (one per core)."""
    memory_limit: str = ""
    """Memory DuckDB may hold before spilling to disk ("4GB", "512MiB", "50%"); empty leaves its default."""
    preserve_insertion_order: bool = True
    """Whether rows keep the order they were read in where a query does not sort."""


def apply_settings(con: duckdb.DuckDBPyConnection, settings: DuckDBSettings) -> None:
    """Set (or reset to DuckDB's default) the connection's threads, memory limit and insertion order."""
    try:
        if settings.threads:
            execute(con, "set threads = $v", {"v": settings.threads})
        else:
            execute(con, "reset threads")
        if settings.memory_limit:
            execute(con, "set memory_limit = $v", {"v": settings.memory_limit})
        else:
            execute(con, "reset memory_limit")
        execute(con, "set preserve_insertion_order = $v", {"v": settings.preserve_insertion_order})
    except duckdb.Error as exc:
        detail = str(exc).splitlines()[0]
        raise StoreError(
            f"DuckDB refused duckdb_threads = {settings.threads}, duckdb_memory_limit ="
            f" {settings.memory_limit!r}: {detail}"
        ) from None


@contextmanager
def warehouse(
    path: Path, read_only: bool = False, settings: DuckDBSettings | None = None
) -> Iterator[duckdb.DuckDBPyConnection]:
    """Open the warehouse with UTC as the session time zone and DuckDB's ``settings``; closes on exit."""
    path = Path(path)
    if read_only and not path.exists():
        raise StoreError(f"warehouse {path} does not exist: run the ingest stage first")
    path.parent.mkdir(parents=True, exist_ok=True)
    con = duckdb.connect(str(path), read_only=read_only)
    try:
        execute(con, "set TimeZone = 'UTC'")
        apply_settings(con, settings or DuckDBSettings())
        yield con
    finally:
        con.close()


def execute(con: duckdb.DuckDBPyConnection, text: str, params: dict[str, Any] | None = None) -> list[tuple]:
    """Run one statement to completion and return its rows (DuckDB refuses work while one is open)."""
    return con.execute(text, params or {}).fetchall()


def run_sql(con: duckdb.DuckDBPyConnection, name: str, params: dict[str, Any] | None = None) -> None:
    """Execute ``sql/<name>.sql`` (may hold several statements) with named parameters."""
    statements = [s for s in sql_text(name).split(";\n") if _has_code(s)]
    for statement in statements:
        execute(con, statement, params_for(statement, params or {}))


def build_table(
    con: duckdb.DuckDBPyConnection, name: str, params: dict[str, Any] | None = None, temp: bool = False
) -> int:
    """Replace table ``name`` (temporary if ``temp``) by ``sql/<name>.sql``; return its row count."""
    query = sql_text(name)
    kind = "temp table" if temp else "table"
    execute(
        con, f"create or replace {kind} {quote_identifier(name)} as {query}", params_for(query, params or {})
    )
    return con.execute(f"select count(*) from {quote_identifier(name)}").fetchall()[0][0]


def build_view(
    con: duckdb.DuckDBPyConnection, name: str, params: dict[str, Any] | None = None, temp: bool = False
) -> None:
    """Replace view ``name`` (temporary if ``temp``) by ``sql/<name>.sql``: read where used, never copied."""
    query = sql_text(name)
    kind = "temp view" if temp else "view"
    execute(
        con, f"create or replace {kind} {quote_identifier(name)} as {query}", params_for(query, params or {})
    )


def query(con: duckdb.DuckDBPyConnection, name: str, params: dict[str, Any] | None = None) -> pl.DataFrame:
    """Result of ``sql/<name>.sql`` as a polars frame."""
    return frame(con, sql_text(name), params)


def frame(con: duckdb.DuckDBPyConnection, text: str, params: dict[str, Any] | None = None) -> pl.DataFrame:
    """Result of a SQL query as a polars frame."""
    return con.sql(text, params=params_for(text, params or {}) or None).pl()


def replace_table(con: duckdb.DuckDBPyConnection, name: str, frame: pl.DataFrame) -> int:
    """Replace warehouse table ``name`` with ``frame``; return its row count."""
    con.register("_frame", frame.to_arrow())
    try:
        execute(con, f"create or replace table {quote_identifier(name)} as select * from _frame")
    finally:
        con.unregister("_frame")
    return frame.height


def _has_code(statement: str) -> bool:
    return any(line.strip() and not line.strip().startswith("--") for line in statement.splitlines())


_PARAMETER = re.compile(r"\$(\w+)")


def params_for(statement: str, params: dict[str, Any]) -> dict[str, Any]:
    """The entries of ``params`` whose ``$name`` the statement uses (``$f`` is not ``$folder``)."""
    # DuckDB refuses named parameters a statement does not use.
    used = set(_PARAMETER.findall(statement))
    return {k: v for k, v in params.items() if k in used}


def quote_identifier(name: str) -> str:
    """``name`` as a double-quoted SQL identifier (embedded quotes doubled), safe to splice into SQL.

    The one way a name that is not a value (a column of a landing file, a table) enters SQL text.
    """
    return '"' + name.replace('"', '""') + '"'


def write_ledger(
    ledger: Path, table: str, frame: pl.DataFrame, run_id: str, run_date: dt.date, part: str = ""
) -> Path:
    """Write one ledger table of one run to ``<ledger>/<table>/run_date=YYYY-MM-DD/<run_id>.parquet``.

    ``part`` names a second file of the same run's table (``<run_id>-<part>.parquet``), for a
    stage that adds rows to a table another stage writes (the improve stage's learned policies
    beside the candidates in ``policy`` and ``savings``); the views read every file.
    """
    folder = Path(ledger) / table / f"run_date={run_date.isoformat()}"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / (f"{run_id}-{part}.parquet" if part else f"{run_id}.parquet")
    tmp = path.with_suffix(".parquet.tmp")
    buffer = io.BytesIO()
    frame.write_parquet(buffer)
    data = buffer.getvalue()
    with open(tmp, "wb") as fh:
        # Written in two halves so a fault test can stop it half-way through the file.
        fh.write(data[: len(data) // 2])
        fh.flush()
        fault_point("ledger-write-partial")
        fh.write(data[len(data) // 2 :])
    fault_point("ledger-write")
    tmp.replace(path)
    return path


FAULT_VARIABLE = "THERMAL_LEDGER_FAULT"
_fault_counts: dict[str, int] = {}


def fault_point(name: str) -> None:
    """Kill this process with SIGKILL at the n-th pass of point ``name`` if the environment asks.

    For fault-injection tests: ``THERMAL_LEDGER_FAULT=ledger-write:3`` kills the process at its
    third ledger write, after the temporary file is written and before it is renamed;
    ``any:N`` kills it at the N-th pass of any point. ``trace:FILE`` kills nothing and
    appends each point's name to FILE, one a line (to count a run's points).
    Does nothing when the variable is unset.
    """
    spec = os.environ.get(FAULT_VARIABLE)
    if not spec:
        return
    point, _, nth = spec.partition(":")
    if point == "trace":
        with open(nth, "a") as fh:
            fh.write(name + "\n")
        return
    if point not in (name, "any"):
        return
    _fault_counts[point] = _fault_counts.get(point, 0) + 1
    if _fault_counts[point] == int(nth or 1):
        os.kill(os.getpid(), signal.SIGKILL)


FAULT_POINTS = (
    "ledger-write-partial",
    "ledger-write",
    "warehouse-commit",
    "ingest-file-commit",
    "shard-file-write",
    "shard-rename",
    "schedule-file-write",
    "report-write",
)
"""Every fault point: ledger Parquet half written / written but not renamed, a warehouse transaction
before its commit (a stage's, one landing file's), a shard's file written / before its folder is
renamed, an operations schedule file written, the report written but not renamed."""


def view_files() -> list[str]:
    """Names of the SQL files of analyst views: ``views`` first, then every ``views_<topic>`` in order."""
    return ["views", *sorted(p.stem for p in SQL_DIR.glob("views_*.sql"))]


def connect_ledger(ledger: Path, settings: DuckDBSettings | None = None) -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB connection with the analyst views of ``sql/views*.sql`` over the ledger.

    Views of tables the ledger holds no file of are left out (a query naming one says the
    table does not exist) rather than failing the whole connection; each appears on the
    first connection after a run writes its table. A folder with no ``run`` table is no
    ledger and is refused (``StoreError``).
    """
    root = Path(ledger).resolve()
    if not (root / "run").is_dir():
        raise StoreError(
            f"no ledger at {root}: give the ledger folder a run wrote (the ledger/ inside its --out folder)"
        )
    con = duckdb.connect()
    execute(con, "set TimeZone = 'UTC'")
    apply_settings(con, settings or DuckDBSettings())
    execute(con, "set variable ledger_root = $root", {"root": str(root)})
    for name in view_files():
        for statement in [s for s in sql_text(name).split(";\n") if _has_code(s)]:
            try:
                execute(con, statement)
            except (duckdb.IOException, duckdb.CatalogException, duckdb.BinderException):
                # A table this ledger does not hold yet (written by a newer version, or not by
                # any run so far): its view, and the views built on it, are left out.
                continue
    return con


@contextmanager
def insertion_order_kept(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """Statements inside keep rows in the order they were read, whatever the connection's setting.

    For tables whose ``rowid`` numbers records by their place in a file.
    """
    before = execute(con, "select current_setting('preserve_insertion_order')")[0][0]
    execute(con, "set preserve_insertion_order = true")
    try:
        yield con
    finally:
        execute(con, "set preserve_insertion_order = $kept", {"kept": before})


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """Everything written inside commits together, or is rolled back if anything raises."""
    execute(con, "begin transaction")
    try:
        yield con
    except BaseException:
        execute(con, "rollback")
        raise
    fault_point("warehouse-commit")
    execute(con, "commit")
