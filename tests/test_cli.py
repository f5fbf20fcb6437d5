"""The thermal-ledger command: help, exit codes, and the seeded simulator entry."""

from __future__ import annotations

import hashlib
from pathlib import Path

import polars as pl
import pytest

from pipeline import stages
from pipeline.cli import EXIT_OK, EXIT_REFUSED, EXIT_USAGE, main, print_episodes, print_evaluation
from tests.conftest import write_landing

STAGES = ("ingest", "episodes", "learn", "evaluate", "improve", "run", "serve", "simulate")


@pytest.mark.parametrize("stage", STAGES)
def test_every_stage_explains_its_options(stage, capsys):
    """``--help`` on each subcommand prints its options and exits 0."""
    with pytest.raises(SystemExit) as done:
        main([stage, "--help"])
    assert done.value.code == 0
    out = capsys.readouterr().out
    assert "--out" in out
    if stage != "simulate":
        assert "SETTINGS.md" in out


def _digests(root):
    return {
        p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(root.rglob("*"))
        if p.is_file()
    }


def test_simulate_is_reproducible_bit_for_bit_from_its_seed(tmp_path):
    """Two runs of ``simulate`` with the same seed write identical files."""
    args = ["simulate", "--premises", "3", "--days", "7", "--seed", "11"]
    assert main([*args, "--out", str(tmp_path / "a")]) == EXIT_OK
    assert main([*args, "--out", str(tmp_path / "b")]) == EXIT_OK
    first = _digests(tmp_path / "a")
    assert first and first == _digests(tmp_path / "b")


def test_simulate_chunk_premises_reaches_the_simulator_and_leaves_the_files_unchanged(tmp_path, monkeypatch):
    """``--chunk-premises 1`` simulates one home at a time and writes the same bytes as the default chunk."""
    from pipeline.simulate import lake

    seen, real = [], lake.generate_lake

    def spy(*args, **kwargs):
        seen.append(kwargs["chunk_premises"])
        return real(*args, **kwargs)

    monkeypatch.setattr(lake, "generate_lake", spy)
    args = ["simulate", "--premises", "3", "--days", "7", "--seed", "11"]
    assert main([*args, "--out", str(tmp_path / "one"), "--chunk-premises", "1"]) == EXIT_OK
    assert main([*args, "--out", str(tmp_path / "default")]) == EXIT_OK
    assert seen == [1, lake.CHUNK_PREMISES]
    assert _digests(tmp_path / "one") == _digests(tmp_path / "default")


@pytest.mark.parametrize("flag", ["--chunk-premises", "--premises", "--days"])
@pytest.mark.parametrize("value", ["0", "-2"])
def test_simulate_refuses_counts_below_one_in_one_line(tmp_path, capsys, flag, value):
    """A chunk size, number of homes or days below one exits 2, one line naming the flag; no files."""
    code = main(["simulate", "--premises", "2", "--days", "2", flag, value, "--out", str(tmp_path / "lake")])
    assert code == EXIT_USAGE
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"thermal-ledger simulate: {flag} {value}: must be at least 1"]
    assert not (tmp_path / "lake").exists()


def test_ingest_exits_non_zero_when_a_file_is_refused(tmp_path, capsys):
    """A meter file without its kWh column is refused: exit code 1 and a message naming file and column."""
    lake = write_landing(tmp_path, {"meter/m.csv": "premise_id,interval_start,interval_minutes\nP1,x,15\n"})
    code = main(["ingest", "--lake", str(lake), "--out", str(tmp_path / "out")])
    assert code == EXIT_REFUSED
    out = capsys.readouterr().out
    assert "landing/meter/m.csv" in out and "'kwh' or 'wh'" in out


def test_unknown_setting_is_a_usage_error(tmp_path, capsys):
    """A misspelt --set key is refused with exit code 2 rather than silently ignored."""
    code = main(["ingest", "--lake", str(tmp_path), "--out", str(tmp_path / "o"), "--set", "recovry_hours=2"])
    assert code == EXIT_USAGE
    assert "recovry_hours" in capsys.readouterr().err


@pytest.mark.parametrize(
    "setting",
    ["behavior_model=mixture", "behavior_types=0", "behavior_types=2.5", "behavior_prior_strength=-1"],
)
def test_unusable_behaviour_settings_are_usage_errors(tmp_path, capsys, setting):
    """A behaviour model, number of types or strength out of range exits 2 and names the setting."""
    code = main(["learn", "--lake", str(tmp_path), "--out", str(tmp_path / "o"), "--set", setting])
    assert code == EXIT_USAGE
    assert setting.split("=")[0] in capsys.readouterr().err


# A settings file for the table below: "NAME" is replaced by the file's contents.
_FILES = {
    "typo.toml": "recovery_hour = 2\n",
    "folder.toml": '[columns.meters]\nkwh = "usage_kwh"\n',
    "column.toml": '[columns.meter]\nkwhh = "usage_kwh"\n',
    "state.toml": "[state]\nprice_tierz = 2\n",
    "candidate.toml": '[[candidate]]\nname = "deep"\ndepht = 3\n',
    "broken.toml": "recovery_hours = = 2\n",
    "band.toml": "heat_band_c = [23, 13]\n",
}

