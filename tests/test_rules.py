"""Rule files: each kind compiles to the table a hand-worked example gives; malformed files are refused."""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline import cli, rules
from pipeline import config as config_module
from pipeline.behavior import CohortCounts
from pipeline.config import Config, ConfigError
from pipeline.evaluate import evaluate_candidates
from pipeline.features import StateSpace
from pipeline.policies import SetbackRule
from pipeline.rules import Candidate, RuleFileError, read_rule_file
from tests.test_evaluate import _logged_steps
from tests.test_schedule import assert_schedule_grain

ROOT = Path(__file__).resolve().parent.parent

# A small state space for hand-worked tables: one hour bucket, two degree bins, three tiers,
# offsets -1..2 and steps left 1, 2, 3 (3 meaning "3 or more"): 72 states.
SMALL = StateSpace(
    hour_bucket_hours=24,
    degree_bin_edges_c=(5.0,),
    price_tiers=3,
    offset_min=-1,
    offset_max=2,
    steps_left_cap=3,
)
UNIT = (-1, 0, 1)
WIDE = (-2, -1, 0, 1, 2)


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "rules.toml"
    path.write_text(textwrap.dedent(text).lstrip())
    return path


def _compile(tmp_path: Path, text: str, actions=UNIT, epsilon: float = 0.0) -> Candidate:
    (candidate,) = read_rule_file(_write(tmp_path, text), SMALL, actions, epsilon)
    return candidate


def _chosen(candidate: Candidate, actions) -> np.ndarray:
    """The action of every state, as an array indexed [degree_bin, price_tier, offset + 1, steps_left - 1]."""
    table = candidate.table
    assert np.allclose(table.sum(axis=1), 1.0)
    chosen = np.asarray(actions)[np.argmax(table, axis=1)]
    return chosen.reshape(SMALL.sizes)[0]


def _by_tier(rows_offset_by_steps_left: list[list[int]]) -> np.ndarray:
    """One hand table (rows offset -1..2, columns steps left 1..3) for every degree bin and tier."""
    return np.broadcast_to(np.asarray(rows_offset_by_steps_left), (2, 3, 4, 3))


def test_setback_rule_compiles_to_the_hand_worked_table(tmp_path):
    """depth 2, actions -1..1: target min(2, steps_left - 1) (0, 1, 2), move one degree toward it."""
    candidate = _compile(tmp_path, '[[rule]]\nname = "s2"\nkind = "setback"\ndepth_c = 2\n')
    expected = [
        # steps left: 1   2   3
        [1, 1, 1],  # offset -1: target above, one up
        [0, 1, 1],  # offset 0: hold at the last decision (target 0), else up
        [-1, 0, 1],  # offset 1
        [-1, -1, 0],  # offset 2: at depth with 3 left, restore one a decision after
    ]
    np.testing.assert_array_equal(_chosen(candidate, UNIT), _by_tier(expected))


def test_setback_that_starts_late_compiles_to_the_hand_worked_table(tmp_path):
    """depth 1 starting with 2 decisions left: target 0 with 3 left, 1 with 2 left, 0 at the last."""
    candidate = _compile(
        tmp_path, '[[rule]]\nname = "late"\nkind = "setback"\ndepth_c = 1\nstart_before_return = 2\n'
    )
    expected = [
        [1, 1, 1],
        [0, 1, 0],
        [-1, 0, -1],
        [-1, -1, -1],
    ]
    np.testing.assert_array_equal(_chosen(candidate, UNIT), _by_tier(expected))


def test_setback_with_a_ramp_compiles_to_the_hand_worked_table(tmp_path):
    """depth 2, ramp 1, actions -2..2: restore 2 a decision, so target (0, 2, 2); rises capped at 1."""
    candidate = _compile(
        tmp_path, '[[rule]]\nname = "ramp"\nkind = "setback"\ndepth_c = 2\nramp_c = 1\n', actions=WIDE
    )
    expected = [
        [1, 1, 1],  # gap 1, 3, 3: at most one up
        [0, 1, 1],
        [-1, 1, 1],
        [-2, 0, 0],  # restore in one move at the last decision
    ]
    np.testing.assert_array_equal(_chosen(candidate, WIDE), _by_tier(expected))


