"""Episodes and decision steps built from a small inline lake with hand-computed answers."""

from __future__ import annotations

import pytest

from pipeline import ingest, store
from pipeline.episodes import build, load_steps
from tests.conftest import lake_config, write_landing

# One Tuesday in Chicago (UTC-5 in June): away 07:40-12:20 local, so hours 08-11 are
# fully away (4 steps), 12 is the return hour and 13 the recovery hour.
DAY = "2026-06-02"
KWH = {8: 1.0, 9: 1.5, 10: 2.0, 11: 2.5, 12: 3.0, 13: 2.0}
OUTDOOR = {8: 20.0, 9: 25.0, 10: 30.0, 11: 33.0}


def _utc(local_hour: int, minute: int = 0) -> str:
    return f"{DAY}T{local_hour + 5:02d}:{minute:02d}:00Z"


def _event(ts, cool_sp, occupied, mode="cool", heat_sp=20):
    return f"P1,{ts},{mode},{cool_sp},{heat_sp},{occupied}\n"


def _lake(tmp_path, thermostat_rows, kwh=KWH, meter_hours=range(0, 19), extra_meter="", **overrides):
    meter = (
        "premise_id,interval_start,interval_minutes,kwh\n"
        + "".join(f"P1,{_utc(h)},60,{kwh.get(h, 1.0)}\n" for h in meter_hours)
        + extra_meter
    )
    weather = "station_id,observed_at,dry_bulb_c\n" + "".join(
        f"S1,{_utc(h)},{OUTDOOR.get(h, 30.0)}\n" for h in range(0, 19)
    )
    files = {
        "tariffs/t.csv": """
            rate_plan_id,months,day_type,start_hour,end_hour,price_per_kwh
            TOU,1-12,weekday,0,10,0.10
            TOU,1-12,weekday,10,12,0.30
            TOU,1-12,weekday,12,24,0.10
            TOU,1-12,weekend,0,24,0.10
        """,
        "premises/p.csv": """
            premise_id,timezone,weather_station_id,rate_plan_id,comfort_cool_c,comfort_heat_c,cohort
            P1,America/Chicago,S1,TOU,24,20,north
        """,
        "meter/m.csv": meter,
        "weather/w.csv": weather,
        "thermostat/t.csv": "premise_id,changed_at,mode,cool_setpoint_c,heat_setpoint_c,occupied\n"
        + "".join(_event(*row) for row in thermostat_rows),
    }
    # Hourly decisions and one-degree actions unless a test asks otherwise: the hand-worked
    # numbers below are easiest to follow hour by hour.
    overrides = {"decision_points": "fixed", "actions": [-1, 0, 1], **overrides}
    config = lake_config(write_landing(tmp_path, files), **overrides)
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path) as con:
        counts = build(con, config)
        steps = load_steps(con)
        episodes = store.frame(con, "select * from episode order by start_utc")
    return config, counts, steps, episodes


WORKED = [
    (_utc(0), 24, 1),
    (_utc(7, 40), 24, 0),
    (_utc(8), 25, ""),
    (_utc(9), 26, ""),
    (_utc(11), 25, ""),
    (_utc(12, 20), 24, 1),
]


def test_worked_example_gives_hand_computed_states_actions_and_return(tmp_path):
    """A 4-step episode with known kWh, prices and setpoints gives the states, actions and return by hand."""
    config, counts, steps, _ = _lake(tmp_path, WORKED)
    assert counts.episodes_used == 1 and steps.height == 4
    assert steps["local_hour"].to_list() == [8, 9, 10, 11]
    assert steps["offset_before_c"].to_list() == [0, 1, 2, 2]
    assert steps["action"].to_list() == [1, 1, 0, -1]
    assert steps["steps_left"].to_list() == [4, 3, 2, 1]
    assert steps["price_tier"].to_list() == [0, 0, 1, 1]
    # Degrees above 18.3 °C: 1.7, 6.7, 11.7, 14.7 -> bins 0, 1, 2, 3 with edges 4, 8, 12.
    decoded = config.state.decode(steps["state_key"].to_numpy())
    assert decoded["degree_bin"].tolist() == [0, 1, 2, 3]
    # Costs: 1.0*0.10, 1.5*0.10, 2.0*0.30, 2.5*0.30 + recovery (3.0 + 2.0)*0.10
    # + comfort penalty 0.10 USD per °C-hour * 1 °C still set back * 1 recovery hour.
    assert steps["reward"].to_list() == pytest.approx([-0.10, -0.15, -0.60, -(0.75 + 0.50 + 0.10)])
    assert steps["reward"].sum() == pytest.approx(-2.20)


