"""Typed run configuration: one TOML file, overridable from the command line.

Every stage receives a ``Config``; nothing reads settings from globals or the
environment. Every setting is validated when a Config is made (pydantic), so a
typo or an out-of-range value is refused in one line naming where it came from,
the key, the value and what is allowed, never silently replaced by a default.
Each field's metadata records the stages it shapes (``Config.stage_settings``),
and ``settings_reference`` lists them all for the generated ``SETTINGS.md``.
"""

from __future__ import annotations

import ast
import dataclasses
import difflib
import inspect
import json
import re
import shlex
import textwrap
import tomllib
import zoneinfo
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, get_args, get_origin, get_type_hints

from pydantic import AfterValidator, BeforeValidator, ConfigDict, Field, Strict, TypeAdapter, ValidationError
from pydantic.dataclasses import dataclass

from pipeline.cron import check_cron
from pipeline.features import StateSpace
from pipeline.policies import DEFAULT_ACTIONS, SetbackRule
from pipeline.store import DuckDBSettings

STAGES: tuple[str, ...] = ("ingest", "episodes", "learn", "improve", "evaluate")
"""The stages a setting can shape, in the order they run."""

PRESENCE_SOURCES: tuple[str, ...] = ("occupancy_flag", "schedule", "setback_hold")
"""Kinds of evidence of absence the episode stage knows."""


class ConfigError(ValueError):
    """A configuration file or override that cannot be used."""


class _Rule(ValueError):
    """A rule between settings is broken: ``keys`` the settings involved, ``reasons`` the words for each.

    The first key the user gave is the one reported (so a file's value is not blamed for an override).
    """

    def __init__(self, keys: tuple[str, ...], *reasons: str) -> None:
        super().__init__(reasons[0])
        self.keys = keys
        self.reasons = reasons


class _OneOf:
    """Validator of a name against allowed values that may live in another module (imported when used)."""

    def __init__(self, choices: tuple[str, ...] | Callable[[], tuple[str, ...]]) -> None:
        self._choices = choices

    @property
    def choices(self) -> tuple[str, ...]:
        return self._choices() if callable(self._choices) else self._choices

    def __call__(self, value: str) -> str:
        if value not in self.choices:
            raise ValueError(f"must be one of {_listing(self.choices)}{_did_you_mean(value, self.choices)}")
        return value


class _Matches:
    """Validator of text against a regular expression (case ignored); ``words`` say what it admits."""

    def __init__(self, pattern: str, words: str) -> None:
        self._pattern = re.compile(pattern, re.IGNORECASE)
        self.words = words

    def __call__(self, value: str) -> str:
        if not self._pattern.fullmatch(value):
            raise ValueError(f"must be {self.words}")
        return value


_MEMORY_SIZE = _Matches(
    r"(\d+(\.\d+)?\s*([KMGT]i?B|[KMGT]|B|%))?",
    '"" (DuckDB\'s default) or a size such as "4GB", "512MiB" or "50%" (of RAM)',
)


def _behavior_models() -> tuple[str, ...]:
    # Imported when used: pipeline.behavior owns the names, and this module stays importable from it.
    from pipeline.behavior import BEHAVIOR_MODELS

    return tuple(BEHAVIOR_MODELS)


def _estimator_names() -> tuple[str, ...]:
    # Imported when used, like the behaviour models: the registry owns the names.
    from pipeline.estimators import OFF_POLICY_NAMES

    return tuple(OFF_POLICY_NAMES)


class _AutoOr:
    """Validator of a setting that is 'auto' or a value passing ``check``."""

    def __init__(self, kind: str, check: Callable[[Any], bool]) -> None:
        self.kind = kind
        self._check = check

    def __call__(self, value: Any) -> Any:
        if value == "auto" or (not isinstance(value, bool) and self._check(value)):
            return value
        raise ValueError(f"must be 'auto' or {self.kind}")


def _time_zone(value: str) -> str:
    try:
        zoneinfo.ZoneInfo(value)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValueError("must be an IANA time zone name, e.g. 'UTC' or 'America/Chicago'") from None
    return value


_BANNED_IN_NAMES = "/%&<>"
"""Characters Prefect refuses in a deployment's name ('/' separates flow and deployment)."""


def _deployment_name(value: str) -> str:
    if not value.strip() or any(c in value for c in _BANNED_IN_NAMES):
        raise ValueError(f"must be a non-empty name without any of {' '.join(_BANNED_IN_NAMES)}")
    return value


def _no_booleans(prefix: str) -> Callable[[Any], Any]:
    """The nested tables are plain dataclasses, validated leniently: refuse true/false given for a number."""

    def validate(value: Any) -> Any:
        rows = enumerate(value) if isinstance(value, list | tuple) else [(None, value)]
        for i, row in rows:
            for key, item in row.items() if isinstance(row, dict) else ():
                if isinstance(item, bool):
                    where = prefix if i is None else f"{prefix}.{i}"
                    raise _Rule((f"{where}.{key}",), "must be a number, not true/false")
        return value

    return validate


