"""`thermal-ledger serve`: the cron setting, the deployment Prefect keeps, a hand-triggered run, no server."""

from __future__ import annotations

import os
import re
import socket
import subprocess
import sys
from pathlib import Path

import pytest

from pipeline import config as config_module
from pipeline import stages, store
from pipeline.cli import main
from pipeline.config import ConfigError
from pipeline.cron import CronError, check_cron

ROOT = Path(__file__).resolve().parent.parent

# Verdicts on which this check and Prefect's own cron validator (the reference) must agree.
AGREED = [
    ("0 4 1 * *", True),
    ("*/15 * * * *", True),
    ("0 22 * * mon-fri", True),
    ("30 6 1,15 jan-mar,oct *", True),
    ("0 0 * * 7", True),  # 7 is Sunday as well as 0 (crontab(5))
    ("0-30/10 8-18/2 * * *", True),
    ("@monthly", True),
    ("@hourly", True),
    ("0 4 32 * *", False),
    ("60 * * * *", False),
    ("0 24 * * *", False),
    ("0 0 0 * *", False),
    ("* * * 13 *", False),
    ("* * * * 8", False),
    ("*/0 * * * *", False),
    ("1-5/ * * * *", False),
    ("0 4 * *", False),
    ("monthly", False),
    ("", False),
]

# Accepted by Prefect's wider dialect but refused here, on purpose.
NARROWER = [
    ("0 0 30 2 *", "never fires"),  # February has at most 29 days, so this schedule never comes
    ("5/15 * * * *", "a step needs"),  # not in the classic grammar; readers differ on its meaning
    ("0 4 L * *", "not a number"),  # 'last day' is an extension
    ("0 4 1 * * 0", "has 6 field(s)"),  # a sixth (seconds) field is an extension
    ("0 4 * * 5-1", "runs backwards"),
]


def _prefect_accepts(text: str) -> bool:
    from prefect.client.schemas.schedules import CronSchedule

    try:
        CronSchedule(cron=text)
    except ValueError:
        return False
    return True


@pytest.mark.parametrize("text, valid", AGREED)
def test_cron_check_agrees_with_prefects_validator(text, valid):
    """On classic five-field cron text the check accepts exactly what Prefect's CronSchedule accepts."""
    assert _prefect_accepts(text) is valid
    if valid:
        assert check_cron(text) == text
    else:
        with pytest.raises(CronError):
            check_cron(text)


@pytest.mark.parametrize("text, reason", NARROWER)
def test_cron_check_refuses_extensions_and_schedules_that_never_fire(text, reason):
    """Text Prefect takes but that never fires, or that other cron readers read differently, is refused."""
    assert _prefect_accepts(text)
    with pytest.raises(CronError, match=re.escape(reason)):
        check_cron(text)


def test_a_bad_cron_setting_is_one_line_naming_the_setting(tmp_path):
    """serve_cron from a file, --set or --cron is refused in one line naming where it came from."""
    path = tmp_path / "s.toml"
    path.write_text('serve_cron = "0 4 31 4 *"\n')
    with pytest.raises(ConfigError) as error:
        config_module.load(path)
    assert str(error.value) == f"{path}: serve_cron='0 4 31 4 *': never fires: no month selected has day 31"
    with pytest.raises(ConfigError, match=r"^--set serve_cron='0 25 \* \* \*': hour 25 is outside 0-23; "):
        config_module.load(overrides={"serve_cron": "0 25 * * *"})
    with pytest.raises(ConfigError, match=r"^--set serve_timezone='Mars/Olympus': must be an IANA time zone"):
        config_module.load(overrides={"serve_timezone": "Mars/Olympus"})


