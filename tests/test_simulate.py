"""Tests of the home simulator: reproducibility, physics, the landing contract and on-policy truth."""

from __future__ import annotations

from dataclasses import replace
from datetime import date
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline import config, ingest, store
from pipeline.episodes import build, load_steps
from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, SetbackRule, action_index
from pipeline.simulate import (
    SimParams,
    SimulationError,
    comfort_penalty,
    episode_return,
    generate_lake,
    manifest,
    physics,
    simulate_policy,
)
from pipeline.simulate.behavior import SUPPORT_FLOOR, allowed
from pipeline.simulate.engine import find_episodes
from pipeline.simulate.lake import read_manifest
from pipeline.simulate.rollout import CANDIDATES
from pipeline.simulate.world import build_world

SAMPLE = Path(__file__).resolve().parents[1] / "sample_lake"
SMALL = {"n_premises": 8, "seed": 11, "start": date(2026, 7, 1), "days": 21}


@pytest.fixture(scope="module")
def small_lake(tmp_path_factory) -> tuple[Path, dict]:
    out = tmp_path_factory.mktemp("lake")
    return out, generate_lake(out, **SMALL)


def _homes(n: int, rng: np.random.Generator) -> physics.ThermalHomes:
    r = rng.uniform(3.0, 7.0, n)
    return physics.ThermalHomes(
        r_k_per_kw=r,
        c_kwh_per_k=rng.uniform(20.0, 60.0, n) / r,
        capacity_kw=rng.uniform(5.0, 9.0, n),
        cop_nominal=rng.uniform(3.0, 4.0, n),
        fan_kw=np.full(n, 0.25),
    )


