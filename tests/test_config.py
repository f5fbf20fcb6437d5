"""Settings: validated on load, one-line errors naming source and key, stages per setting, the reference."""

from __future__ import annotations

import dataclasses
import json
import pickle
import re
from pathlib import Path

import pytest

from pipeline import config as config_module
from pipeline.cli import settings_markdown
from pipeline.config import STAGES, Config, ConfigError
from pipeline.features import StateSpace

ROOT = Path(__file__).resolve().parent.parent

STAGE_MODULES = {
    "ingest": "ingest",
    "episodes": "episodes",
    "learn": "behavior",
    "evaluate": "evaluate",
    "improve": "improve",
}
"""The module whose code does each stage's work (pipeline/<module>.py)."""


def test_config_is_frozen_picklable_and_replace_still_validates():
    """A Config pickles to an equal one, cannot be changed in place, and dataclasses.replace re-validates."""
    config = Config()
    assert pickle.loads(pickle.dumps(config)) == config
    with pytest.raises(dataclasses.FrozenInstanceError):
        config.seed = 1  # type: ignore[misc]
    assert dataclasses.replace(config, decision_points="fixed").decision_points == "fixed"
    with pytest.raises(ValueError, match="must be one of 'fixed', 'anchored'"):
        dataclasses.replace(config, decision_points="anchord")


def test_misspelt_decision_points_is_refused_not_read_as_fixed():
    """'anchord' used to give fixed steps silently; it is now refused with the closest allowed value."""
    with pytest.raises(ConfigError) as error:
        config_module.load(overrides={"decision_points": "anchord"})
    assert str(error.value) == (
        "--set decision_points='anchord': must be one of 'fixed', 'anchored' (did you mean 'anchored'?)"
    )


def test_unknown_key_in_a_file_names_the_file_and_the_closest_key(tmp_path):
    """A typo in the settings file is one line naming the file and suggesting the key meant."""
    path = tmp_path / "settings.toml"
    path.write_text("recovery_hour = 2\n")
    with pytest.raises(ConfigError) as error:
        config_module.load(path)
    assert str(error.value) == f"{path}: unknown setting 'recovery_hour' (did you mean 'recovery_hours'?)"


def test_reversed_safety_band_is_refused():
    """cool_band_c = [30, 22] used to be accepted; a band's low end must be below its high end."""
    with pytest.raises(
        ConfigError, match=r"cool_band_c=\[30, 22\]: must be \[low, high\] °C with low < high"
    ):
        config_module.load(overrides={"cool_band_c": [30, 22]})


def test_overrides_win_over_the_file_and_a_rule_is_judged_on_the_merged_settings(tmp_path):
    """--set is laid over the file, and a file value is not blamed for a rule the override satisfies."""
    path = tmp_path / "settings.toml"
    path.write_text('estimators = ["ordinary_is"]\nrecovery_hours = 3\n')
    config = config_module.load(path, {"recommended_estimator": "ordinary_is", "recovery_hours": 2})
    assert (config.estimators, config.recommended_estimator, config.recovery_hours) == (
        ("ordinary_is",),
        "ordinary_is",
        2,
    )
    with pytest.raises(ConfigError) as error:
        config_module.load(path)
    assert str(error.value) == (
        f"{path}: estimators=['ordinary_is']: must include recommended_estimator 'weighted_is'"
    )


def test_dotted_overrides_reach_into_tables_and_keep_the_rest():
    """--set state.price_tiers=2 changes only that field; columns mappings merge per folder."""
    config = config_module.load(
        overrides={"state.price_tiers": 2, "columns.meter.kwh": "usage_kwh", "columns.meter.quality": "q"}
    )
    assert config.state == dataclasses.replace(StateSpace(), price_tiers=2)
    assert config.columns == {"meter": {"kwh": "usage_kwh", "quality": "q"}}


@pytest.mark.parametrize(
    "text, message",
    [
        ("[state]\nprice_tierz = 2\n", "unknown [state] key 'price_tierz' (did you mean 'price_tiers'?)"),
        (
            '[[candidate]]\nname = "a"\ndepht = 1\n',
            "[[candidate]] 1: unknown key 'depht' (did you mean 'depth_c'?)",
        ),
        (
            '[columns.meters]\nkwh = "x"\n',
            "unknown landing folder 'meters' in [columns] (did you mean 'meter'?)",
        ),
        (
            '[columns.meter]\nkwhh = "x"\n',
            "[columns.meter]: unknown canonical column 'kwhh' (did you mean 'kwh'?)",
        ),
    ],
)
def test_nested_tables_refuse_unknown_keys_with_a_suggestion(tmp_path, text, message):
    """[state], [[candidate]] and [columns.<folder>] keys must exist in the code that reads them."""
    path = tmp_path / "s.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as error:
        config_module.load(path)
    assert str(error.value) == f"{path}: {message}"


def test_true_is_not_a_number_in_the_nested_tables():
    """A boolean given for a state field is refused rather than read as 1."""
    with pytest.raises(ConfigError, match=r"--set state.price_tiers=true: must be a number, not true/false"):
        config_module.load(overrides={"state.price_tiers": True})


def test_sample_settings_file_loads_and_states_the_defaults():
    """sample_lake/settings.toml is valid and spells out the defaults, so the demo means the same with it.

    Its one addition is the demo's rule file, found beside it; the rule file's first three rules are
    the default candidates (tests/test_rules.py).
    """
    loaded = config_module.load(ROOT / "sample_lake" / "settings.toml")
    assert loaded.candidate_file == ROOT / "sample_lake" / "candidates.toml"
    assert dataclasses.replace(loaded, candidate_file=None) == Config()


def test_every_setting_but_the_paths_shapes_at_least_one_stage():
    """Each field names the stages it shapes; only lake, out and the execution settings shape none."""
    unclaimed = {f.name for f in dataclasses.fields(Config) if not f.metadata["stages"]}
    execution = {f.name for f in dataclasses.fields(Config) if f.metadata["execution"]}
    assert unclaimed == {"lake", "out"} | execution
    assert all(set(f.metadata["stages"]) <= set(STAGES) for f in dataclasses.fields(Config))


@pytest.mark.parametrize("stage", STAGES)
def test_every_setting_a_stage_reads_is_claimed_by_that_stage(stage):
    """Every ``config.<setting>`` in a stage's module is among that stage's settings."""
    source = (ROOT / "pipeline" / f"{STAGE_MODULES[stage]}.py").read_text()
    read = set(re.findall(r"config\.([a-z_]+)", source)) & {f.name for f in dataclasses.fields(Config)}
    assert read - {"lake", "out"} <= set(Config().stage_settings(stage))


def test_stage_settings_are_json_values_of_that_stage_only():
    """stage_settings gives plain JSON values (state as a table) of the settings that shape the stage."""
    episodes = Config().stage_settings("episodes")
    assert json.loads(json.dumps(episodes)) == episodes
    assert episodes["recovery_hours"] == 1 and episodes["state"]["price_tiers"] == 3
    assert "bootstrap_replicates" not in episodes
    assert Config().stage_settings("ingest") == {
        "cool_band_c": [22.0, 30.0],
        "heat_band_c": [13.0, 23.0],
        "columns": {},
    }
    with pytest.raises(ConfigError, match="unknown stage 'learning'"):
        Config().stage_settings("learning")


def test_committed_settings_reference_is_what_the_model_generates():
    """SETTINGS.md is ``thermal-ledger settings --markdown`` output; regenerate it when settings change."""
    assert (ROOT / "SETTINGS.md").read_text() == settings_markdown()


def test_reference_lists_every_setting_with_its_meaning():
    """Every field (and every [state] and [[candidate]] key) has a row with a meaning."""
    rows = {row.key: row for row in config_module.settings_reference()}
    for f in dataclasses.fields(Config):
        if f.name not in ("state", "candidates", "columns"):
            assert rows[f.name].meaning, f.name
    assert {f"state.{f.name}" for f in dataclasses.fields(StateSpace)} <= rows.keys()
    assert {
        "candidate",
        "candidate.depth_c",
        "candidate.lead_steps",
        "columns.<folder>.<canonical>",
    } <= rows.keys()
    assert rows["confidence"].allowed == "number, > 0, < 1"
    assert rows["decision_points"].allowed == '"fixed" / "anchored"'


@pytest.mark.parametrize("value", ["lots", "100", "-1GB"])
def test_a_memory_limit_that_is_not_a_size_is_refused_in_one_line(value):
    """duckdb_memory_limit takes a size with its unit ("4GB", "512MiB", "50%") or nothing."""
    with pytest.raises(ConfigError, match=r"duckdb_memory_limit.*must be .* such as \"4GB\""):
        config_module.load(overrides={"duckdb_memory_limit": value})
    assert config_module.load(overrides={"duckdb_memory_limit": "4 GiB"}).duckdb.memory_limit == "4 GiB"
