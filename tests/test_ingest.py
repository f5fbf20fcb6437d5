"""Ingest: every landing row is loaded, quarantined with a reason, or counted as a duplicate."""

from __future__ import annotations

import datetime as dt
import gzip
import json
import tempfile
import textwrap
import zoneinfo
from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline import cli, ingest, store
from pipeline.config import Config
from pipeline.episodes import sql_params
from tests.conftest import lake_config, write_landing

TARIFF = """
    rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
    TOU,1-12,weekday,0,14,0.09
    TOU,1-12,weekday,14,19,0.32
    TOU,1-12,weekday,19,24,0.09
    TOU,1-12,weekend,0,24,0.09
"""
PREMISES = """
    premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c,cohort
    P1,America/Chicago,S1,TOU,24,20,north
"""


def _ingest(tmp_path, files):
    config = lake_config(
        write_landing(
            tmp_path,
            {
                "tariffs/t.csv": TARIFF,
                "premises/p.csv": PREMISES,
                **_meter_unless(files),
                **files,
            },
        )
    )
    results = ingest.results_frame(ingest.ingest(config))
    con = duckdb.connect(str(config.warehouse_path), read_only=True)
    return config, results, con


def _meter_unless(files):
    # Ingest refuses a lake without meter files; tests of other folders get one good reading.
    return (
        {} if any(name.startswith("meter/") for name in files) else {"meter/m.csv": METER_HEAD + GOOD_METER}
    )


def _reasons(con, source_file):
    return dict(
        con.execute(
            "select row_number, reason from quarantine where source_file = $f order by row_number",
            {"f": source_file},
        ).fetchall()
    )


def test_every_row_is_accounted_for_and_each_bad_meter_row_gets_its_reason(tmp_path):
    """Rows read = loaded + quarantined + exact duplicates, and each bad row names why."""
    meter = """
        premise_id,interval_start,interval_minutes,kwh
        P1,2026-06-01T07:00:00-05:00,15,0.5
        P1,2026-06-01T07:00:00-05:00,15,0.5
        P1,2026-06-01T07:15:00-05:00,15,0.5
        P1,2026-06-01T07:15:00-05:00,15,0.7
        P1,2026-06-01 07:30:00,15,0.2
        P1,2026-06-01 07:37:00,15,0.2
        P9,2026-06-01 07:30:00,15,0.2
        P1,2026-03-08 02:30:00,15,0.2
        P1,2026-11-01 01:30:00,15,0.2
        P1,2026-06-01 08:00,15,-1
        P1,,15,0.3
        P1,next tuesday,15,0.3
        P1,2026-06-01 09:00,20,0.3
        P1,2026-06-01 09:00,15,lots
    """
    _, results, con = _ingest(tmp_path, {"meter/m.csv": meter})
    for row in results.iter_rows(named=True):
        assert row["rows_read"] == row["rows_loaded"] + row["rows_quarantined"] + row["rows_duplicate"]
    assert _reasons(con, "landing/meter/m.csv") == {
        3: "conflicting_duplicate",
        4: "conflicting_duplicate",
        6: "interval_not_aligned",
        7: "unknown_premise",
        8: "nonexistent_local_time",
        9: "ambiguous_local_time",
        10: "kwh_out_of_range",
        11: "missing_timestamp",
        12: "bad_timestamp",
        13: "bad_interval_length",
        14: "bad_number",
    }
    meter_row = results.filter(results["folder"] == "meter").row(0, named=True)
    assert (meter_row["rows_read"], meter_row["rows_loaded"], meter_row["rows_duplicate"]) == (14, 2, 1)
    # Naive wall-clock time is read in the premise's zone: 07:30 CDT is 12:30 UTC.
    loaded = con.execute("select strftime(interval_start_utc, '%H:%M') from meter_read order by 1").fetchall()
    assert loaded == [("12:00",), ("12:30",)]


def test_warehouse_keys_are_unique_and_not_null(tmp_path):
    """Each typed table's key is unique and not null after ingest."""
    meter = """
        premise_id,interval_start,interval_minutes,wh
        P1,2026-06-01T12:00:00Z,60,1500
        P1,2026-06-01T12:00:00Z,60,1500
        P1,2026-06-01T13:00:00Z,60,1200
    """
    weather = """
        station_id,observed_at,dry_bulb_f
        S1,2026-06-01T12:00:00Z,95
        S1,2026-06-01T13:00:00Z,212
    """
    _, _, con = _ingest(tmp_path, {"meter/m.csv": meter, "weather/w.csv": weather})
    for table, key in (
        ("meter_read", "premise_id, interval_start_utc"),
        ("weather_obs", "station_id, observed_at_utc"),
        ("premise", "premise_id"),
    ):
        total, distinct, nulls = con.execute(
            f"select count(*), count(distinct ({key})), count(*) filter (({key}) is null) from {table}"
        ).fetchall()[0]
        assert total == distinct and nulls == 0, table
    # Wh are converted to kWh and °F to °C (95 °F = 35 °C); 212 °F is out of physical range.
    assert con.execute("select sum(kwh) from meter_read").fetchall()[0][0] == pytest.approx(2.7)
    assert con.execute("select dry_bulb_c from weather_obs").fetchall() == [(pytest.approx(35.0),)]
    assert _reasons(con, "landing/weather/w.csv") == {2: "temperature_out_of_range"}


def test_missing_required_column_refuses_the_file_and_keeps_its_rows(tmp_path):
    """A file without a required column is refused, named in the message, rows kept in quarantine."""
    thermostat = """
        premise_id,changed_at,mode,cool_setpoint_c
        P1,2026-06-01T07:00:00Z,cool,24
    """
    _, results, con = _ingest(tmp_path, {"thermostat/t.csv": thermostat})
    row = results.filter(results["folder"] == "thermostat").row(0, named=True)
    assert row["status"] == "refused"
    assert "landing/thermostat/t.csv" in row["message"] and "heat_setpoint_c" in row["message"]
    assert _reasons(con, "landing/thermostat/t.csv") == {1: "missing_column"}


def test_premise_rows_check_rate_plan_and_zone(tmp_path):
    """Premises on an unknown rate plan or time zone are quarantined with that reason."""
    premises = """
        premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c
        P2,America/Chicago,S1,NOPE,24,20
        P3,Mars/Olympus,S1,TOU,24,20
        P4,America/Chicago,S1,TOU,40,20
    """
    _, _, con = _ingest(tmp_path, {"premises/q.csv": premises})
    assert _reasons(con, "landing/premises/q.csv") == {
        1: "unknown_rate_plan",
        2: "unknown_time_zone",
        3: "setpoint_out_of_range",
    }


