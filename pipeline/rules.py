"""Candidate policies written by an analyst in a rule file, compiled to probability tables.

A rule file is TOML holding ``[[rule]]`` tables (the format is the project's own; README.md,
"Writing candidate policies", documents every key). Each rule has a ``name`` and a ``kind``:

- ``setback``: set back ``depth_c`` while away, back at comfort ``restore_before_return``
  decisions before the return (the decision one hour before the return when 0); optionally
  only once at most ``start_before_return`` decisions remain, and at most ``ramp_c`` per
  decision on the way down.
- ``precool``: below comfort by ``precool_c`` at decisions in a tier from ``precool_tier``
  up to (not including) ``peak_tier``, then drifting up to ``drift_c`` above comfort at
  decisions in the peak tier or above, ``drift_per_decision_c`` at a time; comfort elsewhere.
  ``restore_before_return`` ends the drift; a pre-cooled setpoint is within comfort and may
  stay to the return. Offsets are in the setback direction, so in heating it pre-heats.
- ``hold``: bring the setpoint to ``offset_c`` from comfort and hold it; with
  ``restore_before_return`` it is back at comfort that many decisions before the return.

Every rule may carry ``epsilon`` (else the run's ``target_epsilon``), ``cohorts`` and
``rate_plans`` (the premises it applies to; both given: premises in both) and ``description``.

A rule is a function of the state only (``pipeline.features.StateSpace``: local-hour
bucket, degree bin, price tier, offset, steps left), so its timing is counted in decisions
left before the return, which the state holds; a start counted from the departure cannot be
written, because the state does not record how many decisions have passed (``ramp_c``
reaches the full depth that many decisions after the departure instead).

At each decision a rule aims for a target offset and moves toward it as far as the action
set (and its per-decision limits) allow; the chosen action gets probability one and the
table is made epsilon-soft (``policies.soften``). A ``setback`` rule without the optional
keys is exactly ``policies.SetbackRule`` (tested), so the three defaults keep their tables.

Errors a user can make are ``RuleFileError`` (a ``PolicyError``, so the command prints one
line and exits 2), naming the file, the rule, the key and what is allowed.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import tomllib
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from pipeline.config import Config
from pipeline.features import StateSpace
from pipeline.policies import PolicyError, SetbackRule, soften

KINDS: tuple[str, ...] = ("setback", "precool", "hold")
"""The kinds of rule a rule file may hold."""


class RuleFileError(PolicyError):
    """A rule file that cannot be compiled: names the file, the rule, the key and what is allowed."""


@dataclass(frozen=True, eq=False)
class Candidate:
    """A candidate policy ready to evaluate: its table and the premises it applies to."""

    name: str
    kind: str
    table: np.ndarray
    """(n_states, n_actions) probabilities, rows summing to one (epsilon-soft)."""
    cohorts: tuple[str, ...] | None = None
    """Cohorts it applies to (None: every cohort)."""
    rate_plans: tuple[str, ...] | None = None
    """Rate plans it applies to (None: every rate plan)."""
    settings: dict[str, Any] = field(default_factory=dict)
    """The rule's keys as compiled (for the digest and the reference)."""

    @property
    def scoped(self) -> bool:
        """Whether the rule applies to only some premises."""
        return self.cohorts is not None or self.rate_plans is not None

    def applies(self, premises: pl.DataFrame) -> np.ndarray:
        """Which premises the rule applies to: bool (n,), from columns cohort and rate_plan_id."""
        mask = np.ones(premises.height, dtype=bool)
        if self.cohorts is not None:
            mask &= premises["cohort"].cast(pl.Utf8).is_in(list(self.cohorts)).fill_null(False).to_numpy()
        if self.rate_plans is not None:
            mask &= (
                premises["rate_plan_id"]
                .cast(pl.Utf8)
                .is_in(list(self.rate_plans))
                .fill_null(False)
                .to_numpy()
            )
        return mask


# ---- the rule kinds ----------------------------------------------------------------------------


def _restore_cap(f: dict[str, np.ndarray], lead: int, max_restore: int) -> np.ndarray:
    """Largest setback a decision may leave so that comfort is back ``lead`` decisions before the last.

    One decision can restore ``max_restore`` °C, so with k decisions to go before the
    restore point the setback may still be k * max_restore (as ``SetbackRule`` does).
    """
    return np.maximum((f["steps_left"] - 1 - lead) * max_restore, 0)


