"""Ingest throughput on a synthetic lake: rows per second for Parquet and CSV meter files.

Not a test. Writes two lakes (the same rows, meter as Parquet in one and CSV in the other)
of ``--premises`` homes x ``--days`` days of 15-minute reads, synthesised directly with
numpy and polars (the physics simulator is far slower than needed for volume), ingests each
into a fresh warehouse, then ingests again to time the unchanged-file path.

    PYTHONPATH=. python bench/ingest_bench.py --premises 1000 --days 92 --work /tmp/bench
"""

from __future__ import annotations

import argparse
import datetime as dt
import resource
import shutil
import time
from pathlib import Path

import numpy as np
import polars as pl

from pipeline import config as config_module
from pipeline import ingest

START = dt.datetime(2026, 6, 1, 5, 0, tzinfo=dt.UTC)
"""Local midnight of 1 June in America/Chicago (CDT, UTC-5)."""


def write_lake(root: Path, premises: int, days: int, meter_format: str, seed: int) -> int:
    """Write one landing lake; return the number of meter rows."""
    rng = np.random.default_rng(seed)
    landing = root / "landing"
    for folder in ("tariffs", "premises", "weather", "meter", "thermostat"):
        (landing / folder).mkdir(parents=True, exist_ok=True)
    pl.DataFrame(
        {
            "rate_plan_id": ["TOU"] * 4,
            "months": ["1-12"] * 4,
            "day_type": ["weekday", "weekday", "weekday", "weekend"],
            "start_hour": [0, 14, 19, 0],
            "end_hour": [14, 19, 24, 24],
            "price_per_kwh": [0.09, 0.32, 0.09, 0.09],
        }
    ).write_csv(landing / "tariffs" / "tariffs.csv")
    ids = np.array([f"B{i:05d}" for i in range(premises)])
    pl.DataFrame(
        {
            "premise_id": ids,
            "timezone": "America/Chicago",
            "weather_station_id": "WX-1",
            "rate_plan_id": "TOU",
            "comfort_cool_c": rng.integers(22, 26, premises).astype(float),
            "comfort_heat_c": rng.integers(18, 21, premises).astype(float),
        }
    ).write_csv(landing / "premises" / "premises.csv")
    hours = np.arange(days * 24)
    hour_times = pl.datetime_range(
        START, START + dt.timedelta(hours=days * 24 - 1), "1h", time_zone="UTC", eager=True
    )
    pl.DataFrame(
        {
            "station_id": "WX-1",
            "observed_at": hour_times.dt.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "dry_bulb_c": np.round(27 + 6 * np.sin(2 * np.pi * (hours - 9) / 24), 1),
        }
    ).write_csv(landing / "weather" / "weather.csv")

    slots = days * 96
    base = np.datetime64(START.replace(tzinfo=None), "us")
    starts = base + np.arange(slots) * np.timedelta64(15 * 60_000_000, "us")
    kwh = np.round(rng.gamma(2.0, 0.12, (premises, slots)), 3)
    meter = pl.DataFrame(
        {
            "premise_id": np.repeat(ids, slots),
            "interval_start": np.tile(starts, premises),
            "interval_minutes": np.full(premises * slots, 15, dtype=np.int32),
            "kwh": kwh.ravel(),
        }
    ).with_columns(pl.col("interval_start").dt.replace_time_zone("UTC"))
    for month, part in meter.group_by(pl.col("interval_start").dt.month(), maintain_order=True):
        path = landing / "meter" / f"meter_2026-{month[0]:02d}"
        if meter_format == "parquet":
            part.write_parquet(path.with_suffix(".parquet"))
        else:
            part.with_columns(pl.col("interval_start").dt.strftime("%Y-%m-%dT%H:%M:%S+00:00")).write_csv(
                path.with_suffix(".csv")
            )

    events_per_day = 4
    n = premises * days * events_per_day
    offsets = np.repeat(np.arange(days), events_per_day) * 1440 + np.tile([390, 480, 1020, 1320], days)
    changed = base + np.tile(offsets, premises).astype("timedelta64[m]").astype("timedelta64[us]")
    pl.DataFrame(
        {
            "premise_id": np.repeat(ids, days * events_per_day),
            "changed_at": pl.Series(changed).dt.strftime("%Y-%m-%dT%H:%M:%S+00:00"),
            "mode": "cool",
            "cool_setpoint_c": rng.integers(22, 28, n).astype(float),
            "heat_setpoint_c": 19.0,
            "occupied": np.tile([1, 0, 1, 1], premises * days),
        }
    ).write_csv(landing / "thermostat" / "thermostat.csv")
    return premises * slots


def run(lake: Path, out: Path) -> tuple[pl.DataFrame, float]:
    config = config_module.load(overrides={"lake": str(lake), "out": str(out)})
    started = time.perf_counter()
    results = ingest.results_frame(ingest.ingest(config))
    return results, time.perf_counter() - started


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--premises", type=int, default=1000)
    parser.add_argument("--days", type=int, default=92)
    parser.add_argument("--work", type=Path, default=Path("/tmp/thermal-ledger-bench"))
    parser.add_argument("--seed", type=int, default=7)
    args = parser.parse_args()
    shutil.rmtree(args.work, ignore_errors=True)
    lines = []
    for meter_format in ("parquet", "csv"):
        lake = args.work / f"lake_{meter_format}"
        started = time.perf_counter()
        meter_rows = write_lake(lake, args.premises, args.days, meter_format, args.seed)
        generated = time.perf_counter() - started
        results, seconds = run(lake, args.work / f"out_{meter_format}")
        again, seconds_again = run(lake, args.work / f"out_{meter_format}")
        meter = results.filter(pl.col("folder") == "meter")
        meter_seconds = meter["seconds"].sum()
        assert meter["rows_loaded"].sum() == meter_rows, "benchmark lake should load whole"
        assert set(again["status"]) == {"unchanged"}
        lines.append(
            f"| {meter_format} | {meter_rows:,} | {meter_seconds:.1f} | {meter_rows / meter_seconds:,.0f}"
            f" | {results['rows_read'].sum():,} | {seconds:.1f} | {results['rows_read'].sum() / seconds:,.0f}"
            f" | {seconds_again:.1f} |"
        )
        print(f"{meter_format}: generated in {generated:.1f} s", flush=True)
        print(results.select("source_file", "rows_read", "rows_loaded", "seconds"), flush=True)
    peak_gib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    print(f"\n{args.premises} premises x {args.days} days of 15-minute reads; peak RSS {peak_gib:.1f} GiB\n")
    print("| meter as | meter rows | meter s | meter rows/s | all rows | total s | all rows/s | re-run s |")
    print("|---|---|---|---|---|---|---|---|")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