def test_reingesting_unchanged_files_changes_nothing_and_changed_file_replaces_rows(tmp_path):
    """Same files twice leave identical tables; an edited file replaces its own rows."""
    meter = "premise_id,interval_start,interval_minutes,kwh\nP1,2026-06-01T12:00:00Z,60,1.0\n"
    config, _, con = _ingest(tmp_path, {"meter/m.csv": meter})
    before = con.execute("select * from meter_read order by all").fetchall()
    con.close()
    again = ingest.results_frame(ingest.ingest(config))
    assert set(again["status"]) == {"unchanged"}
    (tmp_path / "landing/meter/m.csv").write_text(meter.replace("1.0", "2.0"))
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        after = con.execute("select kwh from meter_read").fetchall()
        logged = con.execute("select count(*) from ingest_log").fetchall()[0][0]
    assert len(before) == 1 and after == [(2.0,)] and logged == 3


# --- every reason code, each from a tiny inline file ---------------------------------------

METER_HEAD = "premise_id,interval_start,interval_minutes,kwh,quality\n"
GOOD_METER = "P1,2026-06-01T12:00:00Z,60,1.0,actual\n"


def _check_accounting(con):
    """Every logged file: read = loaded + quarantined + duplicates, and the tables agree with the log."""
    tables = {f.name: f.table for f in ingest.FOLDERS}
    rows = con.execute(
        "select source_file, folder, rows_read, rows_loaded, rows_quarantined, rows_duplicate,"
        " quarantined_by_reason from ingest_log"
    ).fetchall()
    for source_file, folder, read, loaded, quarantined, duplicate, by_reason in rows:
        assert read == loaded + quarantined + duplicate, source_file
        in_table = con.execute(
            f"select count(*) from {tables[folder]} where source_file = $f", {"f": source_file}
        ).fetchall()[0][0]
        in_quarantine = con.execute(
            "select count(*) from quarantine where source_file = $f", {"f": source_file}
        ).fetchall()[0][0]
        assert (in_table, in_quarantine) == (loaded, quarantined), source_file
        assert sum(json.loads(by_reason).values()) == quarantined, source_file
    # The time-series keys hold without an index: the checks alone keep them unique.
    for table, key in (
        ("meter_read", "premise_id, interval_start_utc"),
        ("weather_obs", "station_id, observed_at_utc"),
    ):
        total, distinct = con.execute(f"select count(*), count(distinct ({key})) from {table}").fetchall()[0]
        assert total == distinct, table


REASON_CASES = [
    ("meter/m.csv", METER_HEAD + ",2026-06-01T12:00:00Z,60,1.0,actual\n", "missing_key"),
    ("meter/m.csv", METER_HEAD + "P9,2026-06-01T12:00:00Z,60,1.0,actual\n", "unknown_premise"),
    ("meter/m.csv", METER_HEAD + "P1,,60,1.0,actual\n", "missing_timestamp"),
    ("meter/m.csv", METER_HEAD + "P1,June the first,60,1.0,actual\n", "bad_timestamp"),
    # 02:30 on 8 March 2026 does not exist in America/Chicago (IANA tz database via zoneinfo).
    ("meter/m.csv", METER_HEAD + "P1,2026-03-08 02:30,15,0.2,actual\n", "nonexistent_local_time"),
    # 01:30 on 1 November 2026 happens twice in America/Chicago (IANA tz database via zoneinfo).
    ("meter/m.csv", METER_HEAD + "P1,2026-11-01 01:30,15,0.2,actual\n", "ambiguous_local_time"),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,20,1.0,actual\n", "bad_interval_length"),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:15:00Z,30,1.0,actual\n", "interval_not_aligned"),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,60,-0.1,actual\n", "kwh_out_of_range"),
    # 61 kWh in one hour is a 61 kW mean draw, beyond residential service (common practice).
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,60,61,actual\n", "kwh_out_of_range"),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,60,a lot,actual\n", "bad_number"),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,60,1.0,guessed\n", "bad_code"),
    (
        "meter/m.csv",
        METER_HEAD + GOOD_METER + "P1,2026-06-01T12:00:00Z,60,1.5,actual\n",
        "conflicting_duplicate",
    ),
    ("meter/m.csv", METER_HEAD + "P1,2026-06-01T12:00:00Z,60,1.0,actual,extra\n", "malformed_row"),
    ("meter/m.csv", "premise_id,interval_start,kwh\nP1,2026-06-01T12:00:00Z,1.0\n", "missing_column"),
    ("meter/m.parquet", "PAR1 this is not parquet\n", "unreadable_file"),
    # -60..60 °C bounds the dry-bulb temperatures ever observed at the surface (common practice).
    (
        "weather/w.csv",
        "station_id,observed_at,dry_bulb_c\nS1,2026-06-01T12:00:00Z,71\n",
        "temperature_out_of_range",
    ),
    (
        "thermostat/t.csv",
        "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c\nP1,2026-06-01T12:00:00Z,cool,45,20\n",
        "setpoint_out_of_range",
    ),
    (
        "thermostat/t.csv",
        "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c\nP1,2026-06-01T12:00:00Z,warm,24,20\n",
        "bad_code",
    ),
    # The same two wall-clock times as for the meter, in a thermostat log (IANA tz database).
    (
        "thermostat/t.csv",
        "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c\nP1,2026-03-08 02:30,cool,24,20\n",
        "nonexistent_local_time",
    ),
    (
        "thermostat/t.csv",
        "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c\nP1,2026-11-01 01:30,cool,24,20\n",
        "ambiguous_local_time",
    ),
    (
        "premises/q.csv",
        "premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c\n"
        "P2,America/Chicago,S1,FLAT-9,24,20\n",
        "unknown_rate_plan",
    ),
    (
        "premises/q.csv",
        "premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c\n"
        "P2,America/Chicago,,TOU,24,20\n",
        "missing_value",
    ),
    (
        "tariffs/u.csv",
        "rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh\nX,1-12,weekday,0,24,25\n",
        "price_out_of_range",
    ),
    (
        "tariffs/u.csv",
        "rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh\nX,1-12,weekday,0,24,0.1\n"
        "X,7-7,weekday,8,9,0.3\n",
        "tariff_overlap",
    ),
    (
        "tariffs/u.csv",
        "rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh\nX,1-12,weekday,0,23,0.1\n",
        "tariff_gap",
    ),
]