def _setback_target(s: dict[str, Any], f: dict[str, np.ndarray], r: int) -> np.ndarray:
    depth = np.full(f["offset"].shape, s["depth_c"])
    if s.get("start_before_return") is not None:
        depth = np.where(f["steps_left"] <= s["start_before_return"], depth, 0)
    return np.minimum(depth, _restore_cap(f, s["restore_before_return"], r))


def _precool_target(s: dict[str, Any], f: dict[str, np.ndarray], r: int) -> np.ndarray:
    tier = f["price_tier"]
    peak = tier >= s["peak_tier"]
    before = (tier >= s["precool_tier"]) & ~peak
    raw = np.where(peak, s["drift_c"], np.where(before, -s["precool_c"], 0))
    return np.minimum(raw, _restore_cap(f, s["restore_before_return"], r))


def _hold_target(s: dict[str, Any], f: dict[str, np.ndarray], r: int) -> np.ndarray:
    raw = np.full(f["offset"].shape, s["offset_c"])
    if s.get("restore_before_return") is None:
        return raw
    return np.minimum(raw, _restore_cap(f, s["restore_before_return"], r))


def _setback_rise(s: dict[str, Any], f: dict[str, np.ndarray]) -> np.ndarray | None:
    return None if s.get("ramp_c") is None else np.full(f["offset"].shape, s["ramp_c"])


def _precool_rise(s: dict[str, Any], f: dict[str, np.ndarray]) -> np.ndarray | None:
    if s.get("drift_per_decision_c") is None:
        return None
    peak = f["price_tier"] >= s["peak_tier"]
    return np.where(peak, s["drift_per_decision_c"], np.iinfo(np.int64).max)


_TARGETS: dict[str, Callable[[dict[str, Any], dict[str, np.ndarray], int], np.ndarray]] = {
    "setback": _setback_target,
    "precool": _precool_target,
    "hold": _hold_target,
}
_RISES: dict[str, Callable[[dict[str, Any], dict[str, np.ndarray]], np.ndarray | None]] = {
    "setback": _setback_rise,
    "precool": _precool_rise,
    "hold": lambda s, f: None,
}


def rule_actions(
    kind: str, settings: dict[str, Any], space: StateSpace, actions: Sequence[int], keys: np.ndarray
) -> np.ndarray:
    """The action (°C, setback direction) a compiled rule takes in each state of ``keys``.

    The rule moves from the state's offset toward its target: the move is limited by the
    rule's largest rise per decision (``ramp_c``, ``drift_per_decision_c``) and then is
    the action nearest to it (the smaller move on a tie), so a sparse action set never
    overshoots more than it must.
    """
    f = space.decode(keys)
    acts = np.asarray(actions, dtype=np.int64)
    r = max(1, -int(acts.min()))
    gap = _TARGETS[kind](settings, f, r) - f["offset"]
    rise = _RISES[kind](settings, f)
    if rise is not None:
        gap = np.minimum(gap, rise)
    gap = np.clip(gap, acts.min(), acts.max())
    distance = np.abs(gap[:, None] - acts[None, :]) * 2 + (np.abs(acts) > np.abs(gap)[:, None])
    return acts[np.argmin(distance, axis=1)]


def compile_table(
    kind: str, settings: dict[str, Any], space: StateSpace, actions: Sequence[int], epsilon: float
) -> np.ndarray:
    """Probability table (n_states, n_actions) of a rule: its action with probability one, softened."""
    chosen = rule_actions(kind, settings, space, actions, np.arange(space.n_states))
    index = np.searchsorted(np.asarray(actions), chosen)
    probs = np.zeros((space.n_states, len(actions)))
    probs[np.arange(space.n_states), index] = 1.0
    return soften(probs, epsilon)


# ---- reading a rule file -----------------------------------------------------------------------

_COMMON = ("name", "kind", "description", "epsilon", "cohorts", "rate_plans")
_KIND_KEYS: dict[str, tuple[str, ...]] = {
    "setback": ("depth_c", "restore_before_return", "start_before_return", "ramp_c"),
    "precool": (
        "precool_c",
        "precool_tier",
        "peak_tier",
        "drift_c",
        "drift_per_decision_c",
        "restore_before_return",
    ),
    "hold": ("offset_c", "restore_before_return"),
}
_REQUIRED: dict[str, tuple[str, ...]] = {
    "setback": ("depth_c",),
    "precool": ("precool_c", "drift_c"),
    "hold": (),
}
_NOT_EXPRESSIBLE = {
    "start_after_departure": (
        "a rule sees the decisions left before the return, not those since the departure;"
        " use start_before_return, or ramp_c to reach the depth gradually after the departure"
    ),
}