def test_precool_rule_compiles_to_the_hand_worked_table_per_price_tier(tmp_path):
    """precool 1 at tier 1, drift to 2 at tier 2 (peak); comfort at tier 0; restore at the last decision.

    Targets: tier 0 -> 0; tier 1 -> -1 (pre-cooled stays within comfort, so no restore);
    tier 2 -> min(2, steps_left - 1) = 0, 1, 2.
    """
    candidate = _compile(
        tmp_path,
        """
        [[rule]]
        name = "precool"
        kind = "precool"
        precool_c = 1
        precool_tier = 1
        peak_tier = 2
        drift_c = 2
        drift_per_decision_c = 1
        """,
    )
    expected = np.array(
        [
            [[1, 1, 1], [0, 0, 0], [-1, -1, -1], [-1, -1, -1]],  # tier 0 (off-peak)
            [[0, 0, 0], [-1, -1, -1], [-1, -1, -1], [-1, -1, -1]],  # tier 1 (before the peak)
            [[1, 1, 1], [0, 1, 1], [-1, 0, 1], [-1, -1, 0]],  # tier 2 (peak)
        ]
    )
    np.testing.assert_array_equal(_chosen(candidate, UNIT), np.broadcast_to(expected, (2, 3, 4, 3)))
    assert candidate.settings["precool_tier"] == 1 and candidate.settings["peak_tier"] == 2


def test_precool_drift_per_decision_limits_rises_in_the_peak_only(tmp_path):
    """With actions -2..2 the peak rises by one a decision while tier 0 moves two at once."""
    candidate = _compile(
        tmp_path,
        '[[rule]]\nname = "p"\nkind = "precool"\nprecool_c = 1\ndrift_c = 2\ndrift_per_decision_c = 1\n',
        actions=WIDE,
    )
    chosen = _chosen(candidate, WIDE)
    # tier 2, offset -1, 3 left: target 2, gap 3, capped at 1; tier 0, offset -1 (below comfort): +1.
    assert chosen[0, 2, 0, 2] == 1 and chosen[0, 0, 0, 2] == 1
    # tier 1 defaults to the precool tier (one below the peak): from offset 1 down by two.
    assert chosen[0, 1, 2, 2] == -2


def test_hold_rule_compiles_to_the_hand_worked_table_and_softens(tmp_path):
    """hold at +1 with no restore: target 1 at every decision; epsilon 0.3 over 3 actions gives 0.8 / 0.1."""
    candidate = _compile(tmp_path, '[[rule]]\nname = "h"\nkind = "hold"\noffset_c = 1\nepsilon = 0.3\n')
    expected = [[1, 1, 1], [1, 1, 1], [0, 0, 0], [-1, -1, -1]]
    np.testing.assert_array_equal(_chosen(candidate, UNIT), _by_tier(expected))
    assert set(np.round(candidate.table, 12).ravel()) == {0.8, 0.1}
    restored = _compile(
        tmp_path, '[[rule]]\nname = "h"\nkind = "hold"\noffset_c = 1\nrestore_before_return = 0\n'
    )
    # With a restore it is the plain 1 °C setback.
    np.testing.assert_array_equal(restored.table, SetbackRule("x", depth_c=1).table(SMALL, UNIT, 0.0))


@pytest.mark.parametrize("actions", [UNIT, WIDE, (-2, -1, 0, 1)])
@pytest.mark.parametrize("depth, lead", [(0, 0), (1, 0), (2, 0), (2, 1), (4, 2)])
def test_a_plain_setback_rule_is_exactly_the_setback_rule_of_the_settings(tmp_path, actions, depth, lead):
    """Without the optional keys a setback rule's table is SetbackRule's, bit for bit, for any action set."""
    space = StateSpace()
    path = _write(
        tmp_path,
        f'[[rule]]\nname = "s"\nkind = "setback"\ndepth_c = {depth}\nrestore_before_return = {lead}\n',
    )
    (candidate,) = read_rule_file(path, space, actions, 0.05)
    np.testing.assert_array_equal(
        candidate.table, SetbackRule("s", depth_c=depth, lead_steps=lead).table(space, actions, 0.05)
    )