@pytest.mark.parametrize(("name", "text", "reason"), REASON_CASES, ids=[c[2] for c in REASON_CASES])
def test_each_reason_code_lands_in_quarantine_and_every_file_adds_up(tmp_path, name, text, reason):
    """The bad row is quarantined with its reason code and every file's counts add up."""
    _, results, con = _ingest(tmp_path, {name: text})
    reasons = set(_reasons(con, f"landing/{name}").values())
    assert reason in reasons
    _check_accounting(con)
    for row in results.iter_rows(named=True):
        assert row["rows_read"] == row["rows_loaded"] + row["rows_quarantined"] + row["rows_duplicate"]
    if reason == "conflicting_duplicate":
        assert _reasons(con, f"landing/{name}") == {1: reason, 2: reason}
        assert con.execute("select count(*) from meter_read").fetchall() == [(0,)]


def test_exact_duplicates_are_counted_and_loaded_once(tmp_path):
    """The same interval twice with the same kWh is one loaded row and one counted duplicate."""
    _, results, con = _ingest(tmp_path, {"meter/m.csv": METER_HEAD + GOOD_METER * 3})
    row = results.filter(pl.col("folder") == "meter").row(0, named=True)
    assert (row["rows_read"], row["rows_loaded"], row["rows_quarantined"], row["rows_duplicate"]) == (
        3,
        1,
        0,
        2,
    )
    assert con.execute("select count(*) from meter_read").fetchall() == [(1,)]


def test_malformed_rows_keep_their_row_numbers_around_good_ones(tmp_path):
    """Records the CSV reader rejects keep their text and row number; the rows after them still load."""
    meter = (
        METER_HEAD
        + "P1,2026-06-01T12:00:00Z,60,1.0,actual\n"
        + "P1,2026-06-01T13:00:00Z,60,1.0,actual,surplus\n"
        + "P1,2026-06-01T14:00:00Z,60,1.0,actual\n"
        + "P1,2026-06-01T15:00:00Z,60,-5,actual\n"
    )
    _, _, con = _ingest(tmp_path, {"meter/m.csv": meter})
    assert _reasons(con, "landing/meter/m.csv") == {2: "malformed_row", 4: "kwh_out_of_range"}
    raw = con.execute("select raw from quarantine where row_number = 2").fetchall()[0][0]
    assert raw.endswith("surplus")
    _check_accounting(con)


@pytest.mark.parametrize("gzipped", [False, True], ids=["csv", "csv.gz"])
def test_a_stray_quote_quarantines_its_own_line_only_and_the_rows_after_it_load(tmp_path, gzipped):
    """An unclosed quote is one malformed_row with its text and line number; the later rows still load."""
    thermostat = (
        "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c,occupied\n"
        "P1,2026-06-01T12:00:00Z,cool,24.0,19.0,0\n"
        'P1,2026-06-01T13:00:00Z,cool,"24.0,19.0,0,23.0\n'
        "P1,2026-06-01T14:00:00Z,cool,25.0,19.0,0\n"
        'P1,2026-06-01T15:00:00Z,cool,"25.0",19.0,0,surplus\n'
        'P1,2026-06-01T16:00:00Z,cool,"26.0",19.0,1\n'
        "P1,2026-06-01T17:00:00Z,cool,45,19.0,1\n"
    )
    name = "thermostat/t.csv.gz" if gzipped else "thermostat/t.csv"
    path = tmp_path / "landing" / name
    path.parent.mkdir(parents=True)
    path.write_bytes(gzip.compress(thermostat.encode()) if gzipped else thermostat.encode())
    _, results, con = _ingest(tmp_path, {})
    assert _reasons(con, f"landing/{name}") == {
        2: "malformed_row",
        4: "malformed_row",
        6: "setpoint_out_of_range",
    }
    raw = con.execute("select raw from quarantine where row_number = 2").fetchall()[0][0]
    assert raw == 'P1,2026-06-01T13:00:00Z,cool,"24.0,19.0,0,23.0'
    assert con.execute("select source_row, cool_setpoint_c from thermostat_event order by 1").fetchall() == [
        (1, 24.0),
        (3, 25.0),
        (5, 26.0),
    ]
    row = results.filter(pl.col("folder") == "thermostat").row(0, named=True)
    assert (row["rows_read"], row["rows_loaded"], row["rows_quarantined"], row["rows_duplicate"]) == (
        6,
        3,
        3,
        0,
    )
    _check_accounting(con)


# --- readers and the column mapping ---------------------------------------------------------


def test_gzip_bom_crlf_csv_and_parquet_all_load(tmp_path):
    """Gzip CSV with a byte-order mark and CRLF line ends, and Parquet, load like plain CSV."""
    root = tmp_path
    for folder, text in (("tariffs", TARIFF), ("premises", PREMISES)):
        (root / "landing" / folder).mkdir(parents=True)
        frame = pl.read_csv(textwrap.dedent(text).strip().encode(), infer_schema=False)
        frame.write_parquet(root / "landing" / folder / "first.parquet")
    text = "\ufeff" + (METER_HEAD + GOOD_METER + "P1,2026-06-01T13:00:00Z,60,2.0,\n").replace("\n", "\r\n")
    (root / "landing/meter").mkdir()
    (root / "landing/meter/a.csv.gz").write_bytes(gzip.compress(text.encode("utf-8")))
    pl.DataFrame(
        {
            "premise_id": ["P1", "P1"],
            "interval_start": [
                dt.datetime(2026, 6, 1, 14, tzinfo=dt.UTC),
                dt.datetime(2026, 6, 1, 15, tzinfo=dt.UTC),
            ],
            "interval_minutes": [60, 60],
            "kwh": [3.0, 4.0],
        }
    ).write_parquet(root / "landing/meter/b.parquet")
    config = lake_config(root)
    results = ingest.results_frame(ingest.ingest(config))
    assert set(results["status"]) == {"loaded"}
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        rows = con.execute(
            "select strftime(interval_start_utc, '%H'), kwh, quality from meter_read order by 1"
        ).fetchall()
    assert rows == [
        ("12", 1.0, "actual"),
        ("13", 2.0, "actual"),
        ("14", 3.0, "actual"),
        ("15", 4.0, "actual"),
    ]