def _did_you_mean(word: str, choices: Sequence[str]) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _shown(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, list):
        return "[" + ", ".join(_shown(v) for v in value) + "]"
    return repr(value)


class _Reader:
    """Checks one rule file's keys with messages naming the file, the rule and the key."""

    def __init__(self, path: Path, space: StateSpace, actions: Sequence[int], epsilon: float) -> None:
        self.path, self.space, self.actions, self.epsilon = path, space, tuple(actions), epsilon

    def fail(self, label: str, key: str | None, value: Any, allowed: str) -> RuleFileError:
        where = f"{self.path}: rule {label}"
        if key is None:
            return RuleFileError(f"{where}: {allowed}")
        return RuleFileError(f"{where}: {key} = {_shown(value)}: {allowed}")

    def whole(
        self, label: str, raw: dict, key: str, low: int, high: int | None, words: str = ""
    ) -> int | None:
        if key not in raw:
            return None
        value = raw[key]
        ok = isinstance(value, int) and not isinstance(value, bool)
        ok = ok and value >= low and (high is None or value <= high)
        if not ok:
            span = f"from {low} to {high}" if high is not None else f"{low} or more"
            raise self.fail(label, key, value, f"must be a whole number {span}{words}")
        return value

    def names(self, label: str, raw: dict, key: str) -> tuple[str, ...] | None:
        if key not in raw:
            return None
        value = raw[key]
        if not (isinstance(value, list) and value and all(isinstance(v, str) and v for v in value)):
            raise self.fail(label, key, value, 'must be a list of names in quotes, e.g. ["north-tou"]')
        return tuple(value)

    def rule(self, i: int, raw: Any, seen: set[str]) -> Candidate:
        label = f"#{i}"
        if not isinstance(raw, dict):
            raise RuleFileError(f"{self.path}: rule {label}: must be a [[rule]] table")
        name = raw.get("name")
        if name is None:
            raise self.fail(label, None, None, "name is missing: every rule needs a name")
        if not isinstance(name, str) or not name.strip():
            raise self.fail(label, "name", name, "must be a name in quotes")
        label = f"{name!r}"
        if name in seen:
            raise self.fail(label, "name", name, "must be a name no other rule in the file has")
        kind = raw.get("kind")
        if kind is None:
            raise self.fail(label, None, None, f"kind is missing: must be one of {', '.join(KINDS)}")
        if kind not in KINDS:
            raise self.fail(
                label, "kind", kind, f"must be one of {', '.join(KINDS)}{_did_you_mean(str(kind), KINDS)}"
            )
        known = _COMMON + _KIND_KEYS[kind]
        for key, value in raw.items():
            if key in _NOT_EXPRESSIBLE:
                raise self.fail(label, key, value, _NOT_EXPRESSIBLE[key])
            if key not in known:
                raise self.fail(
                    label,
                    key,
                    value,
                    f"unknown key for a {kind} rule{_did_you_mean(key, known)}; allowed: {', '.join(known)}",
                )
        for key in _REQUIRED[kind]:
            if key not in raw:
                raise self.fail(
                    label, None, None, f"{key} is missing: a {kind} rule needs {', '.join(_REQUIRED[kind])}"
                )
        if "description" in raw and not isinstance(raw["description"], str):
            raise self.fail(label, "description", raw["description"], "must be text in quotes")
        epsilon = raw.get("epsilon", self.epsilon)
        if isinstance(epsilon, bool) or not isinstance(epsilon, int | float) or not 0 <= epsilon <= 1:
            raise self.fail(label, "epsilon", epsilon, "must be a number from 0 to 1")
        settings = getattr(self, f"_{kind}")(label, raw)
        table = compile_table(kind, settings, self.space, self.actions, float(epsilon))
        return Candidate(
            name,
            kind,
            table,
            self.names(label, raw, "cohorts"),
            self.names(label, raw, "rate_plans"),
            {"kind": kind, **settings, "epsilon": float(epsilon)},
        )

    def _lead(self, label: str, raw: dict, default: int | None) -> int | None:
        cap = self.space.steps_left_cap
        lead = self.whole(
            label,
            raw,
            "restore_before_return",
            0,
            cap - 2,
            f" (state.steps_left_cap is {cap}: a larger lead never lets the setpoint leave comfort)",
        )
        return default if lead is None else lead

    def _setback(self, label: str, raw: dict) -> dict[str, Any]:
        top = self.space.offset_max
        depth = self.whole(label, raw, "depth_c", 0, top, f" (state.offset_max is {top})")
        lead = self._lead(label, raw, 0)
        start = self.whole(label, raw, "start_before_return", 1, None)
        if start is not None and start <= lead + 1:
            raise self.fail(
                label,
                "start_before_return",
                start,
                f"must be more than restore_before_return + 1 ({lead + 1}), or the setback never starts",
            )
        ramp = self.whole(label, raw, "ramp_c", 1, None)
        return {"depth_c": depth, "restore_before_return": lead, "start_before_return": start, "ramp_c": ramp}

    def _precool(self, label: str, raw: dict) -> dict[str, Any]:
        low, top, tiers = -self.space.offset_min, self.space.offset_max, self.space.price_tiers
        if tiers < 2:
            raise self.fail(label, "kind", "precool", f"needs state.price_tiers of 2 or more (it is {tiers})")
        if low < 1:
            raise self.fail(label, "precool_c", raw["precool_c"], "needs state.offset_min below 0 (it is 0)")
        precool = self.whole(label, raw, "precool_c", 1, low, f" (state.offset_min is {-low})")
        peak = self.whole(label, raw, "peak_tier", 1, tiers - 1, f" (state.price_tiers is {tiers})")
        peak = tiers - 1 if peak is None else peak
        start = self.whole(label, raw, "precool_tier", 0, peak - 1, f" (below peak_tier {peak})")
        drift = self.whole(label, raw, "drift_c", 0, top, f" (state.offset_max is {top})")
        step = self.whole(label, raw, "drift_per_decision_c", 1, None)
        return {
            "precool_c": precool,
            "precool_tier": peak - 1 if start is None else start,
            "peak_tier": peak,
            "drift_c": drift,
            "drift_per_decision_c": step,
            "restore_before_return": self._lead(label, raw, 0),
        }

    def _hold(self, label: str, raw: dict) -> dict[str, Any]:
        low, top = self.space.offset_min, self.space.offset_max
        offset = self.whole(label, raw, "offset_c", low, top, " (state.offset_min to state.offset_max)")
        return {
            "offset_c": 0 if offset is None else offset,
            "restore_before_return": self._lead(label, raw, None),
        }


