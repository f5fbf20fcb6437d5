"""Setpoint plans: hand-computed plans, the safety band and comfort limits, weather bands, the ledger."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeline.config import Config
from pipeline.features import StateSpace
from pipeline.policies import SetbackRule
from pipeline.rules import Candidate
from pipeline.schedule import COLUMNS, ScheduleError, assignments_for, setpoint_plans
from tests.grain import assert_grain

# The sample lake's TOU-SUMMER weekday tiers (sample_lake/README.md): 0 before 11 and from 22,
# 1 from 11 to 14 and 19 to 22, 2 (peak) from 14 to 19.
TOU_WEEKDAY = [0] * 11 + [1] * 3 + [2] * 5 + [1] * 3 + [0] * 2


def _tiers(premise: str = "P1") -> pl.DataFrame:
    return pl.DataFrame(
        {"premise_id": premise, "day_type": "weekday", "local_hour": range(24), "price_tier": TOU_WEEKDAY}
    )


def _one_premise(
    mode: str = "cool", cool: float = 24.0, heat: float = 20.0, policies=("setback-2",)
) -> pl.DataFrame:
    return pl.DataFrame(
        {
            "premise_id": "P1",
            "policy_name": list(policies),
            "mode": mode,
            "comfort_cool_c": cool,
            "comfort_heat_c": heat,
            "rate_plan_id": "TOU-SUMMER",
        }
    )


# Away on weekdays from 08:00 for 9 hours (08..16, back at 17); no absence seen on weekends.
ABSENCE = pl.DataFrame(
    {"premise_id": ["P1"], "mode": ["cool"], "day_type": ["weekday"], "depart_hour": [8], "away_hours": [9]}
)


def _tables(config: Config, mode: str = "cool", **rules: SetbackRule) -> dict[tuple[str, str], np.ndarray]:
    return {
        (name, mode): rule.table(config.state, config.actions, config.target_epsilon)
        for name, rule in rules.items()
    }


def _weekday(plan: pl.DataFrame, policy: str) -> list[float]:
    return (
        plan.filter((pl.col("policy_name") == policy) & (pl.col("day_type") == "weekday"))
        .sort("hour")["setpoint_c"]
        .to_list()
    )


def test_a_pure_setback_plan_matches_the_hand_computed_one():
    """setback-2 and setback-2-early on comfort 24 °C, away 08..16 on TOU weekdays, anchored decisions.

    By hand: decisions at 08 (departure, 4 left), 11 (tier 0 -> 1, 3 left), 14 (1 -> 2, 2 left)
    and 16 (one hour before the 17:00 return, 1 left). With actions -2..2 one decision restores
    2 °C, so setback-2 aims at min(2, (left - 1) * 2): 2, 2, 2, 0; setback-2-early (lead 1) at
    min(2, (left - 2) * 2): 2, 2, 0, 0. Home hours keep comfort.
    """
    config = Config()
    tables = _tables(
        config,
        **{"setback-2": SetbackRule("s", depth_c=2), "setback-2-early": SetbackRule("e", 2, lead_steps=1)},
    )
    plan = setpoint_plans(
        _one_premise(policies=("setback-2", "setback-2-early")), ABSENCE, _tiers(), tables, config
    )
    assert plan.columns == COLUMNS
    home = [24.0] * 8
    assert _weekday(plan, "setback-2") == home + [26.0] * 8 + [24.0] + [24.0] * 7
    assert _weekday(plan, "setback-2-early") == home + [26.0] * 6 + [24.0] * 3 + [24.0] * 7
    weekday = plan.filter((pl.col("policy_name") == "setback-2") & (pl.col("day_type") == "weekday")).sort(
        "hour"
    )
    assert weekday["occupied"].to_list() == [True] * 8 + [False] * 9 + [True] * 7
    assert weekday["price_tier"].to_list() == TOU_WEEKDAY
    assert weekday["offset_c"].to_list() == [0.0] * 8 + [2.0] * 8 + [0.0] * 8
    weekend = plan.filter(pl.col("day_type") == "weekend")
    assert weekend.height == 48 and (weekend["setpoint_c"] == 24.0).all() and weekend["occupied"].all()
    # No policy here reads the weather: one plan for any outdoor band.
    assert plan["outdoor_band"].is_null().all() and plan["outdoor_from_c"].is_null().all()


def test_fixed_decision_points_restore_at_the_last_hour():
    """Every 3 hours from 08 (08, 11, 14; 3, 2, 1 left) with actions -1..1: aims 1, 1, 0 for setback-1."""
    config = Config(decision_points="fixed", step_hours=3, actions=(-1, 0, 1))
    tables = _tables(config, **{"setback-1": SetbackRule("s", depth_c=1)})
    absence = ABSENCE.with_columns(pl.lit(7).alias("away_hours"))  # 08..14
    plan = setpoint_plans(_one_premise(policies=("setback-1",)), absence, _tiers(), tables, config)
    assert _weekday(plan, "setback-1") == [24.0] * 8 + [25.0] * 6 + [24.0] + [24.0] * 9


def test_setpoints_are_clipped_to_the_safety_band_after_every_decision():
    """Heating at comfort 14 °C, band 13..23: a 2 °C setback stops at 13 °C (offset 1 in force), and the
    next decision starts from there."""
    config = Config()
    tables = _tables(config, mode="heat", **{"setback-2": SetbackRule("s", depth_c=2)})
    absence = ABSENCE.with_columns(pl.lit("heat").alias("mode"))
    plan = setpoint_plans(_one_premise(mode="heat", cool=24.0, heat=14.0), absence, _tiers(), tables, config)
    assert _weekday(plan, "setback-2") == [14.0] * 8 + [13.0] * 8 + [14.0] + [14.0] * 7
    offsets = plan.filter(pl.col("day_type") == "weekday").sort("hour")["offset_c"].to_list()
    assert offsets[8:16] == [1.0] * 8


def test_an_absence_past_midnight_wraps_onto_the_early_hours():
    """Away from 20:00 for 8 hours: hours 20..23 and 00..03 are away, in the same day type's plan."""
    config = Config()
    tables = _tables(config, **{"setback-2": SetbackRule("s", depth_c=2)})
    absence = ABSENCE.with_columns(pl.lit(20).alias("depart_hour"), pl.lit(8).alias("away_hours"))
    plan = setpoint_plans(_one_premise(), absence, _tiers(), tables, config)
    weekday = plan.filter(pl.col("day_type") == "weekday").sort("hour")
    assert weekday["occupied"].to_list() == [False] * 4 + [True] * 16 + [False] * 4