# Rows of one meter file as (premise_id, interval_start, interval_minutes, kwh), with the reason
# each row must get; the same rows go into a CSV (text) and a Parquet file (typed columns).
_UTC = dt.UTC
METER_CASES = [
    ("P1", dt.datetime(2026, 6, 1, 12, tzinfo=_UTC), 60, 1.0, None),
    ("P1", dt.datetime(2026, 6, 1, 12, tzinfo=_UTC), 60, 1.0, "exact_duplicate"),
    ("P1", dt.datetime(2026, 6, 1, 13, tzinfo=_UTC), 60, 1.0, "conflicting_duplicate"),
    ("P1", dt.datetime(2026, 6, 1, 13, tzinfo=_UTC), 60, 1.5, "conflicting_duplicate"),
    ("P1", None, 60, 1.0, "missing_timestamp"),
    ("P1", dt.datetime(2026, 6, 1, 14, tzinfo=_UTC), 20, 1.0, "bad_interval_length"),
    ("P1", dt.datetime(2026, 6, 1, 14, 15, tzinfo=_UTC), 30, 1.0, "interval_not_aligned"),
    ("P1", dt.datetime(2026, 6, 1, 15, tzinfo=_UTC), 60, None, "bad_number"),
    # 61 kWh in one hour is a 61 kW mean draw, beyond residential service (common practice).
    ("P1", dt.datetime(2026, 6, 1, 16, tzinfo=_UTC), 60, 61.0, "kwh_out_of_range"),
    ("P9", dt.datetime(2026, 6, 1, 17, tzinfo=_UTC), 60, 1.0, "unknown_premise"),
    ("P1", dt.datetime(2026, 6, 1, 18, tzinfo=_UTC), None, 1.0, "bad_interval_length"),
    ("P1", dt.datetime(2026, 6, 1, 19, tzinfo=_UTC), 15, 0.1, None),
]


def _meter_csv(cases) -> str:
    def text(value):
        if value is None:
            return ""
        return value.strftime("%Y-%m-%dT%H:%M:%SZ") if isinstance(value, dt.datetime) else str(value)

    return "premise_id,interval_start,interval_minutes,kwh\n" + "".join(
        ",".join(text(v) for v in case[:4]) + "\n" for case in cases
    )


def _meter_parquet(cases, path: Path, minutes: pl.DataType, kwh: pl.DataType, compression="zstd") -> None:
    pl.DataFrame(
        {
            "premise_id": [c[0] for c in cases],
            "interval_start": pl.Series([c[1] for c in cases], dtype=pl.Datetime("us", "UTC")),
            "interval_minutes": pl.Series([c[2] for c in cases], dtype=minutes),
            "kwh": pl.Series([c[3] for c in cases], dtype=kwh),
        }
    ).write_parquet(path, compression=compression)


def _meter_outcome(tmp_path, name, write):
    root = write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES})
    (root / "landing/meter").mkdir()
    write(root / "landing/meter" / name)
    config = lake_config(root)
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        _check_accounting(con)
        loaded = con.execute(
            "select premise_id, interval_start_utc, interval_minutes, kwh, quality, source_row"
            " from meter_read order by source_row"
        ).fetchall()
        return loaded, _reasons(con, f"landing/meter/{name}")


@pytest.mark.parametrize(
    ("minutes", "kwh"),
    [(pl.Int32, pl.Float64), (pl.Int64, pl.Float32)],
    ids=["int32-float64", "int64-float32"],
)
def test_a_typed_parquet_meter_file_loads_and_quarantines_exactly_as_its_csv_text(tmp_path, minutes, kwh):
    """Typed Parquet columns give the rows, values and reasons the same rows give as CSV text.

    FLOAT kWh goes through its text, so 0.1 stored as a 32-bit float loads as 0.1, as in the CSV.
    """
    csv_rows = _meter_outcome(tmp_path / "csv", "m.csv", lambda p: p.write_text(_meter_csv(METER_CASES)))
    parquet_rows = _meter_outcome(
        tmp_path / "parquet", "m.parquet", lambda p: _meter_parquet(METER_CASES, p, minutes, kwh)
    )
    expected = {
        i: reason for i, (*_, reason) in enumerate(METER_CASES, 1) if reason and reason != "exact_duplicate"
    }
    assert csv_rows[1] == expected
    assert parquet_rows == csv_rows
    assert [row[3] for row in parquet_rows[0]] == [1.0, 0.1]


def test_typed_parquet_columns_skip_their_text_and_others_keep_it(tmp_path):
    """An absolute instant and integers are taken typed; a naive timestamp and a FLOAT go through text."""
    path = tmp_path / "m.parquet"
    pl.DataFrame(
        {
            "premise_id": ["P1"],
            "interval_start": pl.Series([dt.datetime(2026, 6, 1, 12, tzinfo=_UTC)]),
            "interval_minutes": pl.Series([60], dtype=pl.Int64),
            "kwh": pl.Series([0.5], dtype=pl.Float32),
            "wh": pl.Series([500.0], dtype=pl.Float64),
        }
    ).write_parquet(path)
    meter = next(f for f in ingest.FOLDERS if f.name == "meter")
    with store.warehouse(tmp_path / "w.duckdb") as con:
        types, _ = ingest._stage(con, path)
        selected = ingest._select_columns(meter, {}, set(types), "m.parquet")
        ingest._landing_view(con, meter, selected, types)
        row = store.frame(con, "select * exclude (source_row) from landing").row(0, named=True)
    assert row == {
        "typed_interval_start": dt.datetime(2026, 6, 1, 12, tzinfo=zoneinfo.ZoneInfo("UTC")),
        "interval_start": None,
        "typed_interval_minutes": 60,
        "interval_minutes": None,
        "typed_kwh": None,
        "kwh": "0.5",
        "typed_wh": 500.0,
        "wh": None,
        "premise_id": "P1",
        "quality": None,
    }


def test_a_typed_parquet_weather_file_converts_fahrenheit_and_counts_duplicates(tmp_path):
    """Typed °F observations become °C, (F - 32) * 5 / 9 (the Fahrenheit scale's definition)."""
    root = write_landing(
        tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES, "meter/m.csv": METER_HEAD}
    )
    (root / "landing/weather").mkdir()
    pl.DataFrame(
        {
            "station_id": ["S1", "S1", "S1"],
            "observed_at": pl.Series(
                [dt.datetime(2026, 6, 1, h, tzinfo=_UTC) for h in (12, 12, 13)],
                dtype=pl.Datetime("us", "UTC"),
            ),
            "dry_bulb_f": [50.0, 50.0, 212.0],
        }
    ).write_parquet(root / "landing/weather/w.parquet")
    config = lake_config(root)
    results = ingest.results_frame(ingest.ingest(config))
    weather = results.filter(pl.col("folder") == "weather").row(0, named=True)
    assert (weather["rows_loaded"], weather["rows_duplicate"], weather["rows_quarantined"]) == (1, 1, 1)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select dry_bulb_c from weather_obs").fetchall() == [(10.0,)]
        assert _reasons(con, "landing/weather/w.parquet") == {3: "temperature_out_of_range"}
        _check_accounting(con)


