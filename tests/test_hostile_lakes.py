"""Must-show: lakes with random combinations of many kinds of damage lose no landing row.

Each example writes a lake whose meter files carry a random set of the defects below (line
defects at random lines, file defects on whole files); ingest must finish, every file gets a log
entry, every file's rows read = loaded + quarantined + duplicates with the tables agreeing, and
where each line is one record (no quotes, no carriage returns) rows read is the file's non-empty
data lines counted here, outside the pipeline.
"""

from __future__ import annotations

import gzip
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline import ingest, store
from tests.conftest import lake_config, write_landing
from tests.test_ingest import PREMISES, TARIFF, _check_accounting

HEAD = b"premise_id,interval_start,interval_minutes,kwh,quality"


def _row(i: int) -> bytes:
    return f"P1,2026-06-01T{i // 4:02d}:{15 * (i % 4):02d}:00Z,15,0.{i % 9 + 1},actual".encode()


LINE_DEFECTS = {
    "non_utf8": lambda line: line + b"\xff\xfe",
    "semicolons": lambda line: line.replace(b",", b";"),
    "decimal_comma": lambda line: line.replace(b"0.", b"0,", 1),
    "repeated_header": lambda line: HEAD,
    "very_long_line": lambda line: line + b"x" * 200_000,
    "control_chars": lambda line: line.replace(b"P1", b"P\x011\x07"),
    "thousands_separator": lambda line: line.rsplit(b",", 2)[0] + b',"1,000.5",actual',
    "other_timestamp_format": lambda line: line.replace(b"2026-06-01T", b"06/01/2026 ").replace(b":00Z", b""),
    "quote_in_id": lambda line: b'"P1""x"' + line[2:],
    "sql_in_id": lambda line: b"P1'; drop table meter_read; --" + line[2:],
    "path_in_id": lambda line: b"../../etc/P1" + line[2:],
    "negative_kwh": lambda line: line.replace(b",0.", b",-0.", 1),
    "huge_kwh": lambda line: line.replace(b",0.", b",9990.", 1),
    "missing_field": lambda line: line.rsplit(b",", 1)[0],
    "extra_field": lambda line: line + b",extra",
    "empty_line": lambda line: b"",
    "stray_quote": lambda line: line.replace(b"P1", b'P"1', 1),
    "unknown_premise": lambda line: b"P404" + line[2:],
    "bad_interval": lambda line: line.replace(b",15,", b",7,", 1),
    "blank_kwh": lambda line: b",".join(line.split(b",")[:3]) + b",,actual",
    "bad_timestamp": lambda line: line.replace(b"2026-06-01T", b"2026-13-45T"),
    "crlf": lambda line: line + b"\r",
    "nul_byte": lambda line: line.replace(b"actual", b"act\x00ual"),
    "tab_delimited": lambda line: line.replace(b",", b"\t"),
    "bad_quality": lambda line: line.replace(b"actual", b"guessed"),
    "duplicate_line": lambda line: line + b"\n" + line,
    "conflicting_duplicate": lambda line: line + b"\n" + line.replace(b",actual", b"5,actual"),
}
"""Damage to one line of a meter file: each its own kind."""

FILE_DEFECTS = ("bom", "gzip", "hostile_name", "zero_byte_file", "header_only_file")
"""Damage to a whole file, or a damaged file beside the others."""


@st.composite
def hostile_lakes(draw):
    files = {}
    for f in range(draw(st.integers(1, 3))):
        lines = [_row(i) for i in range(draw(st.integers(1, 16)))]
        for _ in range(draw(st.integers(0, 6))):
            kind = draw(st.sampled_from(sorted(LINE_DEFECTS)))
            i = draw(st.integers(0, len(lines) - 1))
            lines[i] = LINE_DEFECTS[kind](lines[i])
        data = HEAD + b"\n" + b"\n".join(lines) + b"\n"
        kinds = draw(st.sets(st.sampled_from(FILE_DEFECTS), max_size=3))
        name = f"m{f}"
        if "hostile_name" in kinds:
            name += '\'; drop table meter_read; -- "q"'
        if "bom" in kinds:
            data = b"\xef\xbb\xbf" + data
        if "gzip" in kinds:
            files[f"{name}.csv.gz"] = gzip.compress(data)
        else:
            files[f"{name}.csv"] = data
        if "zero_byte_file" in kinds:
            files[f"{name}-empty.csv"] = b""
        if "header_only_file" in kinds:
            files[f"{name}-head.csv"] = HEAD + b"\n"
    return files


def _records(data: bytes) -> int | None:
    """Non-empty data lines of a CSV whose lines are its records, else None."""
    if data.endswith(b"\n") is False or b'"' in data or b"\r" in data or not data:
        return None
    return sum(1 for line in data.split(b"\n")[1:] if line.strip())