def test_the_demo_rule_file_keeps_the_default_candidates_tables():
    """sample_lake/candidates.toml opens with the three default candidates, compiled to the same tables."""
    config = config_module.load(ROOT / "sample_lake" / "settings.toml")
    compiled = rules.candidates_for(config)
    defaults = Config().candidates
    assert [c.name for c in compiled[:3]] == [r.name for r in defaults]
    for candidate, rule in zip(compiled, defaults, strict=False):
        np.testing.assert_array_equal(
            candidate.table, rule.table(config.state, config.actions, config.target_epsilon)
        )
    assert {c.kind for c in compiled} == {"setback", "precool"}
    assert any(c.rate_plans for c in compiled) and any(c.cohorts for c in compiled)


def test_without_a_rule_file_the_settings_candidates_are_used():
    """Old settings files keep working: [[candidate]] tables become setback candidates for every premise."""
    config = Config()
    compiled = rules.candidates_for(config)
    assert [c.name for c in compiled] == ["setback-1", "setback-2", "setback-2-early"]
    assert not any(c.scoped for c in compiled)


def test_applicability_needs_both_cohort_and_rate_plan_when_both_are_given():
    """cohorts and rate_plans together select the premises in both."""
    premises = pl.DataFrame(
        {"premise_id": ["a", "b", "c"], "cohort": ["n", "n", "s"], "rate_plan_id": ["TOU", "FLAT", "TOU"]}
    )
    table = np.full((1, 1), 1.0)
    assert Candidate("x", "setback", table, ("n",), ("TOU",)).applies(premises).tolist() == [
        True,
        False,
        False,
    ]
    assert Candidate("x", "setback", table, None, ("TOU",)).applies(premises).tolist() == [True, False, True]
    assert Candidate("x", "setback", table).applies(premises).tolist() == [True, True, True]


def test_a_scoped_rule_is_scored_on_its_premises_only():
    """A rule for cohort c only: no rows for the other cohort's premise; its premise rows equal the
    unscoped rule's, and its portfolio is that cohort (same episodes, same per-episode draws)."""
    config = Config(bootstrap_replicates=30, estimators=("weighted_is",), min_ess=1.0, max_weight_share=1.0)
    steps = _logged_steps(config).with_columns(
        pl.when(pl.col("premise_id") == "B").then(pl.lit("d")).otherwise(pl.lit("c")).alias("cohort")
    )
    days = pl.DataFrame(
        {
            "premise_id": ["A", "B"],
            "cohort": ["c", "d"],
            "rate_plan_id": ["TOU", "TOU"],
            "days_observed": [30, 30],
        }
    )
    behavior = CohortCounts(actions=config.actions).fit(steps)
    table = SetbackRule("r", depth_c=2).table(config.state, config.actions, 0.05)
    everyone = Candidate("all", "setback", table)
    scoped = Candidate("only-c", "setback", table, cohorts=("c",))
    savings = evaluate_candidates(steps, behavior, days, config, (everyone, scoped)).savings
    mine = savings.filter(pl.col("policy_name") == "only-c")
    assert set(zip(mine["scope"], mine["key"], strict=True)) == {
        ("premise", "A"),
        ("cohort", "c"),
        ("portfolio", "portfolio"),
    }
    # The exact lower bound is left out: its return range comes from the episodes scored.
    figures = [
        "value_policy_usd",
        "value_behavior_usd",
        "savings_usd_per_episode",
        "ci_low",
        "ci_high",
        "ess",
    ]
    a_all = savings.filter((pl.col("policy_name") == "all") & (pl.col("key") == "A")).select(figures)
    a_mine = mine.filter(pl.col("key") == "A").select(figures)
    np.testing.assert_allclose(a_mine.to_numpy(), a_all.to_numpy(), rtol=1e-12)
    portfolio = mine.filter(pl.col("scope") == "portfolio").select(figures)
    cohort = mine.filter(pl.col("scope") == "cohort").select(figures)
    np.testing.assert_allclose(portfolio.to_numpy(), cohort.to_numpy(), rtol=1e-12)
    assert mine.filter(pl.col("scope") == "portfolio")["n_episodes"].item() == 30


