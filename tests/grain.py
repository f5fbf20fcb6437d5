"""Grain checks any table's tests can use: its keys are unique and never null."""

from __future__ import annotations

from collections.abc import Sequence

import duckdb
import polars as pl

from pipeline import store


def assert_grain(
    con_or_frame: duckdb.DuckDBPyConnection | pl.DataFrame,
    table_or_frame: str | pl.DataFrame,
    keys: Sequence[str],
) -> None:
    """Fail, naming the table, keys and an offending key, unless ``keys`` are unique and not null.

    Pass a DuckDB connection and a table name, or a polars frame (twice, or as the first argument
    with ``None`` as the second) to check a frame already in hand.
    """
    if isinstance(con_or_frame, pl.DataFrame):
        frame, label = con_or_frame, "frame"
    elif isinstance(table_or_frame, pl.DataFrame):
        frame, label = table_or_frame, "frame"
    else:
        columns = ", ".join(store.quote_identifier(k) for k in keys)
        frame = store.frame(con_or_frame, f"select {columns} from {store.quote_identifier(table_or_frame)}")
        label = table_or_frame
    keys = list(keys)
    assert frame.height > 0, f"{label}: no rows, so its grain ({', '.join(keys)}) proves nothing"
    nulls = frame.filter(pl.any_horizontal(pl.col(keys).is_null()))
    assert nulls.is_empty(), (
        f"{label}: {nulls.height} rows with a null key ({', '.join(keys)}), e.g. {nulls.row(0)}"
    )
    repeated = frame.group_by(keys).len().filter(pl.col("len") > 1).sort(keys)
    assert repeated.is_empty(), (
        f"{label}: {repeated.height} keys ({', '.join(keys)}) on more than one row,"
        f" e.g. {repeated.row(0)[:-1]} on {repeated.row(0)[-1]} rows"
    )
