"""Shared fixtures: a tiny landing folder writer, one sample-lake run and one Prefect harness per session."""

from __future__ import annotations

import textwrap
from pathlib import Path
from types import SimpleNamespace

import pytest

from pipeline import config as config_module
from pipeline.config import Config

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"


def write_landing(root: Path, files: dict[str, str]) -> Path:
    """Write ``{"meter/m.csv": "csv text", ...}`` under ``root/landing``; return ``root``."""
    for name, text in files.items():
        path = root / "landing" / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text).lstrip())
    return root


def lake_config(root: Path, **overrides) -> Config:
    """A Config reading ``root`` as the lake and writing under ``root/out``."""
    return config_module.load(overrides={"lake": str(root), "out": str(root / "out"), **overrides})


@pytest.fixture(scope="session")
def sample_lake_run(tmp_path_factory):
    """Every stage run once on the committed sample lake: ``.config`` and the run ``.summary``."""
    from pipeline import stages

    out = tmp_path_factory.mktemp("sample_lake_out")
    # Only homes with presence sensing: their episodes are exactly the simulator's.
    config = config_module.load(
        overrides={"lake": str(SAMPLE_LAKE), "out": str(out), "presence_sources": ["occupancy_flag"]}
    )
    return SimpleNamespace(config=config, summary=stages.run_all(config))


@pytest.fixture(scope="session")
def prefect_harness():
    """Prefect's temporary server, started once for the whole session (it costs ~15 s)."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield
