"""Typed run configuration: one TOML file, overridable from the command line.

Every stage receives a ``Config``; nothing reads settings from globals or the
environment. Unknown keys are refused so that a typo never silently falls back
to a default.
"""

from __future__ import annotations

import dataclasses
import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, SetbackRule


class ConfigError(ValueError):
    """A configuration file or override that cannot be used."""


def _default_candidates() -> tuple[SetbackRule, ...]:
    return (
        SetbackRule("setback-1", depth_c=1, lead_steps=0),
        SetbackRule("setback-2", depth_c=2, lead_steps=0),
        SetbackRule("setback-2-early", depth_c=2, lead_steps=1),
    )


@dataclass(frozen=True)
class Config:
    """All settings of one pipeline run."""

    lake: Path = Path("sample_lake")
    """Folder holding ``landing/`` (the input files)."""
    out: Path = Path("out")
    """Folder for ``warehouse.duckdb`` and ``ledger/``."""
    seed: int = 20260601
    """Seed for every random draw (bootstrap, tie-breaking)."""
    step_hours: int = 1
    """Length of one decision step, hours (when decision_points is 'fixed')."""
    decision_points: str = "anchored"
    """'fixed': a decision every step_hours; 'anchored': at departure, price-tier rises, 1 h before return."""
    schedule_away_hours: tuple[int, int] = (8, 17)
    """Local hours [from, to) assumed away on weekdays for premises with no occupancy or setback evidence."""
    schedule_max_load_ratio: float = 0.9
    """An assumed schedule is implausible unless weekday kWh in it is below this share of weekend kWh."""
    presence_sources: tuple[str, ...] = ("occupancy_flag", "schedule")
    """Evidence of absence trusted for episodes; others are excluded as 'presence_source_not_used'.

    'setback_hold' is opt-in: its episodes exist only on days the residents set back, so
    they over-represent setbacks and bias every estimate toward the residents' choices.
    """
    setback_hold_hours: tuple[int, int] = (6, 20)
    """Local hours [from, to) in which a held setback counts as absence (premises without occupancy flag)."""
    comfort_penalty_basis: str = "setpoint"
    """'setpoint': setback still in force at return; 'indoor': logged indoor temperature, where present."""
    actions: tuple[int, ...] = DEFAULT_ACTIONS
    """Allowed setpoint changes per decision, whole °C in the setback direction."""
    cool_band_c: tuple[float, float] = (22.0, 30.0)
    """Safety band for cooling setpoints, °C (common practice, from memory)."""
    heat_band_c: tuple[float, float] = (13.0, 23.0)
    """Safety band for heating setpoints, °C; 13 °C guards against frozen pipes (common practice)."""
    min_episode_hours: int = 3
    """Shortest away episode kept, in fully-away hours."""
    max_episode_hours: int = 14
    """Longest away episode kept, in fully-away hours."""
    recovery_hours: int = 1
    """Hours after the return hour charged to the episode (pull-back to comfort)."""
    comfort_penalty_usd_per_degree_hour: float = 0.10
    """Price put on each °C-hour of setback still in force over the recovery window, USD."""
    behavior_model: str = "types"
    """'types': each premise a mixture of habit types; 'counts': premise counts shrunk toward the cohort's."""
    behavior_types: int | str = "auto"
    """Number of habit types of the 'types' model; 'auto': best held-out fit."""
    behavior_prior_strength: float | str = "auto"
    """Pseudo-counts shrinking each count table toward the coarser one above it; 'auto': best held-out fit."""
    behavior_floor: float = 0.01
    """Smallest behaviour probability assigned to any allowed action."""
    target_epsilon: float = 0.05
    """Mix of the uniform policy into each candidate rule, so weights stay bounded."""
    bootstrap_replicates: int = 400
    """Bootstrap resamples of episodes for confidence intervals."""
    bootstrap_refit_behavior: bool = False
    """Re-fit the behaviour model in every bootstrap replicate (weighted IS), so intervals carry its error."""
    confidence: float = 0.95
    """Level of confidence intervals and of the lower bound."""
    min_ess: float = 10.0
    """Smallest Kish effective sample size at which an estimate counts as supported."""
    max_weight_share: float = 0.25
    """Largest share of the total importance weight one episode may carry in a supported estimate."""
    estimators: tuple[str, ...] = ("weighted_is", "weighted_per_decision_is", "doubly_robust")
    """Off-policy estimators reported for every candidate (names in pipeline.estimators)."""
    recommended_estimator: str = "weighted_is"
    """The estimator whose rows are marked recommended."""
    cooling_days_per_year: int = 122
    """Days a year the cooling schedule is in force, for annualising per-episode savings."""
    state: StateSpace = field(default_factory=StateSpace)
    """How step features are binned into state keys."""
    candidates: tuple[SetbackRule, ...] = field(default_factory=_default_candidates)
    """Candidate setback rules evaluated in every run."""
    columns: dict[str, dict[str, str]] = field(default_factory=dict)
    """Per landing folder, canonical column name -> the name used in the files."""

    @property
    def warehouse_path(self) -> Path:
        """The DuckDB warehouse file."""
        return self.out / "warehouse.duckdb"

    @property
    def ledger_path(self) -> Path:
        """Root of the Parquet ledger."""
        return self.out / "ledger"

    def stage_settings(self, stage: str) -> dict[str, Any]:
        """Settings that shape ``stage``'s output, as JSON values."""
        names = {
            "ingest": ("columns", "cool_band_c", "heat_band_c"),
            "episodes": (
                "recovery_hours", "min_episode_hours", "max_episode_hours", "step_hours", "actions",
                "comfort_penalty_usd_per_degree_hour", "decision_points", "comfort_penalty_basis",
                "schedule_away_hours", "schedule_max_load_ratio", "setback_hold_hours", "presence_sources",
                "state",
            ),
            "learn": ("behavior_model", "behavior_types", "behavior_prior_strength", "behavior_floor", "seed"),
        }.get(stage, ())
        return json.loads(json.dumps({n: dataclasses.asdict(self)[n] for n in names}, default=str))

    def to_json(self) -> str:
        """The configuration as JSON, recorded in the run table."""
        return json.dumps(dataclasses.asdict(self), default=str, sort_keys=True)