def test_a_parquet_file_damaged_behind_its_footer_is_refused_and_the_rest_loads(tmp_path):
    """Damage the footer does not show (a data page) refuses the file when it is read; the others load."""
    root = write_landing(
        tmp_path,
        {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES, "meter/a.csv": METER_HEAD + GOOD_METER},
    )
    cases = [
        ("P1", dt.datetime(2026, 6, 2, tzinfo=_UTC) + dt.timedelta(minutes=15 * i), 15, 0.1, None)
        for i in range(2000)
    ]
    path = root / "landing/meter/b.parquet"
    _meter_parquet(cases, path, pl.Int32, pl.Float64, compression="snappy")
    data = bytearray(path.read_bytes())  # the instants' data page starts near byte 100
    data[200:264] = bytes(b ^ 0xFF for b in data[200:264])
    path.write_bytes(bytes(data))
    config = lake_config(root)
    results = ingest.results_frame(ingest.ingest(config)).filter(pl.col("folder") == "meter")
    assert results.select("source_file", "status").rows() == [
        ("landing/meter/a.csv", "loaded"),
        ("landing/meter/b.parquet", "refused"),
    ]
    assert "file cannot be read" in results["message"][1]
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select count(*) from meter_read").fetchall() == [(1,)]
        assert set(_reasons(con, "landing/meter/b.parquet").values()) == {"unreadable_file"}
        _check_accounting(con)


def test_column_mapping_renames_and_converts_units(tmp_path):
    """Mapped headers load: usage_kwh for kwh, wh converted to kWh, dry_bulb_f converted to °C."""
    root = write_landing(
        tmp_path,
        {
            "tariffs/t.csv": TARIFF,
            "premises/p.csv": PREMISES,
            "meter/a.csv": "meter,start,minutes,usage_kwh\nP1,2026-06-01T12:00:00Z,60,1.25\n",
            "meter/b.csv": "meter,start,minutes,wh\nP1,2026-06-01T13:00:00Z,30,750\n",
            "weather/w.csv": "station,time_utc,temp_f\nS1,2026-06-01T12:00:00Z,50\n",
        },
    )
    config = lake_config(
        root,
        columns={
            "meter": {
                "premise_id": "meter",
                "interval_start": "start",
                "interval_minutes": "minutes",
                "kwh": "usage_kwh",
            },
            "weather": {"station_id": "station", "observed_at": "time_utc", "dry_bulb_f": "temp_f"},
        },
    )
    results = ingest.results_frame(ingest.ingest(config))
    assert set(results["status"]) == {"loaded"}
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        kwh = con.execute(
            "select interval_minutes, kwh from meter_read order by interval_start_utc"
        ).fetchall()
        temp = con.execute("select dry_bulb_c from weather_obs").fetchall()
    # 50 °F = 10 °C; 750 Wh = 0.75 kWh (SI definitions).
    assert kwh == [(60, 1.25), (30, 0.75)] and temp == [(pytest.approx(10.0),)]


# --- daylight saving ----------------------------------------------------------------------

CHICAGO = zoneinfo.ZoneInfo("America/Chicago")


def _local_day_rows(day: dt.date, minutes: int, rng: np.random.Generator) -> tuple[list[str], int, float]:
    """Meter rows with offsets covering one local day; return them, the day's hours and kWh."""
    start = dt.datetime.combine(day, dt.time(), CHICAGO).astimezone(dt.UTC)
    end = dt.datetime.combine(day + dt.timedelta(days=1), dt.time(), CHICAGO).astimezone(dt.UTC)
    count = int((end - start) / dt.timedelta(minutes=minutes))
    kwh = np.round(rng.uniform(0.05, 0.5, count) * minutes / 15, 3)
    rows = [
        f"P1,{(start + dt.timedelta(minutes=minutes * i)).astimezone(CHICAGO).isoformat()},{minutes},{kwh[i]}"
        for i in range(count)
    ]
    return rows, int((end - start) / dt.timedelta(hours=1)), float(kwh.sum())


def test_daylight_saving_days_have_23_and_25_hours_and_keep_their_kwh(tmp_path):
    """Spring-forward and fall-back local days have 23 and 25 hourly rows whose kWh equals the reads'."""
    rng = np.random.default_rng(4)
    spring, spring_hours, spring_kwh = _local_day_rows(dt.date(2026, 3, 8), 15, rng)
    fall, fall_hours, fall_kwh = _local_day_rows(dt.date(2026, 11, 1), 30, rng)
    summer, summer_hours, summer_kwh = _local_day_rows(dt.date(2026, 7, 1), 60, rng)
    # A spring-forward local day has 23 hours, a fall-back day 25 (common practice); here the
    # count comes independently from the IANA tz database via zoneinfo.
    assert (spring_hours, fall_hours, summer_hours) == (23, 25, 24)
    meter = "premise_id,interval_start,interval_minutes,kwh\n" + "\n".join(spring + fall + summer) + "\n"
    config, results, con = _ingest(tmp_path, {"meter/m.csv": meter})
    con.close()
    assert results.filter(pl.col("folder") == "meter")["rows_loaded"].to_list() == [
        len(spring + fall + summer)
    ]
    with store.warehouse(config.warehouse_path) as con:
        store.build_table(con, "hourly", sql_params(Config()))
        days = dict(
            (d, (n, kwh))
            for d, n, kwh in con.execute(
                "select local_date, count(*), sum(kwh) from hourly"
                " where local_date in ('2026-03-08', '2026-11-01', '2026-07-01') group by local_date"
            ).fetchall()
        )
    assert days[dt.date(2026, 3, 8)] == (spring_hours, pytest.approx(spring_kwh))
    assert days[dt.date(2026, 11, 1)] == (fall_hours, pytest.approx(fall_kwh))
    assert days[dt.date(2026, 7, 1)] == (summer_hours, pytest.approx(summer_kwh))


# --- idempotency, increments, replacement, files that leave the lake ---------------------------

TABLES = ("premise", "tariff_rate", "meter_read", "weather_obs", "thermostat_event", "quarantine")


def _snapshot(config):
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        tables = {t: con.execute(f"select * from {t} order by all").fetchall() for t in TABLES}
        tables["ingest_log"] = con.execute(
            "select source_file, content_hash, rows_read, rows_loaded, rows_quarantined, rows_duplicate,"
            " quarantined_by_reason from ingest_log order by all"
        ).fetchall()
        tables["coverage"] = con.execute("select * from coverage order by all").fetchall()
    return tables


def _meter_day(day: int, kwh: float) -> str:
    rows = [f"P1,2026-06-{day:02d}T{h:02d}:00:00Z,60,{kwh}" for h in range(24)]
    return "premise_id,interval_start,interval_minutes,kwh\n" + "\n".join(rows) + "\nP1,bad,60,1\n"


