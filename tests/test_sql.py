"""Analyst SQL: every view in sql/ and every README example query run against the demo ledger,
and the ``thermal-ledger sql`` command's output and one-line errors."""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import polars as pl
import pytest

from pipeline import store
from pipeline.cli import EXIT_OK, EXIT_USAGE, main

ROOT = Path(__file__).resolve().parent.parent
VIEW = re.compile(r"create or replace view (\w+)", re.IGNORECASE)


def _views() -> list[str]:
    names = []
    for name in store.view_files():
        names += VIEW.findall((store.SQL_DIR / f"{name}.sql").read_text())
    return names


def _readme_queries() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text.split("## For analysts", 1)[1].split("\n## ", 1)[0]
    return [q.strip() for q in re.findall(r"```sql\n(.*?)```", section, re.DOTALL)]


@pytest.fixture(scope="module")
def ledger(sample_lake_run, tmp_path_factory):
    """A copy of the demo output with one more evaluate run and the truth table beside it.

    The sample lake's residents already set back about as well as any policy, so the demo's
    recommendation sends nothing and its schedule is empty. The extra run allows comfort to rise
    (``comfort_rise_limit_degree_hours = 10``), so some home is sent a policy and its schedule
    exists; ``thermal-ledger truth`` then writes ``policy_truth`` for that run, so every view in
    sql/ has a table under it.
    """
    from pipeline import config as config_module
    from pipeline import stages

    out = tmp_path_factory.mktemp("sql_demo") / "out"
    shutil.copytree(sample_lake_run.config.out, out)
    overrides = {
        "lake": str(sample_lake_run.config.lake),
        "out": str(out),
        "presence_sources": ["occupancy_flag"],
        "comfort_rise_limit_degree_hours": 10.0,
    }
    # A whole run (every stage before evaluate reused), so it holds every table a run writes.
    stages.run_all(config_module.load(overrides=overrides))
    args = ["--lake", overrides["lake"], "--out", str(out), "--set", 'presence_sources=["occupancy_flag"]']
    assert main(["truth", *args, "--set", "comfort_rise_limit_degree_hours=10.0"]) == EXIT_OK
    return out / "ledger"


def test_views_are_found_in_every_view_file():
    """The view files hold the decision views the README names (the parser below sees them all)."""
    names = _views()
    for view in (
        "run_latest",
        "recommendation_latest",
        "program_totals",
        "schedule_latest",
        "savings_comfort_by_cohort",
        "estimator_disagreement",
        "savings_by_premise",
    ):
        assert view in names
    assert len(names) == len(set(names))


# Views that are empty on a ledger whose runs all finished (no run was killed part-way).
EMPTY_WHEN_ALL_RUNS_FINISHED = {"abandoned_run"}


@pytest.mark.parametrize("view", _views())
def test_every_view_runs_against_the_demo_ledger(ledger, view):
    """Each view in sql/views*.sql answers a query on the demo ledger, with rows where the demo has any."""
    con = store.connect_ledger(ledger)
    rows = con.execute(f"select count(*) from {store.quote_identifier(view)}").fetchone()[0]
    assert rows == 0 if view in EMPTY_WHEN_ALL_RUNS_FINISHED else rows > 0, view


def test_every_view_file_opens_with_a_header_comment_and_each_view_has_one():
    """Each view file starts with a comment, and a comment line stands right before every view."""
    for name in store.view_files():
        text = (store.SQL_DIR / f"{name}.sql").read_text()
        assert text.startswith("--"), name
        lines = text.splitlines()
        for i, line in enumerate(lines):
            if VIEW.match(line) and name != "views":
                assert lines[i - 1].startswith("--"), (name, line)


def test_latest_views_show_only_the_newest_run(ledger):
    """recommendation_latest has one row per premise and mode of the newest run, none of older runs."""
    con = store.connect_ledger(ledger)
    latest = con.execute(
        "select count(*) from recommendation semi join latest_run using (run_id)"
    ).fetchone()[0]
    shown, keys = con.execute(
        "select count(*), count(distinct (premise_id, mode)) from recommendation_latest"
    ).fetchone()
    assert shown == latest == keys > 0


@pytest.mark.parametrize("number", range(len(_readme_queries())))
def test_every_readme_example_query_runs_through_the_command(ledger, number, tmp_path, capsys):
    """Each example query of the README's analyst section runs via `thermal-ledger sql` and returns rows."""
    query = _readme_queries()[number]
    out = tmp_path / "result.parquet"
    assert main(["sql", query, "--ledger", str(ledger), "--out", str(out)]) == EXIT_OK
    assert pl.read_parquet(out).height > 0, query


def test_readme_has_at_least_five_examples_covering_the_questions():
    """Top homes by bound, program totals, homes kept and why, a schedule, estimator disagreement."""
    queries = _readme_queries()
    assert len(queries) >= 5
    joined = "\n".join(queries)
    for view in ("program_totals", "recommendation_latest", "schedule_latest", "estimator_disagreement"):
        assert view in joined
    assert "bill_lower_bound_usd desc" in joined


def test_the_command_prints_a_table_and_writes_csv_equal_to_the_query(ledger, tmp_path, capsys):
    """Printed rows and the CSV written hold what the same query gives through connect_ledger."""
    query = "select premise_id, decision, reason from recommendation_latest order by premise_id, mode"
    expected = store.connect_ledger(ledger).sql(query).pl()
    assert main(["sql", query, "--ledger", str(ledger)]) == EXIT_OK
    printed = capsys.readouterr().out
    assert f"{expected.height:,} rows" in printed and expected["premise_id"][0] in printed
    csv = tmp_path / "r.csv"
    assert (
        main(
            [
                "sql",
                query,
                "--ledger",
                str(ledger.parent if ledger.name == "ledger" else ledger),
                "--out",
                str(csv),
            ]
        )
        == EXIT_OK
    )
    assert pl.read_csv(csv).equals(expected)


def test_forgetting_the_ledger_folder_is_one_line_and_exit_2(tmp_path, monkeypatch, capsys):
    """With no --ledger and no out/ledger here, the command names the fix in one line, no traceback."""
    monkeypatch.chdir(tmp_path)
    assert main(["sql", "select 1"]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--ledger" in err and "Traceback" not in err


@pytest.mark.parametrize(
    ("query", "extra", "words"),
    [
        ("select * from no_such_view", [], "no_such_view"),
        ("select from where", [], "Parser Error"),
        ("select 1", ["--out", "result.xlsx"], ".csv or .parquet"),
    ],
)
def test_a_refused_query_or_output_is_one_line_and_exit_2(ledger, tmp_path, query, extra, words, capsys):
    """DuckDB's refusal (first line, with the views there are) or a bad --out: one line, exit 2."""
    extra = [str(tmp_path / e) if e.endswith(".xlsx") else e for e in extra]
    assert main(["sql", query, "--ledger", str(ledger), *extra]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and words in err and "Traceback" not in err


def test_a_folder_that_is_no_ledger_is_one_line_and_exit_2(tmp_path, capsys):
    """A --ledger folder without a run table says so in one line."""
    assert main(["sql", "select 1", "--ledger", str(tmp_path)]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no ledger" in err