Whole = Annotated[int, Strict()]
Count = Annotated[int, Strict(), Field(ge=1)]
Hour = Annotated[int, Strict(), Field(ge=0, le=24)]
Number = Annotated[float, Strict()]
Share = Annotated[float, Strict(), Field(gt=0, le=1)]
Name = Annotated[str, Strict()]


def _setting(
    default: Any = dataclasses.MISSING,
    *,
    stages: tuple[str, ...],
    unit: str = "",
    factory=None,
    execution: bool = False,
):
    """A field with the stages it shapes and its unit in the metadata.

    ``execution`` marks a setting of how the work runs (shards, workers, schedule, DuckDB's
    resources) that by design shapes no result, so it claims no stage.
    """
    if execution and stages:
        raise ValueError("an execution setting shapes no stage")
    metadata = {"stages": stages, "unit": unit, "execution": execution}
    if factory is not None:
        return dataclasses.field(default_factory=factory, metadata=metadata)
    return dataclasses.field(default=default, metadata=metadata)


def _default_candidates() -> tuple[SetbackRule, ...]:
    return (
        SetbackRule("setback-1", depth_c=1, lead_steps=0),
        SetbackRule("setback-2", depth_c=2, lead_steps=0),
        SetbackRule("setback-2-early", depth_c=2, lead_steps=1),
    )