def test_same_lake_twice_identical_new_file_adds_only_its_rows_changed_file_replaces_its_rows(tmp_path):
    """Re-ingest changes nothing; a new file adds exactly its rows; an edited file swaps its own rows."""
    weather = "station_id,observed_at,dry_bulb_c\nS1,2026-06-01T12:00:00Z,30\nS1,2026-06-01T13:00:00Z,99\n"
    config, _, con = _ingest(tmp_path, {"meter/d01.csv": _meter_day(1, 1.0), "weather/w.csv": weather})
    con.close()
    first = _snapshot(config)
    ingest.ingest(config)
    assert _snapshot(config) == first

    write_landing(tmp_path, {"meter/d02.csv": _meter_day(2, 2.0)})
    results = ingest.results_frame(ingest.ingest(config))
    assert results.filter(pl.col("status") != "unchanged")["source_file"].to_list() == [
        "landing/meter/d02.csv"
    ]
    second = _snapshot(config)
    added = [r for r in second["meter_read"] if r not in first["meter_read"]]
    assert len(added) == 24 and {r[-1] for r in added} == {"landing/meter/d02.csv"}
    assert set(first["meter_read"]) <= set(second["meter_read"])
    assert len(second["quarantine"]) == len(first["quarantine"]) + 1

    write_landing(tmp_path, {"meter/d02.csv": _meter_day(2, 3.0).replace("P1,bad,60,1\n", "")})
    ingest.ingest(config)
    third = _snapshot(config)
    d02 = [r for r in third["meter_read"] if r[-1] == "landing/meter/d02.csv"]
    assert len(d02) == 24 and {r[3] for r in d02} == {3.0}
    assert [r for r in third["meter_read"] if r[-1] != "landing/meter/d02.csv"] == first["meter_read"]
    assert third["quarantine"] == first["quarantine"]
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        _check_accounting(con)


def test_conflict_with_a_loaded_row_quarantines_both_and_is_released_when_fixed(tmp_path):
    """A later file disagreeing with a loaded interval quarantines both rows; fixing it reloads one."""
    config, _, con = _ingest(tmp_path, {"meter/a.csv": METER_HEAD + GOOD_METER})
    con.close()
    write_landing(tmp_path, {"meter/b.csv": METER_HEAD + GOOD_METER.replace("1.0", "1.7")})
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select count(*) from meter_read").fetchall() == [(0,)]
        assert con.execute("select source_file, reason from quarantine order by 1").fetchall() == [
            ("landing/meter/a.csv", "conflicting_duplicate"),
            ("landing/meter/b.csv", "conflicting_duplicate"),
        ]
        _check_accounting(con)
    # A third file agreeing with either side is not silently chosen either.
    write_landing(tmp_path, {"meter/c.csv": METER_HEAD + GOOD_METER})
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select count(*) from meter_read").fetchall() == [(0,)]
    # Correcting b releases the conflict: a and c are checked again and the value loads once.
    write_landing(tmp_path, {"meter/b.csv": METER_HEAD + GOOD_METER})
    results = ingest.results_frame(ingest.ingest(config))
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select kwh, source_file from meter_read").fetchall() == [
            (1.0, "landing/meter/b.csv")
        ]
        assert con.execute("select count(*) from quarantine").fetchall() == [(0,)]
        _check_accounting(con)
    assert results.filter(pl.col("folder") == "meter")["rows_duplicate"].sum() == 2


def test_a_file_gone_from_the_lake_is_reported_and_its_rows_stay(tmp_path):
    """A file that disappeared is listed as missing; the rows it loaded are kept."""
    config, _, con = _ingest(tmp_path, {"meter/d01.csv": _meter_day(1, 1.0)})
    con.close()
    (tmp_path / "landing/meter/d01.csv").unlink()
    results = ingest.results_frame(ingest.ingest(config))
    missing = results.filter(pl.col("status") == "missing").row(0, named=True)
    assert missing["source_file"] == "landing/meter/d01.csv" and missing["rows_loaded"] == 24
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select count(*) from meter_read").fetchall() == [(24,)]


# --- coverage -----------------------------------------------------------------------------


def test_utc_hour_is_the_hour_an_instant_falls_in_also_before_1970(tmp_path):
    """utc_hour (integer arithmetic on epoch microseconds) agrees with Python's own truncation."""
    instants = [
        dt.datetime(2026, 6, 1, 5, 0, tzinfo=dt.UTC),
        dt.datetime(2026, 6, 1, 5, 59, 59, 999999, tzinfo=dt.UTC),
        dt.datetime(2026, 11, 1, 6, 30, tzinfo=dt.UTC),
        dt.datetime(1970, 1, 1, 0, 0, tzinfo=dt.UTC),
        dt.datetime(1969, 12, 31, 23, 59, 59, 1, tzinfo=dt.UTC),
        dt.datetime(1901, 3, 4, 17, 45, tzinfo=dt.UTC),
    ]
    with store.warehouse(tmp_path / "w.duckdb") as con:
        store.run_sql(con, "schema")
        got = [con.execute("select utc_hour($t::timestamptz)", {"t": t}).fetchall()[0][0] for t in instants]
    assert got == [t.replace(minute=0, second=0, microsecond=0) for t in instants]


def test_coverage_reports_missing_intervals_per_premise_consistently_with_the_hourly_grid(tmp_path):
    """Coverage counts expected and present intervals, and its gap hours are the grid's short hours."""
    starts = [dt.datetime(2026, 6, 1, 0, tzinfo=dt.UTC) + dt.timedelta(minutes=15 * i) for i in range(96)]
    kept = [s for i, s in enumerate(starts) if not (20 <= i < 28 or i == 50)]
    meter = "premise_id,interval_start,interval_minutes,kwh\n" + "".join(
        f"P1,{s.isoformat()},15,0.25\n" for s in kept
    )
    premises = PREMISES + "    P2,America/Chicago,S1,TOU,24,20,north\n"
    config = lake_config(
        write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": premises, "meter/m.csv": meter})
    )
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path) as con:
        coverage = store.frame(con, "select * from coverage order by premise_id")
        store.build_table(con, "hourly", sql_params(Config()))
        short = con.execute(
            "select count(*) from hourly where premise_id = 'P1' and minutes_read < 60"
        ).fetchall()
    p1, p2 = coverage.rows(named=True)
    assert (p1["intervals_expected"], p1["intervals_present"]) == (96, 87)
    assert p1["coverage_pct"] == pytest.approx(100 * 87 / 96, abs=1e-3)
    # Hours 5 and 6 are empty, hour 12 lacks one quarter: three gap hours either way.
    assert p1["gap_hours"] == short[0][0] == 3
    assert (p2["intervals_present"], p2["coverage_pct"]) == (0, 0.0)


# --- random corruption never crashes ingest or loses a row from the accounting --------------


