"""Landing files still being written are refused with a reason and read whole by the next run."""

from __future__ import annotations

import gzip
import io

import polars as pl
import pytest

from pipeline import ingest, store
from tests.conftest import lake_config, write_landing
from tests.test_ingest import PREMISES, TARIFF

HEAD = "premise_id,interval_start,interval_minutes,kwh\n"
ROWS = [f"P1,2026-06-01T{h:02d}:00:00Z,60,0.{h % 9 + 1}\n" for h in range(24)]


def _lake(tmp_path):
    root = write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES})
    (root / "landing" / "meter").mkdir()
    return root


def _meter(config, name):
    results = {r.source_file: r for r in ingest.ingest(config)}
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        loaded = con.execute("select count(*) from meter_read").fetchall()[0][0]
        logged = con.execute("select status from ingest_log where source_file = $f", {"f": name}).fetchall()
    return results[name], loaded, logged


def test_a_file_that_grows_while_it_is_read_is_refused_unlogged_and_read_whole_next_run(
    tmp_path, monkeypatch
):
    """Size changed between the start of the read and the commit: no rows kept, none lost."""
    config = lake_config(_lake(tmp_path))
    path = config.lake / "landing/meter/m.csv"
    path.write_text(HEAD + "".join(ROWS[:10]))
    hashed = ingest._content_hash

    def writer_still_appending(p):
        digest = hashed(p)
        if p == path:
            with open(p, "a") as fh:
                fh.write("".join(ROWS[10:]))
        return digest

    monkeypatch.setattr(ingest, "_content_hash", writer_still_appending)
    result, loaded, logged = _meter(config, "landing/meter/m.csv")
    assert result.status == "refused" and "still being written" in result.message
    assert (result.rows_read, loaded, logged) == (0, 0, [])
    monkeypatch.undo()
    result, loaded, logged = _meter(config, "landing/meter/m.csv")
    assert (result.status, result.rows_read, result.rows_loaded, loaded) == ("loaded", 24, 24, 24)


def _gzip(text: str) -> bytes:
    return gzip.compress(text.encode())


def _parquet(text: str) -> bytes:
    buffer = io.BytesIO()
    pl.read_csv(io.StringIO(text), infer_schema=False).write_parquet(buffer)
    return buffer.getvalue()


@pytest.mark.parametrize(
    ("name", "partial", "whole"),
    [
        ("m.csv", b"", (HEAD + "".join(ROWS)).encode()),
        ("m.csv.gz", _gzip(HEAD + "".join(ROWS))[:60], _gzip(HEAD + "".join(ROWS))),
        ("m.parquet", _parquet(HEAD + "".join(ROWS))[:-40], _parquet(HEAD + "".join(ROWS))),
    ],
    ids=["zero-byte", "truncated-gzip", "truncated-parquet"],
)
def test_a_half_written_file_is_refused_with_a_reason_and_the_finished_file_loads_whole(
    tmp_path, name, partial, whole
):
    """Zero bytes, a gzip stream cut short or a Parquet file without its footer: refused, then whole."""
    config = lake_config(_lake(tmp_path))
    path = config.lake / "landing/meter" / name
    path.write_bytes(partial)
    result, loaded, _ = _meter(config, f"landing/meter/{name}")
    assert result.status == "refused" and result.message and loaded == 0
    assert result.rows_read == result.rows_quarantined
    path.write_bytes(whole)
    result, loaded, logged = _meter(config, f"landing/meter/{name}")
    assert (result.rows_read, result.rows_loaded, loaded, logged) == (24, 24, 24, [("loaded",)])
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        left = con.execute(
            "select count(*) from quarantine where source_file = $f", {"f": result.source_file}
        )
        assert left.fetchall() == [(0,)]


def test_a_symlink_out_of_the_lake_is_refused_unread_and_the_rest_loads(tmp_path):
    """A link to a file outside the lake is not read: refused with a reason, nothing of it stored."""
    secret = tmp_path / "elsewhere" / "private.csv"
    secret.parent.mkdir()
    secret.write_text(HEAD + "".join(ROWS))
    config = lake_config(_lake(tmp_path / "lake"))
    (config.lake / "landing/meter/m.csv").write_text(HEAD + "".join(ROWS[:3]))
    (config.lake / "landing/meter/linked.csv").symlink_to(secret)
    result, loaded, logged = _meter(config, "landing/meter/linked.csv")
    assert result.status == "refused" and "outside the lake" in result.message
    assert (loaded, logged) == (3, [])
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        rows = con.execute("select count(*) from quarantine where source_file like '%linked%'").fetchall()
        assert rows == [(0,)]