BAD = [
    (
        ["--set", "decision_points=anchord"],
        "decision_points='anchord': must be one of 'fixed', 'anchored' (did you mean 'anchored'?)",
    ),
    (["--set", "cool_band_c=[30, 22]"], "cool_band_c=[30, 22]: must be [low, high] °C with low < high"),
    (["--config", "band.toml"], "band.toml: heat_band_c=[23, 13]: must be [low, high]"),
    (["--set", "min_ess=-1"], "min_ess=-1: must be >= 0"),
    (["--set", "min_episode_hours=-3"], "min_episode_hours=-3: must be >= 1"),
    (["--set", "max_episode_hours=2"], "max_episode_hours=2: must be >= min_episode_hours (3)"),
    (["--set", "cooling_days_per_year=-1"], "cooling_days_per_year=-1: must be >= 1"),
    (["--set", "cooling_days_per_year=400"], "cooling_days_per_year=400: must be <= 366"),
    (["--set", "recovery_hours=-1"], "recovery_hours=-1: must be >= 0"),
    (["--set", "confidence=1.5"], "confidence=1.5: must be < 1"),
    (["--set", "target_epsilon=1.5"], "target_epsilon=1.5: must be <= 1"),
    (["--set", "max_weight_share=0"], "max_weight_share=0: must be > 0"),
    (["--set", "bootstrap_replicates=0"], "bootstrap_replicates=0: must be >= 1"),
    (["--set", "step_hours=1.5"], "step_hours=1.5: must be a whole number"),
    (["--set", "comfort_penalty_usd_per_degree_hour=-0.1"], "must be >= 0"),
    (["--set", "behavior_floor=0.5"], "behavior_floor=0.5: must be below 1 / 5 actions"),
    (["--set", "actions=[1, 2]"], "including 0"),
    (["--set", "schedule_away_hours=[17, 8]"], "schedule_away_hours=[17, 8]: must be [from, to]"),
    (["--set", "setback_hold_hours=[6, 30]"], "item 2 (30) must be <= 24"),
    (["--set", 'presence_sources=["occupancy"]'], "(did you mean 'occupancy_flag'?)"),
    (["--set", "comfort_penalty_basis=inside"], "must be one of 'setpoint', 'indoor'"),
    (["--set", "recommended_estimator=ordinary_is"], "must be one of estimators"),
    (["--set", 'estimators=["weighted_is", "wis"]'], "item 2 ('wis') must be one of"),
    (["--set", "state.hour_bucket_hours=5"], "state.hour_bucket_hours=5: must be a divisor of 24"),
    (["--set", "recovery_hours"], "--set recovery_hours: must look like key=value"),
    (["--seed", "-1"], "--seed -1: must be >= 0"),
    (
        ["--config", "typo.toml"],
        "typo.toml: unknown setting 'recovery_hour' (did you mean 'recovery_hours'?)",
    ),
    (["--config", "folder.toml"], "unknown landing folder 'meters' in [columns] (did you mean 'meter'?)"),
    (["--config", "column.toml"], "[columns.meter]: unknown canonical column 'kwhh' (did you mean 'kwh'?)"),
    (["--config", "state.toml"], "unknown [state] key 'price_tierz' (did you mean 'price_tiers'?)"),
    (["--config", "candidate.toml"], "[[candidate]] 1: unknown key 'depht' (did you mean 'depth_c'?)"),
    (["--config", "broken.toml"], "broken.toml: not valid TOML"),
    (["--config", "absent.toml"], "absent.toml: settings file not found"),
]


@pytest.mark.parametrize("stage", ["learn", "run"])
@pytest.mark.parametrize("extra, message", BAD)
def test_unusable_settings_are_one_line_and_exit_2(tmp_path, monkeypatch, capsys, stage, extra, message):
    """Each bad setting exits 2 with one line naming source, key, value and what is allowed; no traceback."""
    monkeypatch.chdir(tmp_path)
    for name, text in _FILES.items():
        Path(name).write_text(text)
    lake = write_landing(tmp_path / "lake", {"premises/p.csv": "premise_id\n"})
    argv = [stage, "--lake", str(lake), "--out", str(tmp_path / "out"), *extra]
    code = main([*argv, "--no-prefect"] if stage == "run" else argv)
    captured = capsys.readouterr()
    assert code == EXIT_USAGE
    assert "Traceback" not in captured.out + captured.err
    assert captured.out == ""
    assert captured.err.count("\n") == 1 and captured.err.startswith("thermal-ledger: ")
    assert message in captured.err