def _valid_meter_csv() -> bytes:
    rows = [f"P1,2026-06-01T{h:02d}:{m:02d}:00Z,15,0.{h % 9 + 1}" for h in range(6) for m in (0, 15, 30, 45)]
    return ("premise_id,interval_start,interval_minutes,kwh\n" + "\n".join(rows) + "\n").encode()


@st.composite
def corrupted(draw):
    lines = _valid_meter_csv().split(b"\n")[:-1]
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(lines) - 1))
        kind = draw(st.sampled_from(["drop_field", "garbage", "swap", "truncate"]))
        fields = lines[i].split(b",")
        if kind == "drop_field" and len(fields) > 1:
            del fields[draw(st.integers(0, len(fields) - 1))]
            lines[i] = b",".join(fields)
        elif kind == "garbage":
            at = draw(st.integers(0, len(lines[i])))
            lines[i] = lines[i][:at] + draw(st.binary(min_size=1, max_size=6)) + lines[i][at:]
        elif kind == "swap" and len(fields) > 1:
            a, b = draw(st.lists(st.integers(0, len(fields) - 1), min_size=2, max_size=2, unique=True))
            fields[a], fields[b] = fields[b], fields[a]
            lines[i] = b",".join(fields)
        elif kind == "truncate":
            lines[i] = lines[i][: draw(st.integers(0, len(lines[i])))]
    return b"\n".join(lines) + b"\n"


# The session's Prefect test server (tests/test_flow.py) runs threads that draw from the
# global random module; Hypothesis sees that as the strategy using it and warns.
@pytest.mark.filterwarnings("ignore:Do not use the `random` module inside strategies")
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=corrupted())
def test_random_corruption_never_crashes_and_never_loses_a_row(data):
    """Dropped fields, garbage bytes, swapped fields or cut lines: ingest ends and every row is counted."""
    with tempfile.TemporaryDirectory() as tmp:
        root = write_landing(Path(tmp), {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES})
        (root / "landing/meter").mkdir()
        (root / "landing/meter/m.csv").write_bytes(data)
        config = lake_config(root)
        results = ingest.results_frame(ingest.ingest(config))
        with store.warehouse(config.warehouse_path, read_only=True) as con:
            _check_accounting(con)
        meter = results.filter(pl.col("folder") == "meter").row(0, named=True)
        # Without quotes or carriage returns each non-empty line after the header is one record
        # (with a one-column header a blank line is a record too: an empty value).
        if b'"' not in data and b"\r" not in data and b"," in data.split(b"\n")[0]:
            lines = data.split(b"\n")[1:]
            assert meter["rows_read"] == sum(1 for line in lines if line.strip()), meter


def test_command_line_prints_per_file_counts_with_progress_and_exits_1_on_a_refused_file(tmp_path, capsys):
    """thermal-ledger ingest prints per-file counts, no progress off a terminal; exit 1 while one refused."""
    root = write_landing(
        tmp_path,
        {
            "tariffs/t.csv": TARIFF,
            "premises/p.csv": PREMISES,
            "meter/good.csv": METER_HEAD + GOOD_METER,
            "meter/short.csv": "premise_id,interval_start\nP1,2026-06-01T12:00:00Z\n",
        },
    )
    code = cli.main(["ingest", "--lake", str(root), "--out", str(root / "out")])
    out, err = capsys.readouterr()
    assert code == cli.EXIT_REFUSED
    assert "landing/meter/good.csv" in out and "refused: landing/meter/short.csv" in out
    assert err == ""
    assert cli.main(["ingest", "--lake", str(root), "--out", str(root / "out")]) == cli.EXIT_REFUSED
    (root / "landing/meter/short.csv").write_text(METER_HEAD + GOOD_METER.replace("12:00", "13:00"))
    assert cli.main(["ingest", "--lake", str(root), "--out", str(root / "out")]) == cli.EXIT_OK


def test_weather_conflict_across_files_quarantines_both_observations(tmp_path):
    """Two files giving one station and hour different temperatures leave neither loaded."""
    head = "station_id,observed_at,dry_bulb_c\n"
    config, _, con = _ingest(tmp_path, {"weather/a.csv": head + "S1,2026-06-01T12:00:00Z,30\n"})
    con.close()
    write_landing(
        tmp_path, {"weather/b.csv": head + "S1,2026-06-01T12:00:00Z,31\nS1,2026-06-01T13:00:00Z,31\n"}
    )
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select strftime(observed_at_utc, '%H') from weather_obs").fetchall() == [("13",)]
        assert con.execute(
            "select source_file, row_number, reason from quarantine order by 1"
        ).fetchall() == [
            ("landing/weather/a.csv", 1, "conflicting_duplicate"),
            ("landing/weather/b.csv", 1, "conflicting_duplicate"),
        ]
        _check_accounting(con)


def test_an_exact_duplicate_is_loaded_when_the_file_holding_its_copy_drops_the_row(tmp_path):
    """a.csv and b.csv carry the same readings (loaded once); when a.csv drops half, b's copies load."""
    rows = _meter_day(1, 1.0).replace("P1,bad,60,1\n", "")
    config, _, con = _ingest(tmp_path, {"meter/a.csv": rows, "meter/b.csv": rows})
    assert con.execute("select count(*) from meter_read").fetchall() == [(24,)]
    con.close()
    write_landing(tmp_path, {"meter/a.csv": "\n".join(rows.splitlines()[:13]) + "\n"})
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select count(*) from meter_read").fetchall() == [(24,)]
        by_file = dict(
            con.execute("select source_file, count(*) from meter_read group by 1 order by 1").fetchall()
        )
        assert by_file == {"landing/meter/a.csv": 12, "landing/meter/b.csv": 12}
        _check_accounting(con)


def test_hourly_reads_in_a_half_hour_offset_zone_load_and_keep_their_kwh(tmp_path):
    """Newfoundland (UTC-02:30 in July): 60-minute reads on the local hour load; UTC hours get two halves."""
    zone = zoneinfo.ZoneInfo("America/St_Johns")
    # The offset comes from the IANA tz database via zoneinfo, not from the code under test.
    assert dt.datetime(2026, 7, 1, 12, tzinfo=zone).utcoffset() == -dt.timedelta(hours=2, minutes=30)
    premises = PREMISES.replace("P1,America/Chicago", "P1,America/St_Johns")
    kwh = np.round(np.random.default_rng(8).uniform(0.2, 1.5, 24), 3)
    rows = [f"P1,2026-07-01T{h:02d}:00:00,60,{kwh[h]}" for h in range(24)]
    meter = "premise_id,interval_start,interval_minutes,kwh\n" + "\n".join(rows) + "\n"
    config = lake_config(
        write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": premises, "meter/m.csv": meter})
    )
    results = ingest.results_frame(ingest.ingest(config))
    assert results.filter(pl.col("folder") == "meter")["rows_loaded"].to_list() == [24]
    with store.warehouse(config.warehouse_path) as con:
        store.build_table(con, "hourly", sql_params(Config()))
        hours = con.execute("select hour_utc, kwh, minutes_read from hourly order by hour_utc").fetchall()
        coverage = con.execute("select partial_hours from coverage").fetchall()
    assert len(hours) == 25 and sum(h[1] for h in hours) == pytest.approx(kwh.sum())
    assert [h[2] for h in hours] == [30] + [60] * 23 + [30]
    assert hours[1][1] == pytest.approx((kwh[0] + kwh[1]) / 2)
    assert coverage == [(2,)]


