"""Landing files into typed warehouse tables; every row loaded, quarantined or counted.

Each file is read whole by DuckDB as text columns, checked by ``sql/<table>.sql``
(which gives every row either typed values or a reason code), and then split:
rows without a reason go to the typed table, rows with one go to ``quarantine``
with the raw row, exact duplicates are counted and loaded once. ``ingest_log``
keeps one row per file with its content hash, so re-running changes nothing and
a changed file replaces its old rows in one transaction.
"""

from __future__ import annotations

import csv
import difflib
import gzip
import hashlib
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import duckdb
import polars as pl

from pipeline import landing_checks, store
from pipeline.config import Config


class IngestError(RuntimeError):
    """The landing folder itself is unusable (not a single bad file or row)."""


class LakeNotFound(IngestError):
    """The lake folder, or the landing/ folder inside it, does not exist."""


class NoMeterFiles(IngestError):
    """Neither the lake nor the warehouse has a single meter file: there is nothing to evaluate."""


class FileRefused(IngestError):
    """One landing file cannot be loaded as a whole; its rows still go to quarantine."""


class MissingColumnError(FileRefused):
    """A landing file lacks a required column (after the configured column mapping)."""

    def __init__(self, source_file: str, wanted: str) -> None:
        super().__init__(
            f"{source_file}: missing required column {wanted}; rename it in the file or map it in the"
            f' config ([columns.<folder>] canonical = "name in file")'
        )


@dataclass(frozen=True)
class Folder:
    """How one landing folder maps onto one warehouse table."""

    name: str
    """Landing sub-folder name."""
    table: str
    """Warehouse table (and ``sql/<table>.sql`` check) it feeds."""
    required: tuple[tuple[str, ...], ...]
    """Required columns; a tuple of several names means any one of them."""
    optional: tuple[str, ...] = ()
    """Columns read when present and left empty otherwise."""
    key: tuple[str, ...] = ()
    """Key of a time series whose conflicting duplicates across files are all quarantined."""
    typed: tuple[tuple[str, str], ...] = ()
    """Columns the check also takes already typed, (canonical name, DuckDB type), as ``typed_<name>``.

    A Parquet column of a type that converts exactly (see ``_EXACT_SOURCES``) arrives there and
    its text column is null, so the check does not format it as text and parse it back.
    """


# Order matters: premises need the tariffs, meter and thermostat rows need the premises.
FOLDERS: tuple[Folder, ...] = (
    Folder(
        "tariffs",
        "tariff_rate",
        (("rate_plan_id",), ("months",), ("day_type",), ("start_hour",), ("end_hour",), ("price_per_kwh",)),
    ),
    Folder(
        "premises",
        "premise",
        (
            ("premise_id",),
            ("timezone",),
            ("weather_station_id",),
            ("rate_plan_id",),
            ("comfort_cool_c",),
            ("comfort_heat_c",),
        ),
        ("cohort", "floor_area_m2"),
    ),
    Folder(
        "weather",
        "weather_obs",
        (("station_id",), ("observed_at",), ("dry_bulb_c", "dry_bulb_f")),
        key=("station_id", "observed_at_utc"),
        typed=(("observed_at", "TIMESTAMPTZ"), ("dry_bulb_c", "DOUBLE"), ("dry_bulb_f", "DOUBLE")),
    ),
    Folder(
        "meter",
        "meter_read",
        (("premise_id",), ("interval_start",), ("interval_minutes",), ("kwh", "wh")),
        ("quality",),
        ("premise_id", "interval_start_utc"),
        typed=(
            ("interval_start", "TIMESTAMPTZ"),
            ("interval_minutes", "INTEGER"),
            ("kwh", "DOUBLE"),
            ("wh", "DOUBLE"),
        ),
    ),
    Folder(
        "thermostat",
        "thermostat_event",
        (("premise_id",), ("changed_at",), ("mode",), ("cool_setpoint_c",), ("heat_setpoint_c",)),
        ("occupied", "indoor_c"),
    ),
)

