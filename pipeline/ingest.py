"""Landing files into typed warehouse tables; every row loaded, quarantined or counted.

Each file is read whole by DuckDB as text columns, checked by ``sql/<table>.sql``
(which gives every row either typed values or a reason code), and then split:
rows without a reason go to the typed table, rows with one go to ``quarantine``
with the raw row, exact duplicates are counted and loaded once. ``ingest_log``
keeps one row per file with its content hash, so re-running changes nothing and
a changed file replaces its old rows in one transaction.
"""

from __future__ import annotations

import hashlib
import time
from dataclasses import dataclass
from pathlib import Path

import duckdb
import polars as pl

from pipeline import store
from pipeline.config import Config


class IngestError(RuntimeError):
    """The landing folder itself is unusable (not a single bad file or row)."""


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
    Folder("weather", "weather_obs", (("station_id",), ("observed_at",), ("dry_bulb_c", "dry_bulb_f"))),
    Folder(
        "meter",
        "meter_read",
        (("premise_id",), ("interval_start",), ("interval_minutes",), ("kwh", "wh")),
        ("quality",),
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
    rows_read: int
    rows_loaded: int
    rows_quarantined: int
    rows_duplicate: int
    message: str = ""


def landing_files(lake: Path, folder: str) -> list[Path]:
    """CSV (optionally gzip) and Parquet files of one landing folder, in name order."""
    base = Path(lake) / "landing" / folder
    if not base.exists():
        return []
    suffixes = (".csv", ".csv.gz", ".parquet")
    return sorted(p for p in base.rglob("*") if p.is_file() and p.name.lower().endswith(suffixes))


def ingest(config: Config) -> list[FileResult]:
    """Ingest every landing file of ``config.lake`` into the warehouse; return one result per file."""
    landing = Path(config.lake) / "landing"
    if not landing.is_dir():
        raise IngestError(f"{landing} is not a folder: --lake must hold landing/")
    results: list[FileResult] = []
    with store.warehouse(config.warehouse_path) as con:
        store.run_sql(con, "schema")
        for folder in FOLDERS:
            for path in landing_files(config.lake, folder.name):
                results.append(ingest_file(con, folder, path, config))
    return results


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


def ingest_file(con: duckdb.DuckDBPyConnection, folder: Folder, path: Path, config: Config) -> FileResult:
    """Ingest one file; unchanged files are skipped, changed ones replace their earlier rows."""
    started = time.perf_counter()
    name = _relative(path, config)
    content_hash = _content_hash(path)
    seen = con.execute("select content_hash from ingest_log where source_file = $f", {"f": name}).fetchall()
    if seen and seen[0][0] == content_hash:
        return FileResult(name, folder.name, "unchanged", 0, 0, 0, 0)

    try:
        present = {
            row[0]
            for row in con.execute(f"describe select * from {_reader(path)}", {"path": str(path)}).fetchall()
        }
    except duckdb.Error as exc:
        present = None
        unreadable = f"{name}: file cannot be read: {exc}".splitlines()[0]

    store.execute(con, "begin transaction")
    try:
        store.execute(con, f"delete from {folder.table} where source_file = $f", {"f": name})
        store.execute(con, "delete from quarantine where source_file = $f", {"f": name})
        store.execute(con, "delete from ingest_log where source_file = $f", {"f": name})
        if present is None:
            result = _refuse_unreadable(con, folder, path, name, unreadable)
        else:
            result = _load(con, folder, path, name, present, config)
        store.execute(
            con,
            "insert into ingest_log values ($f, $folder, $h, $read, $loaded, $quar, $dup, $status, $msg,"
            " $secs, now())",
            {
                "f": name,
                "folder": folder.name,
                "h": content_hash,
                "read": result.rows_read,
                "loaded": result.rows_loaded,
                "quar": result.rows_quarantined,
                "dup": result.rows_duplicate,
                "status": result.status,
                "msg": result.message,
                "secs": time.perf_counter() - started,
            },
        )
        store.execute(con, "commit")
    except Exception:
        store.execute(con, "rollback")
        raise
    return result


def _reader(path: Path) -> str:
    if path.name.lower().endswith(".parquet"):
        return "read_parquet($path)"
    # Text columns so that checks, not the reader, decide what a bad value is.
    return "read_csv($path, all_varchar = true, header = true, auto_detect = true)"


def _load(
    con: duckdb.DuckDBPyConnection, folder: Folder, path: Path, name: str, present: set[str], config: Config
) -> FileResult:
    mapping = config.columns.get(folder.name, {})

    selected: dict[str, str | None] = {}
    for choices in folder.required:
        found = [c for c in choices if mapping.get(c, c) in present]
        if not found:
            wanted = " or ".join(repr(mapping.get(c, c)) for c in choices)
            return _refuse_all_rows(con, folder, path, name, f"{name}: missing required column {wanted}")
        for c in choices:
            selected[c] = mapping.get(c, c) if c in found else None
    for c in folder.optional:
        selected[c] = mapping.get(c, c) if mapping.get(c, c) in present else None

    columns = ", ".join(
        f'cast(t."{src}" as varchar) as "{canon}"' if src else f'cast(null as varchar) as "{canon}"'
        for canon, src in selected.items()
    )
    store.execute(
        con,
        f"create or replace temp table landing as select row_number() over () as source_row,"
        f" to_json(t)::varchar as raw, {columns} from {_reader(path)} t",
        {"path": str(path)},
    )
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

    target_columns = [r[1] for r in con.execute(f"pragma table_info('{folder.table}')").fetchall()]
    value_columns = ", ".join(c for c in target_columns if c != "source_file")
    store.execute(
        con,
        f"insert into {folder.table} ({value_columns}, source_file)"
        f" select {value_columns}, $f from checked where reason is null order by source_row",
        {"f": name},
    )
    store.execute(
        con,
        "insert into quarantine select $f, source_row, reason, raw from checked"
        " where reason is not null and reason <> 'exact_duplicate'",
        {"f": name},
    )
    read, loaded, dup = con.execute(
        "select count(*), count(*) filter (reason is null), count(*) filter (reason = 'exact_duplicate')"
        " from checked"
    ).fetchall()[0]
    quarantined = read - loaded - dup
    status = "loaded" if quarantined == 0 else "loaded_with_quarantine"
    return FileResult(name, folder.name, status, read, loaded, quarantined, dup)


def _refuse_all_rows(
    con: duckdb.DuckDBPyConnection, folder: Folder, path: Path, name: str, message: str
) -> FileResult:
    # The rows are kept in quarantine so the refusal loses nothing.
    store.execute(
        con,
        f"insert into quarantine select $f, row_number() over (), 'missing_column', to_json(t)::varchar"
        f" from {_reader(path)} t",
        {"f": name, "path": str(path)},
    )
    read = con.execute("select count(*) from quarantine where source_file = $f", {"f": name}).fetchall()[0][0]
    return FileResult(name, folder.name, "refused", read, 0, read, 0, message)


def _refuse_unreadable(
    con: duckdb.DuckDBPyConnection, folder: Folder, path: Path, name: str, message: str
) -> FileResult:
    # An unreadable file is kept whole, line by line, as raw text in quarantine.
    store.execute(
        con,
        "insert into quarantine select $f, row_number() over (), 'unreadable_file', line"
        " from (select unnest(string_split(content, chr(10))) as line from read_text($path))"
        " where trim(line) <> ''",
        {"f": name, "path": str(path)},
    )
    read = con.execute("select count(*) from quarantine where source_file = $f", {"f": name}).fetchall()[0][0]
    return FileResult(name, folder.name, "refused", read, 0, read, 0, message)


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
        },
    )
