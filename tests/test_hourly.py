"""The hourly grid holds its grain (one row per premise and UTC hour) and every metered kWh.

Checked on small inline lakes, one of them with a tariff whose rows overlap, and end to end on
sample_lake/.
"""

from __future__ import annotations

import json
from pathlib import Path

import duckdb
import pytest

from pipeline import ingest, store
from pipeline.config import Config
from pipeline.episodes import build, sql_params
from tests.conftest import lake_config, write_landing
from tests.grain import assert_grain

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"

# One Tuesday in Chicago (UTC-5 in June), metered every hour of the local day.
DAY = "2026-06-02"
PREMISES = """
    premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c,cohort
    P1,America/Chicago,S1,TOU,24,20,north
"""
TOU = """
    rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
    TOU,1-12,weekday,0,14,0.09
    TOU,1-12,weekday,14,19,0.32
    TOU,1-12,weekday,19,24,0.09
    TOU,1-12,weekend,0,24,0.09
"""


def _utc(local_hour: int, minute: int = 0) -> str:
    # Local hour 19 is 00 UTC of the next day.
    day = int(DAY[-2:]) + (local_hour + 5) // 24
    return f"{DAY[:-2]}{day:02d}T{(local_hour + 5) % 24:02d}:{minute:02d}:00Z"


def _meter(hours=range(24), kwh: float = 1.0) -> str:
    return "premise_id,interval_start,interval_minutes,kwh\n" + "".join(
        f"P1,{_utc(h)},60,{kwh}\n" for h in hours
    )


def _warehouse(tmp_path, files: dict[str, str], **overrides) -> tuple[Config, duckdb.DuckDBPyConnection]:
    files = {"premises/p.csv": PREMISES, "meter/m.csv": _meter(), **files}
    config = lake_config(write_landing(tmp_path, files), **overrides)
    ingest.ingest(config)
    con = duckdb.connect(str(config.warehouse_path))
    store.execute(con, "set TimeZone = 'UTC'")
    return config, con


def _quarantine(con) -> dict[int, str]:
    return dict(
        store.execute(
            con, "select row_number, reason from quarantine where source_file like '%tariffs%' order by 1"
        )
    )


def _kwh(con, table: str) -> float:
    return store.execute(con, f"select sum(kwh) from {table}")[0][0]


def test_overlapping_tariff_row_is_quarantined_and_hourly_keeps_its_grain_and_kwh(tmp_path):
    """An extra row overlapping the plan's own is quarantined; 24 metered hours stay 24 rows and 24 kWh."""
    overlapping = TOU + "    TOU,6-6,weekday,12,18,0.50\n"
    config, con = _warehouse(tmp_path, {"tariffs/t.csv": overlapping, "meter/m.csv": _meter()})
    # Rows 1 (0-14) and 2 (14-19) share June weekday hours with row 5 (12-18); row 3 (19-24) is
    # all that is left of the weekday plan, so it leaves hours 0-19 unpriced.
    assert _quarantine(con) == {
        1: "tariff_overlap",
        2: "tariff_overlap",
        3: "tariff_gap",
        5: "tariff_overlap",
    }
    store.build_table(con, "hourly", sql_params(config))
    assert_grain(con, "hourly", ["premise_id", "hour_utc"])
    assert store.execute(con, "select count(*) from hourly") == [(24,)]
    assert _kwh(con, "hourly") == pytest.approx(_kwh(con, "meter_read")) == pytest.approx(24.0)
    # The weekday hours have no price now: null, never a guess.
    assert store.execute(con, "select count(*) from hourly where price_usd_per_kwh is null") == [(24,)]
    read, loaded, quarantined, duplicate, by_reason = store.execute(
        con,
        "select rows_read, rows_loaded, rows_quarantined, rows_duplicate, quarantined_by_reason"
        " from ingest_log where folder = 'tariffs'",
    )[0]
    assert (read, loaded, quarantined, duplicate) == (5, 1, 4, 0)
    assert json.loads(by_reason) == {"tariff_gap": 1, "tariff_overlap": 3}


def test_a_plan_with_an_hour_unpriced_is_quarantined_as_a_gap(tmp_path):
    """Weekday rows that leave 14-15 unpriced are quarantined; the weekend rows still load."""
    gappy = """
        rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
        TOU,1-12,weekday,0,14,0.09
        TOU,1-12,weekday,15,24,0.09
        TOU,1-12,weekend,0,24,0.09
    """
    _, con = _warehouse(tmp_path, {"tariffs/t.csv": gappy})
    assert _quarantine(con) == {1: "tariff_gap", 2: "tariff_gap"}
    assert store.execute(con, "select day_type from tariff_rate") == [("weekend",)]


def test_a_plan_tiled_over_wrapping_months_loads_whole(tmp_path):
    """Rows for 10-3 (wrapping the year) and 4-9 tile every month without a gap or overlap, so all load."""
    seasons = """
        rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
        TOU,10-3,weekday,0,24,0.09
        TOU,4-9,weekday,0,12,0.09
        TOU,4-9,weekday,12,24,0.30
        TOU,1-12,weekend,0,24,0.09
    """
    _, con = _warehouse(tmp_path, {"tariffs/t.csv": seasons})
    assert _quarantine(con) == {}
    assert store.execute(con, "select count(*) from tariff_rate") == [(4,)]