@dataclass(frozen=True, config=ConfigDict(extra="forbid"))
class Config:
    """All settings of one pipeline run."""

    lake: Path = _setting(Path("sample_lake"), stages=(), unit="folder")
    """Folder holding ``landing/`` (the input files)."""
    out: Path = _setting(Path("out"), stages=(), unit="folder")
    """Folder for ``warehouse.duckdb`` and ``ledger/``."""
    seed: Annotated[int, Strict(), Field(ge=0)] = _setting(20260601, stages=("learn", "evaluate", "improve"))
    """Seed for every random draw (bootstrap, tie-breaking)."""
    step_hours: Count = _setting(1, stages=("episodes",), unit="h")
    """Length of one decision step, hours (when decision_points is 'fixed')."""
    decision_points: Annotated[Name, AfterValidator(_OneOf(("fixed", "anchored")))] = _setting(
        "anchored", stages=("episodes", "evaluate")
    )
    """'fixed': a decision every step_hours; 'anchored': at departure, price-tier rises, 1 h before return."""
    schedule_away_hours: tuple[Hour, Hour] = _setting((8, 17), stages=("episodes",), unit="local hour")
    """Local hours [from, to) assumed away on weekdays for premises with no occupancy or setback evidence."""
    schedule_max_load_ratio: Share = _setting(0.9, stages=("episodes",), unit="ratio")
    """An assumed schedule is implausible unless weekday kWh in it is below this share of weekend kWh."""
    presence_sources: Annotated[
        tuple[Annotated[Name, AfterValidator(_OneOf(PRESENCE_SOURCES))], ...], Field(min_length=1)
    ] = _setting(("occupancy_flag", "schedule"), stages=("episodes",))
    """Evidence of absence trusted for episodes; others are excluded as 'presence_source_not_used'.

    'setback_hold' is opt-in: its episodes exist only on days the residents set back, so
    they over-represent setbacks and bias every estimate toward the residents' choices.
    """
    setback_hold_hours: tuple[Hour, Hour] = _setting((6, 20), stages=("episodes",), unit="local hour")
    """Local hours [from, to) in which a held setback counts as absence (premises without occupancy flag)."""
    comfort_penalty_basis: Annotated[Name, AfterValidator(_OneOf(("setpoint", "indoor")))] = _setting(
        "setpoint", stages=("episodes",)
    )
    """'setpoint': setback still in force at return; 'indoor': logged indoor temperature, where present."""
    actions: Annotated[tuple[Whole, ...], Field(min_length=2)] = _setting(
        DEFAULT_ACTIONS, stages=("episodes", "learn", "evaluate", "improve"), unit="°C"
    )
    """Allowed setpoint changes per decision, whole °C in the setback direction, increasing, including 0."""
    cool_band_c: tuple[Number, Number] = _setting((22.0, 30.0), stages=("ingest", "improve"), unit="°C")
    """Safety band for cooling setpoints, °C, low then high (common practice, from memory)."""
    heat_band_c: tuple[Number, Number] = _setting((13.0, 23.0), stages=("ingest", "improve"), unit="°C")
    """Safety band for heating setpoints, °C, low then high (13 °C guards frozen pipes: common practice)."""
    min_episode_hours: Count = _setting(3, stages=("episodes",), unit="h")
    """Shortest away episode kept, in fully-away hours."""
    max_episode_hours: Count = _setting(14, stages=("episodes",), unit="h")
    """Longest away episode kept, in fully-away hours (at least min_episode_hours)."""
    recovery_hours: Annotated[int, Strict(), Field(ge=0)] = _setting(1, stages=("episodes",), unit="h")
    """Hours after the return hour charged to the episode (pull-back to comfort)."""
    comfort_penalty_usd_per_degree_hour: Annotated[float, Strict(), Field(ge=0)] = _setting(
        0.10, stages=("episodes", "evaluate", "improve"), unit="USD/°C·h"
    )
    """Price put on each °C-hour of setback still in force over the recovery window, USD."""
    behavior_model: Annotated[Name, AfterValidator(_OneOf(_behavior_models))] = _setting(
        "types", stages=("learn",)
    )
    """'types': each premise a mixture of habit types; 'counts': premise counts shrunk toward the cohort's."""
    behavior_types: Annotated[
        int | str, BeforeValidator(_AutoOr("a whole number >= 1", lambda v: isinstance(v, int) and v >= 1))
    ] = _setting("auto", stages=("learn",))
    """Number of habit types of the 'types' model; 'auto': best held-out fit."""
    behavior_prior_strength: Annotated[
        float | str, BeforeValidator(_AutoOr("a number > 0", lambda v: isinstance(v, int | float) and v > 0))
    ] = _setting("auto", stages=("learn",), unit="pseudo-counts")
    """Pseudo-counts shrinking each count table toward the coarser one above it; 'auto': best held-out fit."""
    behavior_floor: Annotated[float, Strict(), Field(ge=0)] = _setting(
        0.01, stages=("learn",), unit="probability"
    )
    """Smallest behaviour probability assigned to any allowed action (below 1 / number of actions)."""
    behavior_tuning_premises: Count = _setting(1000, stages=("learn",), unit="premises")
    """Premises (drawn with the seed) whose episodes choose the 'auto' behaviour settings; all are fitted."""
    target_epsilon: Annotated[float, Strict(), Field(ge=0, le=1)] = _setting(
        0.05, stages=("evaluate",), unit="probability"
    )
    """Mix of the uniform policy into each candidate rule, so weights stay bounded."""
    bootstrap_replicates: Count = _setting(400, stages=("evaluate", "improve"))
    """Bootstrap resamples of episodes for confidence intervals."""
    bootstrap_refit_behavior: Annotated[bool, Strict()] = _setting(False, stages=("evaluate",))
    """Re-fit the behaviour model in every bootstrap replicate (weighted IS), so intervals carry its error."""
    confidence: Annotated[float, Strict(), Field(gt=0, lt=1)] = _setting(
        0.95, stages=("evaluate", "improve"), unit="probability"
    )
    """Level of confidence intervals and of the lower bound."""
    min_ess: Annotated[float, Strict(), Field(ge=0)] = _setting(
        10.0, stages=("evaluate", "improve"), unit="episodes"
    )
    """Smallest Kish effective sample size at which an estimate counts as supported."""
    max_weight_share: Share = _setting(0.25, stages=("evaluate", "improve"), unit="share")
    """Largest share of the total importance weight one episode may carry in a supported estimate."""
    estimators: Annotated[
        tuple[Annotated[Name, AfterValidator(_OneOf(_estimator_names))], ...], Field(min_length=1)
    ] = _setting(("weighted_is", "weighted_per_decision_is", "doubly_robust"), stages=("evaluate", "improve"))
    """Off-policy estimators reported for every candidate (names in pipeline.estimators.OFF_POLICY_NAMES)."""
    recommended_estimator: Annotated[Name, AfterValidator(_OneOf(_estimator_names))] = _setting(
        "weighted_is", stages=("evaluate", "improve")
    )
    """The estimator whose rows are marked recommended (one of estimators)."""
    cooling_days_per_year: Annotated[int, Strict(), Field(ge=1, le=366)] = _setting(
        122, stages=("evaluate", "improve"), unit="days"
    )
    """Season length for cooling: annual figures are episodes per observed cooling day times this."""
    heating_days_per_year: Annotated[int, Strict(), Field(ge=1, le=366)] = _setting(
        151, stages=("evaluate",), unit="days"
    )
    """Season length for heating (default November to March): annual figures of heating episodes use it."""
    comfort_rise_limit_degree_hours: Annotated[float, Strict(), Field(ge=0)] = _setting(
        0.0, stages=("evaluate",), unit="°C·h per episode"
    )
    """A policy is sent to a home only if the upper end of its comfort-change interval is at most this."""
    state: Annotated[StateSpace, BeforeValidator(_no_booleans("state"))] = _setting(
        stages=("episodes", "learn", "evaluate", "improve"), factory=StateSpace
    )
    """How step features are binned into state keys ([state] table)."""
    candidates: Annotated[
        tuple[SetbackRule, ...], BeforeValidator(_no_booleans("candidate")), Field(min_length=1)
    ] = _setting(stages=("evaluate",), factory=_default_candidates)
    """Candidate setback rules evaluated in every run ([[candidate]] tables; candidate_file replaces them)."""
    schedule_for: Annotated[Name, AfterValidator(_OneOf(("recommended", "every_candidate")))] = _setting(
        "recommended", stages=("evaluate",)
    )
    """Plans in the schedule: 'recommended' (each home's policy to send) or 'every_candidate' (for review)."""
    candidate_file: Path | None = _setting(None, stages=("evaluate",), unit="file")
    """Rule file of candidate policies ([[rule]] tables; README), found beside the settings file naming it."""
    columns: dict[str, dict[str, str]] = _setting(stages=("ingest",), factory=dict)
    """Per landing folder, canonical column name -> the name used in the files ([columns.<folder>])."""
    shard_premises: Count = _setting(250, stages=(), execution=True, unit="premises")
    """Premises per shard of the episode stage; shapes no result, only memory and parallel work."""
    task_runner: Annotated[Name, AfterValidator(_OneOf(("default", "dask")))] = _setting(
        "default", stages=(), execution=True
    )
    """Where the flow's shard tasks run: 'default' (Prefect's threads) or 'dask' (needs the dask extra)."""
    dask_address: Name = _setting("", stages=(), execution=True, unit="address")
    """Scheduler of an existing Dask cluster (tcp://host:8786); empty starts a local cluster."""
    dask_workers: Count = _setting(2, stages=(), execution=True, unit="processes")
    """Worker processes of the local Dask cluster (when dask_address is empty)."""
    serve_cron: Annotated[Name, AfterValidator(check_cron)] = _setting(
        "0 4 1 * *", stages=(), execution=True, unit="cron"
    )
    """When `thermal-ledger serve` starts a run: cron text in serve_timezone (default: 04:00 on the 1st)."""
    serve_timezone: Annotated[Name, AfterValidator(_time_zone)] = _setting(
        "UTC", stages=(), execution=True, unit="IANA zone"
    )
    """Time zone the serve_cron schedule is read in (daylight-saving changes follow it)."""
    serve_name: Annotated[Name, AfterValidator(_deployment_name)] = _setting(
        "monthly", stages=(), execution=True
    )
    """Name of the Prefect deployment `thermal-ledger serve` registers (thermal-ledger-run/<name>)."""
    # ---- improve: learned policies and their safety test (pipeline/improve.py) ----
    improve_learner: Annotated[Name, AfterValidator(_OneOf(("auto", "mc_control", "fitted_q_iteration")))] = (
        _setting("auto", stages=("improve",))
    )
    """Learner of setpoint policies; 'auto' picks by the bound on the learning part's last third."""
    improve_holdout_share: Annotated[float, Strict(), Field(gt=0, lt=1)] = _setting(
        0.4, stages=("improve",), unit="share"
    )
    """Share of each mode's latest episodes held out for the safety test (the learners never see them)."""
    improve_min_count: Annotated[int, Strict(), Field(ge=0)] = _setting(10, stages=("improve",), unit="steps")
    """Baseline bootstrapping: a pair logged fewer times in the scope keeps the home's own habit."""
    improve_epsilon: Annotated[float, Strict(), Field(ge=0, le=1)] = _setting(
        0.0, stages=("improve",), unit="probability"
    )
    """Share of the moved probability spread over well-sampled allowed actions the residents take."""
    improve_min_probability: Annotated[float, Strict(), Field(ge=0, lt=1)] = _setting(
        0.0, stages=("improve",), unit="probability"
    )
    """A home's action below this behaviour probability keeps it and gets none of the moved mass."""
    improve_min_episodes: Count = _setting(200, stages=("improve",), unit="episodes")
    """Fewest learning and held-out episodes a scope needs for a policy to be learned and tested."""
    improve_scopes: Annotated[
        tuple[Annotated[Name, AfterValidator(_OneOf(("portfolio", "habit_type", "cohort", "premise")))], ...],
        Field(min_length=1),
    ] = _setting(("portfolio", "habit_type", "cohort", "premise"), stages=("improve",))
    """Scopes a policy is learned for (each with enough evidence)."""
    safety_bound: Annotated[Name, AfterValidator(_OneOf(("student_t", "exact")))] = _setting(
        "student_t", stages=("improve",)
    )
    """Safety test's lower bound: 'exact' (concentration inequality) or 'student_t' (approximate)."""
    duckdb_threads: Annotated[int, Strict(), Field(ge=0)] = _setting(
        0, stages=(), execution=True, unit="threads"
    )
    """Threads each DuckDB connection may use; 0 leaves DuckDB's default (one per core)."""
    duckdb_memory_limit: Annotated[Name, AfterValidator(_MEMORY_SIZE)] = _setting(
        "2GB", stages=(), execution=True, unit="bytes"
    )
    """Memory each DuckDB connection may hold before it spills to disk (beside the warehouse); the default
    keeps a 10,000-home CSV ingest near 2 GiB; empty leaves DuckDB's default (80 % of RAM)."""
    duckdb_preserve_insertion_order: Annotated[bool, Strict()] = _setting(True, stages=(), execution=True)
    """Whether DuckDB keeps rows in the order read where a query does not sort; false can use less memory."""
    # ---- the run report (read from the ledger after the stages; shapes no stage) ----
    report_homes: Annotated[int, Strict(), Field(ge=0)] = _setting(3, stages=(), execution=True, unit="homes")
    """Homes with the largest and, apart, the smallest estimated savings given a page each in the report."""
    report_premises: tuple[Name, ...] = _setting((), stages=(), execution=True)
    """Premises always given a page in the report (`thermal-ledger report --premise` adds more)."""

    def __post_init__(self) -> None:
        _check_rules(self)

    @property
    def warehouse_path(self) -> Path:
        """The DuckDB warehouse file."""
        return self.out / "warehouse.duckdb"

    @property
    def duckdb(self) -> DuckDBSettings:
        """DuckDB's resources for every connection to the warehouse and ledger."""
        return DuckDBSettings(
            self.duckdb_threads, self.duckdb_memory_limit, self.duckdb_preserve_insertion_order
        )

    @property
    def ledger_path(self) -> Path:
        """Root of the Parquet ledger."""
        return self.out / "ledger"

    def to_json(self) -> str:
        """The configuration as JSON, recorded in the run table."""
        return json.dumps(dataclasses.asdict(self), default=str, sort_keys=True)

    def stage_settings(self, stage: str) -> dict[str, Any]:
        """The JSON-serialisable values of the settings that shape ``stage``, by name."""
        if stage not in STAGES:
            raise ConfigError(f"unknown stage {stage!r}: must be one of {_listing(STAGES)}")
        values = TypeAdapter(Config).dump_python(self, mode="json")
        return {f.name: values[f.name] for f in dataclasses.fields(self) if stage in f.metadata["stages"]}