def test_a_plan_that_depends_on_the_weather_is_given_per_outdoor_band():
    """A policy that sets back only in the hottest degree bin gets one plan per band, with its range."""
    config = Config()
    space = config.state
    f = space.decode(np.arange(space.n_states))
    target = np.where(f["degree_bin"] == 3, np.minimum(2, (f["steps_left"] - 1) * 2), 0)
    chosen = np.clip(target - f["offset"], -2, 2)
    table = np.zeros((space.n_states, 5))
    table[np.arange(space.n_states), chosen + 2] = 1.0
    plan = setpoint_plans(
        _one_premise(policies=("hot",)), ABSENCE, _tiers(), {("hot", "cool"): table}, config
    )
    bands = (
        plan.filter(pl.col("day_type") == "weekday")
        .group_by("outdoor_band")
        .agg(pl.col("setpoint_c").max(), pl.col("outdoor_from_c").first(), pl.col("outdoor_to_c").first())
    )
    rows = {r["outdoor_band"]: r for r in bands.iter_rows(named=True)}
    assert set(rows) == {0, 1, 2, 3}
    assert [rows[b]["setpoint_c"] for b in range(4)] == [24.0, 24.0, 24.0, 26.0]
    # Degree bins above the 18.3 °C base (65 °F, common practice): <4, 4-8, 8-12, >=12 °C.
    assert rows[0]["outdoor_from_c"] is None and rows[0]["outdoor_to_c"] == pytest.approx(22.3)
    assert rows[3]["outdoor_from_c"] == pytest.approx(30.3) and rows[3]["outdoor_to_c"] is None
    assert_schedule_grain(plan)


def assert_schedule_grain(plan: pl.DataFrame) -> None:
    """Keys unique and not null (tests/grain.py); a plan for any weather has a null band, keyed -1 here."""
    keyed = plan.with_columns(pl.col("outdoor_band").fill_null(-1))
    assert_grain(keyed, None, ["premise_id", "policy_name", "mode", "day_type", "outdoor_band", "hour"])


