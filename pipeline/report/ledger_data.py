"""Everything the report shows, read from one run of the Parquet ledger and nothing else.

The analyst views of ``sql/views.sql`` (``store.connect_ledger``) give the tables every run
writes. Tables that later stages add (``recommendation``, ``schedule``, ``safety_test``, a truth
table for simulated lakes, ...) may not have a view yet, or may be absent from an older run's
ledger: ``RunData.table`` reads a view when there is one, else the table's own Parquet files,
and answers None when this run wrote no rows of it, so each section can say so plainly.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from pipeline import store


def report_path(out: Path, run_id: str) -> Path:
    """Where the report of run ``run_id`` is written under the output folder ``out``."""
    return Path(out) / "report" / run_id / "report.html"


class ReportError(RuntimeError):
    """The report cannot be made as asked (no ledger, no such run, no such premise)."""


@dataclass
class RunData:
    """One run of the ledger: its id, its settings and a reader of its tables."""

    ledger: Path
    con: duckdb.DuckDBPyConnection
    run_id: str
    run: dict[str, Any]
    settings: dict[str, Any]
    _cache: dict[str, pl.DataFrame | None] = field(default_factory=dict)

    def table(self, name: str) -> pl.DataFrame | None:
        """This run's rows of ledger table ``name``; None when the run's ledger does not hold it."""
        if name not in self._cache:
            self._cache[name] = self._read(name)
        return self._cache[name]

    def wrote(self, name: str) -> bool:
        """Whether this run wrote ledger table ``name`` at all (perhaps with no rows)."""
        return any((self.ledger / name).glob(f"run_date=*/{self.run_id}*.parquet"))

    def _read(self, name: str) -> pl.DataFrame | None:
        views = {row[0] for row in self.con.execute("select view_name from duckdb_views()").fetchall()}
        if name in views:
            try:
                rows = store.frame(
                    self.con,
                    f"select * from {store.quote_identifier(name)} where run_id = $run",
                    {"run": self.run_id},
                )
            except duckdb.IOException:
                rows = None
        else:
            rows = self._read_files(name)
        if rows is None or rows.is_empty():
            return None
        return rows.drop([c for c in ("run_id", "run_date") if c in rows.columns])

    def _read_files(self, name: str) -> pl.DataFrame | None:
        # A stage may add a second file of the run's rows (``<run_id>-learned.parquet``).
        files = sorted((self.ledger / name).glob(f"run_date=*/{self.run_id}*.parquet"))
        if not files:
            return None
        return store.frame(
            self.con,
            "select * from read_parquet($files, hive_partitioning = true, union_by_name = true)"
            " where run_id = $run",
            {"files": [str(f) for f in files], "run": self.run_id},
        )

    def setting(self, name: str, default: Any = None) -> Any:
        """A setting as the run recorded it (the ``run`` table's configuration)."""
        return self.settings.get(name, default)


def open_run(
    ledger: Path, run_id: str | None = None, settings: store.DuckDBSettings | None = None
) -> RunData:
    """The run ``run_id`` of the ledger at ``ledger`` (default: the newest finished run)."""
    ledger = Path(ledger)
    if not (ledger / "run").is_dir():
        raise ReportError(
            f"no ledger at {ledger}: no run has finished there; run `thermal-ledger run --out ...` first"
            " (the report reads <out>/ledger)"
        )
    con = store.connect_ledger(ledger, settings)
    if run_id is None:
        found = con.execute("select run_id from latest_run").fetchall()
    else:
        found = con.execute("select run_id from run where run_id = $r", {"r": run_id}).fetchall()
    if not found:
        runs = [
            r[0] for r in con.execute("select run_id from run order by finished_at desc limit 3").fetchall()
        ]
        raise ReportError(
            f"--run {run_id}: no such run in {ledger}; newest runs: {', '.join(runs) or 'none'}"
        )
    run_id = found[0][0]
    record = store.frame(con, "select * from run where run_id = $r", {"r": run_id}).row(0, named=True)
    return RunData(ledger, con, run_id, record, json.loads(record["config"] or "{}"))


def recommended_rows(data: RunData, scope: str) -> pl.DataFrame:
    """The savings rows of ``scope`` from the recommended estimator (one per key, policy and mode)."""
    savings = data.table("savings")
    if savings is None:
        return pl.DataFrame()
    return savings.filter((pl.col("scope") == scope) & pl.col("recommended")).sort(
        "key", "policy_name", "mode"
    )


COMFORT_COLUMNS = {
    "bill_savings_usd_per_episode": "bill savings USD/episode (energy only)",
    "comfort_change_degree_hours": "comfort change °C-h/episode",
    "comfort_change_ci_low": "comfort change low °C-h",
    "comfort_change_ci_high": "comfort change high °C-h",
}
"""Savings columns of the energy-only bill and the comfort change, with the labels the report prints."""


def comfort_columns(savings: pl.DataFrame) -> list[str]:
    """Those of ``COMFORT_COLUMNS`` the savings rows carry (runs before comfort was estimated have none)."""
    return [c for c in COMFORT_COLUMNS if c in savings.columns]


def premise_best(data: RunData) -> pl.DataFrame:
    """Per premise with a supported recommended estimate: its best policy and that savings figure."""
    rows = recommended_rows(data, "premise")
    if rows.is_empty():
        return rows
    return (
        rows.filter((pl.col("status") == "ok") & pl.col("savings_usd_per_episode").is_not_null())
        .sort(["savings_usd_per_episode", "policy_name"], descending=[True, False])
        .unique("key", keep="first", maintain_order=True)
        .sort(["savings_usd_per_episode", "key"], descending=[True, False])
    )


def homes_to_show(data: RunData, few: int, asked: tuple[str, ...]) -> list[tuple[str, str]]:
    """(premise_id, why shown) for the best and worst ``few`` homes and every premise asked for."""
    best = premise_best(data)
    known = set()
    for name in ("episode_summary", "savings", "behavior_type"):
        frame = data.table(name)
        if frame is not None:
            column = "key" if name == "savings" else "premise_id"
            if name == "savings":
                frame = frame.filter(pl.col("scope") == "premise")
            known |= set(frame[column].to_list())
    missing = [p for p in asked if p not in known]
    if missing:
        raise ReportError(f"--premise {missing[0]}: no such premise in run {data.run_id}'s ledger")
    chosen: list[tuple[str, str]] = []
    keys = best["key"].to_list() if not best.is_empty() else []
    for key in keys[:few]:
        chosen.append((key, "among the largest estimated savings"))
    for key in keys[::-1][:few]:
        if key not in {c[0] for c in chosen}:
            chosen.append((key, "among the smallest estimated savings"))
    for key in asked:
        if key not in {c[0] for c in chosen}:
            chosen.append((key, "asked for with --premise"))
    return chosen