def test_step_kwh_equals_meter_kwh_over_the_episode_window(tmp_path):
    """Conservation: step kWh plus recovery kWh equals the meter's kWh over the window."""
    _, _, steps, episodes = _lake(tmp_path, WORKED)
    window = sum(KWH.values())
    assert steps["kwh"].sum() + steps["recovery_kwh"].sum() == pytest.approx(window)
    assert episodes["excluded_reason"].to_list() == [None]


def test_step_keys_are_unique_and_contiguous(tmp_path):
    """One row per (episode, step); steps of an episode run 0..n-1 without holes."""
    _, _, steps, _ = _lake(tmp_path, WORKED)
    assert steps.select("episode_id", "t").is_unique().all()
    per_episode = steps.group_by("episode_id").agg(n=steps["t"].len(), top=steps["t"].max())
    assert (per_episode["top"] + 1 == per_episode["n"]).all()


def test_episode_touching_a_meter_gap_is_excluded_with_its_reason(tmp_path):
    """A missing meter hour inside the window excludes the episode as a data gap."""
    hours = [h for h in range(0, 19) if h != 10]
    _, counts, steps, episodes = _lake(tmp_path, WORKED, meter_hours=hours)
    assert steps.height == 0 and counts.excluded == {"data_gap": 1}
    assert episodes["excluded_reason"].to_list() == ["data_gap"]


def test_short_absence_is_excluded_as_too_short(tmp_path):
    """Two fully-away hours are below the 3-hour minimum."""
    rows = [(_utc(0), 24, 1), (_utc(8, 40), 24, 0), (_utc(11, 20), 24, 1)]
    _, counts, _, _ = _lake(tmp_path, rows)
    assert counts.excluded == {"too_short": 1}


def test_mode_change_inside_episode_excludes_it(tmp_path):
    """Switching the system off while away excludes the episode."""
    rows = [*WORKED[:3], (_utc(9, 30), 26, "")]
    rows = [(ts, sp, occ) for ts, sp, occ in rows]
    config, _, _, _ = _lake(tmp_path, WORKED)
    thermostat = tmp_path / "landing/thermostat/t.csv"
    thermostat.write_text(thermostat.read_text().replace(f"P1,{_utc(9)},cool", f"P1,{_utc(9)},off"))
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path) as con:
        counts = build(con, config)
    assert counts.excluded == {"mode_change": 1}


def test_anchored_decisions_fall_at_departure_price_rise_and_last_hour(tmp_path):
    """Anchored: decisions at 08 (departure), 10 (tier rises) and 11 (an hour before return)."""
    _, counts, steps, _ = _lake(tmp_path, WORKED, decision_points="anchored", actions=[-2, -1, 0, 1, 2])
    assert steps["local_hour"].to_list() == [8, 10, 11]
    assert steps["step_hours"].to_list() == [2, 1, 1]
    assert steps["steps_left"].to_list() == [3, 2, 1]
    assert steps["action"].to_list() == [2, 0, -1]
    assert steps["reward"].to_list() == pytest.approx([-0.25, -0.60, -1.35])
    assert counts.mean_decisions == 3


def test_recovery_window_length_moves_energy_and_penalty_to_the_last_step(tmp_path):
    """With two recovery hours, hours 12-14 are charged to the last step and the penalty doubles."""
    _, _, steps, _ = _lake(tmp_path, WORKED, recovery_hours=2)
    last = steps.row(-1, named=True)
    assert last["recovery_kwh"] == pytest.approx(3.0 + 2.0 + 1.0)
    assert last["comfort_penalty_usd"] == pytest.approx(0.10 * 1 * 2)


