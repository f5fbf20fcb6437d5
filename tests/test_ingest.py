"""Ingest: every landing row is loaded, quarantined with a reason, or counted as a duplicate."""

from __future__ import annotations

import duckdb
import pytest

from pipeline import ingest, store
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
        write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES, **files})
    )
    results = ingest.results_frame(ingest.ingest(config))
    con = duckdb.connect(str(config.warehouse_path), read_only=True)
    return config, results, con


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
