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


def _current(con, name):
    return store.execute(con, f"select current_setting('{name}')")[0][0]


def test_duckdb_settings_from_the_configuration_reach_the_connection(tmp_path):
    """duckdb_threads, duckdb_memory_limit and duckdb_preserve_insertion_order are the connection's."""
    from pipeline import config as config_module

    config = config_module.load(
        overrides={
            "out": str(tmp_path),
            "duckdb_threads": 1,
            "duckdb_memory_limit": "512MiB",
            "duckdb_preserve_insertion_order": False,
        }
    )
    with store.warehouse(config.warehouse_path, settings=config.duckdb) as con:
        assert _current(con, "threads") == 1
        # DuckDB reports the limit in binary units: 512 MiB exactly.
        assert _current(con, "memory_limit") == "512.0 MiB"
        assert _current(con, "preserve_insertion_order") is False
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        assert _current(con, "threads") == 1


def test_default_duckdb_settings_leave_duckdb_its_own_defaults(tmp_path):
    """Threads 0 and an empty memory limit give what a fresh DuckDB connection has; order is kept."""
    fresh = duckdb.connect()
    expected = (_current(fresh, "threads"), _current(fresh, "memory_limit"))
    with store.warehouse(tmp_path / "w.duckdb", settings=store.DuckDBSettings(threads=1)) as con:
        assert _current(con, "threads") == 1
    with store.warehouse(tmp_path / "w.duckdb") as con:
        assert (_current(con, "threads"), _current(con, "memory_limit")) == expected
        assert _current(con, "preserve_insertion_order") is True


def test_a_memory_limit_duckdb_refuses_is_one_store_error(tmp_path):
    """A limit DuckDB cannot read is a StoreError naming the setting (one line), not a DuckDB traceback."""
    with pytest.raises(store.StoreError, match="duckdb_memory_limit = 'lots'"):
        with store.warehouse(tmp_path / "w.duckdb", settings=store.DuckDBSettings(memory_limit="lots")):
            pass


def test_insertion_order_is_kept_inside_and_the_setting_restored_after():
    """Statements that number records by position run with insertion order kept, whatever the setting."""
    con = duckdb.connect()
    store.execute(con, "set preserve_insertion_order = false")
    with store.insertion_order_kept(con):
        assert _current(con, "preserve_insertion_order") is True
    assert _current(con, "preserve_insertion_order") is False
