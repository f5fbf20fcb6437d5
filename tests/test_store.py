"""The store's SQL helpers: parameters matched by whole name, identifiers quoted once."""

from __future__ import annotations

import duckdb
import pytest

from pipeline import store


def test_params_for_matches_whole_parameter_names_only():
    """``$f`` in a statement does not pull in ``folder``, and ``$folder`` does not pull in ``f``."""
    params = {"f": "a.csv", "folder": "meter", "files": ["a.csv"]}
    assert store.params_for("select * from t where source_file = $f", params) == {"f": "a.csv"}
    assert store.params_for("select $folder, $files", params) == {"folder": "meter", "files": ["a.csv"]}
    assert store.params_for("select 1", params) == {}


def test_params_for_statement_runs_in_duckdb_with_a_prefix_named_parameter():
    """A statement using ``$folder`` runs: DuckDB refuses an unused ``$f``, which a prefix match passed."""
    con = duckdb.connect()
    rows = store.execute(
        con, "select $folder", store.params_for("select $folder", {"f": 1, "folder": "meter"})
    )
    assert rows == [("meter",)]


@pytest.mark.parametrize(
    "name",
    ['kwh"; drop table t; --', "interval start", 'a""b', "semi;colon", '"', "plain"],
)
def test_quote_identifier_keeps_any_name_one_identifier(name):
    """A column named with quotes, semicolons or spaces round-trips through DuckDB's parser as itself."""
    con = duckdb.connect()
    quoted = store.quote_identifier(name)
    store.execute(con, f"create table t ({quoted} varchar)")
    store.execute(con, f"insert into t ({quoted}) values ('x')")
    assert [row[0] for row in store.execute(con, "describe t")] == [name]
    assert store.execute(con, f"select {quoted} from t") == [("x",)]