def test_serve_refuses_a_bad_cron_or_name_before_touching_prefect(tmp_path, capsys):
    """`serve --cron` with an impossible day, or a name with '/', exits 2 with one line on stderr."""
    lake = _lake(tmp_path)
    code = main(["serve", "--lake", str(lake), "--cron", "0 4 32 * *"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert err.startswith(
        "thermal-ledger: --cron '0 4 32 * *': day of month 32 is outside 1-31; cron text is"
    )
    code = main(["serve", "--lake", str(lake), "--name", "monthly/a"])
    err = capsys.readouterr().err
    assert (
        code == 2
        and err == "thermal-ledger: --name monthly/a: must be a non-empty name without any of / % & < >\n"
    )


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.parametrize("api_url", ["unreachable", "unset"])
def test_serve_without_a_prefect_api_says_how_to_start_one(tmp_path, api_url):
    """With no server at PREFECT_API_URL, or none set, serve exits 2 with one line and no traceback."""
    lake = _lake(tmp_path)
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    env["PREFECT_HOME"] = str(tmp_path / "prefect_home")  # no profile of the machine's user
    if api_url == "unreachable":
        env["PREFECT_API_URL"] = f"http://127.0.0.1:{_free_port()}/api"
    done = subprocess.run(
        [sys.executable, "-m", "pipeline.cli", "serve", "--lake", str(lake), "--out", str(tmp_path / "out")],
        capture_output=True,
        text=True,
        cwd=ROOT,
        env=env,
        timeout=120,
    )
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr and done.stderr.count("\n") == 1, done.stderr
    assert "`prefect server start`" in done.stderr and "PREFECT_API_URL" in done.stderr
    if api_url == "unreachable":
        assert env["PREFECT_API_URL"] in done.stderr
    assert not (tmp_path / "out").exists()


# ---- with Prefect's test server -----------------------------------------------------------------

FAST = {"bootstrap_replicates": 50, "behavior_types": 1, "behavior_prior_strength": 5.0}
"""Settings that keep a run of the tiny lake quick (no held-out search); they shape nothing checked here."""


def _lake(root: Path) -> Path:
    from pipeline.simulate import generate_lake

    lake = root / "lake"
    generate_lake(lake, n_premises=4, days=7, seed=3)
    return lake


@pytest.fixture(scope="module")
def served(prefect_harness, tmp_path_factory):
    """`thermal-ledger serve` run from a folder of its own, with Prefect's blocking serve replaced by
    registering the deployment (its `apply`); the first ledger run made directly; the settings file."""
    import flows.serve as serving

    root = tmp_path_factory.mktemp("serve")
    _lake(root)
    settings = root / "settings.toml"
    settings.write_text('serve_timezone = "America/Chicago"\n')
    registered = []
    mp = pytest.MonkeyPatch()
    mp.setattr(
        serving, "prefect_serve", lambda *deployments: registered.extend(d.apply() for d in deployments)
    )
    mp.chdir(root)
    argv = ["serve", "--lake", "lake", "--out", "out", "--config", "settings.toml", "--cron", "15 3 2 * *"]
    argv += ["--name", "monthly-test"]
    for key, value in FAST.items():
        argv += ["--set", f"{key}={value}"]
    try:
        code = main(argv)
    finally:
        mp.undo()
    config = config_module.load(settings, {**FAST, "lake": str(root / "lake"), "out": str(root / "out")})
    first = stages.run_all(config)
    return root, code, registered, first


def test_serve_registers_the_deployment_with_its_schedule_and_parameters(served):
    """Read back through Prefect's client: the cron, its time zone, the config path and the overrides."""
    from prefect.client.orchestration import get_client

    root, code, registered, _ = served
    assert code == 0 and len(registered) == 1
    with get_client(sync_client=True) as client:
        deployment = client.read_deployment_by_name("thermal-ledger-run/monthly-test")
    assert deployment.id == registered[0]
    assert [(s.schedule.cron, s.schedule.timezone, s.active) for s in deployment.schedules] == [
        ("15 3 2 * *", "America/Chicago", True)
    ]
    assert deployment.parameters == {
        "config_path": str(root / "settings.toml"),
        "overrides": {**FAST, "lake": str(root / "lake"), "out": str(root / "out")},
    }
    assert deployment.entrypoint == "flows.thermal_run.thermal_ledger_run"


def test_a_run_triggered_by_hand_adds_a_run_and_keeps_the_first_readable(served):
    """A flow run made from the deployment and executed here writes a second run's ledger files; the
    analysts' views then hold both runs, the first one's rows unchanged, and *_latest the second only."""
    from prefect.deployments import run_deployment
    from prefect.flow_engine import load_flow_and_flow_run, run_flow

    root, _, _, first = served
    ledger = root / "out" / "ledger"
    before = store.connect_ledger(ledger).execute("select * from savings order by all").fetchall()
    assert before

    scheduled = run_deployment("thermal-ledger-run/monthly-test", timeout=0)
    assert scheduled.state.is_scheduled()
    flow_run, flow = load_flow_and_flow_run(scheduled.id)
    state = run_flow(flow, flow_run=flow_run, return_type="state")
    assert state.is_completed(), state.message
    second = state.result()

    con = store.connect_ledger(ledger)
    runs = con.execute("select run_id from run order by finished_at").fetchall()
    assert runs == [(first.run_id,), (second.run_id,)]
    assert len(list((ledger / "savings").glob("run_date=*/*.parquet"))) == 2
    kept = con.execute("select * from savings where run_id = ? order by all", [first.run_id]).fetchall()
    assert kept == before
    latest = con.execute("select distinct run_id from savings_latest").fetchall()
    assert latest == [(second.run_id,)]
    assert con.execute("select count(*) from savings_by_premise").fetchall()[0][0] > 0
    # The served run read the settings file: its run record carries the file's time zone and the overrides.
    config = con.execute("select config from run where run_id = ?", [second.run_id]).fetchall()[0][0]
    assert '"serve_timezone": "America/Chicago"' in config and '"bootstrap_replicates": 50' in config