def _check_rules(c: Config) -> None:
    """Rules between settings, and of the nested tables, that a type alone cannot state."""
    for key in ("schedule_away_hours", "setback_hold_hours"):
        start, end = getattr(c, key)
        if start >= end:
            raise _Rule((key,), "must be [from, to] local hours with from < to")
    for key in ("cool_band_c", "heat_band_c"):
        low, high = getattr(c, key)
        if low >= high:
            raise _Rule((key,), "must be [low, high] °C with low < high")
    if c.max_episode_hours < c.min_episode_hours:
        raise _Rule(
            ("max_episode_hours", "min_episode_hours"),
            f"must be >= min_episode_hours ({c.min_episode_hours})",
            f"must be <= max_episode_hours ({c.max_episode_hours})",
        )
    if list(c.actions) != sorted(set(c.actions)) or 0 not in c.actions:
        raise _Rule(("actions",), "must be distinct whole numbers in increasing order, including 0")
    if c.behavior_floor >= 1 / len(c.actions):
        raise _Rule(
            ("behavior_floor", "actions"),
            f"must be below 1 / {len(c.actions)} actions",
            f"leaves behavior_floor {c.behavior_floor} at or above 1 / {len(c.actions)} actions",
        )
    for key in ("presence_sources", "estimators"):
        if len(set(getattr(c, key))) != len(getattr(c, key)):
            raise _Rule((key,), "must not name the same value twice")
    if c.recommended_estimator not in c.estimators:
        raise _Rule(
            ("recommended_estimator", "estimators"),
            f"must be one of estimators {_listing(c.estimators)}",
            f"must include recommended_estimator {c.recommended_estimator!r}",
        )
    s = c.state
    state_rules = (
        (
            "hour_bucket_hours",
            1 <= s.hour_bucket_hours <= 24 and 24 % s.hour_bucket_hours == 0,
            "a divisor of 24",
        ),
        ("degree_bin_edges_c", list(s.degree_bin_edges_c) == sorted(set(s.degree_bin_edges_c)), "increasing"),
        ("price_tiers", s.price_tiers >= 1, ">= 1"),
        ("offset_min", s.offset_min <= 0, "<= 0"),
        ("offset_max", s.offset_max >= 0, ">= 0"),
        ("steps_left_cap", s.steps_left_cap >= 1, ">= 1"),
    )
    for key, ok, allowed in state_rules:
        if not ok:
            raise _Rule((f"state.{key}",), f"must be {allowed}")
    if c.candidate_file is not None and c.candidates != _default_candidates():
        raise _Rule(
            ("candidate_file", "candidate"),
            "replaces the [[candidate]] tables: give the rules in one place (move them into the rule file)",
            "tables cannot be given with candidate_file, which replaces them: move them into the rule file",
        )
    names = [rule.name for rule in c.candidates]
    for i, rule in enumerate(c.candidates):
        for key in ("depth_c", "lead_steps"):
            if getattr(rule, key) < 0:
                raise _Rule((f"candidate.{i}.{key}",), "must be >= 0")
        if not rule.name or names.count(rule.name) > 1:
            raise _Rule((f"candidate.{i}.name",), "must be a name no other candidate has")