@pytest.mark.parametrize(
    "argv, message",
    [
        (["run", "--no-prefect", "--lake", "missing"], "--lake missing: no landing/ folder there"),
        (["ingest", "--lake", "missing"], "--lake missing: no landing/ folder there"),
        (["episodes"], "no warehouse at "),
        (["learn"], "no warehouse at "),
        (["evaluate"], "no warehouse at "),
        (["improve"], "no warehouse at "),
        (["truth"], "no warehouse at "),
    ],
)
def test_a_stage_that_cannot_run_says_what_to_run(tmp_path, monkeypatch, capsys, argv, message):
    """A missing lake or warehouse exits 2 with one line naming the problem and the command to run first."""
    monkeypatch.chdir(tmp_path)
    code = main([*argv, "--out", str(tmp_path / "out")])
    captured = capsys.readouterr()
    assert code == EXIT_USAGE
    assert "Traceback" not in captured.out + captured.err
    assert captured.err.count("\n") == 1 and message in captured.err
    assert "thermal-ledger" in captured.err.split(":", 1)[1]


def test_demo_on_a_missing_lake_prints_one_line_under_prefect(prefect_harness, tmp_path, capfd):
    """`make demo LAKE=missing` (the Prefect run) prints one line and exits 2, before any flow starts."""
    code = main(["run", "--lake", str(tmp_path / "missing"), "--out", str(tmp_path / "out")])
    captured = capfd.readouterr()
    assert code == EXIT_USAGE
    assert captured.out == ""
    assert captured.err.splitlines() == [
        f"thermal-ledger: --lake {tmp_path / 'missing'}: no landing/ folder there; give the folder that holds"
        " landing/ (e.g. thermal-ledger run --lake sample_lake)"
    ]


@pytest.fixture(scope="module")
def prefect_logging(prefect_harness):
    """Prefect sets up its log handlers at the first flow run; do that here, on pytest's session streams.

    Set up inside a test, they would keep writing to that test's capture after it is closed.
    """
    from prefect import flow

    @flow(name="nothing")
    def nothing() -> None:
        return None

    nothing()


def test_a_stage_failing_inside_the_flow_ends_in_one_line_without_traceback(
    prefect_logging, tmp_path, capsys, caplog
):
    """A user error in a task (no meter files) ends a Prefect run in one line, exit 2, no traceback."""
    lake = write_landing(tmp_path, {"premises/p.csv": "premise_id\n"})
    code = main(["run", "--lake", str(lake), "--out", str(tmp_path / "out")])
    captured = capsys.readouterr()
    assert code == EXIT_USAGE
    ours = [line for line in captured.err.splitlines() if line.startswith("thermal-ledger:")]
    assert len(ours) == 1 and ours[0].startswith("thermal-ledger: no meter files")
    failed = [r for r in caplog.records if "NoMeterFiles" in r.getMessage()]
    assert failed, "Prefect logged the failed task and flow"
    assert "Traceback" not in captured.out + captured.err + caplog.text


def test_settings_subcommand_prints_the_committed_reference(capsys):
    """`thermal-ledger settings` off a terminal prints the markdown committed as SETTINGS.md."""
    assert main(["settings"]) == EXIT_OK
    assert capsys.readouterr().out == (Path(__file__).resolve().parent.parent / "SETTINGS.md").read_text()


_LABELS = ("away episodes used", "decision steps", "decisions per used episode", "presence_source_not_used")


def test_episode_summary_is_a_labelled_table(capsys):
    """The episodes stage prints plain labels and counts, without colour codes or a dataclass repr."""
    counts = stages.EpisodeCounts(
        hours=48, episodes=5, episodes_used=4, steps=12, clipped_actions=0,
        excluded={"presence_source_not_used": 1}, mean_decisions=3.0, weekday_episodes_per_weekday=0.8,
    )  # fmt: skip
    print_episodes(counts)
    out = capsys.readouterr().out
    assert all(label in out for label in _LABELS)
    assert "EpisodeCounts(" not in out and "\x1b[" not in out


def test_evaluation_summary_shows_portfolio_and_cohort_and_points_to_premise_rows(capsys):
    """Portfolio and cohort rows are printed with unwrapped headers; premise rows are counted and located."""
    row = {
        "policy_name": "setback-2", "mode": "cool", "estimator": "weighted_is", "recommended": True,
        "status": "ok", "n_episodes": 40, "savings_usd_per_episode": 0.12, "ci_low": -0.01, "ci_high": 0.25,
        "lower_bound_usd": -0.3, "ess": 22.5, "savings_usd_annual": 14.6,
    }  # fmt: skip
    scopes = [("portfolio", "portfolio"), ("cohort", "town-tou"), ("premise", "P1"), ("premise", "P2")]
    savings = pl.DataFrame([{**row, "scope": s, "key": k} for s, k in scopes])
    horizon = pl.DataFrame(
        {"decision_points": ["anchored"], "mode": ["cool"], "policy_name": ["setback-2"],
         "mean_decisions": [3.0], "ess": [22.5], "ess_share": [0.5], "max_weight_share": [0.1]}
    )  # fmt: skip
    print_evaluation(stages.EvaluationSummary(savings, horizon), 0.9)
    out = capsys.readouterr().out
    assert "\x1b[" not in out
    header = next(line for line in out.splitlines() if "savings USD/episode" in line)
    assert all(label in header for label in ("interval low USD", "lower bound USD", "USD/premise/year"))
    assert "90% interval" in out and "town-tou" in out and "weighted_is *" in out
    assert "P1" not in out and "2 premise rows (2 premises) not shown" in out and "savings_by_premise" in out