# --- the landing folder itself ------------------------------------------------------------


def test_an_ingest_under_a_memory_limit_below_its_data_spills_and_loads_the_same_rows(tmp_path):
    """With DuckDB held to 48 MiB (one thread), below what a file of 556,800 reads needs at once
    (staged as text it alone takes 35 MiB, measured with duckdb_memory(), and its checked rows are
    built while it is held), the statements spill to disk instead of failing, and the tables and
    accounting are those of the same lake ingested with DuckDB's own limit (80 % of RAM)."""
    premises = [f"P{k:03d}" for k in range(200)]
    starts = pl.datetime_range(
        dt.datetime(2026, 6, 1, tzinfo=dt.UTC),
        dt.datetime(2026, 6, 29, 23, 45, tzinfo=dt.UTC),
        "15m",
        eager=True,
    ).dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    reads = pl.DataFrame({"premise_id": premises}).join(pl.DataFrame({"interval_start": starts}), how="cross")
    reads = reads.with_columns(
        interval_minutes=pl.lit(15),
        kwh=(pl.int_range(pl.len()) % 97 / 100).round(2),
        quality=pl.lit("actual"),
    )
    landing = {
        "tariffs/t.csv": TARIFF,
        "premises/p.csv": PREMISES.rstrip()
        + "\n"
        + "".join(f"{p},America/Chicago,S1,TOU,24,20,north\n" for p in premises),
    }
    tables = {}
    for limit in ("48MiB", ""):
        root = write_landing(tmp_path / (limit or "default"), landing)
        # One bad row, so quarantine is written under the limit too.
        meter = root / "landing" / "meter"
        meter.mkdir()
        reads.write_csv(meter / "m.csv")
        with (meter / "m.csv").open("a") as fh:
            fh.write("P001,2026-06-01T00:07:00Z,15,0.5,actual\n")
        config = lake_config(root, duckdb_memory_limit=limit, duckdb_threads=1)
        ingest.ingest(config)
        with duckdb.connect(str(config.warehouse_path), read_only=True) as con:
            _check_accounting(con)
            tables[limit] = {
                name: con.execute(f"select * exclude (source_file) from {name} order by all").fetchall()
                for name in ("meter_read", "premise")
            } | {"quarantine": con.execute("select row_number, reason from quarantine").fetchall()}
    assert len(tables["48MiB"]["meter_read"]) == reads.height
    assert tables["48MiB"]["quarantine"] == [(reads.height + 1, "interval_not_aligned")]
    assert tables["48MiB"] == tables[""]


def test_an_unknown_folder_is_refused_with_the_nearest_known_name_and_exits_1(tmp_path, capsys):
    """landing/meters next to landing/meter is reported as refused, suggesting meter/, and ingest exits 1."""
    root = write_landing(
        tmp_path,
        {
            "tariffs/t.csv": TARIFF,
            "premises/p.csv": PREMISES,
            "meter/m.csv": METER_HEAD + GOOD_METER,
            "meters/late.csv": METER_HEAD + GOOD_METER,
        },
    )
    results = ingest.results_frame(ingest.ingest(lake_config(root)))
    refused = results.filter(pl.col("status") == "refused").row(0, named=True)
    assert refused["source_file"] == "landing/meters"
    assert refused["message"] == "landing/meters: unknown folder, not read; did you mean meter/?"
    code = cli.main(["ingest", "--lake", str(root), "--out", str(tmp_path / "out")])
    assert code == cli.EXIT_REFUSED
    assert (
        "refused: landing/meters: unknown folder, not read; did you mean meter/?" in capsys.readouterr().out
    )


def test_a_lake_without_meter_files_is_one_line_and_exit_2(tmp_path, capsys):
    """Meter files only in landing/meters: exit 2 and one line naming landing/meter and the fix."""
    root = write_landing(
        tmp_path,
        {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES, "meters/m.csv": METER_HEAD + GOOD_METER},
    )
    with pytest.raises(ingest.NoMeterFiles):
        ingest.ingest(lake_config(root))
    code = cli.main(["ingest", "--lake", str(root), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == cli.EXIT_USAGE
    assert err.count("\n") == 1 and "Traceback" not in err
    assert str(root / "landing" / "meter") in err and "landing/meters looks like it: rename it meter/" in err


def test_a_lake_pruned_of_meter_files_after_loading_them_still_ingests(tmp_path):
    """Meter files already loaded by an earlier run count: a lake pruned of them is not an error."""
    config, _, con = _ingest(tmp_path, {})
    con.close()
    (tmp_path / "landing/meter/m.csv").unlink()
    results = ingest.results_frame(ingest.ingest(config))
    assert results.filter(pl.col("folder") == "meter")["status"].to_list() == ["missing"]


def test_a_missing_lake_folder_is_one_line_and_exit_2(tmp_path, capsys):
    """--lake naming a folder that does not exist gives exit 2 and one line naming it."""
    missing = tmp_path / "no-such-lake"
    code = cli.main(["ingest", "--lake", str(missing), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == cli.EXIT_USAGE
    assert len(err.splitlines()) == 1
    assert err.startswith(f"thermal-ledger: --lake {missing}: no landing/ folder")


def test_a_changed_safety_band_reads_unchanged_files_again(tmp_path):
    """A premise loaded under the default band is quarantined once the band changes, its file unchanged."""
    from pipeline import stages
    from pipeline.ledger import Run

    config, _, con = _ingest(tmp_path, {})
    con.close()
    stages.ingest(config, Run(config))
    narrow = lake_config(tmp_path, cool_band_c=[25.0, 30.0])
    summary = stages.ingest(narrow, Run(narrow))
    assert "unchanged" not in summary.files["status"].to_list()
    with store.warehouse(config.warehouse_path, read_only=True) as again:
        assert again.execute("select count(*) from premise").fetchall()[0][0] == 0
        reasons = again.execute("select reason from quarantine where source_file like '%p.csv'").fetchall()
    assert reasons == [("setpoint_out_of_range",)]