DEVICE_RANGE_C = (4.0, 37.0)
"""Setpoints no thermostat accepts lie outside this range, °C (common practice, from memory)."""
MAX_PREMISE_KW = 60.0
"""Demand above this for a home is not physical for residential service, kW (common practice)."""


@dataclass(frozen=True)
class FileResult:
    """What happened to one landing file."""

    source_file: str
    folder: str
    status: str
    """loaded, loaded_with_quarantine, refused, unchanged or missing (gone from the lake)."""
    rows_read: int
    rows_loaded: int
    rows_quarantined: int
    rows_duplicate: int
    message: str = ""
    seconds: float = 0.0


Progress = Callable[[int, int, FileResult], None]
"""Called after each file with (files done, files in total, its result)."""

_ROW = "__row"
"""Name of the record-number column of a staged landing file (as in sql/landing_*.sql)."""

_INTEGERS = ("TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT")
_INTEGERS += tuple("U" + kind for kind in _INTEGERS)
_EXACT_SOURCES: dict[str, tuple[str, ...]] = {
    "TIMESTAMPTZ": ("TIMESTAMP WITH TIME ZONE",),
    "INTEGER": _INTEGERS,
    "DOUBLE": ("DOUBLE", *_INTEGERS),
}
"""File column types that convert to a typed check column exactly as their text would parse.

An absolute instant stays one (a naive TIMESTAMP is wall-clock time, read through its text in
the premise's zone); integers fit or become null (as their text would fail); a FLOAT or a DECIMAL
goes through its text, which is what a user reads.
"""


def landing_files(lake: Path, folder: str) -> list[Path]:
    """CSV (optionally gzip) and Parquet files of one landing folder, in name order."""
    base = Path(lake) / "landing" / folder
    if not base.exists():
        return []
    suffixes = (".csv", ".csv.gz", ".parquet")
    return sorted(p for p in base.rglob("*") if p.is_file() and p.name.lower().endswith(suffixes))


def ingest(config: Config, progress: Progress | None = None, reread: bool = False) -> list[FileResult]:
    """Ingest every landing file of ``config.lake`` into the warehouse; return one result per file.

    Unchanged files are skipped; a changed file replaces its earlier rows in one transaction,
    and files whose rows were quarantined as conflicts with its old rows are loaded again after
    it. Files that left the lake are reported with status ``missing``; their rows stay (the
    lake may be pruned after loading, the warehouse is the record). Finally ``coverage`` is
    rebuilt. ``reread`` reads every file again as if changed (settings that shape the checks,
    such as the safety bands or the column mapping, differ from the last load's).
    """
    lake = Path(config.lake)
    landing = lake / "landing"
    if not lake.is_dir():
        raise LakeNotFound(f"lake folder {lake} does not exist: check --lake")
    if not landing.is_dir():
        raise LakeNotFound(f"{landing} is not a folder: --lake must hold landing/")
    work = [(folder, path) for folder in FOLDERS for path in landing_files(config.lake, folder.name)]
    # --- a symlink out of the lake is refused unread (pipeline/landing_checks.py) ---
    outside = set(landing_checks.outside_lake([path for _, path in work], lake))
    work = [(folder, path) for folder, path in work if path not in outside]
    by_name = {_relative(path, config): (folder, path) for folder, path in work}
    unknown = _unknown_folders(landing)
    results: dict[str, FileResult] = {r.source_file: r for r in unknown}
    for path in sorted(outside):
        name = str(path.relative_to(lake))
        message = f"{name}: a link to a file outside the lake, not read; copy the file into the lake"
        results[name] = FileResult(name, path.parent.name, "refused", 0, 0, 0, 0, message)
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
        store.run_sql(con, "schema")
        if not any(folder.name == "meter" for folder, _ in work):
            _require_loaded_meter(con, landing, unknown)
        released: list[str] = []
        for done, (folder, path) in enumerate(work, 1):
            result, freed = ingest_file(con, folder, path, config, set(by_name), reread)
            results[result.source_file] = result
            released += freed
            if progress is not None:
                progress(done, len(work), result)
        # Files whose conflicts were released are loaded again against the new rows.
        # (those the loop reached after their release are already loaded and come back unchanged).
        for name in dict.fromkeys(released):
            again, _ = ingest_file(con, *by_name[name], config, set(by_name))
            if again.status != "unchanged":
                results[name] = again
        missing = _mark_missing(con, set(by_name))
        store.build_table(con, "coverage")
    return list(results.values()) + missing


