"""Estimates against the simulator's truth: every policy of a run rolled out on the lake it was made from.

For a lake ``thermal-ledger simulate`` wrote, the simulator can roll any policy out
on-policy on the same weather, prices, occupancy and base load as the logged
history (``pipeline.simulate.simulate_policy``), so each estimate of a run has a
known right answer. ``policy_truth`` rolls out every candidate rule (as evaluated,
epsilon-soft) and every learned policy of the run (each premise under its scope's
policy, keeping its own habit where the policy bootstraps, as the improve stage
evaluated it), pairs each simulated episode with the logged one the pipeline used
(premise and start), and gives per savings row of the recommended estimator, and
per safety test, the true value and savings over exactly the row's episodes
(candidates: all used episodes; learned policies: the held-out ones), and whether
the interval covered the truth and the bound held.

The behaviour's true returns are the logged ones (``truth/episodes.parquet``, the
residents' own choices on stream 0).
"""

from __future__ import annotations

from dataclasses import replace
from datetime import date
from pathlib import Path

import numpy as np
import polars as pl

from pipeline import improve as improvement
from pipeline import store
from pipeline.behavior import BehaviorModel
from pipeline.config import Config
from pipeline.simulate import SimParams, simulate_policy
from pipeline.simulate.behavior import ACTIONS
from pipeline.simulate.engine import find_episodes
from pipeline.simulate.world import build_world


class TruthError(ValueError):
    """A lake, ledger or run the truth command cannot pair with the simulator."""


TRUTH_COLUMNS = [
    "policy_name",
    "kind",
    "mode",
    "scope",
    "key",
    "estimator",
    "status",
    "outcome",
    "n_episodes",
    "savings_usd_per_episode",
    "ci_low",
    "ci_high",
    "lower_bound_usd",
    "true_value_policy_usd",
    "true_value_behavior_usd",
    "true_savings_usd_per_episode",
    "covered",
    "bound_held",
    "tightness_usd",
]
"""Columns of the ``policy_truth`` table (one row per recommended savings row and per safety test)."""


def lake_params(lake: Path, seed: int, start: date | None = None, days: int | None = None) -> SimParams:
    """The simulator's parameters of ``lake``, checked against its ``truth/`` files.

    The premise count comes from ``truth/premise_parameters.parquet``; the seed (and the
    start and length, default the simulator's) must reproduce those homes and the logged
    episodes' count, or TruthError says which to pass.
    """
    truth = Path(lake) / "truth"
    homes_file, episodes_file = truth / "premise_parameters.parquet", truth / "episodes.parquet"
    if not homes_file.is_file() or not episodes_file.is_file():
        raise TruthError(
            f"--lake {lake}: no truth/premise_parameters.parquet and truth/episodes.parquet; the truth"
            " command"
            " needs a lake written by `thermal-ledger simulate`"
        )
    homes = pl.read_parquet(homes_file)
    defaults = SimParams()
    params = replace(
        defaults,
        n_premises=homes.height,
        seed=seed,
        start=start or defaults.start,
        days=days or defaults.days,
    )
    world = build_world(params)
    if not np.allclose(world.homes.r_k_per_kw, homes["r_k_per_kw"].to_numpy()):
        raise TruthError(
            f"--lake {lake}: its homes are not the simulator's for seed {seed}; pass the seed it was"
            " simulated with (--sim-seed)"
        )
    logged = pl.read_parquet(episodes_file).height
    made = int(find_episodes(world).n.size)
    if made != logged:
        raise TruthError(
            f"--lake {lake}: {logged} logged episodes, but start {params.start} and {params.days} days make"
            f" {made}; pass the lake's --sim-start and --sim-days"
        )
    return params


def _episode_truth(run: pl.DataFrame, used: pl.DataFrame) -> pl.DataFrame:
    """Simulated episodes paired with the pipeline's used episodes: episode_id, return_usd."""
    return used.join(
        run.select("premise_id", pl.col("episode_start").alias("start_utc"), "return_usd"),
        on=["premise_id", "start_utc"],
        how="inner",
    ).select("episode_id", "return_usd")


def _learned_tables(
    policy: pl.DataFrame,
    tests: pl.DataFrame,
    homes: pl.DataFrame,
    premises: pl.DataFrame,
    behavior: BehaviorModel,
    config: Config,
) -> np.ndarray:
    """Per-home tables (n_homes, S, A) of one scope kind's policies; homes outside every scope get uniform."""
    n_states, n_actions = config.state.n_states, len(config.actions)
    out = np.full((homes.height, n_states, n_actions), 1.0 / n_actions)
    for test in tests.iter_rows(named=True):
        rows = policy.filter(pl.col("policy_name") == test["policy_name"])
        own = premises.filter(pl.col("premise_id").is_in(test["premises"])).sort("premise_id")
        table = improvement.premise_tables(
            rows,
            own,
            test["mode"],
            behavior,
            config,
            int(test["min_count"]),
            float(test["epsilon"]),
            float(test.get("min_probability") or 0.0),
        )
        at = own.select("premise_id").join(
            homes.with_row_index("_i"), on="premise_id", how="left", maintain_order="left"
        )["_i"]
        out[at.to_numpy()] = table
    return out