def test_the_digest_changes_with_a_rule():
    """The evaluate stage's build hashes the compiled rules, so editing the rule file recomputes it."""
    config = Config()
    first = rules.candidates_for(config)
    table = first[0].table.copy()
    table[0] = np.roll(table[0], 1)
    changed = (Candidate(first[0].name, "setback", table), *first[1:])
    assert rules.digest(first) == rules.digest(rules.candidates_for(config))
    assert rules.digest(first) != rules.digest(changed)


# ---- malformed files ---------------------------------------------------------------------------

MALFORMED = {
    "not TOML": (
        '[[rule]]\nname = "a\n',
        "not valid TOML: Illegal character '\\n' (at line 2, column 10)",
    ),
    "no rules": ("# nothing yet\n", "no rules: add at least one [[rule]] table"),
    "single brackets": (
        '[rule]\nname = "a"\n',
        "rule must be [[rule]] tables (double brackets), one per rule",
    ),
    "unknown top-level key": (
        '[[rules]]\nname = "a"\n',
        "unknown key 'rules' (did you mean 'rule'?): a rule file holds [[rule]] tables only",
    ),
    "no name": (
        '[[rule]]\nkind = "setback"\ndepth_c = 1\n',
        "rule #1: name is missing: every rule needs a name",
    ),
    "name twice": (
        '[[rule]]\nname = "a"\nkind = "hold"\n[[rule]]\nname = "a"\nkind = "hold"\n',
        "rule 'a': name = \"a\": must be a name no other rule in the file has",
    ),
    "no kind": ('[[rule]]\nname = "a"\n', "rule 'a': kind is missing: must be one of setback, precool, hold"),
    "misspelt kind": (
        '[[rule]]\nname = "a"\nkind = "setbak"\n',
        "rule 'a': kind = \"setbak\": must be one of setback, precool, hold (did you mean 'setback'?)",
    ),
    "misspelt key": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth = 2\n',
        "rule 'a': depth = 2: unknown key for a setback rule (did you mean 'depth_c'?); allowed: name, kind,"
        " description, epsilon, cohorts, rate_plans, depth_c, restore_before_return, start_before_return,"
        " ramp_c",
    ),
    "key of another kind": (
        '[[rule]]\nname = "a"\nkind = "hold"\ndrift_c = 2\n',
        "rule 'a': drift_c = 2: unknown key for a hold rule; allowed: name, kind, description, epsilon,"
        " cohorts, rate_plans, offset_c, restore_before_return",
    ),
    "required key missing": (
        '[[rule]]\nname = "a"\nkind = "setback"\n',
        "rule 'a': depth_c is missing: a setback rule needs depth_c",
    ),
    "negative depth": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = -1\n',
        "rule 'a': depth_c = -1: must be a whole number from 0 to 4 (state.offset_max is 4)",
    ),
    "depth beyond the state space": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = 5\n',
        "rule 'a': depth_c = 5: must be a whole number from 0 to 4 (state.offset_max is 4)",
    ),
    "fractional depth": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = 1.5\n',
        "rule 'a': depth_c = 1.5: must be a whole number from 0 to 4 (state.offset_max is 4)",
    ),
    "true for a number": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = true\n',
        "rule 'a': depth_c = true: must be a whole number from 0 to 4 (state.offset_max is 4)",
    ),
    "epsilon above one": (
        '[[rule]]\nname = "a"\nkind = "hold"\nepsilon = 2\n',
        "rule 'a': epsilon = 2: must be a number from 0 to 1",
    ),
    "cohorts not a list": (
        '[[rule]]\nname = "a"\nkind = "hold"\ncohorts = "north"\n',
        'rule \'a\': cohorts = "north": must be a list of names in quotes, e.g. ["north-tou"]',
    ),
    "start counted from the departure": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = 2\nstart_after_departure = 1\n',
        "rule 'a': start_after_departure = 1: a rule sees the decisions left before the return, not those"
        " since the departure; use start_before_return, or ramp_c to reach the depth gradually after the"
        " departure",
    ),
    "start too late to set back": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = 2\nstart_before_return = 1\n',
        "rule 'a': start_before_return = 1: must be more than restore_before_return + 1 (1), or the setback"
        " never starts",
    ),
    "lead beyond the steps counted": (
        '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = 2\nrestore_before_return = 3\n',
        "rule 'a': restore_before_return = 3: must be a whole number from 0 to 2 (state.steps_left_cap is 4:"
        " a larger lead never lets the setpoint leave comfort)",
    ),
    "peak tier beyond the tiers": (
        '[[rule]]\nname = "a"\nkind = "precool"\nprecool_c = 1\ndrift_c = 2\npeak_tier = 3\n',
        "rule 'a': peak_tier = 3: must be a whole number from 1 to 2 (state.price_tiers is 3)",
    ),
    "precool deeper than the state space": (
        '[[rule]]\nname = "a"\nkind = "precool"\nprecool_c = 2\ndrift_c = 2\n',
        "rule 'a': precool_c = 2: must be a whole number from 1 to 1 (state.offset_min is -1)",
    ),
    "precool tier at the peak": (
        '[[rule]]\nname = "a"\nkind = "precool"\nprecool_c = 1\ndrift_c = 2\nprecool_tier = 2\n',
        "rule 'a': precool_tier = 2: must be a whole number from 0 to 1 (below peak_tier 2)",
    ),
    "a rule that is not a table": ("rule = [1]\n", "rule #1: must be a [[rule]] table"),
}


