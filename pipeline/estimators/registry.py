"""The one list of published estimators: what each is and what it can be used for.

Evaluation, the bootstrap and configuration checks all read ``REGISTRY``; an
estimator that is not registered here cannot be configured, bootstrapped or
reported.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import polars as pl

from pipeline.estimators import importance_sampling as _is
from pipeline.estimators import monte_carlo as _mc
from pipeline.estimators._steps import EstimatorInputError


@dataclass(frozen=True)
class Estimator:
    """A published estimator and the uses it supports."""

    name: str
    """Published name, as written in the ``estimators`` and ``recommended_estimator`` settings."""
    function: Callable[..., pl.DataFrame]
    """The public function: decision steps (and ``gamma``) in, one row per group out."""
    terms: _is.TermsBuilder | None
    """Numerator and denominator entries for the bootstrap; None when it cannot be bootstrapped."""
    off_policy: bool
    """Estimates a target policy's value from another policy's logs (pi and b)."""
    needs_q_model: bool = False
    """Needs ``q_hat`` and ``v_hat`` columns from a fitted Q model of the target."""

    @property
    def bootstrappable(self) -> bool:
        """Whether ``bootstrap_interval`` and ``bootstrap_replicates`` accept it."""
        return self.terms is not None


REGISTRY: dict[str, Estimator] = {
    e.name: e
    for e in (
        Estimator("on_policy_value", _is.on_policy_value, _is._on_policy_terms, off_policy=False),
        Estimator("ordinary_is", _is.ordinary_is, _is._ordinary_is_terms, off_policy=True),
        Estimator("weighted_is", _is.weighted_is, _is._weighted_is_terms, off_policy=True),
        Estimator("per_decision_is", _is.per_decision_is, _is._per_decision_is_terms, off_policy=True),
        Estimator(
            "weighted_per_decision_is",
            _is.weighted_per_decision_is,
            _is._weighted_per_decision_is_terms,
            off_policy=True,
        ),
        Estimator(
            "doubly_robust", _is.doubly_robust, _is._doubly_robust_terms, off_policy=True, needs_q_model=True
        ),
        Estimator("first_visit_mc", _mc.first_visit_mc, None, off_policy=False),
        Estimator("every_visit_mc", _mc.every_visit_mc, None, off_policy=False),
    )
}
"""Every published estimator by name."""

OFF_POLICY_NAMES: tuple[str, ...] = tuple(name for name, e in REGISTRY.items() if e.off_policy)
"""Names valid in the ``estimators`` and ``recommended_estimator`` settings."""


def off_policy_estimator(name: str) -> Estimator:
    """The registered off-policy estimator called ``name``; EstimatorInputError naming the choices if none."""
    entry = REGISTRY.get(name)
    if entry is None or not entry.off_policy:
        raise EstimatorInputError(
            f"{name!r} is not an off-policy estimator; use one of {', '.join(OFF_POLICY_NAMES)}"
        )
    return entry


def terms_of(estimator: Callable | str) -> _is.TermsBuilder:
    """The terms builder of a registered estimator, given as its function or its name."""
    if isinstance(estimator, str):
        entry = REGISTRY.get(estimator)
    else:
        entry = next((e for e in REGISTRY.values() if e.function is estimator), None)
    if entry is None or entry.terms is None:
        name = estimator if isinstance(estimator, str) else getattr(estimator, "__name__", repr(estimator))
        choices = sorted(n for n, e in REGISTRY.items() if e.bootstrappable)
        raise EstimatorInputError(f"estimator {name!r} cannot be bootstrapped; use one of {choices}")
    return entry.terms