def _summer(days: int, per_hour: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Outdoor °C and clear-sky shape per sub-step: daily means 20..32 °C, swing +/- 6 °C."""
    hours = np.arange(days * 24 * per_hour) / per_hour
    mean = np.repeat(rng.uniform(20.0, 32.0, days), 24 * per_hour)
    t_out = mean + 6.0 * np.cos(2 * np.pi * (hours % 24 - 16.0) / 24.0)
    sun = np.clip(np.sin(np.pi * (hours % 24 - 6.5) / 14.0), 0.0, None)
    return t_out, sun


def test_generate_is_bit_for_bit_reproducible_from_the_seed(small_lake, tmp_path):
    """Two lakes from the same parameters have identical bytes; another seed gives other bytes."""
    out, _ = small_lake
    again = tmp_path / "again"
    generate_lake(again, **SMALL)
    first, second = manifest(out), manifest(again)
    assert first and first == second
    other = tmp_path / "other"
    generate_lake(other, **{**SMALL, "seed": 12})
    meter = "landing/meter/meter_2026-07.parquet"
    assert manifest(other)[meter] != first[meter]


@pytest.mark.parametrize("hidden", [False, True], ids=["plain", "hidden-confounder"])
def test_a_lake_is_the_same_whatever_the_chunk_size(tmp_path, hidden):
    """Simulating 3 premises at a time or all at once writes byte-identical landing and truth files."""
    params = SimParams(hidden_confounder=hidden)
    generate_lake(tmp_path / "small", params=params, policy_values=True, chunk_premises=3, **SMALL)
    generate_lake(tmp_path / "whole", params=params, policy_values=True, chunk_premises=1000, **SMALL)
    chunked, whole = manifest(tmp_path / "small"), manifest(tmp_path / "whole")
    assert "truth/policy_values.parquet" in whole
    assert chunked == whole
    assert not list((tmp_path / "small").glob(".chunks-*")), "scratch parts are removed"


def test_a_slice_of_premises_holds_the_lakes_homes_at_those_positions():
    """build_world over premises 2..4 draws the homes, days and loads the whole lake has at 2..4."""
    params = replace(SimParams(), **SMALL)
    whole, part = build_world(params), build_world(params, range(2, 5))
    for name in whole.homes.__dataclass_fields__:
        np.testing.assert_array_equal(getattr(part.homes, name), getattr(whole.homes, name)[2:5], name)
    np.testing.assert_array_equal(part.days.away, whole.days.away[2:5])
    np.testing.assert_array_equal(part.base_kwh, whole.base_kwh[:, 2:5])
    np.testing.assert_array_equal(part.estimated, whole.estimated[:, 2:5])
    np.testing.assert_array_equal(part.weather.temp_c, whole.weather.temp_c)


def test_summarised_runs_equal_a_plain_loop_over_premises():
    """summarise_runs gives, per premise and overall, exactly the means a masked loop over premises gives."""
    from pipeline.simulate.rollout import policy_runs, summarise_runs

    runs = policy_runs(build_world(replace(SimParams(), **SMALL)), rules=(CANDIDATES[0],), epsilons=(0.0,))
    values = summarise_runs(runs)
    for name, eps, seen in runs:
        ids = seen["premise_id"].to_numpy()
        for premise in [None, *sorted(set(ids))]:
            mask = np.ones(len(ids), dtype=bool) if premise is None else ids == premise
            row = values.filter(
                (pl.col("policy_name") == name)
                & (pl.col("epsilon") == eps)
                & (pl.col("premise_id").is_null() if premise is None else pl.col("premise_id") == premise)
            )
            assert row["n_episodes"].item() == mask.sum()
            assert row["value_usd"].item() == float(np.mean(seen["return_usd"].to_numpy()[mask]))
            assert row["kwh"].item() == float(np.mean(seen["kwh"].to_numpy()[mask]))


@pytest.mark.parametrize("name", ["chunk_premises", "n_premises", "days"])
def test_generate_refuses_counts_below_one(tmp_path, name):
    """A chunk size, number of homes or days below one is refused, naming it, before any file is made."""
    with pytest.raises(SimulationError, match=f"{name} must be at least 1, got 0"):
        generate_lake(tmp_path / "lake", **{**SMALL, "chunk_premises": 5, name: 0})
    assert not (tmp_path / "lake").exists()


def _assert_frames_close(expected: pl.DataFrame, actual: pl.DataFrame) -> None:
    assert expected.schema == actual.schema
    for name in expected.columns:
        if expected.schema[name].is_float():
            np.testing.assert_allclose(actual[name].to_numpy(), expected[name].to_numpy(), rtol=1e-12, atol=0)
        else:
            assert actual[name].equals(expected[name]), name


def test_committed_sample_lake_matches_its_manifest_and_a_regeneration(tmp_path):
    """Committed files hash to MANIFEST.sha256, and regenerating with the README's command reproduces them."""
    expected = read_manifest(SAMPLE / "MANIFEST.sha256")
    assert manifest(SAMPLE) == expected
    summary = generate_lake(
        tmp_path, n_premises=60, seed=20260601, start=date(2026, 6, 1), days=92, policy_values=True
    )
    regenerated = manifest(tmp_path)
    assert regenerated.keys() == expected.keys()
    landing = [rel for rel in expected if rel.startswith("landing/")]
    assert {rel: regenerated[rel] for rel in landing} == {rel: expected[rel] for rel in landing}
    # Truth side files carry softmax probabilities whose last bit depends on the CPU's vector
    # exp (numpy picks the kernel at run time), so they are compared by value, not by bytes.
    for rel in expected.keys() - set(landing):
        if rel.endswith(".parquet"):
            _assert_frames_close(pl.read_parquet(SAMPLE / rel), pl.read_parquet(tmp_path / rel))
        else:
            assert regenerated[rel] == expected[rel], rel
    assert summary["bytes"] < 15_000_000
    for rule in CANDIDATES:
        assert 0.08 <= summary["followed_share_observable"][rule.name] <= 0.20


def test_thermal_energy_balance_closes_over_a_day():
    """Stored heat change = gains - cooling - conduction over a day, within 1 % of the cooling energy."""
    rng = np.random.default_rng(1)
    n, per_hour = 12, 12
    homes = _homes(n, rng)
    t_out, sun = _summer(1, per_hour, rng)
    steps = len(t_out)
    gains = 0.6 + 1.5 * sun[:, None] * rng.uniform(0.5, 1.5, n)
    setpoint = np.where((np.arange(steps) // per_hour)[:, None] % 24 < 8, 24.0, 23.0) + np.zeros((steps, n))
    out = physics.run(homes, np.full(n, 23.0), np.repeat(t_out[:, None], n, 1), gains, setpoint, 1 / per_hour)
    dt = 1 / per_hour
    t_in = out["t_in_c"]
    conduction = ((0.5 * (t_in[1:] + t_in[:-1]) - t_out[:, None]) / homes.r_k_per_kw * dt).sum(axis=0)
    cooling = (out["q_cool_kw"] * dt).sum(axis=0)
    stored = homes.c_kwh_per_k * (t_in[-1] - t_in[0])
    residual = stored - ((gains * dt).sum(axis=0) - cooling - conduction)
    assert (cooling > 1.0).all()
    assert np.abs(residual / cooling).max() < 0.01


def test_free_running_home_relaxes_toward_outdoors_with_time_constant_rc():
    """With the AC off and no gains, T(t) = T_out + (T0 - T_out) exp(-t / RC), the analytic RC decay."""
    rng = np.random.default_rng(2)
    n, per_hour, hours = 5, 12, 72
    homes = _homes(n, rng)
    steps = hours * per_hour
    t_out = np.full((steps, n), 35.0)
    off = np.full((steps, n), 99.0)
    out = physics.run(homes, np.full(n, 22.0), t_out, np.zeros((steps, n)), off, 1 / per_hour)
    t = np.arange(steps + 1)[:, None] / per_hour
    analytic = 35.0 + (22.0 - 35.0) * np.exp(-t / (homes.r_k_per_kw * homes.c_kwh_per_k))
    np.testing.assert_allclose(out["t_in_c"], analytic, rtol=1e-9)
    assert not out["running"].any()


def test_daily_cooling_energy_rises_with_cooling_degree_hours():
    """Daily AC kWh rises with cooling degree-hours, base 18.3 °C (65 °F, common practice): R² > 0.8."""
    rng = np.random.default_rng(3)
    n, per_hour, days = 6, 12, 40
    homes = _homes(n, rng)
    t_out, sun = _summer(days, per_hour, rng)
    steps = len(t_out)
    gains = 0.6 + 1.5 * sun[:, None]
    outdoor, setpoint = np.repeat(t_out[:, None], n, 1), np.full((steps, n), 24.0)
    out = physics.run(homes, np.full(n, 24.0), outdoor, gains, setpoint, 1 / per_hour)
    kwh = (out["electric_kw"] / per_hour).reshape(days, 24 * per_hour, n).sum(axis=1)
    hourly_out = t_out[::per_hour]
    cdh = np.maximum(hourly_out - StateSpace().degree_base_c, 0.0).reshape(days, 24).sum(axis=1)
    for j in range(n):
        slope, intercept = np.polyfit(cdh, kwh[:, j], 1)
        r2 = np.corrcoef(cdh, kwh[:, j])[0, 1] ** 2
        assert slope > 0 and r2 > 0.8


def test_eight_hour_setback_saves_a_plausible_share():
    """A 4 °C (7.2 °F) setback 8 h a day saves within a factor 3 of the rule of thumb.

    Rule of thumb (U.S. Department of Energy consumer guidance, from memory):
    turning the thermostat back 7-10 °F for 8 hours a day saves up to about
    10 % a year on heating and cooling, i.e. about 1 % per °F. For 7.2 °F that
    is about 7 %; the band accepted is 7.2 % / 3 to 7.2 % * 3 = 2.4 % to 21.6 %
    of summer cooling energy, wide because the rule is annual and approximate
    and our homes and climate are invented.
    """
    rng = np.random.default_rng(4)
    n, per_hour, days = 20, 12, 30
    homes = _homes(n, rng)
    t_out, sun = _summer(days, per_hour, rng)
    steps = len(t_out)
    gains = 0.6 + 1.5 * sun[:, None]
    hour = (np.arange(steps) // per_hour) % 24
    comfort = np.full((steps, n), 24.0)
    setback = comfort + np.where((hour >= 9) & (hour < 17), 4.0, 0.0)[:, None]
    runs = [
        physics.run(homes, np.full(n, 24.0), np.repeat(t_out[:, None], n, 1), gains, sp, 1 / per_hour)
        for sp in (comfort, setback)
    ]
    base, saved = (r["electric_kw"].sum(axis=0) for r in runs)
    share = 1.0 - saved.sum() / base.sum()
    assert 0.024 <= share <= 0.216


def test_episode_return_matches_a_hand_worked_episode():
    """Steps costing 0.50 and 0.30 USD, recovery 0.20 USD, 2 °C still set back: G = -(1.00 + 0.10 * 2 * 1)."""
    assert comfort_penalty(2, recovery_hours=1, usd_per_degree_hour=0.10) == pytest.approx(0.20)
    assert comfort_penalty(-1) == 0.0
    assert episode_return(0.50 + 0.30, 0.20, 2) == pytest.approx(-1.20)


def test_landing_files_follow_the_contract(small_lake):
    """Every landing folder has the contracted columns, units and time conventions."""
    out, summary = small_lake
    land = out / "landing"
    prem = pl.read_csv(land / "premises" / "premises.csv")
    assert prem.columns[:6] == [
        "premise_id",
        "timezone",
        "weather_station_id",
        "rate_plan_id",
        "comfort_cool_c",
        "comfort_heat_c",
    ]
    assert prem["comfort_cool_c"].is_between(22, 25).all() and prem["comfort_heat_c"].is_between(19, 21).all()
    meter = pl.read_parquet(land / "meter")
    assert meter.schema["interval_start"] == pl.Datetime("us", "UTC")
    assert (meter["interval_minutes"] == 15).all() and (meter["kwh"] > 0).all()
    assert set(meter["quality"].unique()) <= {"actual", "estimated"}
    assert meter.group_by("premise_id").len()["len"].unique().to_list() == [4 * 24 * SMALL["days"]]
    assert meter.select(pl.struct("premise_id", "interval_start").is_unique().all()).item()
    weather = {p.name: pl.read_csv(p) for p in (land / "weather").glob("*.csv")}
    assert sum("dry_bulb_f" in w.columns for w in weather.values()) == 1
    thermo = pl.read_csv(land / "thermostat" / "*.csv", schema_overrides={"occupied": pl.Int8})
    assert (thermo["mode"] == "cool").all()
    assert thermo["cool_setpoint_c"].is_between(22, 30).all()
    stamp = thermo["changed_at"].str.to_datetime("%Y-%m-%dT%H:%M:%S%z")
    changes = thermo.filter(pl.col("occupied") == 0).with_columns(stamp=stamp.filter(thermo["occupied"] == 0))
    moved = changes.filter(
        pl.col("cool_setpoint_c")
        != pl.col("premise_id").replace_strict(prem["premise_id"], prem["comfort_cool_c"].cast(pl.Float64))
    )
    assert moved.height > 0 and (moved["stamp"].dt.minute() == 0).all()
    assert thermo.group_by("premise_id").len().height == SMALL["n_premises"]
    tariffs = pl.read_csv(land / "tariffs" / "tariffs.csv")
    assert set(tariffs["rate_plan_id"]) == set(prem["rate_plan_id"]) | set(tariffs["rate_plan_id"])
    assert summary["n_episodes"] > 0


def test_truth_behaviour_table_is_a_proper_policy(small_lake):
    """True behaviour rows sum to one; every action the safety band allows has at least the support floor."""
    out, _ = small_lake
    table = pl.read_parquet(out / "truth" / "behavior_probabilities.parquet")
    sums = table.group_by("premise_id", "state_key").agg(pl.col("probability").sum())
    np.testing.assert_allclose(sums["probability"].to_numpy(), 1.0)
    prem = pl.read_csv(out / "landing" / "premises" / "premises.csv")
    space = StateSpace()
    joined = table.join(prem.select("premise_id", "comfort_cool_c"), on="premise_id")
    offset = space.decode(joined["state_key"].to_numpy())["offset"]
    nxt = offset + joined["action"].to_numpy()
    sp = joined["comfort_cool_c"].to_numpy() + nxt
    ok = (nxt >= space.offset_min) & (nxt <= space.offset_max) & (sp >= 22) & (sp <= 30)
    prob = joined["probability"].to_numpy()
    assert (prob[ok] >= SUPPORT_FLOOR - 1e-12).all() and (prob[~ok] == 0).all()
    assert set(table["action"].unique()) == set(DEFAULT_ACTIONS)


def test_rolling_out_the_behaviour_reproduces_the_logged_episodes(small_lake):
    """On the logged choice stream the true behaviour table replays the log exactly; on a fresh stream the
    mean return agrees within four standard errors."""
    out, _ = small_lake
    logged = pl.read_parquet(out / "truth" / "episodes.parquet")
    table = pl.read_parquet(out / "truth" / "behavior_probabilities.parquet")
    table = table.sort("premise_id", "state_key", "action")
    n_actions = len(DEFAULT_ACTIONS)
    probs = table["probability"].to_numpy().reshape(SMALL["n_premises"], StateSpace().n_states, n_actions)
    params = replace(SimParams(), **SMALL)
    replay = simulate_policy(probs, params, choice_stream=0)
    assert replay.equals(logged)
    fresh = simulate_policy("behavior", params, choice_stream=1)
    a, b = logged["return_usd"].to_numpy(), fresh["return_usd"].to_numpy()
    se = np.sqrt(a.var(ddof=1) / len(a) + b.var(ddof=1) / len(b))
    assert abs(a.mean() - b.mean()) < 4 * se


def test_a_setback_rule_beats_holding_comfort_on_the_same_draws():
    """Setting back 2 °C while away costs less than never setting back, episode by episode on average."""
    space = StateSpace()
    params = replace(SimParams(), n_premises=6, seed=5, start=date(2026, 7, 1), days=14)
    hold = simulate_policy(SetbackRule("hold", depth_c=0).table(space), params)
    setback = simulate_policy(SetbackRule("setback-2", depth_c=2).table(space), params)
    assert hold.select("premise_id", "episode_start").equals(setback.select("premise_id", "episode_start"))
    assert (hold["comfort_penalty_usd"] == 0).all()
    assert setback["return_usd"].mean() > hold["return_usd"].mean()
    assert setback["kwh"].sum() < hold["kwh"].sum()


def test_hidden_confounder_changes_behaviour_but_not_the_world(tmp_path):
    """With the hidden 'feeling hot' state the truth table gains a column and logged choices differ."""
    plain = simulate_policy("behavior", replace(SimParams(), **SMALL))
    hidden_params = replace(SimParams(), hidden_confounder=True, **SMALL)
    hidden = simulate_policy("behavior", hidden_params)
    assert plain.select("premise_id", "episode_start").equals(hidden.select("premise_id", "episode_start"))
    assert not plain["final_offset_c"].equals(hidden["final_offset_c"])
    generate_lake(tmp_path, params=hidden_params, **SMALL)
    assert "feeling_hot" in pl.read_parquet(tmp_path / "truth" / "behavior_probabilities.parquet").columns


def test_true_values_of_the_behaviour_equal_the_logged_mean_return(small_lake):
    """The behaviour row of true_values is the mean logged return over episodes the pipeline can see."""
    from pipeline.simulate.rollout import true_values

    out, _ = small_lake
    logged = pl.read_parquet(out / "truth" / "episodes.parquet").filter(pl.col("presence_sensing"))
    values = true_values(replace(SimParams(), **SMALL), rules=(SetbackRule("setback-2", depth_c=2),))
    portfolio = values.filter(pl.col("premise_id").is_null())
    behaviour = portfolio.filter(pl.col("policy_name") == "behavior")
    assert behaviour["value_usd"].item() == pytest.approx(logged["return_usd"].mean(), rel=1e-12)
    assert behaviour["n_episodes"].item() == logged.height
    assert set(portfolio["policy_name"]) == {"behavior", "setback-2"}


def test_simulate_policy_refuses_a_table_of_the_wrong_shape():
    """A policy table that does not match the state space is refused with a specific error."""
    from pipeline.simulate import SimulationError

    with pytest.raises(SimulationError, match="does not fit"):
        simulate_policy(np.full((10, 3), 1 / 3), n_premises=2, days=3)
    with pytest.raises(SimulationError, match="does not fit"):
        simulate_policy(np.full((StateSpace().n_states, 3), 1 / 3), n_premises=2, days=3)


def _decisions_by_loop(tiers: list[int]) -> list[int]:
    """Reference: departure, every strict tier rise, and the hour before the return hour."""
    out = [0]
    for k in range(1, len(tiers)):
        if tiers[k] > tiers[k - 1] and k not in out:
            out.append(k)
    if len(tiers) - 1 not in out:
        out.append(len(tiers) - 1)
    return out


def test_decision_hours_are_departure_tier_rises_and_the_hour_before_return():
    """The simulator's anchored decision hours equal a plain loop over each episode's price tiers."""
    world = build_world(replace(SimParams(), **SMALL))
    episodes = find_episodes(world)
    h = world.homes
    for i in range(len(episodes.n)):
        hours = episodes.h0[i] + np.arange(episodes.n[i])
        tiers = world.tariffs.tier[h.plan[episodes.home[i]], h.tz[episodes.home[i]], hours].tolist()
        assert np.flatnonzero(episodes.decision[i]).tolist() == _decisions_by_loop(tiers)
    assert set(episodes.n_decisions.tolist()) <= {1, 2, 3, 4}
    assert (episodes.n_decisions == 4).any()


def test_setback_two_sets_back_at_departure_holds_and_restores_an_hour_before_return():
    """On a four-decision episode setback-2 plays +2, 0, 0, -2 and the early variant +2, 0, -2, 0."""
    space = StateSpace()

    def play(rule: SetbackRule) -> list[int]:
        offset, out = 0, []
        for steps_left in (4, 3, 2, 1):
            key = space.encode([9], [8.0], [0], [offset], [steps_left])
            a = int(rule.actions(space, key, DEFAULT_ACTIONS)[0])
            out.append(a)
            offset += a
        return out

    assert play(SetbackRule("s2", depth_c=2)) == [2, 0, 0, -2]
    assert play(SetbackRule("s2e", depth_c=2, lead_steps=1)) == [2, 0, -2, 0]
    assert play(SetbackRule("s1", depth_c=1)) == [1, 0, 0, -1]


def test_residents_set_back_at_departure_hold_in_between_and_mostly_restore_at_the_end(small_lake):
    """Logged behaviour has the intended shape: setbacks at departure, holds in between, restores or keeps."""
    out, _ = small_lake
    steps = pl.read_parquet(out / "truth" / "steps.parquet")
    steps = steps.with_columns(
        n=pl.len().over("premise_id", "episode_start"),
        offset=pl.Series(StateSpace().decode(steps["state_key"].to_numpy())["offset"]),
    )
    first = steps.filter(pl.col("t") == 0)["action"]
    middle = steps.filter((pl.col("t") > 0) & (pl.col("t") < pl.col("n") - 1))["action"]
    last = steps.filter((pl.col("t") == pl.col("n") - 1) & (pl.col("offset") > 0))["action"]
    assert (first > 0).mean() > 0.6
    assert (middle == 0).mean() > 0.5
    assert 0.3 < (last < 0).mean() < 0.8 and (last == 0).mean() > 0.1


def test_mean_importance_weight_of_each_soft_candidate_is_one_on_the_sample_lake():
    """E_b[prod pi/b] = 1 with the true b: the sample-lake mean of rho lies within 3 standard errors of 1.

    pi is the 5 %-soft rule as the thermostat applies it (actions leaving the safety band dropped and
    the row renormalised), the policy ``simulate_policy`` rolls out. With hourly decisions the mean
    weight was far below 1 (mass on paths never observed); anchored decisions keep the horizon short.
    """
    steps = pl.read_parquet(SAMPLE / "truth" / "steps.parquet")
    prem = pl.read_csv(SAMPLE / "landing" / "premises" / "premises.csv")
    steps = steps.join(prem.select("premise_id", "comfort_cool_c"), on="premise_id", how="left")
    space = StateSpace()
    keys = steps["state_key"].to_numpy()
    ok = allowed(space.decode(keys)["offset"], steps["comfort_cool_c"].to_numpy(), (22, 30), space)
    idx = action_index(steps["action"].to_numpy(), DEFAULT_ACTIONS)
    for rule in CANDIDATES:
        rows = np.where(ok, rule.table(space, DEFAULT_ACTIONS, 0.05)[keys], 0.0)
        pi = rows[np.arange(len(keys)), idx] / rows.sum(axis=1)
        rho = (
            steps.with_columns(ratio=pl.Series(pi) / pl.col("probability"))
            .group_by("premise_id", "episode_start")
            .agg(pl.col("ratio").product())["ratio"]
            .to_numpy()
        )
        se = rho.std(ddof=1) / np.sqrt(len(rho))
        assert len(rho) > 3000 and se < 0.3
        assert abs(rho.mean() - 1.0) < 3 * se, (rule.name, rho.mean(), se)


def test_pipeline_anchored_steps_equal_the_simulator_truth_on_the_sample_lake(tmp_path):
    """The pipeline's anchored episode build finds exactly the logged decisions of homes with presence
    sensing, with the same state keys, actions and rewards."""
    cfg = config.load(
        overrides={
            "lake": str(SAMPLE),
            "out": str(tmp_path),
            "decision_points": "anchored",
            "actions": list(DEFAULT_ACTIONS),
        }
    )
    ingest.ingest(cfg)
    with store.warehouse(cfg.warehouse_path) as con:
        build(con, cfg)
        built = load_steps(con)
    sensing = pl.read_parquet(SAMPLE / "truth" / "premise_parameters.parquet").filter("presence_sensing")
    ids = sensing["premise_id"].to_list()
    truth = pl.read_parquet(SAMPLE / "truth" / "steps.parquet").filter(pl.col("premise_id").is_in(ids))
    built = built.filter(pl.col("premise_id").is_in(ids)).select(
        "premise_id", pl.col("step_start_utc").alias("hour_start"), "state_key", "action", "reward"
    )
    joined = truth.join(built, on=["premise_id", "hour_start"], how="full", coalesce=True)
    assert truth.height == built.height == joined.height
    assert (joined["state_key"] == joined["state_key_right"]).all()
    assert (joined["action"] == joined["action_right"]).all()
    np.testing.assert_allclose(
        joined["reward"].to_numpy(), joined["reward_usd"].to_numpy(), rtol=0, atol=1e-9
    )


def test_true_step_probabilities_refuse_a_step_the_simulator_never_made():
    """A decision step with no simulated counterpart is an error, not a silent gap."""
    import datetime as dt

    from pipeline.simulate import SimulationError, true_step_probabilities

    stray = pl.DataFrame(
        {"premise_id": ["P0001"], "step_start_utc": [dt.datetime(2020, 1, 1, tzinfo=dt.UTC)]}
    )
    with pytest.raises(SimulationError, match="no simulated counterpart"):
        true_step_probabilities(SAMPLE, stray)
