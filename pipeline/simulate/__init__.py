"""Physics-based simulator of homes: writes a landing lake and knows the true value of any policy.

``generate_lake`` writes the files a utility would receive; ``simulate_policy``
rolls any setpoint policy out on-policy on the same exogenous draws (weather,
prices, occupancy, base load), so the value of a policy is known exactly.
The decision process and the episode return are defined in
``pipeline.simulate.engine`` (see ``episode_return`` and ``comfort_penalty``).
"""

from pipeline.simulate.engine import comfort_penalty, episode_return
from pipeline.simulate.lake import (
    generate_lake,
    main_simulate,
    manifest,
    true_step_probabilities,
    write_manifest,
)
from pipeline.simulate.params import SimParams, SimulationError
from pipeline.simulate.rollout import simulate_policy

__all__ = [
    "SimParams",
    "SimulationError",
    "comfort_penalty",
    "episode_return",
    "generate_lake",
    "main_simulate",
    "manifest",
    "simulate_policy",
    "true_step_probabilities",
    "write_manifest",
]