def _members(tests: pl.DataFrame, premises: pl.DataFrame, behavior: BehaviorModel) -> pl.DataFrame:
    """Each tested scope's premises (list column ``premises``)."""
    membership = behavior.membership()
    top = (
        membership.sort("share", descending=True)
        .unique(["mode", "premise_id"], keep="first")
        .select("mode", "premise_id", pl.col("habit_type").cast(pl.Utf8).alias("type_key"))
        if membership.height
        else pl.DataFrame(schema={"mode": pl.Utf8, "premise_id": pl.Utf8, "type_key": pl.Utf8})
    )
    lists = []
    for test in tests.iter_rows(named=True):
        scope, key = test["scope"], test["key"]
        if scope == "portfolio":
            ids = premises["premise_id"]
        elif scope == "cohort":
            ids = premises.filter(pl.col("cohort") == key)["premise_id"]
        elif scope == "premise":
            ids = pl.Series([key])
        else:
            ids = top.filter((pl.col("mode") == test["mode"]) & (pl.col("type_key") == key))["premise_id"]
        lists.append(ids.to_list())
    return tests.with_columns(pl.Series("premises", lists, dtype=pl.List(pl.Utf8)))


def policy_truth(
    config: Config,
    ledger: dict[str, pl.DataFrame],
    behavior: BehaviorModel,
    premises: pl.DataFrame,
    params: SimParams,
) -> pl.DataFrame:
    """The ``policy_truth`` rows of one run (see the module docstring).

    ``ledger`` holds the run's ``savings``, ``policy``, ``safety_test`` and
    ``episode_summary`` frames.
    """
    if tuple(config.actions) != tuple(ACTIONS.tolist()) or config.state != params.state:
        raise TruthError(
            "the run's actions and [state] settings differ from the simulator's; truth needs the same ones"
        )
    used = ledger["episode_summary"].filter(pl.col("excluded_reason").is_null() & (pl.col("n_steps") > 0))
    used = used.select("premise_id", "episode_id", pl.col("start_utc").dt.convert_time_zone("UTC"), "mode")
    logged = pl.read_parquet(Path(config.lake) / "truth" / "episodes.parquet")
    behavior_truth = _episode_truth(logged, used).rename({"return_usd": "behavior_usd"})
    homes = pl.DataFrame({"premise_id": build_world(params).homes.premise_id.tolist()})
    per_episode: dict[str, pl.DataFrame] = {}
    savings = ledger["savings"]
    for rule in config.candidates:
        if rule.name in savings["policy_name"].to_list():
            table = rule.table(config.state, config.actions, config.target_epsilon)
            run = simulate_policy(table, params, choice_stream=1 if config.target_epsilon > 0 else 0)
            per_episode[rule.name] = _episode_truth(run, used)
    tests = ledger["safety_test"].filter(pl.col("learner").is_not_null())
    tests = _members(tests, premises, behavior)
    for scope in tests["scope"].unique().sort().to_list():
        of_scope = tests.filter(pl.col("scope") == scope)
        tables = _learned_tables(ledger["policy"], of_scope, homes, premises, behavior, config)
        run = simulate_policy(tables, params, choice_stream=1)
        paired = _episode_truth(run, used)
        for name in of_scope["policy_name"].to_list():
            per_episode[name] = paired
    held_from = {row["policy_name"]: row["held_out_from_utc"] for row in tests.iter_rows(named=True)}
    members = {row["policy_name"]: row["premises"] for row in tests.iter_rows(named=True)}
    episodes = used.join(premises.select("premise_id", "cohort"), on="premise_id", how="left")
    rows = []
    recommended = savings.filter(pl.col("recommended"))
    for name, truth in per_episode.items():
        kind = "learned" if name in held_from else "candidate"
        eps = episodes.join(truth, on="episode_id").join(behavior_truth, on="episode_id")
        if kind == "learned":
            eps = eps.filter(
                (pl.col("start_utc") >= held_from[name]) & pl.col("premise_id").is_in(members[name])
            )
        for row in recommended.filter(pl.col("policy_name") == name).iter_rows(named=True):
            group = _group(eps, row["scope"], row["key"], row["mode"], members.get(name))
            rows.append(_truth_row(row, kind, group))
        for test in tests.filter(pl.col("policy_name") == name).iter_rows(named=True):
            group = eps.filter(pl.col("mode") == test["mode"])
            rows.append(
                _truth_row(
                    {
                        "policy_name": name,
                        "mode": test["mode"],
                        "scope": test["scope"],
                        "key": test["key"],
                        "estimator": f"safety_test_{test['bound_method']}",
                        "status": None,
                        "outcome": test["outcome"],
                        "savings_usd_per_episode": test["savings_estimate_usd"],
                        "ci_low": None,
                        "ci_high": None,
                        "lower_bound_usd": test["lower_bound_usd"],
                    },
                    kind,
                    group,
                )
            )
    return pl.DataFrame(rows, infer_schema_length=None).select(TRUTH_COLUMNS) if rows else pl.DataFrame()


def _group(eps: pl.DataFrame, scope: str, key: str, mode: str, members: list[str] | None) -> pl.DataFrame:
    eps = eps.filter(pl.col("mode") == mode)
    if scope == "premise":
        return eps.filter(pl.col("premise_id") == key)
    if scope == "cohort":
        return eps.filter(pl.col("cohort") == key)
    return eps


def _truth_row(row: dict, kind: str, group: pl.DataFrame) -> dict:
    n = group.height
    policy = float(group["return_usd"].mean()) if n else None
    behavior = float(group["behavior_usd"].mean()) if n else None
    true = policy - behavior if n else None
    low, high, bound = row.get("ci_low"), row.get("ci_high"), row.get("lower_bound_usd")
    covered = None if (true is None or low is None or high is None) else bool(low <= true <= high)
    held = None if (true is None or bound is None) else bool(bound <= true)
    return {
        "policy_name": row["policy_name"],
        "kind": kind,
        "mode": row["mode"],
        "scope": row["scope"],
        "key": row["key"],
        "estimator": row["estimator"],
        "status": row.get("status"),
        "outcome": row.get("outcome"),
        "n_episodes": n,
        "savings_usd_per_episode": row["savings_usd_per_episode"],
        "ci_low": low,
        "ci_high": high,
        "lower_bound_usd": bound,
        "true_value_policy_usd": policy,
        "true_value_behavior_usd": behavior,
        "true_savings_usd_per_episode": true,
        "covered": covered,
        "bound_held": held,
        "tightness_usd": None if (true is None or bound is None) else true - bound,
    }


def read_run(ledger_path: Path, run_id: str | None = None) -> tuple[str, date, dict[str, pl.DataFrame]]:
    """The run's id, run date, savings, policy, safety_test and episode_summary rows (default: latest run)."""
    if not (Path(ledger_path) / "run").is_dir():
        raise TruthError(f"no ledger at {ledger_path}: run `thermal-ledger run` on the lake first")
    con = store.connect_ledger(Path(ledger_path))
    try:
        # Whole runs only: the latest whose savings, safety test and episodes are all in the ledger.
        runs = store.frame(
            con,
            "select run_id, run_date from run"
            " where run_id in (select run_id from safety_test)"
            " and run_id in (select run_id from episode_summary)"
            " and run_id in (select run_id from savings)"
            " order by finished_at desc",
        )
        if runs.is_empty():
            raise TruthError(
                f"no run in the ledger at {ledger_path} has savings, a safety test and episodes:"
                " score a whole `thermal-ledger run`"
            )
        if run_id is None:
            run_id = runs["run_id"][0]
        found = runs.filter(pl.col("run_id") == run_id)
        if found.is_empty():
            raise TruthError(f"run {run_id} is not in the ledger at {ledger_path}")
        tables = {}
        for name in ("savings", "policy", "safety_test", "episode_summary"):
            if not (Path(ledger_path) / name).is_dir():
                raise TruthError(
                    f"the ledger at {ledger_path} has no {name} table; run the improve stage first"
                )
            tables[name] = store.frame(
                con, f"select * exclude (run_date) from {name} where run_id = $run", {"run": run_id}
            )
        return run_id, found["run_date"][0], tables
    finally:
        con.close()


def summary_line(truth: pl.DataFrame) -> str:
    """One line: coverage and bounds against the truth, the safety test's passes, the best policies' truth."""
    if truth.is_empty():
        return "truth: no rows"
    supported = truth.filter(pl.col("covered").is_not_null())
    covered = int(supported["covered"].sum() or 0)
    bounds = truth.filter(pl.col("bound_held").is_not_null())
    tests = truth.filter(pl.col("estimator").str.starts_with("safety_test"))
    passed = tests.filter(pl.col("outcome") == improvement.PROPOSED)
    truly = passed.filter(pl.col("true_savings_usd_per_episode") > 0).height
    portfolio = truth.filter(
        (pl.col("scope") == "portfolio") & ~pl.col("estimator").str.starts_with("safety_test")
    )
    best = portfolio.filter(pl.col("kind") == "candidate").sort("true_savings_usd_per_episode").tail(1)
    learned = portfolio.filter(pl.col("kind") == "learned")
    parts = [
        f"truth: {supported.height} intervals covered the true savings in {covered}"
        f" ({covered / max(supported.height, 1):.0%})",
        f"bounds held in {int(bounds['bound_held'].sum() or 0)} of {bounds.height}",
        f"safety test passed {passed.height} of {tests.height} scopes ({truly} truly better)",
    ]
    if learned.height:
        parts.append(
            f"learned portfolio policy true savings {learned['true_savings_usd_per_episode'][0]:+.3f}"
        )
    if best.height:
        parts.append(
            f"best candidate {best['policy_name'][0]}"
            f" {best['true_savings_usd_per_episode'][0]:+.3f} USD/episode"
        )
    return "; ".join(parts)
