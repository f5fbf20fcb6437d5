"""Off-policy estimators of a policy's value from logged decision steps.

Every function takes one polars frame of decision steps sorted by
``(episode_id, t)`` with columns ``episode_id`` (int), ``t`` (int, 0-based step
within the episode), ``reward`` (float, USD per step, costs negative), ``pi``
(target-policy probability of the logged action), ``b`` (behaviour probability
of the logged action) and an optional ``group`` column (premise, cohort). When
``group`` is absent every episode belongs to the single group ``"all"``.

All arithmetic runs on numpy arrays indexed by episode code, never a Python
loop over episodes or steps, so a cohort of a hundred thousand episodes costs
the same few array passes as ten.

Modules by job: ``importance_sampling`` (the IS family, doubly robust and the
on-policy value, written as shared numerator/denominator terms),
``monte_carlo`` (first- and every-visit state values), ``bootstrap``
(per-episode Poisson draws, sums per group that add up across shards, and
intervals), ``bounds`` (the high-confidence lower bound), ``safety`` (the safety test's
bound on held-out episodes, Thomas, Theocharous and Ghavamzadeh 2015),
``weight_diagnostics`` (weight spread and support) and ``registry`` (the one
list of published names, ``REGISTRY`` and ``OFF_POLICY_NAMES``).
"""

from pipeline.estimators._steps import ALL_GROUP, EstimatorInputError
from pipeline.estimators.bootstrap import (
    ReplicateSums,
    bootstrap_interval,
    bootstrap_replicates,
    combine_sums,
    frame_multiplicity,
    nan_quantiles,
    percentile_interval,
    poisson_multiplicity,
    refit_weighted_is_replicates,
    replicate_sums,
)
from pipeline.estimators.bounds import lower_bound
from pipeline.estimators.importance_sampling import (
    doubly_robust,
    on_policy_value,
    ordinary_is,
    per_decision_is,
    weighted_is,
    weighted_per_decision_is,
)
from pipeline.estimators.monte_carlo import every_visit_mc, first_visit_mc
from pipeline.estimators.registry import OFF_POLICY_NAMES, REGISTRY, Estimator
from pipeline.estimators.safety import improvement_lower_bound, truncated_bound, value_lower_bound
from pipeline.estimators.weight_diagnostics import diagnostics, effective_sample_size

__all__ = [
    "ALL_GROUP",
    "OFF_POLICY_NAMES",
    "REGISTRY",
    "Estimator",
    "EstimatorInputError",
    "ReplicateSums",
    "bootstrap_interval",
    "bootstrap_replicates",
    "combine_sums",
    "diagnostics",
    "doubly_robust",
    "effective_sample_size",
    "every_visit_mc",
    "first_visit_mc",
    "frame_multiplicity",
    "improvement_lower_bound",
    "lower_bound",
    "nan_quantiles",
    "on_policy_value",
    "ordinary_is",
    "per_decision_is",
    "percentile_interval",
    "poisson_multiplicity",
    "refit_weighted_is_replicates",
    "replicate_sums",
    "truncated_bound",
    "value_lower_bound",
    "weighted_is",
    "weighted_per_decision_is",
]