def _unknown_folders(landing: Path) -> list[FileResult]:
    """A refused result for each sub-folder of landing/ that is not a known folder, with the nearest name."""
    known = [folder.name for folder in FOLDERS]
    results = []
    for path in sorted(p for p in landing.iterdir() if p.is_dir() and p.name not in known):
        near = difflib.get_close_matches(path.name, known, n=1)
        hint = (
            f"did you mean {near[0]}/?" if near else "known folders are " + ", ".join(f"{k}/" for k in known)
        )
        name = f"landing/{path.name}"
        results.append(
            FileResult(name, path.name, "refused", 0, 0, 0, 0, f"{name}: unknown folder, not read; {hint}")
        )
    return results


def _require_loaded_meter(con: duckdb.DuckDBPyConnection, landing: Path, unknown: list[FileResult]) -> None:
    """Raise NoMeterFiles unless meter files were loaded by an earlier run (the lake may be pruned)."""
    if store.execute(con, "select count(*) from ingest_log where folder = 'meter'")[0][0]:
        return
    lookalike = [r.source_file for r in unknown if difflib.get_close_matches(r.folder, ["meter"], n=1)]
    hint = f"; {lookalike[0]} looks like it: rename it meter/" if lookalike else ""
    raise NoMeterFiles(f"no meter files (CSV, CSV.gz or Parquet) in {landing / 'meter'}{hint}")


def _relative(path: Path, config: Config) -> str:
    try:
        return str(path.resolve().relative_to(Path(config.lake).resolve()))
    except ValueError:
        return str(path)