@pytest.mark.filterwarnings("ignore:Do not use the `random` module inside strategies")
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(files=hostile_lakes())
def test_a_lake_with_random_kinds_of_damage_is_ingested_without_losing_a_row(files):
    """Every landing row is loaded, quarantined with a reason or counted as a duplicate."""
    assert len(LINE_DEFECTS) + len(FILE_DEFECTS) >= 25
    with tempfile.TemporaryDirectory() as tmp:
        root = write_landing(Path(tmp), {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES})
        (root / "landing/meter").mkdir()
        for name, data in files.items():
            (root / "landing/meter" / name).write_bytes(data)
        config = lake_config(root)
        results = {r.source_file: r for r in ingest.ingest(config)}
        with store.warehouse(config.warehouse_path, read_only=True) as con:
            _check_accounting(con)
            logged = {r[0] for r in con.execute("select source_file from ingest_log").fetchall()}
            reasons = con.execute("select count(*) from quarantine where reason is null").fetchall()
            assert reasons == [(0,)]
        for name, data in files.items():
            source = f"landing/meter/{name}"
            assert source in logged and source in results, source
            r = results[source]
            assert r.rows_read == r.rows_loaded + r.rows_quarantined + r.rows_duplicate, source
            expected = _records(gzip.decompress(data) if name.endswith(".gz") else data)
            if expected is not None and not data.startswith(b"\xef\xbb\xbf"):
                assert r.rows_read == expected, (source, r)


HOSTILE_ID = "P1'; drop table meter_read; --\"</td><script>alert(1)</script>/../x"


def test_a_hostile_premise_id_is_stored_verbatim_and_is_text_in_report_html(tmp_path):
    """Quotes, semicolons, SQL, markup and path separators in an id stay data in the warehouse and HTML."""
    from html.parser import HTMLParser

    from pipeline.report import page

    quoted = '"' + HOSTILE_ID.replace('"', '""') + '"'
    premises = PREMISES.replace("\n    P1,", f"\n    {quoted},")
    meter = f"premise_id,interval_start,interval_minutes,kwh\n{quoted},2026-06-01T12:00:00Z,60,1.0\n"
    root = write_landing(
        tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": premises, "meter/m.csv": meter}
    )
    config = lake_config(root)
    ingest.ingest(config)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        assert con.execute("select premise_id from premise").fetchall() == [(HOSTILE_ID,)]
        assert con.execute("select premise_id from meter_read").fetchall() == [(HOSTILE_ID,)]

    # The standard library's HTML parser sees one table cell whose text is the id, and no script.
    class Cells(HTMLParser):
        def __init__(self):
            super().__init__()
            self.tags, self.text = [], []

        def handle_starttag(self, tag, attrs):
            self.tags.append(tag)

        def handle_data(self, data):
            self.text.append(data)

    parsed = Cells()
    parsed.feed(page.table(["premise"], [[HOSTILE_ID]]))
    assert "script" not in parsed.tags and parsed.tags.count("td") == 1
    assert "".join(parsed.text) == "premise" + HOSTILE_ID


def test_parquet_files_of_one_folder_with_different_schemas_each_load_by_their_own(tmp_path):
    """Column order, kWh or Wh, text or typed columns differ per file: each file is read by its own schema.

    (A Parquet file has one schema in its footer for all its row groups, so the differing
    schemas a writer can produce are those of separate files or parts of a folder.)
    """
    import datetime as dt

    import polars as pl

    root = write_landing(tmp_path, {"tariffs/t.csv": TARIFF, "premises/p.csv": PREMISES})
    meter = root / "landing/meter"
    meter.mkdir()
    starts = [dt.datetime(2026, 6, 1, h, tzinfo=dt.UTC) for h in range(6)]
    pl.DataFrame(
        {
            "premise_id": ["P1"] * 2,
            "interval_start": starts[:2],
            "interval_minutes": [60, 60],
            "kwh": [1.0, 2.0],
        }
    ).write_parquet(meter / "a.parquet")
    pl.DataFrame(
        {
            "wh": [500, 700],
            "interval_minutes": [60, 60],
            "interval_start": starts[2:4],
            "premise_id": ["P1"] * 2,
        }
    ).write_parquet(meter / "b.parquet")
    pl.DataFrame(
        {
            "premise_id": ["P1"] * 2,
            "interval_start": [s.isoformat() for s in starts[4:]],
            "interval_minutes": ["60", "sixty"],
            "kwh": ["0.5", "0.25"],
        }
    ).write_parquet(meter / "c.parquet", row_group_size=1)
    config = lake_config(root)
    results = {r.source_file: r for r in ingest.ingest(config)}
    counts = {name[-9:]: (r.rows_read, r.rows_loaded, r.rows_quarantined) for name, r in results.items()}
    assert counts["a.parquet"] == (2, 2, 0) and counts["b.parquet"] == (2, 2, 0)
    assert counts["c.parquet"] == (2, 1, 1)
    with store.warehouse(config.warehouse_path, read_only=True) as con:
        _check_accounting(con)
        kwh = con.execute("select sum(kwh) from meter_read").fetchall()[0][0]
    # 1 + 2 kWh, 500 + 700 Wh = 1.2 kWh, 0.5 kWh.
    assert kwh == pytest.approx(4.7)