# ---- loading -----------------------------------------------------------------------------------

_FIELDS = {f.name: f for f in dataclasses.fields(Config)}
_TABLE_KEYS = {"candidate": "candidates"}
"""TOML keys that differ from the field they set ([[candidate]] tables fill ``candidates``)."""
_TOP_KEYS = sorted((set(_FIELDS) - set(_TABLE_KEYS.values())) | set(_TABLE_KEYS))


def _listing(values) -> str:
    return ", ".join(repr(v) for v in values)


def _did_you_mean(word: Any, choices) -> str:
    close = difflib.get_close_matches(str(word), [str(c) for c in choices], n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _show(value: Any, quote: Callable[[str], str] = repr) -> str:
    """A value as the user would write it in TOML (strings in single quotes unless ``quote`` says)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if value is None:
        return "(unset)"
    if isinstance(value, str | Path):
        return quote(str(value))
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_show(v, quote) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {_show(v, quote)}" for k, v in value.items()) + "}"
    if dataclasses.is_dataclass(value):
        return _show(dataclasses.asdict(value), quote)
    return repr(value)


def _toml(value: Any) -> str:
    return _show(value, json.dumps)


def _folders() -> dict[str, tuple[str, ...]]:
    """Landing folders and their canonical columns, as pipeline.ingest defines them."""
    from pipeline.ingest import FOLDERS  # imported when used: pipeline.ingest imports this module

    return {f.name: tuple(c for group in f.required for c in group) + f.optional for f in FOLDERS}


def _unknown(what: str, key: str, known) -> ConfigError:
    """``what`` holds ``{}`` where the unknown key goes."""
    return ConfigError(what.format(repr(key)) + _did_you_mean(key, known))


def _table(source: str, key: str, value: Any, what: str) -> dict[str, Any]:
    if not isinstance(value, dict):
        raise ConfigError(f"{_where(source, key, value)}: must be a table of {what}")
    return value


def _normalise(source: str, key: str, value: Any) -> tuple[str, Any]:
    """The field a TOML key sets and its value with lists made tuples; refuses unknown keys."""
    parts = key.split(".")
    head = parts[0]
    if head not in _TOP_KEYS:
        raise _unknown("unknown setting {}", key, _TOP_KEYS)
    if len(parts) > 1:
        if head not in ("state", "columns"):
            raise _unknown("unknown setting {}", key, _TOP_KEYS)
        for part in reversed(parts[1:]):
            value = {part: value}
    if head == "state":
        known = [f.name for f in dataclasses.fields(StateSpace)]
        for sub in _table(source, head, value, "state settings"):
            if sub not in known:
                raise _unknown("unknown [state] key {}", sub, known)
        return "state", {k: _tuples(v) for k, v in value.items()}
    if head == "candidate":
        known = [f.name for f in dataclasses.fields(SetbackRule)]
        if not isinstance(value, list) or not all(isinstance(c, dict) for c in value):
            raise ConfigError(f"{_where(source, key, value)}: must be [[candidate]] tables")
        for i, rule in enumerate(value, start=1):
            for sub in rule:
                if sub not in known:
                    raise _unknown(f"[[candidate]] {i}: unknown key {{}}", sub, known)
        return "candidates", tuple(value)
    if head == "candidate_file" and isinstance(value, str) and source not in ("--set", "flag", "settings"):
        # A rule file named in a settings file is found beside it, wherever the command runs from.
        return head, str(Path(source).parent / value)
    if head == "columns":
        folders = _folders()
        for folder, mapping in _table(source, head, value, "landing folders").items():
            if folder not in folders:
                raise _unknown("unknown landing folder {} in [columns]", folder, folders)
            for canonical, in_file in _table(source, f"columns.{folder}", mapping, "column names").items():
                if canonical not in folders[folder]:
                    raise _unknown(
                        f"[columns.{folder}]: unknown canonical column {{}}", canonical, folders[folder]
                    )
                if not isinstance(in_file, str) or not in_file:
                    raise ConfigError(
                        f"{_where(source, f'columns.{folder}.{canonical}', in_file)}: must be a column name"
                    )
        return "columns", value
    return head, _tuples(value)


def _tuples(value: Any) -> Any:
    return tuple(_tuples(v) for v in value) if isinstance(value, list) else value


_FLAG_NAMES = {"serve_cron": "cron", "serve_name": "name"}
"""Settings whose command-line flag is not named after them (``thermal-ledger serve --cron``)."""


def _where(source: str, key: str, value: Any) -> str:
    if source == "flag":
        return f"--{_FLAG_NAMES.get(key, key)} {shlex.quote(str(value))}"
    if source == "--set":
        return f"--set {key}={_show(value)}"
    return f"{source}: {key}={_show(value)}"


def _merge(name: str, base: Config, earlier: Any, value: Any) -> Any:
    if name == "state":
        return {**(earlier or dataclasses.asdict(base.state)), **value}
    if name == "columns":
        merged = {folder: dict(m) for folder, m in (earlier or base.columns).items()}
        for folder, mapping in value.items():
            merged[folder] = {**merged.get(folder, {}), **mapping}
        return merged
    return value


def _build(layers: list[tuple[str, dict[str, Any]]], base: Config | None = None) -> Config:
    base = base or Config()
    changes: dict[str, Any] = {}
    given: dict[str, tuple[str, str, Any]] = {}
    for source, data in layers:
        for key, value in data.items():
            try:
                name, value_ = _normalise(source, key, value)
            except ConfigError as exc:
                text = str(exc)
                raise ConfigError(text if text.startswith(("--", source)) else f"{source}: {text}") from None
            changes[name] = _merge(name, base, changes.get(name), value_)
            given[name] = (source, key, value)
    try:
        return dataclasses.replace(base, **changes)
    except ValidationError as exc:
        raise _explain(exc.errors()[0], given, changes) from None


def _explain(
    error: dict[str, Any], given: dict[str, tuple[str, str, Any]], changes: dict[str, Any]
) -> ConfigError:
    """One line for the first pydantic error: source, key, the value given, what is allowed."""
    cause = error.get("ctx", {}).get("error")
    if isinstance(cause, _Rule):
        named = [i for i, k in enumerate(cause.keys) if _field_of(k) in given] or [0]
        path = cause.keys[named[0]].split(".")
        reason = cause.reasons[min(named[0], len(cause.reasons) - 1)]
        value = _value_at(changes, ".".join(path))
    else:
        path = [str(p) for p in error["loc"]]
        reason, value = _reason(error), error.get("input")
        if len(path) == 2 and path[1].isdigit() and path[0] != "candidates":
            reason = f"item {int(path[1]) + 1} ({_show(value)}) {reason}"
            value, path = changes.get(path[0]), path[:1]
    source, _, _ = given.get(_field_of(path[0]), ("settings", path[0], None))
    return ConfigError(f"{_where(source, _key_label(path), value)}: {reason}")


def _field_of(key: str) -> str:
    head = key.split(".")[0]
    return _TABLE_KEYS.get(head, head)


def _key_label(path: list[str]) -> str:
    if path[0] in ("candidate", "candidates") and len(path) >= 3:
        return f"candidate[{int(path[1]) + 1}].{path[2]}"
    if path[0] in ("candidate", "candidates") and len(path) == 2:
        return f"candidate[{int(path[1]) + 1}]"
    return ".".join(path[:2]) if path[0] == "state" else path[0]


def _value_at(changes: dict[str, Any], dotted: str) -> Any:
    parts = dotted.split(".")
    field = "candidates" if parts[0] == "candidate" else parts[0]
    value = changes.get(field, getattr(Config(), field, None) if field in _FIELDS else None)
    for part in parts[1:]:
        if isinstance(value, dict):
            value = value.get(part)
        elif isinstance(value, tuple | list) and part.isdigit():
            value = value[int(part)]
        elif dataclasses.is_dataclass(value):
            value = getattr(value, part, None)
    return value


def _reason(error: dict[str, Any]) -> str:
    ctx = error.get("ctx", {})
    kind = error["type"]
    if kind == "value_error":
        return str(ctx["error"])
    bounds = {"greater_than_equal": ">=", "greater_than": ">", "less_than_equal": "<=", "less_than": "<"}
    if kind in bounds:
        limit = next(iter(ctx.values()))
        return f"must be {bounds[kind]} {limit}"
    if kind.startswith("int_"):
        return "must be a whole number"
    if kind.startswith("float_"):
        return "must be a number"
    if kind.startswith("bool_"):
        return "must be true or false"
    if kind.startswith("string_"):
        return "must be text in quotes"
    if kind in ("too_short", "too_long"):
        limit = ctx.get("min_length", ctx.get("max_length"))
        return f"must have {'at least' if kind == 'too_short' else 'at most'} {limit} items"
    if kind.startswith("path_"):
        return "must be a folder path in quotes"
    if kind in ("tuple_type", "list_type"):
        return "must be a list [..]"
    return error["msg"][0].lower() + error["msg"][1:]


def from_mapping(data: dict[str, Any], base: Config | None = None, source: str = "settings") -> Config:
    """Build a Config from a parsed TOML mapping laid over ``base`` (defaults when None)."""
    return _build([(source, data)], base)


def parse_override(text: str) -> dict[str, Any]:
    """Parse one ``key=value`` override (TOML value syntax; bare words are strings).

    ``key`` may be dotted into the tables: ``state.price_tiers=2``, ``columns.meter.kwh=usage_kwh``.
    """
    if "=" not in text:
        raise ConfigError(f"--set {text}: must look like key=value, e.g. --set recovery_hours=2")
    key, raw = (part.strip() for part in text.split("=", 1))
    try:
        value = tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw
    return {key: value}


def read_toml(path: Path) -> dict[str, Any]:
    """The parsed settings file; a missing or malformed one is a ConfigError naming it."""
    try:
        return tomllib.loads(Path(path).read_text())
    except FileNotFoundError:
        raise ConfigError(f"{path}: settings file not found (give --config an existing .toml file)") from None
    except IsADirectoryError:
        raise ConfigError(f"{path}: is a folder, not a settings file") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from None


def load(
    path: Path | None = None, overrides: dict[str, Any] | None = None, flags: dict[str, Any] | None = None
) -> Config:
    """Read the TOML file (if any), then ``--set`` overrides, then explicit flags (--lake, --out, --seed)."""
    layers: list[tuple[str, dict[str, Any]]] = []
    if path is not None:
        layers.append((str(path), read_toml(path)))
    if overrides:
        layers.append(("--set", overrides))
    if flags:
        layers.append(("flag", flags))
    return _build(layers)


# ---- the reference ----------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class SettingInfo:
    """One row of the settings reference."""

    key: str
    """The TOML key (dotted into tables)."""
    default: str
    """The default, in TOML syntax."""
    unit: str
    allowed: str
    stages: tuple[str, ...]
    meaning: str


def _field_docs(cls: type) -> dict[str, str]:
    """First line of each field's docstring (the string right after its annotation in the class body)."""
    body = ast.parse(textwrap.dedent(inspect.getsource(cls))).body[0].body
    docs = {}
    for node, after in zip(body, body[1:], strict=False):
        if (
            isinstance(node, ast.AnnAssign)
            and isinstance(node.target, ast.Name)
            and isinstance(after, ast.Expr)
            and isinstance(after.value, ast.Constant)
        ):
            first = after.value.value.strip().split("\n\n")[0]
            docs[node.target.id] = " ".join(first.split()).replace("``", "`")
    return docs


def _allowed(tp: Any) -> str:
    """What a field's type admits, in words, read from its annotation."""
    if get_origin(tp) is tuple:
        args = get_args(tp)
        if args[-1] is Ellipsis:
            return f"list of: {_allowed(args[0])}"
        if len(set(args)) == 1:
            return f"{len(args)} values, each {_allowed(args[0])}"
        return "[" + ", ".join(_allowed(a) for a in args) + "]"
    if get_origin(tp) is not Annotated:
        return {int: "whole number", float: "number", bool: "true or false", str: "text"}.get(tp, "")
    base, *meta = get_args(tp)
    words = [_allowed(base)]
    for m in meta:
        func = getattr(m, "func", None)
        if isinstance(func, _OneOf):
            words = [" / ".join(f'"{c}"' for c in func.choices)]
        elif isinstance(func, _AutoOr):
            words = [f'"auto" or {func.kind}']
        elif isinstance(func, _Matches):
            words = [func.words]
        for item in getattr(m, "metadata", ()):
            for attr, sign in (
                ("ge", ">="),
                ("gt", ">"),
                ("le", "<="),
                ("lt", "<"),
                ("min_length", "at least"),
            ):
                if getattr(item, attr, None) is not None:
                    words.append(f"{sign} {getattr(item, attr)}")
    return ", ".join(w for w in words if w)


_RULES = {
    "schedule_away_hours": "from < to",
    "setback_hold_hours": "from < to",
    "cool_band_c": "low < high",
    "heat_band_c": "low < high",
    "max_episode_hours": ">= min_episode_hours",
    "actions": "increasing, distinct, including 0",
    "behavior_floor": "< 1 / number of actions",
    "presence_sources": "no repeats",
    "estimators": "no repeats",
    "recommended_estimator": "one of estimators",
    "candidate_file": "a TOML rule file; not together with [[candidate]] tables",
    "serve_cron": "5 fields (minute hour day-of-month month day-of-week) or @hourly ... @yearly",
    "serve_timezone": "an IANA time zone name",
    "serve_name": "no / % & < >",
}
"""Rules between settings (``_check_rules``) and checks beyond a type, in words, for the reference."""

_NESTED_RULES = {
    "state.hour_bucket_hours": "a divisor of 24",
    "state.degree_bin_edges_c": "increasing",
    "state.price_tiers": ">= 1",
    "state.offset_min": "<= 0",
    "state.offset_max": ">= 0",
    "state.steps_left_cap": ">= 1",
    "candidate.name": "distinct",
    "candidate.depth_c": ">= 0",
    "candidate.lead_steps": ">= 0",
}


def settings_reference() -> list[SettingInfo]:
    """Every setting with its default, unit, allowed values, the stages it shapes and its meaning."""
    hints = get_type_hints(Config, include_extras=True)
    docs = _field_docs(Config)
    default = Config()
    rows = []
    for f in dataclasses.fields(Config):
        stages = tuple(f.metadata["stages"])
        if f.name in ("state", "candidates"):
            prefix, cls = ("state", StateSpace) if f.name == "state" else ("candidate", SetbackRule)
            sub_docs = _field_docs(cls)
            if f.name == "candidates":
                rules = "; ".join(_toml(dataclasses.asdict(r)) for r in default.candidates)
                rows.append(SettingInfo("candidate", rules, "", "at least one", stages, docs[f.name]))
            for sub in dataclasses.fields(cls):
                key = f"{prefix}.{sub.name}"
                shown = _toml(getattr(default.state, sub.name)) if f.name == "state" else ""
                meaning = sub_docs.get(sub.name, "Name of the rule, shown in the ledger.")
                rows.append(SettingInfo(key, shown, "", _NESTED_RULES.get(key, ""), stages, meaning))
            continue
        if f.name == "columns":
            folders = _folders()
            allowed = "; ".join(f"{name}: {', '.join(cols)}" for name, cols in folders.items())
            rows.append(SettingInfo("columns.<folder>.<canonical>", "{}", "", allowed, stages, docs[f.name]))
            continue
        allowed = "; ".join(w for w in (_allowed(hints[f.name]), _RULES.get(f.name, "")) if w)
        rows.append(
            SettingInfo(
                f.name, _toml(getattr(default, f.name)), f.metadata["unit"], allowed, stages, docs[f.name]
            )
        )
    return rows