def test_clipped_actions_are_counted(tmp_path):
    """A 2 °C move in one hour with actions of at most 1 °C is clipped and counted."""
    rows = [(_utc(0), 24, 1), (_utc(7, 40), 24, 0), (_utc(8), 26, ""), (_utc(12, 20), 24, 1)]
    _, counts, steps, _ = _lake(tmp_path, rows)
    assert steps["action"].to_list()[0] == 1 and steps["change_c"].to_list()[0] == 2
    assert counts.clipped_actions == 1


def test_heating_offsets_and_actions_are_in_the_setback_direction(tmp_path):
    """Lowering a heating setpoint is a positive setback, as raising a cooling one is."""
    rows = [
        (_utc(0), 26, 1, "heat", 20),
        (_utc(7, 40), 26, 0, "heat", 20),
        (_utc(8), 26, "", "heat", 19),
        (_utc(9), 26, "", "heat", 18),
        (_utc(11), 26, "", "heat", 19),
        (_utc(12, 20), 26, 1, "heat", 20),
    ]
    _, _, steps, _ = _lake(tmp_path, rows)
    assert steps["mode"].unique().to_list() == ["heat"]
    assert steps["offset_before_c"].to_list() == [0, 1, 2, 2]
    assert steps["action"].to_list() == [1, 1, 0, -1]


def test_setback_hold_stands_in_for_a_missing_occupancy_flag(tmp_path):
    """Without an occupancy flag, hours whose setback is in force at their end form the episode (opt-in)."""
    rows = [(_utc(0), 24, ""), (_utc(8), 26, ""), (_utc(12, 20), 24, "")]
    _, counts, steps, episodes = _lake(tmp_path, rows, presence_sources=["occupancy_flag", "setback_hold"])
    assert episodes["presence_source"].to_list() == ["setback_hold"]
    assert steps["local_hour"].to_list() == [8, 9, 10, 11]
    assert counts.excluded == {}


def _saturday_meter(kwh: float) -> str:
    return "".join(f"P1,2026-06-06T{h + 5:02d}:00:00Z,60,{kwh}\n" for h in range(0, 19))


def test_schedule_fallback_is_used_when_the_meter_agrees(tmp_path):
    """No flag, no setback: the weekday schedule is used when its hours draw less than on Saturday."""
    rows = [(_utc(0), 24, "")]
    _, _, steps, episodes = _lake(
        tmp_path, rows, extra_meter=_saturday_meter(3.0), schedule_away_hours=[8, 12]
    )
    tuesday = episodes.filter(episodes["start_local"].dt.day() == 2)
    assert tuesday["presence_source"].to_list() == ["schedule"]
    assert tuesday["excluded_reason"].to_list() == [None]
    assert steps["local_hour"].to_list() == [8, 9, 10, 11]


def test_schedule_fallback_is_refused_when_the_load_does_not_drop(tmp_path):
    """The same schedule is implausible when weekday load in it is not below Saturday's."""
    rows = [(_utc(0), 24, "")]
    _, _, steps, episodes = _lake(
        tmp_path, rows, extra_meter=_saturday_meter(1.0), schedule_away_hours=[8, 12]
    )
    tuesday = episodes.filter(episodes["start_local"].dt.day() == 2)
    assert tuesday["excluded_reason"].to_list() == ["implausible_schedule"]
    assert steps.height == 0


def test_untrusted_evidence_of_absence_is_excluded_with_its_reason(tmp_path):
    """By default a setback-hold episode is listed but not used."""
    rows = [(_utc(0), 24, ""), (_utc(8), 26, ""), (_utc(12, 20), 24, "")]
    _, counts, steps, _ = _lake(tmp_path, rows)
    assert steps.height == 0 and counts.excluded == {"presence_source_not_used": 1}