def test_a_premise_whose_comfort_lies_outside_its_band_is_refused():
    """No schedule can keep both the band and comfort then; the message names the premise (ingest refuses
    such premises, so this guards the pure function)."""
    config = Config()
    tables = _tables(config, **{"setback-2": SetbackRule("s", depth_c=2)})
    with pytest.raises(ScheduleError, match=r"^premise P1: comfort 20.0 .. 21.0 °C is not inside the safety"):
        setpoint_plans(_one_premise(cool=21.0), ABSENCE, _tiers(), tables, config)


def test_a_policy_without_a_table_is_named():
    config = Config()
    with pytest.raises(ScheduleError, match="^premise P1: no table for policy 'setback-2' in mode cool$"):
        setpoint_plans(_one_premise(), ABSENCE, _tiers(), {}, config)


def test_assignments_follow_the_recommendation_or_every_applicable_candidate():
    """'send' rows give their policy, 'keep current' none; else every premise x applicable rule."""
    recommendation = pl.DataFrame(
        {
            "premise_id": ["A", "B", "C"],
            "policy": ["setback-2", None, "setback-1"],
            "decision": ["send", "keep current", "send"],
            "reason": [None, "bound not above zero", None],
        }
    )
    premises = pl.DataFrame({"premise_id": ["A", "B", "C"], "cohort": ["n", "n", "s"], "rate_plan_id": "TOU"})
    sent = assignments_for(recommendation, (), premises)
    assert sorted(sent.iter_rows()) == [("A", "setback-2"), ("C", "setback-1")]
    table = np.ones((1, 1))
    rules = (Candidate("all", "setback", table), Candidate("south", "setback", table, cohorts=("s",)))
    every = assignments_for(None, rules, premises)
    assert sorted(every.iter_rows()) == [("A", "all"), ("B", "all"), ("C", "all"), ("C", "south")]


# ---- the property: inside the band always, inside comfort while home ----------------------------


@st.composite
def _cases(draw):
    n = draw(st.integers(1, 6))
    cool_low = draw(st.integers(18, 26))
    cool_band = (float(cool_low), float(cool_low + draw(st.integers(1, 8))))
    heat_low = draw(st.integers(8, cool_low))
    heat_band = (float(heat_low), float(heat_low + draw(st.integers(1, 10))))
    half = st.integers(0, 20).map(lambda k: k / 2)
    premises = []
    for i in range(n):
        cool = min(cool_band[0] + draw(half), cool_band[1])
        heat_high = min(heat_band[1], cool)
        heat = min(heat_band[0] + draw(half), heat_high)
        premises.append((f"P{i}", draw(st.sampled_from(["cool", "heat"])), cool, heat))
    absences = [
        (p, mode, day, draw(st.integers(0, 23)), draw(st.integers(1, 24)))
        for p, mode, _, _ in premises
        for day in ("weekday", "weekend")
        if draw(st.booleans())
    ]
    actions = draw(st.sampled_from([(-1, 0, 1), (-2, -1, 0, 1, 2), (-3, 0, 2)]))
    space = StateSpace(
        offset_min=-draw(st.integers(0, 3)),
        offset_max=draw(st.integers(0, 5)),
        steps_left_cap=draw(st.integers(1, 5)),
        price_tiers=draw(st.integers(1, 4)),
    )
    config = Config(
        cool_band_c=cool_band,
        heat_band_c=heat_band,
        actions=actions,
        state=space,
        decision_points=draw(st.sampled_from(["fixed", "anchored"])),
        step_hours=draw(st.integers(1, 5)),
        behavior_floor=0.001,
    )
    seed = draw(st.integers(0, 2**32 - 1))
    n_policies = draw(st.integers(1, 3))
    return premises, absences, config, seed, n_policies