_SCALARS = {f.name for f in dataclasses.fields(Config)} - {"state", "candidates", "columns"}


def _coerce(name: str, value: Any) -> Any:
    kind = {f.name: f.type for f in dataclasses.fields(Config)}[name]
    if name in ("lake", "out"):
        return Path(value)
    if isinstance(value, list):
        return tuple(value)
    if name == "behavior_prior_strength":
        if value == "auto" or (isinstance(value, int | float) and value > 0):
            return value if value == "auto" else float(value)
        raise ConfigError(f"behavior_prior_strength must be 'auto' or a positive number, got {value!r}")
    if name == "behavior_types":
        if value == "auto" or (isinstance(value, int) and not isinstance(value, bool) and value >= 1):
            return value
        raise ConfigError(f"behavior_types must be 'auto' or a whole number >= 1, got {value!r}")
    if name == "behavior_model" and value not in ("types", "counts"):
        raise ConfigError(f"behavior_model must be 'types' or 'counts', got {value!r}")
    if kind == "int" and not isinstance(value, int):
        raise ConfigError(f"{name} must be a whole number, got {value!r}")
    if kind == "float" and isinstance(value, int | float):
        return float(value)
    return value


def from_mapping(data: dict[str, Any], base: Config | None = None) -> Config:
    """Build a Config from a parsed TOML mapping laid over ``base`` (defaults when None)."""
    base = base or Config()
    changes: dict[str, Any] = {}
    for key, value in data.items():
        if key in _SCALARS:
            changes[key] = _coerce(key, value)
        elif key == "state":
            try:
                changes["state"] = dataclasses.replace(
                    base.state, **{k: tuple(v) if isinstance(v, list) else v for k, v in value.items()}
                )
            except TypeError as exc:
                raise ConfigError(f"[state]: {exc}") from exc
        elif key == "candidate":
            try:
                changes["candidates"] = tuple(SetbackRule(**c) for c in value)
            except TypeError as exc:
                raise ConfigError(f"[[candidate]]: {exc}") from exc
        elif key == "columns":
            changes["columns"] = {folder: dict(m) for folder, m in value.items()}
        else:
            raise ConfigError(f"unknown setting {key!r}")
    return dataclasses.replace(base, **changes)


def parse_override(text: str) -> dict[str, Any]:
    """Parse one ``key=value`` override (TOML value syntax; bare words are strings)."""
    if "=" not in text:
        raise ConfigError(f"override {text!r} must look like key=value")
    key, raw = (part.strip() for part in text.split("=", 1))
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw
    return {key: value}


def load(path: Path | None = None, overrides: dict[str, Any] | None = None) -> Config:
    """Read the TOML file (if any) and apply command-line overrides on top."""
    config = Config()
    if path is not None:
        try:
            config = from_mapping(tomllib.loads(Path(path).read_text()), config)
        except FileNotFoundError as exc:
            raise ConfigError(f"config file {path} not found") from exc
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"config file {path}: {exc}") from exc
    if overrides:
        config = from_mapping(overrides, config)
    return config
