"""The Prefect flow runs the whole pipeline on sample_lake/ and leaves a readable ledger."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from pipeline import store

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"


@pytest.fixture(scope="module")
def flow_run(prefect_harness, tmp_path_factory):
    from flows.thermal_run import thermal_ledger_run

    out = tmp_path_factory.mktemp("flow_out")
    summary = thermal_ledger_run(
        None, {"lake": str(SAMPLE_LAKE), "out": str(out), "bootstrap_replicates": 100}
    )
    return out, summary


def test_flow_writes_every_ledger_table(flow_run):
    """Every ledger table a run writes (savings, policy, behavior_type, ...) is non-empty Parquet."""
    out, summary = flow_run
    for table in (
        "savings",
        "policy",
        "behavior_policy",
        "behavior_type",
        "episode_summary",
        "diagnostics",
        "horizon",
        "state_value",
        "state_lookup",
        "run",
    ):
        files = list((out / "ledger" / table).glob("run_date=*/*.parquet"))
        # One run: its file, and for policy and savings the improve stage's learned rows beside it.
        runs = {f.name.removesuffix(".parquet").removesuffix("-learned") for f in files}
        assert len(runs) == 1 and len(files) == (2 if table in ("savings", "policy") else 1), table
        assert all(f.stat().st_size > 0 for f in files)
    assert summary.ingest.refused == 0 and summary.episodes.steps > 0


def test_run_table_records_configuration_and_row_counts(flow_run):
    """The run row holds the configuration as JSON and each ledger table's row count."""
    out, summary = flow_run
    con = store.connect_ledger(out / "ledger")
    config, counts, run_id = con.execute("select config, row_counts, run_id from run").fetchall()[0]
    assert run_id == summary.run_id
    assert json.loads(config)["bootstrap_replicates"] == 100
    counts = json.loads(counts)
    saved = con.execute("select count(*) from savings").fetchall()[0][0]
    assert counts["savings"] + counts.get("savings-learned", 0) == saved > 0


def test_analyst_selects_savings_per_premise_with_the_sql_views(flow_run):
    """sql/views.sql gives an analyst savings per premise from the DuckDB Python client."""
    out, _ = flow_run
    con = store.connect_ledger(out / "ledger")
    rows = con.execute(
        "select premise_id, policy_name, savings_usd_per_episode, ci_low, ci_high, status, shrinkage"
        " from savings_by_premise"
    ).fetchall()
    assert rows and all(r[3] <= r[4] for r in rows if r[5] == "ok")
    assert all(r[2] is None for r in rows if r[5] == "insufficient_evidence")
    assert all(0.0 <= r[6] <= 1.0 for r in rows)
    premises = {r[0] for r in rows}
    assert (
        len(premises)
        == con.execute("select count(distinct key) from savings where scope = 'premise'").fetchall()[0][0]
    )


def test_sample_lake_has_about_one_away_episode_per_weekday(flow_run):
    """The scenario sends residents out on 60-90 % of weekdays (sample_lake/README.md); the build agrees."""
    _, summary = flow_run
    assert 0.6 <= summary.episodes.weekday_episodes_per_weekday <= 0.9
    assert 2.5 <= summary.episodes.mean_decisions <= 4.5  # anchored: departure, tier rises, last hour


def test_state_values_give_first_and_every_visit_values_at_every_scope(flow_run):
    """The behaviour policy's Monte Carlo state values are there per premise, cohort and portfolio."""
    out, _ = flow_run
    con = store.connect_ledger(out / "ledger")
    rows = con.execute("select distinct scope, method from state_value order by all").fetchall()
    assert rows == [
        (scope, method)
        for scope in ("cohort", "portfolio", "premise")
        for method in ("every_visit", "first_visit")
    ]


def test_habit_type_shares_are_one_distribution_per_premise(flow_run):
    """behavior_type has one row per (mode, premise, type), shares summing to one, every premise counted."""
    out, summary = flow_run
    con = store.connect_ledger(out / "ledger")
    keys, unique_keys, worst = con.execute(
        "select count(*), count(distinct (mode, premise_id, habit_type)),"
        " max(abs(total - 1)) from behavior_type"
        " join (select mode, premise_id, sum(share) as total from behavior_type group by all)"
        " using (mode, premise_id)"
    ).fetchall()[0]
    assert keys == unique_keys > 0 and worst < 1e-9
    premises = con.execute("select count(distinct premise_id) from behavior_type").fetchall()[0][0]
    assert summary.behavior.n_types >= 1 and sum(summary.behavior.premises_per_type) == premises
