"""The wheel ships every package and SQL file, and an installed copy runs from any folder."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal

from pipeline import stages
from pipeline.config import load

ROOT = Path(__file__).resolve().parent.parent
SAMPLE_LAKE = ROOT / "sample_lake"
SETTINGS = {"bootstrap_replicates": 40}


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    # Built from a copy: setuptools reuses an in-tree build/ folder, which may hold stale modules.
    source = tmp_path_factory.mktemp("source") / "thermal-ledger"
    skip = shutil.ignore_patterns(".*", "build", "out", "bench_out", "*.egg-info", "__pycache__")
    shutil.copytree(ROOT, source, ignore=skip)
    pip = [sys.executable, "-m", "pip", "wheel", "--quiet", "--no-deps", "--no-build-isolation"]
    subprocess.run([*pip, "-w", out, source], check=True, capture_output=True)
    (built,) = out.glob("thermal_ledger-*.whl")
    return built


def _checkout_packages() -> set[str]:
    return {
        init.parent.relative_to(ROOT).as_posix()
        for top in ("pipeline", "flows")
        for init in (ROOT / top).rglob("__init__.py")
    }


def test_wheel_holds_every_package_and_sql_file(wheel):
    """Every package and module of the checkout, and each sql/*.sql as pipeline/sql/, is in the wheel."""
    names = set(zipfile.ZipFile(wheel).namelist())
    for package in _checkout_packages():
        assert f"{package}/__init__.py" in names, package
    for sql in (ROOT / "sql").glob("*.sql"):
        assert f"pipeline/sql/{sql.name}" in names, sql.name
    modules = {
        p.relative_to(ROOT).as_posix() for top in ("pipeline", "flows") for p in (ROOT / top).rglob("*.py")
    }
    assert modules <= names


def _savings(out: Path) -> pl.DataFrame:
    # One run: the candidates' file and the improve stage's learned rows beside it.
    paths = sorted((out / "ledger" / "savings").rglob("*.parquet"))
    assert len(paths) == 2, paths
    frame = pl.concat([pl.read_parquet(p) for p in paths], how="diagonal_relaxed")
    return frame.drop("run_id").sort("scope", "key", "mode", "policy_name", "estimator")


def test_installed_copy_runs_from_another_folder_and_matches_the_checkout(wheel, tmp_path):
    """The unpacked wheel, run from an unrelated folder, writes the same savings as the checkout's code."""
    site = tmp_path / "site"
    zipfile.ZipFile(wheel).extractall(site)
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    env = {**os.environ, "PYTHONPATH": str(site)}
    located = subprocess.run(
        [
            sys.executable,
            "-c",
            "import pipeline, pipeline.store as s; print(pipeline.__file__); print(s.SQL_DIR)",
        ],
        cwd=elsewhere,
        env=env,
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split()
    assert all(Path(p).is_relative_to(site) for p in located), located
    installed_out = tmp_path / "installed"
    args = ["run", "--no-prefect", "--lake", str(SAMPLE_LAKE), "--out", str(installed_out)]
    args += [f"--set={k}={v}" for k, v in SETTINGS.items()]
    done = subprocess.run(
        [sys.executable, "-m", "pipeline.cli", *args], cwd=elsewhere, env=env, capture_output=True, text=True
    )
    assert done.returncode == 0, done.stderr[-2000:]
    checkout_out = tmp_path / "checkout"
    stages.run_all(load(overrides={"lake": str(SAMPLE_LAKE), "out": str(checkout_out), **SETTINGS}))
    installed, checkout = _savings(installed_out), _savings(checkout_out)
    assert installed.height > 0
    # Equal to rounding: numpy's vector sums may add in another order when arrays sit at other
    # memory alignments, so two processes can differ in the last bits of a float.
    assert_frame_equal(installed, checkout, check_exact=False, rel_tol=1e-9, abs_tol=1e-12)