@pytest.mark.parametrize("case", sorted(MALFORMED))
def test_a_malformed_rule_file_is_refused_with_its_exact_message(tmp_path, case):
    """Each message names the file, the rule (its name, or its number before it has one), the key and what
    is allowed."""
    text, message = MALFORMED[case]
    path = _write(tmp_path, text)
    with pytest.raises(RuleFileError) as error:
        read_rule_file(path, StateSpace(), (-2, -1, 0, 1, 2), 0.05)
    assert str(error.value) == f"{path}: {message}"


def test_a_missing_rule_file_is_named():
    """A candidate_file that does not exist is one line naming it and the setting."""
    with pytest.raises(RuleFileError) as error:
        rules.candidates_for(Config(candidate_file=Path("nowhere/rules.toml")))
    assert str(error.value) == "nowhere/rules.toml: rule file not found (check the candidate_file setting)"


def test_the_command_prints_a_rule_file_mistake_as_one_line_and_exits_2(tmp_path, capsys):
    """thermal-ledger evaluate reads the rule file before anything else: one line on stderr, exit code 2."""
    path = _write(tmp_path, '[[rule]]\nname = "a"\nkind = "setback"\ndepth_c = -1\n')
    code = cli.main(
        [
            "evaluate",
            "--lake",
            str(ROOT / "sample_lake"),
            "--out",
            str(tmp_path / "out"),
            "--set",
            f"candidate_file={path}",
        ]
    )
    err = capsys.readouterr().err
    assert code == 2
    assert err == (
        f"thermal-ledger: {path}: rule 'a': depth_c = -1: must be a whole number from 0 to 4"
        " (state.offset_max is 4)\n"
    )


def test_a_rule_file_is_found_beside_the_settings_file_and_replaces_candidate_tables(tmp_path):
    """candidate_file in a settings file is read from that file's folder; with [[candidate]] tables it is
    refused in one line, since one of them would be ignored."""
    settings = tmp_path / "conf" / "settings.toml"
    settings.parent.mkdir()
    settings.write_text('candidate_file = "rules.toml"\n')
    assert config_module.load(settings).candidate_file == tmp_path / "conf" / "rules.toml"
    settings.write_text('candidate_file = "rules.toml"\n[[candidate]]\nname = "x"\ndepth_c = 1\n')
    with pytest.raises(ConfigError) as error:
        config_module.load(settings)
    assert str(error.value) == (
        f"{settings}: candidate_file='{tmp_path / 'conf' / 'rules.toml'}': replaces the [[candidate]] tables:"
        " give the rules in one place (move them into the rule file)"
    )


