"""The heating season end to end on the committed winter demo lake (sample_lake/winter/).

The simulator rolled every default candidate out on-policy on the lake's own weather,
prices, occupancy and base load (truth/policy_values.parquet, which the pipeline never
reads), so each heating estimate has a known right answer.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline import config as config_module
from pipeline import control, store
from pipeline.episodes import load_steps
from pipeline.evaluate import BILL_NOTES
from pipeline.simulate import generate_lake, manifest
from pipeline.simulate.lake import read_manifest
from pipeline.simulate.params import winter_params

WINTER = Path(__file__).resolve().parents[1] / "sample_lake" / "winter"
CANDIDATES = ["setback-1", "setback-2", "setback-2-early"]


@pytest.fixture(scope="module")
def winter_run(tmp_path_factory):
    """Every stage once on the winter lake, only homes with presence sensing (the simulator's episodes)."""
    from pipeline import stages

    out = tmp_path_factory.mktemp("winter_out")
    config = config_module.load(
        WINTER / "settings.toml",
        overrides={"lake": str(WINTER), "out": str(out), "presence_sources": ["occupancy_flag"]},
    )
    return config, stages.run_all(config)


@pytest.fixture(scope="module")
def steps(winter_run):
    config, _ = winter_run
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        return load_steps(con)


def _truth(epsilon: float) -> pl.DataFrame:
    """True savings per visible episode, portfolio rows: each candidate's value minus the residents'."""
    values = pl.read_parquet(WINTER / "truth" / "policy_values.parquet").filter(
        pl.col("premise_id").is_null()
    )
    behavior = values.filter(pl.col("policy_name") == "behavior")["value_usd"].item()
    return values.filter(pl.col("epsilon") == epsilon).select(
        "policy_name", (pl.col("value_usd") - behavior).alias("true_savings")
    )


def test_committed_winter_lake_matches_its_manifest_and_a_regeneration(tmp_path):
    """The winter files hash to their MANIFEST.sha256; `simulate --season winter` makes the same landing."""
    expected = read_manifest(WINTER / "MANIFEST.sha256")
    assert manifest(WINTER) == expected
    generate_lake(tmp_path, params=winter_params(), policy_values=True)
    regenerated = manifest(tmp_path)
    assert regenerated.keys() == expected.keys()
    landing = {rel for rel in expected if rel.startswith("landing/")}
    assert {rel: regenerated[rel] for rel in landing} == {rel: expected[rel] for rel in landing}


def test_a_winter_lake_is_the_same_whatever_the_chunk_size(tmp_path):
    """Simulating 3 winter homes at a time or all at once writes byte-identical landing and truth files
    (each home's heating system comes from its own stream)."""
    params = winter_params(n_premises=7, days=9)
    generate_lake(tmp_path / "small", params=params, policy_values=True, chunk_premises=3)
    generate_lake(tmp_path / "whole", params=params, policy_values=True, chunk_premises=1000)
    assert manifest(tmp_path / "small") == manifest(tmp_path / "whole")


def test_simulate_command_takes_the_winter_defaults_for_what_it_is_not_given(tmp_path):
    """`simulate --season winter` without --start or --seed starts on 2026-12-01 with seed 20261201."""
    from pipeline.simulate import main_simulate

    summary = main_simulate(["--season", "winter", "--premises", "2", "--days", "3", "--out", str(tmp_path)])
    assert (summary["season"], summary["start"], summary["seed"]) == ("winter", "2026-12-01", 20261201)
    assert summary["n_premises"] == 2 and summary["days"] == 3


def test_winter_lake_is_heating_only_with_both_systems_and_a_cold_snap():
    """Every thermostat row is in heat mode within the heating band; furnaces and heat pumps both occur;
    some hour is colder than -10 °C."""
    events = pl.read_csv(WINTER / "landing" / "thermostat" / "*.csv")
    assert set(events["mode"].unique()) == {"heat"}
    assert events["heat_setpoint_c"].min() >= 13 and events["heat_setpoint_c"].max() <= 23
    systems = pl.read_parquet(WINTER / "truth" / "premise_parameters.parquet")["heating_system"]
    assert set(systems.unique()) == {"gas_furnace", "heat_pump"}
    weather = pl.read_csv(WINTER / "landing" / "weather" / "weather_VRW-01.csv")
    assert weather["dry_bulb_c"].min() < -10.0


def test_pipeline_heating_steps_equal_the_simulator_truth(steps):
    """The pipeline finds exactly the logged heating decisions of homes with presence sensing, with the
    same state keys (heating degree-hours below 18.3 °C), actions (setpoint lowered) and rewards."""
    truth = pl.read_parquet(WINTER / "truth" / "steps.parquet")
    sensing = pl.read_parquet(WINTER / "truth" / "premise_parameters.parquet").filter("presence_sensing")
    truth = truth.filter(pl.col("premise_id").is_in(sensing["premise_id"].to_list()))
    assert set(steps["mode"].unique()) == {"heat"}
    built = steps.select(
        "premise_id", pl.col("step_start_utc").alias("hour_start"), "state_key", "action", "reward"
    )
    joined = truth.join(built, on=["premise_id", "hour_start"], how="full", coalesce=True)
    assert truth.height == built.height == joined.height
    assert (joined["state_key"] == joined["state_key_right"]).all()
    assert (joined["action"] == joined["action_right"]).all()
    np.testing.assert_allclose(
        joined["reward"].to_numpy(), joined["reward_usd"].to_numpy(), rtol=0, atol=1e-9
    )


@pytest.mark.parametrize("policy_name", CANDIDATES)
def test_portfolio_interval_of_each_heating_candidate_covers_its_true_savings(winter_run, policy_name):
    """The recommended portfolio 95 % interval of each heating candidate covers its true savings."""
    config, summary = winter_run
    truth = _truth(config.target_epsilon).filter(pl.col("policy_name") == policy_name)["true_savings"].item()
    row = summary.evaluation.savings.filter(
        pl.col("recommended") & (pl.col("scope") == "portfolio") & (pl.col("policy_name") == policy_name)
    ).row(0, named=True)
    assert row["mode"] == "heat" and row["status"] == "ok"
    assert row["ci_low"] <= truth <= row["ci_high"], (row, truth)


def _recommended_with_truth(winter_run) -> pl.DataFrame:
    """Recommended savings rows joined to each premise's and the portfolio's true savings."""
    config, summary = winter_run
    values = pl.read_parquet(WINTER / "truth" / "policy_values.parquet")
    behavior = values.filter(pl.col("policy_name") == "behavior").select(
        "premise_id", pl.col("value_usd").alias("behavior_usd")
    )
    truth = (
        values.filter(pl.col("epsilon") == config.target_epsilon)
        .join(behavior, on="premise_id", how="left", nulls_equal=True)
        .select(
            "policy_name",
            pl.col("premise_id").fill_null("portfolio").alias("key"),
            (pl.col("value_usd") - pl.col("behavior_usd")).alias("true_savings"),
        )
    )
    return summary.evaluation.savings.filter(pl.col("recommended")).join(truth, on=["policy_name", "key"])


def test_per_premise_heating_intervals_cover_the_truth_near_their_nominal_rate(winter_run, record_property):
    """Across premises with enough evidence, 95 % heating intervals cover the truth at least 85 % of the
    time (the summer lake's standard, tests/test_truth.py)."""
    rows = _recommended_with_truth(winter_run).filter(
        (pl.col("scope") == "premise") & (pl.col("status") == "ok")
    )
    covered = (pl.col("ci_low") <= pl.col("true_savings")) & (pl.col("true_savings") <= pl.col("ci_high"))
    rate = rows.select(covered.mean()).item()
    record_property("winter_premise_coverage", rate)
    print(f"per-premise heating coverage {rate:.3f} over {rows.height} supported premise-policy rows")
    assert rows.height >= 30 and rate >= 0.85


def test_heating_lower_bound_is_below_the_truth_at_least_at_its_level(winter_run):
    """The 95 % lower bound on heating savings lies below the true savings in at least 95 % of rows."""
    rows = _recommended_with_truth(winter_run)
    assert rows.select((pl.col("lower_bound_usd") <= pl.col("true_savings")).mean()).item() >= 0.95


def test_heating_rows_say_the_furnace_gas_is_not_in_them_and_are_annualised_over_the_heating_season(
    winter_run,
):
    """Every savings row is a heating row carrying the heating bill note, and its episodes per year are
    its episodes per observed day times heating_days_per_year."""
    config, summary = winter_run
    savings = summary.evaluation.savings
    assert set(savings["mode"].unique()) == {"heat"}
    assert (savings["bill_note"] == BILL_NOTES["heat"]).all()
    assert "gas" in BILL_NOTES["heat"]
    expected = savings["n_episodes"] / savings["days_observed"] * config.heating_days_per_year
    np.testing.assert_allclose(savings["episodes_per_year"].to_numpy(), expected.to_numpy())


def test_heating_safety_mask_keeps_every_setpoint_above_the_frozen_pipe_guard(winter_run, steps):
    """For each winter premise, every action the heating mask allows from any state keeps the heating
    setpoint inside heat_band_c (13 °C frozen-pipe guard, common practice), and every candidate's action
    at each logged heating state is one the mask allows."""
    config, _ = winter_run
    premises = pl.read_csv(WINTER / "landing" / "premises" / "premises.csv").sort("premise_id")
    heat_c = premises["comfort_heat_c"].to_numpy().astype(float)
    mask = control.allowed_mask(
        config.state,
        config.actions,
        heating=True,
        comfort_cool_c=premises["comfort_cool_c"].to_numpy().astype(float),
        comfort_heat_c=heat_c,
        cool_band_c=config.cool_band_c,
        heat_band_c=config.heat_band_c,
    )
    offset = config.state.decode(np.arange(config.state.n_states))["offset"]
    reach = offset[:, None] + np.asarray(config.actions)[None, :]
    setpoint = heat_c[:, None, None] - reach[None, :, :]
    inside = (setpoint >= config.heat_band_c[0]) & (setpoint <= config.heat_band_c[1])
    beyond = ~inside.any(axis=-1, keepdims=True)
    assert (inside | ~mask | beyond).all()
    row = {pid: k for k, pid in enumerate(premises["premise_id"].to_list())}
    home = np.array([row[p] for p in steps["premise_id"].to_list()])
    keys = steps["state_key"].to_numpy()
    for rule in config.candidates:
        chosen = rule.actions(config.state, keys, config.actions)
        column = np.searchsorted(np.asarray(config.actions), chosen)
        assert mask[home, keys, column].all(), rule.name


def test_a_heating_comfort_below_the_frozen_pipe_guard_is_quarantined_with_file_row_and_reason(tmp_path):
    """A premise whose heating comfort is 12 °C, below heat_band_c's 13 °C frozen-pipe guard (common
    practice), is quarantined naming its file, row and reason; the other 39 premises load."""
    import shutil

    from pipeline import ingest

    shutil.copytree(WINTER / "landing", tmp_path / "landing")
    path = tmp_path / "landing" / "premises" / "premises.csv"
    premises = pl.read_csv(path)
    premises.with_columns(
        pl.when(pl.col("premise_id") == "P0007")
        .then(12)
        .otherwise(pl.col("comfort_heat_c"))
        .alias("comfort_heat_c")
    ).write_csv(path)
    config = config_module.load(overrides={"lake": str(tmp_path), "out": str(tmp_path / "out")})
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        bad = con.execute(
            "select source_file, row_number, reason from quarantine where source_file like '%premises.csv'"
        ).fetchall()
        loaded = con.execute("select count(*) from premise").fetchone()[0]
    assert len(bad) == 1 and bad[0][2] == "setpoint_out_of_range"
    assert bad[0][1] == premises["premise_id"].to_list().index("P0007") + 1
    assert loaded == premises.height - 1
