"""Stages run in order on current inputs, refuse stale ones, and leave the warehouse whole when they fail."""

from __future__ import annotations

import dataclasses
import json
import pickle
from datetime import date

import pytest

from pipeline import stages, store
from pipeline.cli import EXIT_USAGE, main
from pipeline.ledger import Run
from pipeline.simulate import generate_lake
from tests.conftest import lake_config
from tests.grain import assert_grain

FAST = {"bootstrap_replicates": 20, "behavior_types": 2, "behavior_prior_strength": 5.0}


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """A small simulated lake run through every stage once."""
    root = tmp_path_factory.mktemp("stages")
    generate_lake(root, n_premises=8, seed=11, start=date(2026, 7, 1), days=21)
    config = lake_config(root, **FAST)
    stages.run_all(config)
    return root, config


def _cli(root, stage: str, *settings: str) -> int:
    args = [stage, "--lake", str(root), "--out", str(root / "out")]
    for key, value in FAST.items():
        args += ["--set", f"{key}={value}"]
    for item in settings:
        args += ["--set", item]
    return main(args)


def _tables(config) -> dict[str, list[tuple]]:
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        return {
            name: con.execute(f"select * from {name} order by all").fetchall()
            for name in ("hourly", "episode", "step", "behavior_policy", "stage_build")
        }


@pytest.mark.parametrize(
    ("setting", "stage"),
    [
        ("recovery_hours=3", "episodes"),
        ("comfort_penalty_usd_per_degree_hour=0", "episodes"),
        ("decision_points='fixed'", "episodes"),
        ("behavior_model='counts'", "learn"),
    ],
)
def test_evaluate_refuses_a_setting_its_inputs_were_not_built_with(built, capsys, setting, stage):
    """evaluate with a setting that shapes an earlier stage exits 2 naming the setting and stage to rerun."""
    root, _ = built
    assert _cli(root, "evaluate", setting) == EXIT_USAGE
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert setting.split("=")[0] in err and f"thermal-ledger {stage}" in err


def test_a_stage_refuses_inputs_made_from_an_earlier_build(built, capsys):
    """Once episodes is rebuilt, evaluate refuses the old episodes' behaviour model until learn reruns."""
    root, config = built
    assert _cli(root, "episodes", "recovery_hours=2") == 0
    assert _cli(root, "evaluate", "recovery_hours=2") == EXIT_USAGE
    assert "rerun `thermal-ledger learn`" in capsys.readouterr().err
    assert _cli(root, "learn", "recovery_hours=2") == 0
    assert _cli(root, "improve", "recovery_hours=2") == 0
    assert _cli(root, "evaluate", "recovery_hours=2") == 0
    assert _cli(root, "episodes") == 0
    assert _cli(root, "learn") == 0
    assert _cli(root, "improve") == 0
    assert _cli(root, "evaluate") == 0


def test_stages_out_of_order_name_the_command_to_run(tmp_path, capsys):
    """A stage run before the ones it reads (no warehouse, no episodes yet) exits 2 naming what to run."""
    generate_lake(tmp_path, n_premises=2, seed=3, start=date(2026, 7, 1), days=3)
    assert _cli(tmp_path, "evaluate") == EXIT_USAGE
    assert "run `thermal-ledger ingest" in capsys.readouterr().err
    assert _cli(tmp_path, "ingest") == 0
    capsys.readouterr()
    assert _cli(tmp_path, "learn") == EXIT_USAGE
    assert "run `thermal-ledger episodes` first" in capsys.readouterr().err


def test_a_failed_stage_leaves_the_warehouse_as_it_was(built, monkeypatch):
    """An episode build failing after it re-pointed the grid at new shards rolls back; evaluate runs."""
    _, config = built
    before = _tables(config)

    def fail(*_args, **_kwargs):
        raise RuntimeError("disk full")

    # The views hourly, episode and step already read the new shards when the counts are taken.
    monkeypatch.setattr(stages, "episode_counts", fail)
    with pytest.raises(RuntimeError, match="disk full"):
        stages.episodes(dataclasses.replace(config, recovery_hours=2, min_episode_hours=4), Run(config))
    monkeypatch.undo()
    assert _tables(config) == before
    assert stages.evaluate(config, Run(config)).savings.height > 0


def test_stage_results_and_the_run_pickle(built):
    """Stage results and the run identity survive pickling (stages may run on other workers)."""
    _, config = built
    run = Run(config)
    result = stages.learn(config, run)
    again = pickle.loads(pickle.dumps((run, result)))
    assert again[0].run_id == run.run_id and again[1].rows == result.rows


def test_the_run_record_counts_every_table_the_stages_wrote(built):
    """The run table's row counts are exactly those each stage's result reports."""
    _, config = built
    summary = stages.run_all(config)
    con = store.connect_ledger(config.ledger_path)
    (counts,) = con.execute(
        "select row_counts from run where run_id = $id", {"id": summary.run_id}
    ).fetchall()[0]
    recorded = json.loads(counts)
    assert recorded["savings"] == summary.evaluation.savings.height
    assert recorded["step"] == summary.episodes.steps
    assert {"episode_summary", "behavior_policy", "behavior_type", "horizon", "policy"} <= recorded.keys()


@pytest.mark.parametrize(
    ("table", "keys"),
    [
        ("episode_summary", ["run_id", "episode_id"]),
        ("state_lookup", ["run_id", "state_key"]),
        ("behavior_policy", ["run_id", "scope", "key", "mode", "state_key", "action"]),
        ("behavior_type", ["run_id", "mode", "premise_id", "habit_type"]),
        ("run", ["run_id"]),
    ],
)
def test_ledger_tables_of_the_episode_and_learn_stages_hold_their_grain(built, table, keys):
    """Each ledger table the episodes and learn stages write has unique, non-null keys across runs."""
    _, config = built
    assert_grain(store.connect_ledger(config.ledger_path), table, keys)


@pytest.mark.parametrize(
    ("table", "keys"),
    [
        ("behavior_policy", ["scope", "key", "mode", "state_key", "action"]),
        ("behavior_type", ["mode", "premise_id", "habit_type"]),
        ("behavior_fixed_policy", ["scope", "key", "mode", "state_key", "action"]),
        ("stage_build", ["stage"]),
    ],
)
def test_warehouse_tables_of_the_learn_stage_hold_their_grain(built, table, keys):
    """The warehouse's behaviour model (both decision-point choices) and build records have their grain."""
    _, config = built
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert_grain(con, table, keys)


def test_behaviour_probabilities_in_the_warehouse_sum_to_one_per_state(built):
    """Every stored behaviour row set is a distribution over the action set, for every scope and state."""
    _, config = built
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        worst = con.execute(
            "select max(abs(total - 1)) from (select sum(probability) as total from behavior_policy"
            " group by scope, key, mode, state_key)"
        ).fetchall()[0][0]
    assert worst < 1e-9