def test_the_demo_rule_file_on_the_sample_lake_scores_each_rule_on_its_premises(sample_lake_run, tmp_path):
    """On a copy of the sample lake's warehouse: a rate-plan rule has rows and schedules for that plan's
    premises only, a cohort rule for its cohorts only; the unchanged rule file is reused, an edited one is
    evaluated again."""
    import dataclasses
    import shutil

    from pipeline import stages
    from pipeline.ledger import Run

    shutil.copytree(sample_lake_run.config.out, tmp_path / "out")
    rule_file = tmp_path / "candidates.toml"
    shutil.copy(ROOT / "sample_lake" / "candidates.toml", rule_file)
    config = dataclasses.replace(
        sample_lake_run.config, out=tmp_path / "out", candidate_file=rule_file, schedule_for="every_candidate"
    )
    run = Run(config)
    result = stages.evaluate(config, run)
    stages.finish(config, run, {"evaluate": result})
    assert not result.work.reused
    premises = pl.read_csv(ROOT / "sample_lake" / "landing" / "premises" / "premises.csv")
    tou = set(premises.filter(pl.col("rate_plan_id") == "TOU-SUMMER")["premise_id"])
    ostrel = set(premises.filter(pl.col("cohort").str.starts_with("ostrel"))["premise_id"])
    savings = result.savings.filter(pl.col("scope") == "premise")
    by_rule = {name: set(part["key"]) for (name,), part in savings.group_by(["policy_name"])}
    assert set(by_rule) == {"setback-1", "setback-2", "setback-2-early", "precool-peak", "setback-3-gradual"}
    assert by_rule["precool-peak"] and by_rule["precool-peak"] <= tou
    assert by_rule["setback-3-gradual"] and by_rule["setback-3-gradual"] <= ostrel
    assert by_rule["setback-1"] - tou and by_rule["setback-1"] - ostrel
    precool = result.savings.filter((pl.col("policy_name") == "precool-peak") & (pl.col("scope") == "cohort"))
    assert set(precool["key"]) == {"varrow-tou", "dunmere-tou", "ostrel-tou"}
    schedule = pl.read_parquet(
        config.ledger_path / "schedule" / f"run_date={run.run_date:%Y-%m-%d}" / f"{run.run_id}.parquet"
    )
    assert set(schedule.filter(pl.col("policy_name") == "precool-peak")["premise_id"]) <= tou
    assert set(schedule.filter(pl.col("policy_name") == "setback-3-gradual")["premise_id"]) <= ostrel
    assert schedule["setpoint_c"].is_between(*config.cool_band_c).all()
    assert_schedule_grain(schedule)
    # Every premise with usable episodes has a plan for every rule that applies to it.
    assert set(schedule.filter(pl.col("policy_name") == "setback-1")["premise_id"]) == by_rule["setback-1"]
    files = {p.stem: pl.read_csv(p) for p in stages.schedule_folder(config, run).glob("*.csv")}
    assert set(files) == {"TOU-SUMMER", "FLAT-STD"}
    assert sum(f.height for f in files.values()) == schedule.height
    order = ["premise_id", "policy_name", "mode", "day_type", "outdoor_band", "hour"]
    for plan_id, rows in files.items():
        assert set(rows["premise_id"]) == set(
            schedule.filter(pl.col("rate_plan_id") == plan_id)["premise_id"]
        )
        assert rows.equals(rows.sort(order, nulls_last=False, maintain_order=True))
    again = stages.evaluate(config, Run(config))
    assert again.work.reused
    rule_file.write_text(rule_file.read_text().replace("epsilon = 0.1", "epsilon = 0.2"))
    assert not stages.evaluate(config, Run(config)).work.reused