@settings(max_examples=80, deadline=None)
@given(_cases())
def test_no_setpoint_leaves_the_band_and_none_leaves_comfort_while_home(case):
    """Random premises, bands, action sets, state spaces, absences, tiers and random (stochastic) policies."""
    premises, absences, config, seed, n_policies = case
    rng = np.random.default_rng(seed)
    names = [f"pol{k}" for k in range(n_policies)]
    tables = {
        (name, mode): rng.dirichlet(np.full(len(config.actions), 0.3), size=config.state.n_states)
        for name in names
        for mode in ("cool", "heat")
    }
    frame = pl.DataFrame(
        [(p, name, mode, cool, heat) for p, mode, cool, heat in premises for name in names],
        schema=["premise_id", "policy_name", "mode", "comfort_cool_c", "comfort_heat_c"],
        orient="row",
    )
    absence = pl.DataFrame(
        absences,
        schema={
            "premise_id": pl.Utf8,
            "mode": pl.Utf8,
            "day_type": pl.Utf8,
            "depart_hour": pl.Int64,
            "away_hours": pl.Int64,
        },
        orient="row",
    )
    tiers = pl.DataFrame(
        {
            "premise_id": np.repeat([p for p, *_ in premises], 48),
            "day_type": np.tile(np.repeat(["weekday", "weekend"], 24), len(premises)),
            "local_hour": np.tile(np.arange(24), 2 * len(premises)),
            "price_tier": rng.integers(0, 4, 48 * len(premises)),
        }
    )
    plan = setpoint_plans(frame, absence, tiers, tables, config).join(
        frame.select("premise_id", "comfort_cool_c", "comfort_heat_c").unique(), on="premise_id"
    )
    assert plan.height >= 48 * len(premises) * n_policies
    low = pl.when(pl.col("mode") == "heat").then(config.heat_band_c[0]).otherwise(config.cool_band_c[0])
    high = pl.when(pl.col("mode") == "heat").then(config.heat_band_c[1]).otherwise(config.cool_band_c[1])
    outside = plan.filter((pl.col("setpoint_c") < low) | (pl.col("setpoint_c") > high))
    assert outside.height == 0, outside
    home = plan.filter(pl.col("occupied"))
    uncomfortable = home.filter(
        (pl.col("setpoint_c") < pl.col("comfort_heat_c")) | (pl.col("setpoint_c") > pl.col("comfort_cool_c"))
    )
    assert uncomfortable.height == 0, uncomfortable
    assert_schedule_grain(plan)


# ---- the pipeline --------------------------------------------------------------------------------


def test_sample_lake_schedule_is_the_recommendation_and_every_program_has_its_file(sample_lake_run):
    """The ledger's schedule holds exactly the premises and policies the recommendation sends (24 hours
    x 2 day types each, in the band); every enrolled rate plan has its CSV, header only when nothing is
    sent there. (The grain of a full schedule: tests/test_rules.py, on every candidate.)"""
    config = sample_lake_run.config
    schedule = pl.read_parquet(config.ledger_path / "schedule" / "*" / "*.parquet", hive_partitioning=False)
    recommendation = pl.read_parquet(
        config.ledger_path / "recommendation" / "*" / "*.parquet", hive_partitioning=False
    )
    sent = recommendation.filter(pl.col("decision") == "send")
    assert set(schedule.select("premise_id", "policy_name", "mode").unique().iter_rows()) == set(
        sent.select("premise_id", "policy", "mode").iter_rows()
    )
    assert schedule.height >= 48 * sent.height
    assert schedule["setpoint_c"].is_between(*config.cool_band_c).all()
    (run_folder,) = (config.out / "schedules").glob("run_date=*/*")
    files = {path.stem: pl.read_csv(path) for path in run_folder.glob("*.csv")}
    assert set(files) == {"TOU-SUMMER", "FLAT-STD"}
    assert sum(f.height for f in files.values()) == schedule.height
    assert all(f.columns == [c for c in COLUMNS if c != "rate_plan_id"] for f in files.values())


def test_a_learned_policy_that_is_sent_gets_its_plan(sample_lake_run):
    """A recommendation sending a learned policy plans it from the improve stage's table."""
    from pipeline import rules, store
    from pipeline.schedule import for_run, learned_policy

    config = sample_lake_run.config
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        learned = learned_policy(con)
        policy = pl.concat([store.frame(con, "select * from evaluation_policy"), learned], how="diagonal")
        name = learned["policy_name"][0]
        sent = pl.DataFrame(
            {"premise_id": ["P0001"], "policy": [name], "decision": ["send"], "mode": ["cool"]}
        )
        plan = for_run(con, config, rules.candidates_for(config), policy, sent)
    assert set(plan["policy_name"]) == {name}
    # One plan per outdoor band where the learned table reads the weather, else one for any.
    assert plan.height == 48 * plan.select(pl.col("outdoor_band").n_unique()).item()
    assert plan["setpoint_c"].is_between(*config.cool_band_c).all()