def _content_hash(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _mark_missing(con: duckdb.DuckDBPyConnection, present: set[str]) -> list[FileResult]:
    store.run_sql(con, "mark_missing", {"present": sorted(present)})
    rows = store.query(con, "missing_files").rows()
    return [
        FileResult(f, folder, "missing", *counts, message=f"{f}: no longer in the lake; its rows are kept")
        for f, folder, *counts in rows
    ]


def ingest_file(
    con: duckdb.DuckDBPyConnection,
    folder: Folder,
    path: Path,
    config: Config,
    releasable: set[str] | None = None,
    reread: bool = False,
) -> tuple[FileResult, list[str]]:
    """Ingest one file; return its result and the other files released to be loaded again.

    An unchanged file (same content hash) is skipped; otherwise its earlier rows, quarantine
    rows and log entry are replaced in one transaction. Files in ``releasable`` (those still in
    the lake) that hold conflicting duplicates with this file's old rows, or (when old rows are
    replaced) exact duplicates in the same folder, lose their rows and log entry in the same
    transaction, so that they are checked again, against the new rows, by this run or, if it
    stops, by the next.
    """
    started = time.perf_counter()
    name = _relative(path, config)
    state = landing_checks.file_state(path)
    content_hash = _content_hash(path)
    seen = store.query(con, "logged_file", {"f": name}).rows()
    if seen and seen[0][0] == content_hash and not reread:
        store.execute(con, "update ingest_log set missing_since = null where source_file = $f", {"f": name})
        _, status, *counts, message = seen[0]
        if status == "refused":
            # Still refused: reported again so the exit code says so until the file is fixed.
            return FileResult(
                name, folder.name, "refused", *counts, f"{message} (unchanged since last run)"
            ), []
        return FileResult(name, folder.name, "unchanged", 0, 0, 0, 0), []

    # Staging reads the file before the transaction: a reader error must not abort the
    # transaction that replaces the file's rows.
    try:
        present, rejects = _stage(con, path)
        failure = None
    except (duckdb.Error, OSError, EOFError, UnicodeError, ValueError, FileRefused) as exc:
        present, rejects = {}, 0
        failure = _unreadable(name, exc)
    load = _Load(folder, path, name, content_hash, bool(seen), sorted(releasable or ()), started, state)
    try:
        try:
            return _replace_file(con, load, config, present, rejects, failure)
        except duckdb.Error:
            # A Parquet file is read where it is checked, so damage behind an intact footer
            # shows only now: if reading it whole fails, the file is refused like any unreadable one.
            damage = _read_failure(con, name) if failure is None else None
            if damage is None:
                raise
            return _replace_file(con, load, config, {}, 0, damage)
    finally:
        for table in _SCRATCH_TABLES:
            store.execute(con, f"drop table if exists {store.quote_identifier(table)}")


@dataclass(frozen=True)
class _Load:
    """One changed landing file being loaded: what the transaction that replaces its rows needs."""

    folder: Folder
    path: Path
    name: str
    content_hash: str
    replacing: bool
    """The file was loaded before (its old rows are replaced)."""
    releasable: list[str]
    started: float
    state: landing_checks.FileState | None = None
    """Size and modification time when ingest began reading it (see pipeline/landing_checks.py)."""


def _unreadable(name: str, exc: BaseException) -> str:
    detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return f"{name}: file cannot be read: {detail}"


def _read_failure(con: duckdb.DuckDBPyConnection, name: str) -> str | None:
    """The refusal message if reading every value of the staged file fails, else None."""
    try:
        # Counts may come from the footer's statistics; hashing every value makes each page decode.
        store.execute(con, "select bit_xor(hash(columns(*))) from landing_src")
    except duckdb.Error as exc:
        return _unreadable(name, exc)
    return None


def _replace_file(
    con: duckdb.DuckDBPyConnection,
    load: _Load,
    config: Config,
    present: dict[str, str],
    rejects: int,
    failure: str | None,
) -> tuple[FileResult, list[str]]:
    """Replace the file's rows, quarantine rows and log entry in one transaction (see ingest_file)."""
    folder, name = load.folder, load.name
    store.execute(con, "begin transaction")
    try:
        # Files to check again against the new rows (sql/released_files.sql says which and why).
        released = store.query(
            con,
            "released_files",
            {"f": name, "folder": folder.name, "replacing": load.replacing, "releasable": load.releasable},
        )["source_file"].to_list()
        # A file without a log entry has no rows (both are written in one transaction): deleting
        # them would read the whole table's source_file column for nothing.
        for gone in [name, *released] if load.replacing else released:
            store.execute(
                con, f"delete from {store.quote_identifier(folder.table)} where source_file = $f", {"f": gone}
            )
            store.run_sql(con, "forget_file", {"f": gone})
        moved_from: list[str] = []
        if failure is not None:
            result = _refuse_unreadable(con, folder, load.path, name, failure)
        else:
            try:
                selected = _select_columns(folder, config.columns.get(folder.name, {}), set(present), name)
                result, moved_from = _load(con, folder, name, selected, present, rejects, config)
            except MissingColumnError as exc:
                result = _refuse_all_rows(con, folder, name, str(exc), rejects)
        if load.replacing:
            result = replace(result, message=result.message or "replaced the rows of an earlier version")
        result = replace(result, seconds=time.perf_counter() - load.started)
        store.run_sql(
            con,
            "log_file",
            {
                "f": name,
                "folder": folder.name,
                "h": load.content_hash,
                "read": result.rows_read,
                "loaded": result.rows_loaded,
                "quar": result.rows_quarantined,
                "dup": result.rows_duplicate,
                "status": result.status,
                "msg": result.message,
                "secs": result.seconds,
            },
        )
        _refresh_log(con, folder, name, moved_from)
        # --- a file still being written is rolled back unlogged (pipeline/landing_checks.py) ---
        moving = landing_checks.changed_while_read(load.path, load.state, name) if load.state else None
        if moving is not None:
            store.execute(con, "rollback")
            return FileResult(name, folder.name, "refused", 0, 0, 0, 0, moving), []
        store.fault_point("ingest-file-commit")
        store.execute(con, "commit")
    except Exception:
        store.execute(con, "rollback")
        raise
    return result, released


def _csv_header(path: Path) -> list[str]:
    """Column names from the first line (BOM and CR removed); blank or repeated names made unique."""
    opener = gzip.open if path.name.lower().endswith(".gz") else open
    with opener(path, "rb") as fh:
        first = fh.readline()
    text = first.decode("utf-8", errors="replace").lstrip("\ufeff").rstrip("\r\n")
    names: list[str] = []
    for i, raw in enumerate(next(csv.reader([text]), [])):
        base = raw.strip() or f"column{i + 1}"
        name, n = base, 1
        while name in names or name == _ROW:
            n += 1
            name = f"{base}_{n}"
        names.append(name)
    return names


def _stage(con: duckdb.DuckDBPyConnection, path: Path) -> tuple[dict[str, str], int]:
    """Stage one file as view ``landing_src`` (source_row, then its columns); return their types and rejects.

    A Parquet file is read where it is used (it is typed and numbered already); a CSV is parsed
    once into a temp table. CSV records that do not parse (bad encoding, too many fields,
    unclosed quote) are kept in view ``landing_rejected`` with their text, split into lines; the
    parsed records are numbered around them, so every record has its own row number.
    """
    store.execute(con, "drop table if exists landing_rejects")
    store.execute(con, "drop table if exists landing_reject_scans")
    if path.name.lower().endswith(".parquet"):
        store.execute(con, "set variable landing_path = $path", {"path": str(path)})
        store.build_view(con, "landing_parquet", temp=True)
        _use(con, "landing_parquet", "landing_raw")
        _no_rejects(con)
    else:
        header = _csv_header(path)
        if not header:
            raise FileRefused(f"{path.name}: empty file, no header line")
        columns = dict.fromkeys(header, "VARCHAR")
        try:
            _parse_csv(con, str(path), columns, header=True)
            # A reject over several lines is a stray quote swallowing the records after it.
            swallowed = store.execute(con, _MULTI_LINE_REJECTS)[0][0]
        except duckdb.Error:
            # The reader gives up on some quote damage (quoted new lines with padding) outright.
            swallowed = 1
        if swallowed:
            _stage_by_lines(con, path, columns)
        else:
            store.build_view(con, "landing_csv", temp=True)
            _number_rejects(con)
    store.build_view(con, "landing_src", temp=True)
    present = {name: kind for name, kind, *_ in store.execute(con, "describe landing_src")}
    del present["source_row"]
    rejects = store.execute(con, "select count(*) from landing_rejected")[0][0]
    return present, rejects


_MULTI_LINE_REJECTS = (
    "select count(*) from landing_rejects where contains(trim(csv_line, chr(13) || chr(10)), chr(10))"
)
"""Rejected records spanning several lines: a quote that swallowed the lines after it."""

_SCRATCH_TABLES = ("checked", "moved", "landing_parsed", "landing_line_records", "landing_line_rejects")
"""Temp tables of one file, dropped once it is done so that their memory is not held meanwhile."""


def _parse_csv(con: duckdb.DuckDBPyConnection, path: str, columns: dict[str, str], header: bool) -> None:
    """Parse a CSV into ``landing_parsed``; records that do not parse go to ``landing_rejects``.

    Records are numbered by their position in the table (``rowid``), so it is built in file order
    even when the connection may reorder results (``duckdb_preserve_insertion_order = false``).
    """
    store.execute(con, "drop table if exists landing_rejects")
    store.execute(con, "drop table if exists landing_reject_scans")
    with store.insertion_order_kept(con):
        store.build_table(con, "landing_parsed", {"path": path, "cols": columns, "header": header}, temp=True)


def _stage_by_lines(con: duckdb.DuckDBPyConnection, path: Path, columns: dict[str, str]) -> None:
    """Stage a CSV damaged by stray quotes one physical line per record.

    A line with an odd number of double quotes opens a quoted field it never closes; parsed as
    CSV it would swallow every line after it. Such lines are rejected alone, the others are
    written to a scratch file and parsed; records keep their line number among the data lines
    (header and blank lines not counted), which is their record number in a file without damage.
    """
    with store.insertion_order_kept(con):
        store.build_table(con, "landing_line_text", {"path": str(path)}, temp=True)
    store.build_table(con, "landing_lines", temp=True)
    store.build_table(con, "landing_good_lines", temp=True)
    with tempfile.TemporaryDirectory() as scratch:
        good = str(Path(scratch) / "lines.csv")
        store.execute(
            con,
            "copy (select line from landing_good_lines order by k) to $path"
            " (header false, quote '', escape '', delimiter chr(0))",
            {"path": good},
        )
        _parse_csv(con, good, columns, header=False)
    if store.execute(con, _MULTI_LINE_REJECTS)[0][0]:
        raise FileRefused(f"{path.name}: quotes that cannot be matched line by line")
    store.build_table(con, "landing_line_records", temp=True)
    store.build_table(con, "landing_line_rejects", temp=True)
    _use(con, "landing_line_records", "landing_raw")
    _use(con, "landing_line_rejects", "landing_rejected")
    for table in ("landing_line_text", "landing_lines", "landing_good_lines", "landing_parsed"):
        store.execute(con, f"drop table {store.quote_identifier(table)}")


def _use(con: duckdb.DuckDBPyConnection, built: str, final: str) -> None:
    """Make the staged table or view ``built`` the one later steps read, as view ``final``."""
    store.execute(
        con,
        f"create or replace temp view {store.quote_identifier(final)} as"
        f" select * from {store.quote_identifier(built)}",
    )


def _no_rejects(con: duckdb.DuckDBPyConnection) -> None:
    store.execute(con, "create or replace temp table landing_no_rejects (source_row bigint, line varchar)")
    _use(con, "landing_no_rejects", "landing_rejected")


def _number_rejects(con: duckdb.DuckDBPyConnection) -> None:
    """Number the parsed records of a CSV around its rejected ones (renumbered only if there are any)."""
    store.build_table(con, "landing_reject_records", temp=True)
    shifts = store.build_table(con, "landing_reject_shifts", temp=True)
    store.build_table(con, "landing_rejects_lines", temp=True)
    _use(con, "landing_rejects_lines", "landing_rejected")
    if shifts:
        store.build_view(con, "landing_shifted", temp=True)
        _use(con, "landing_shifted", "landing_raw")
    else:
        _use(con, "landing_csv", "landing_raw")


def _select_columns(
    folder: Folder, mapping: dict[str, str], present: set[str], name: str
) -> dict[str, str | None]:
    """Canonical column -> column of the file (None when an optional one is absent)."""
    selected: dict[str, str | None] = {}
    for choices in folder.required:
        found = [c for c in choices if mapping.get(c, c) in present]
        if not found:
            raise MissingColumnError(name, " or ".join(repr(mapping.get(c, c)) for c in choices))
        for c in choices:
            selected[c] = mapping.get(c, c) if c in found else None
    for c in folder.optional:
        selected[c] = mapping.get(c, c) if mapping.get(c, c) in present else None
    return selected


_RAW_JSON = "json_merge_patch(to_json(s), '{\"source_row\": null}')::varchar"
"""The landing record as JSON of its own columns, for quarantine."""


def _load(
    con: duckdb.DuckDBPyConnection,
    folder: Folder,
    name: str,
    selected: dict[str, str | None],
    types: dict[str, str],
    rejects: int,
    config: Config,
) -> tuple[FileResult, list[str]]:
    _landing_view(con, folder, selected, types)
    params = {
        "cool_low": config.cool_band_c[0],
        "cool_high": config.cool_band_c[1],
        "heat_low": config.heat_band_c[0],
        "heat_high": config.heat_band_c[1],
        "device_low": DEVICE_RANGE_C[0],
        "device_high": DEVICE_RANGE_C[1],
        "max_kw": MAX_PREMISE_KW,
    }
    check = store.sql_text(folder.table)
    store.execute(con, f"create or replace temp table checked as {check}", store.params_for(check, params))

    moved_from = _move_conflicting_loaded_rows(con, folder) if folder.key else []

    target_columns = [
        r[0]
        for r in store.execute(
            con,
            "select name from pragma_table_info($t) order by cid",
            {"t": folder.table},
        )
    ]
    value_columns = ", ".join(store.quote_identifier(c) for c in target_columns if c != "source_file")
    # In file order (the check's joins do not keep it): files usually list a premise's reads
    # together, so the table's blocks stay narrow in premise_id and a later read of some
    # premises (a shard) skips the others' blocks.
    store.execute(
        con,
        f"insert into {store.quote_identifier(folder.table)} ({value_columns}, source_file)"
        f" select {value_columns}, $f from checked where reason is null order by source_row",
        {"f": name},
    )
    read, loaded, dup = store.query(con, "file_counts").row(0)
    if read > loaded + dup:
        record_key = "c.record_key" if folder.key else "null"
        # The raw JSON is made only for rejected rows, and the file read again only if there are any.
        store.execute(
            con,
            f"insert into quarantine (source_file, row_number, reason, raw, record_key)"
            f" select $f, c.source_row, c.reason, {_RAW_JSON},"
            f" case when c.reason = 'conflicting_duplicate' then {record_key} end"
            f" from checked c join landing_src s using (source_row)"
            f" where c.reason is not null and c.reason <> 'exact_duplicate'",
            {"f": name},
        )
    _quarantine_rejects(con, name)
    read += rejects
    quarantined = read - loaded - dup
    status = "loaded" if quarantined == 0 else "loaded_with_quarantine"
    return FileResult(name, folder.name, status, read, loaded, quarantined, dup), moved_from


def _landing_view(
    con: duckdb.DuckDBPyConnection, folder: Folder, selected: dict[str, str | None], types: dict[str, str]
) -> None:
    """View ``landing``: source_row and each canonical column as text, plus ``typed_<name>`` columns.

    A file column whose type converts exactly to a typed column (``_EXACT_SOURCES``) fills it and
    leaves the text null; any other column fills the text and leaves the typed column null.
    """
    typed = dict(folder.typed)
    columns = []
    for canon, src in selected.items():
        text = f"cast(t.{store.quote_identifier(src)} as varchar)" if src else "cast(null as varchar)"
        if canon in typed:
            wanted = typed[canon]
            value = f"cast(null as {wanted})"
            if src and types[src] in _EXACT_SOURCES[wanted]:
                text, value = (
                    "cast(null as varchar)",
                    f"try_cast(t.{store.quote_identifier(src)} as {wanted})",
                )
            columns.append(f"{value} as {store.quote_identifier('typed_' + canon)}")
        columns.append(f"{text} as {store.quote_identifier(canon)}")
    listed = ", ".join(columns)
    store.execute(
        con, f"create or replace temp view landing as select t.source_row, {listed} from landing_src t"
    )


def _move_conflicting_loaded_rows(con: duckdb.DuckDBPyConnection, folder: Folder) -> list[str]:
    """Rows loaded from other files that conflict with this file's rows go to quarantine too."""
    key = ", ".join(store.quote_identifier(k) for k in folder.key)
    store.execute(
        con,
        f"create or replace temp table moved as select t.* from {store.quote_identifier(folder.table)} t"
        f" semi join (select {key} from checked where loaded_conflict) c using ({key})",
    )
    if not store.execute(con, "select count(*) from moved")[0][0]:
        return []
    store.execute(
        con,
        f"insert into quarantine (source_file, row_number, reason, raw, record_key)"
        f" select source_file, source_row, 'conflicting_duplicate',"
        f' json_merge_patch(to_json(m), \'{{"source_file": null, "source_row": null}}\')::varchar,'
        f" concat_ws('|', {key}) from moved m",
    )
    store.execute(
        con,
        f"delete from {store.quote_identifier(folder.table)} t using moved m where "
        + " and ".join(f"t.{store.quote_identifier(k)} = m.{store.quote_identifier(k)}" for k in folder.key),
    )
    return [row[0] for row in store.execute(con, "select distinct source_file from moved")]


def _refresh_log(con: duckdb.DuckDBPyConnection, folder: Folder, name: str, moved_from: list[str]) -> None:
    """Recount quarantined rows (by reason, as JSON) of the file and those it moved rows from.

    Loaded rows are recounted from the table only for the files that lost rows to this one (the
    file's own count is what it inserted): counting the table per file would read all of it.
    """
    files = [name, *moved_from]
    if moved_from:
        table = store.quote_identifier(folder.table)
        store.execute(
            con,
            f"update ingest_log l set"
            f"  rows_loaded = (select count(*) from {table} t where t.source_file = l.source_file)"
            f" where list_contains($files, l.source_file)",
            {"files": moved_from},
        )
    store.execute(
        con,
        "update ingest_log l set"
        "  rows_quarantined = (select count(*) from quarantine q where q.source_file = l.source_file),"
        "  quarantined_by_reason = coalesce((select json_group_object(reason, n)::varchar from"
        "    (select reason, count(*) as n from quarantine q where q.source_file = l.source_file"
        "     group by reason order by reason)), '{}')"
        " where list_contains($files, l.source_file)",
        {"files": files},
    )
    store.execute(
        con,
        "update ingest_log set status = 'loaded_with_quarantine'"
        " where list_contains($files, source_file) and status = 'loaded' and rows_quarantined > 0",
        {"files": files},
    )


def _quarantine_rejects(con: duckdb.DuckDBPyConnection, name: str) -> None:
    store.run_sql(con, "quarantine_rejects", {"f": name})


def _refuse_all_rows(
    con: duckdb.DuckDBPyConnection, folder: Folder, name: str, message: str, rejects: int
) -> FileResult:
    # The rows are kept in quarantine so the refusal loses nothing.
    store.execute(
        con,
        f"insert into quarantine (source_file, row_number, reason, raw)"
        f" select $f, source_row, 'missing_column', {_RAW_JSON} from landing_src s",
        {"f": name},
    )
    _quarantine_rejects(con, name)
    read = store.execute(con, "select count(*) from quarantine where source_file = $f", {"f": name})[0][0]
    return FileResult(name, folder.name, "refused", read, 0, read, 0, message)


def _refuse_unreadable(
    con: duckdb.DuckDBPyConnection, folder: Folder, path: Path, name: str, message: str
) -> FileResult:
    # An unreadable file is kept whole, line by line, as text in quarantine (bytes that are not
    # UTF-8 replaced); for a CSV the first line is its header, not a row.
    data = path.read_bytes()
    if path.name.lower().endswith(".gz"):
        try:
            data = gzip.decompress(data)
        except (OSError, EOFError):
            pass
    lines = pl.Series("line", data.decode("utf-8", errors="replace").splitlines(), dtype=pl.Utf8)
    frame = pl.DataFrame({"source_row": range(1, len(lines) + 1), "line": lines})
    if not path.name.lower().endswith(".parquet"):
        frame = frame.slice(1).with_columns(pl.col("source_row") - 1)
    frame = frame.filter(pl.col("line").str.strip_chars() != "")
    con.register("unreadable_lines", frame.to_arrow())
    try:
        store.run_sql(con, "quarantine_unreadable", {"f": name})
    finally:
        con.unregister("unreadable_lines")
    return FileResult(name, folder.name, "refused", frame.height, 0, frame.height, 0, message)


def results_frame(results: list[FileResult]) -> pl.DataFrame:
    """The per-file results as a frame, for printing and for the run table."""
    return pl.DataFrame(
        [r.__dict__ for r in results],
        schema={
            "source_file": pl.Utf8,
            "folder": pl.Utf8,
            "status": pl.Utf8,
            "rows_read": pl.Int64,
            "rows_loaded": pl.Int64,
            "rows_quarantined": pl.Int64,
            "rows_duplicate": pl.Int64,
            "message": pl.Utf8,
            "seconds": pl.Float64,
        },
    )
