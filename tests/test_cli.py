"""The thermal-ledger command: help, exit codes, and the seeded simulator entry."""

from __future__ import annotations

import hashlib

import pytest

from pipeline.cli import EXIT_OK, EXIT_REFUSED, EXIT_USAGE, main
from tests.conftest import write_landing

STAGES = ("ingest", "episodes", "learn", "evaluate", "run", "simulate")


@pytest.mark.parametrize("stage", STAGES)
def test_every_stage_explains_its_options(stage, capsys):
    """``--help`` on each subcommand prints its options and exits 0."""
    with pytest.raises(SystemExit) as done:
        main([stage, "--help"])
    assert done.value.code == 0
    assert "--out" in capsys.readouterr().out


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