def test_a_second_file_pricing_a_loaded_plan_again_is_quarantined_not_doubled(tmp_path):
    """Another file's row over a loaded plan's hours is an overlap; a copy of a loaded row a duplicate."""
    other = """
        rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
        TOU,1-12,weekend,0,24,0.09
        TOU,1-12,weekday,0,24,0.12
    """
    config, con = _warehouse(
        tmp_path, {"tariffs/t.csv": TOU, "tariffs/u.csv": other, "meter/m.csv": _meter()}
    )
    assert store.execute(con, "select source_file, row_number, reason from quarantine order by all") == [
        ("landing/tariffs/u.csv", 2, "tariff_overlap")
    ]
    assert store.execute(
        con,
        "select rows_read, rows_loaded, rows_quarantined, rows_duplicate from ingest_log"
        " where source_file like '%u.csv'",
    ) == [(2, 0, 1, 1)]
    store.build_table(con, "hourly", sql_params(config))
    assert_grain(con, "hourly", ["premise_id", "hour_utc"])
    assert _kwh(con, "hourly") == pytest.approx(24.0)


def test_episode_over_unpriced_hours_is_excluded_as_missing_price(tmp_path):
    """An away episode over hours whose price was lost to an overlap is excluded as missing_price."""
    thermostat = "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c,occupied\n" + "".join(
        f"P1,{ts},cool,{sp},20,{occ}\n"
        for ts, sp, occ in ((_utc(0), 24, 1), (_utc(7, 40), 26, 0), (_utc(12, 20), 24, 1))
    )
    weather = "station_id,observed_at,dry_bulb_c\n" + "".join(f"S1,{_utc(h)},30\n" for h in range(24))
    files = {
        "tariffs/t.csv": TOU + "    TOU,6-6,weekday,12,18,0.50\n",
        "meter/m.csv": _meter(),
        "weather/w.csv": weather,
        "thermostat/t.csv": thermostat,
    }
    config, con = _warehouse(tmp_path, files, decision_points="fixed", actions=[-1, 0, 1])
    build(con, config)
    assert store.execute(con, "select n_away_hours, excluded_reason from episode") == [(4, "missing_price")]
    assert store.execute(con, "select count(*) from step") == [(0,)]


@pytest.fixture(scope="module")
def sample_warehouse(tmp_path_factory):
    """sample_lake/ ingested and built into episodes in a temporary folder."""
    out = tmp_path_factory.mktemp("sample")
    config = lake_config(SAMPLE_LAKE, out=str(out))
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path) as con:
        build(con, config)
    con = duckdb.connect(str(config.warehouse_path), read_only=True)
    yield con
    con.close()


def test_sample_lake_hourly_is_one_row_per_premise_and_utc_hour(sample_warehouse):
    """hourly's key (premise_id, hour_utc) is unique and not null on the sample lake."""
    assert_grain(sample_warehouse, "hourly", ["premise_id", "hour_utc"])


def test_sample_lake_hourly_carries_every_metered_kwh(sample_warehouse):
    """Hourly kWh sums to meter_read kWh on the sample lake (nothing fans out or drops)."""
    assert _kwh(sample_warehouse, "hourly") == pytest.approx(_kwh(sample_warehouse, "meter_read"), rel=1e-12)


def test_sample_lake_episode_and_step_keys_are_unique_and_not_null(sample_warehouse):
    """episode is one row per episode_id and step one row per (episode_id, t) on the sample lake."""
    assert_grain(sample_warehouse, "episode", ["episode_id"])
    assert_grain(sample_warehouse, "step", ["episode_id", "t"])


def test_assert_grain_names_the_table_and_a_repeated_key(sample_warehouse):
    """The grain helper fails on a repeated key and on a null key, naming the table and the key."""
    import polars as pl

    with pytest.raises(
        AssertionError, match=r"frame: 1 keys \(k\) on more than one row, e\.g\. \(1,\) on 2 rows"
    ):
        assert_grain(pl.DataFrame({"k": [1, 1, 2]}), None, ["k"])
    with pytest.raises(AssertionError, match=r"hourly: \d+ keys \(premise_id\) on more than one row"):
        assert_grain(sample_warehouse, "hourly", ["premise_id"])
    with pytest.raises(AssertionError, match="null key"):
        assert_grain(pl.DataFrame({"k": [1, None]}), None, ["k"])


def test_the_utc_hour_macro_equals_duckdbs_date_trunc_in_utc():
    """utc_hour (microsecond arithmetic) cuts 200,000 random instants from 1950 to 2076 as date_trunc does."""
    con = duckdb.connect()
    store.execute(con, "set TimeZone = 'UTC'")
    store.execute(con, store.sql_text("schema"))
    differing = store.execute(
        con,
        "select count(*) filter (where utc_hour(t) <> date_trunc('hour', t)), count(*) from ("
        " select timestamptz '1950-03-01 00:00:00+00' + to_microseconds((random() * 4e15)::bigint) as t"
        " from range(200000))",
    )[0]
    assert differing == (0, 200000)