def read_rule_file(
    path: Path, space: StateSpace, actions: Sequence[int], epsilon: float
) -> tuple[Candidate, ...]:
    """Compile every rule of a rule file; ``epsilon`` is the default of rules without their own."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text())
    except FileNotFoundError:
        raise RuleFileError(f"{path}: rule file not found (check the candidate_file setting)") from None
    except IsADirectoryError:
        raise RuleFileError(f"{path}: is a folder, not a rule file") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise RuleFileError(f"{path}: not valid TOML: {exc}") from None
    for key in data:
        if key != "rule":
            raise RuleFileError(
                f"{path}: unknown key {key!r}{_did_you_mean(key, ['rule'])}:"
                " a rule file holds [[rule]] tables only"
            )
    rules = data.get("rule")
    if rules is None:
        raise RuleFileError(f"{path}: no rules: add at least one [[rule]] table")
    if not isinstance(rules, list):
        raise RuleFileError(f"{path}: rule must be [[rule]] tables (double brackets), one per rule")
    reader = _Reader(path, space, actions, epsilon)
    seen: set[str] = set()
    compiled = []
    for i, raw in enumerate(rules, start=1):
        candidate = reader.rule(i, raw, seen)
        seen.add(candidate.name)
        compiled.append(candidate)
    return tuple(compiled)


def from_setback_rule(rule: SetbackRule, config: Config) -> Candidate:
    """A ``[[candidate]]`` table of the settings as a candidate (every premise, the run's epsilon)."""
    return Candidate(
        rule.name,
        "setback",
        rule.table(config.state, config.actions, config.target_epsilon),
        settings={
            "kind": "setback",
            "depth_c": rule.depth_c,
            "restore_before_return": rule.lead_steps,
            "epsilon": config.target_epsilon,
        },
    )


def candidates_for(config: Config) -> tuple[Candidate, ...]:
    """The run's candidates: the rule file's when ``candidate_file`` is set, else the [[candidate]] tables."""
    if config.candidate_file is not None:
        return read_rule_file(config.candidate_file, config.state, config.actions, config.target_epsilon)
    return tuple(from_setback_rule(rule, config) for rule in config.candidates)


def digest(candidates: Sequence[Candidate]) -> str:
    """Hash of the candidates' names, scopes and tables: an evaluation of other rules is not reused."""
    h = hashlib.sha256()
    for c in candidates:
        h.update(json.dumps([c.name, c.kind, c.cohorts, c.rate_plans], default=list).encode())
        h.update(np.ascontiguousarray(c.table).tobytes())
    return h.hexdigest()
