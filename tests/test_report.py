"""The run report: one self-contained HTML file from the ledger, checked in headless Chromium."""

from __future__ import annotations

import base64
import io
import json
import os
import re
import shutil
import socket
import subprocess
import time
import urllib.request
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline import cli, progress, store
from pipeline.report import ReportError, write_report
from pipeline.report.figures import Chart

SAMPLE_LAKE = Path(__file__).resolve().parent.parent / "sample_lake"
HOSTILE = "<script>alert('x')</script>\"'; drop table savings; --&amp;"
"""A premise id built to break HTML and SQL that splices text (data must never be markup)."""


@pytest.fixture(scope="module")
def report(sample_lake_run, tmp_path_factory):
    """The report of the sample-lake run in a folder of its own, with one premise asked for by name."""
    config = sample_lake_run.config
    out = tmp_path_factory.mktemp("report_out")
    return write_report(config.ledger_path, out, premises=("P0001",), few=3, settings=config.duckdb)


def _chart(report, name: str) -> Chart:
    return next(c for c in report.charts if c.name == name)


# ---- what the page holds ---------------------------------------------------------------------------


def test_report_is_one_file_with_every_figure_inline_and_as_png(report):
    """Each figure is inline (same PNG bytes as its file) and the page names nothing outside itself."""
    html = report.html.read_text()
    assert report.html.name == "report.html" and report.html.parent.name == report.run_id
    assert len(report.pngs) == len(report.charts) >= 6
    for path in report.pngs:
        data = path.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"
        assert f"data:image/png;base64,{base64.b64encode(data).decode()}" in html
    # No script, no external reference of any kind (href/src to http, //, file, or a stylesheet link).
    assert "<script" not in html.lower() and "<link" not in html.lower()
    assert "url(" not in html and "@import" not in html
    for attr in ("src=", "href="):
        values = [part.split('"')[1] for part in html.split(attr)[1:]]
        assert all(v.startswith(("data:image/png;base64,", "#")) for v in values), attr


def test_report_prints_the_caution_and_the_comfort_penalty_price(report, sample_lake_run):
    """The safety caution and the comfort-penalty price (the run's own setting) are on the page."""
    html = report.html.read_text()
    assert "Local codes, program rules and licensed practice govern what is sent to a device" in html
    price = sample_lake_run.config.comfort_penalty_usd_per_degree_hour
    assert f"<b>{price:,.2f} USD per °C-hour</b>" in html


def test_sections_say_plainly_when_a_table_is_not_in_the_ledger(tmp_path, sample_lake_run, report):
    """A ledger without the later stages' tables (an older run's) gets a plain sentence for each."""
    ledger = tmp_path / "ledger"
    later = {"recommendation", "recommendation_total", "safety_test", "schedule", "estimate_path"}
    _copy_ledger(sample_lake_run.config.ledger_path, ledger, report.run_id, {}, skip=later)
    html = write_report(ledger, tmp_path, few=1).html.read_text()
    for text in (
        "No recommendation table in this run&#x27;s ledger",
        "No safety_test table in this run&#x27;s ledger",
        "No schedule table in this run&#x27;s ledger",
        "No estimate_path table in this run&#x27;s ledger",
        "No truth table beside this run&#x27;s ledger",
    ):
        assert text in html
    # The full run has them: none of those sentences but the truth one (`thermal-ledger truth` not run).
    full = report.html.read_text()
    assert "No truth table beside" in full
    assert not any(t in full for t in ("No recommendation table", "No safety_test table", "No estimate_path"))


def test_home_pages_are_the_best_and_worst_few_and_the_premise_asked_for(report, sample_lake_run):
    """Home pages: the 3 largest and 3 smallest supported savings (from the ledger) and P0001."""
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    best = con.execute(
        "select key, max(savings_usd_per_episode) as s from savings"
        " where run_id = $r and scope = 'premise' and recommended and status = 'ok'"
        " group by key order by s desc, key",
        {"r": report.run_id},
    ).fetchall()
    keys = [k for k, _ in best]
    assert report.homes[:3] == keys[:3]
    assert set(report.homes[3:6]) == set(keys[-3:])
    assert report.homes[-1] == "P0001"


# ---- plotted series against the ledger ------------------------------------------------------------


def test_program_savings_figure_plots_the_ledger_rows(report, sample_lake_run):
    """Estimates, interval ends and lower bounds drawn equal the savings rows queried from the ledger."""
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    rows = con.execute(
        "select savings_usd_per_episode, ci_low, ci_high, lower_bound_usd from savings"
        " where run_id = $r and scope = 'portfolio' and recommended order by policy_name, mode",
        {"r": report.run_id},
    ).fetchall()
    expected = np.array(rows, dtype=float)
    ax = _chart(report, "program-savings").figure.axes[0]
    estimates, bounds = (c.get_offsets()[:, 0] for c in ax.collections)
    # The interval bands are the horizontal two-point lines (the zero line is vertical).
    bands = np.array([line.get_xdata() for line in ax.lines if np.ptp(line.get_ydata()) == 0])
    np.testing.assert_allclose(estimates, expected[:, 0])
    np.testing.assert_allclose(bands[:, 0], expected[:, 1])
    np.testing.assert_allclose(bands[:, 1], expected[:, 2])
    np.testing.assert_allclose(bounds, expected[:, 3])


def test_episode_cost_figure_plots_the_homes_episode_rows(report, sample_lake_run):
    """A home's plotted episode costs are minus return_usd of its used episode_summary rows, in time order."""
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    premise = report.homes[0]
    costs = [
        -r[0]
        for r in con.execute(
            "select return_usd from episode_summary where run_id = $r and premise_id = $p"
            " and excluded_reason is null order by start_utc",
            {"r": report.run_id, "p": premise},
        ).fetchall()
    ]
    ax = _chart(report, "home-01-episodes").figure.axes[0]
    np.testing.assert_allclose(ax.collections[0].get_offsets()[:, 1], costs)


# ---- hostile data and filled-in sections ---------------------------------------------------------


def _copy_ledger(
    source: Path, target: Path, run_id: str, rename: dict[str, str], skip: set[str] = frozenset()
) -> None:
    """Copy one run's ledger files but ``skip``'s tables, renaming premise ids in premise columns and keys."""
    for path in source.glob(f"*/run_date=*/{run_id}*.parquet"):
        if path.parent.parent.name in skip:
            continue
        frame = pl.read_parquet(path)
        for column in ("premise_id", "key"):
            if column in frame.columns:
                frame = frame.with_columns(pl.col(column).replace(rename))
        out = target / path.relative_to(source)
        out.parent.mkdir(parents=True, exist_ok=True)
        frame.write_parquet(out)


def test_strings_from_data_are_escaped(tmp_path, sample_lake_run, report):
    """A premise id made of HTML and SQL fragments appears only escaped, and the page gets no script."""
    ledger = tmp_path / "ledger"
    _copy_ledger(sample_lake_run.config.ledger_path, ledger, report.run_id, {"P0001": HOSTILE})
    made = write_report(ledger, tmp_path, premises=(HOSTILE,), few=0)
    html = made.html.read_text()
    assert HOSTILE not in html and "<script" not in html
    assert (
        "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt;&quot;&#x27;; drop table savings; --&amp;amp;"
        in html
    )
    assert made.homes == [HOSTILE]


def test_recommendation_chart_counts_the_ledgers_recommendation_rows(report, sample_lake_run):
    """The homes-per-recommendation bars are the recommendation table's homes per decision and policy."""
    con = store.connect_ledger(sample_lake_run.config.ledger_path)
    expected = con.execute(
        "select case when decision = 'send' then policy else 'keep current' end as label,"
        " count(distinct premise_id) from recommendation where run_id = $r group by label order by label",
        {"r": report.run_id},
    ).fetchall()
    counts = _chart(report, "recommendations").plotted.sort("label")
    assert counts.rows() == expected and sum(n for _, n in expected) == 60
    ax = _chart(report, "recommendations").figure.axes[0]
    assert sorted(p.get_width() for p in ax.patches) == sorted(n for _, n in expected)


def test_unknown_premise_and_missing_ledger_are_one_line_and_exit_2(tmp_path, capsys, sample_lake_run):
    """`report --premise` naming no premise, or an --out with no ledger, answers one line, exit code 2."""
    out = str(sample_lake_run.config.out)
    assert cli.main(["report", "--out", out, "--premise", "P9999"]) == cli.EXIT_USAGE
    assert cli.main(["report", "--out", str(tmp_path)]) == cli.EXIT_USAGE
    err = capsys.readouterr().err
    assert err.count("\n") == 2 and "Traceback" not in err
    assert "--premise P9999: no such premise" in err and "no ledger at" in err
    with pytest.raises(ReportError, match="--run nope"):
        write_report(sample_lake_run.config.ledger_path, tmp_path, run_id="nope")


# ---- progress ------------------------------------------------------------------------------------


def test_progress_is_absent_when_stdout_is_not_a_terminal(tmp_path, capsys, sample_lake_run):
    """Off a terminal (captured output), `report` prints its result line and no progress at all."""
    assert cli.main(["report", "--out", str(sample_lake_run.config.out), "--set", "report_homes=1"]) == 0
    out, err = capsys.readouterr()
    assert err == "" and out.startswith("report of run ") and out.count("\n") == 1


def test_progress_is_drawn_when_shown_and_silent_outside():
    """Reported steps reach the stream inside `shown(enabled=True)`; outside it they are no-ops."""
    stream = io.StringIO()
    with progress.shown(enabled=True, stream=stream):
        progress.begin("report", total=2, description="report: drawing")
        progress.advance("report")
        time.sleep(0.15)
        progress.advance("report")
    assert "report: drawing" in stream.getvalue()
    quiet = io.StringIO()
    with progress.shown(enabled=False, stream=quiet):
        progress.begin("report", total=2)
        progress.advance("report")
    progress.advance("report")
    assert quiet.getvalue() == ""


# ---- the page in a real browser ------------------------------------------------------------------


def _chromium() -> str | None:
    return next((p for p in map(shutil.which, ("chromium", "chromium-browser", "google-chrome")) if p), None)


class _DevTools:
    """A minimal Chrome DevTools protocol client over one page's websocket (commands and events)."""

    def __init__(self, url: str):
        from websockets.sync.client import connect

        self.ws = connect(url, max_size=None, open_timeout=30)
        self.next_id = 0
        self.events: list[dict] = []

    def send(self, method: str, **params) -> dict:
        self.next_id += 1
        self.ws.send(json.dumps({"id": self.next_id, "method": method, "params": params}))
        while True:
            message = json.loads(self.ws.recv(timeout=60))
            if message.get("id") == self.next_id:
                if "error" in message:
                    raise AssertionError(f"{method}: {message['error']}")
                return message.get("result", {})
            self._event(message)

    def wait_for(self, method: str, timeout: float = 60) -> dict:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for event in self.events:
                if event["method"] == method:
                    return event
            self._event(json.loads(self.ws.recv(timeout=deadline - time.monotonic())))
        raise AssertionError(f"no {method} within {timeout} s")

    def _event(self, message: dict) -> None:
        if "method" not in message:
            return
        self.events.append(message)
        if message["method"] == "Fetch.requestPaused":
            # Every request Fetch sees is outside the file: refuse it (network is blocked) and keep it.
            self.ws.send(
                json.dumps(
                    {
                        "id": 10_000 + len(self.events),
                        "method": "Fetch.failRequest",
                        "params": {
                            "requestId": message["params"]["requestId"],
                            "errorReason": "BlockedByClient",
                        },
                    }
                )
            )


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_report_opens_offline_in_headless_chromium(report, tmp_path):
    """Headless Chromium, network blocked, at a laptop's width: every figure drawn with non-zero size,
    no request outside the file, no horizontal overflow, and a screenshot that is not blank."""
    if _chromium() is None:
        if os.environ.get("THERMAL_LEDGER_REQUIRE_BROWSER"):
            pytest.fail("chromium is not installed; .ci/run (THERMAL_LEDGER_REQUIRE_BROWSER) needs it")
        pytest.skip("chromium is not installed (.ci/run installs Debian's chromium package)")
    port = _free_port()
    browser = subprocess.Popen(
        [
            _chromium(),
            "--headless",
            "--disable-gpu",
            "--no-sandbox",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-extensions",
            "--disable-sync",
            f"--user-data-dir={tmp_path / 'profile'}",
            # Belt and braces: no name resolves and every proxy-able request goes nowhere.
            "--host-resolver-rules=MAP * ~NOTFOUND",
            "--proxy-server=127.0.0.1:9",
            f"--remote-debugging-port={port}",
            "about:blank",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        pages = None
        for _ in range(150):
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=2) as answer:
                    pages = [p for p in json.load(answer) if p["type"] == "page"]
                if pages:
                    break
            except OSError:
                pass
            time.sleep(0.2)
        assert pages, "chromium's DevTools endpoint did not answer"
        tools = _DevTools(pages[0]["webSocketDebuggerUrl"])
        tools.send("Network.enable")
        tools.send("Page.enable")
        tools.send(
            "Fetch.enable", patterns=[{"urlPattern": "http*"}, {"urlPattern": "ws*"}, {"urlPattern": "ftp*"}]
        )
        tools.send(
            "Emulation.setDeviceMetricsOverride", width=1280, height=800, deviceScaleFactor=1, mobile=False
        )
        url = report.html.resolve().as_uri()
        tools.send("Page.navigate", url=url)
        tools.wait_for("Page.loadEventFired")
        found = tools.send(
            "Runtime.evaluate",
            returnByValue=True,
            expression="JSON.stringify({figures: Array.from(document.querySelectorAll('figure')).map(f => {"
            " const i = f.querySelector('img'); const r = i.getBoundingClientRect();"
            " return {name: f.dataset.figure, complete: i.complete,"
            " natural: [i.naturalWidth, i.naturalHeight], shown: [r.width, r.height]}; }),"
            " width: document.documentElement.scrollWidth, height: document.documentElement.scrollHeight})",
        )
        page = json.loads(found["result"]["value"])
        shot = tools.send("Page.captureScreenshot", format="png", captureBeyondViewport=True)
        tools.ws.close()
    finally:
        browser.terminate()
        browser.wait(timeout=30)
    assert [f["name"] for f in page["figures"]] == [c.name for c in report.charts]
    for figure in page["figures"]:
        assert figure["complete"] and min(figure["natural"]) > 0 and min(figure["shown"]) > 0, figure
        assert figure["shown"][0] <= 1280, figure
    assert page["width"] <= 1280, "the page is wider than a laptop's screen"
    requested = [
        e["params"]["request"]["url"] for e in tools.events if e["method"] == "Network.requestWillBeSent"
    ]
    outside = [u for u in requested if u != url and not u.startswith("data:")]
    paused = [e["params"]["request"]["url"] for e in tools.events if e["method"] == "Fetch.requestPaused"]
    assert url in requested
    # Fetch pauses (and fails) every http, ws and ftp request before it leaves; none may have been tried.
    assert outside == [] and paused == [], f"requests outside the file: {outside + paused}"
    from PIL import Image

    image = np.asarray(Image.open(io.BytesIO(base64.b64decode(shot["data"]))).convert("RGB"))
    # The whole page (its width less the scroll bar).
    assert image.shape[1] >= 1200 and image.shape[0] >= page["height"] * 0.9
    # Not blank: many distinct colours and real contrast.
    assert len(np.unique(image.reshape(-1, 3), axis=0)) > 200
    assert image.std() > 10
    (tmp_path / "screenshot.png").write_bytes(base64.b64decode(shot["data"]))


# ---- the flow: report task and Prefect artifacts -------------------------------------------------


@pytest.fixture(scope="module")
def flow_state(prefect_harness, tmp_path_factory):
    """The whole flow on the sample lake (as `make demo` runs it), in Prefect's test harness."""
    from flows.thermal_run import thermal_ledger_run

    out = tmp_path_factory.mktemp("flow_report_out")
    overrides = {"lake": str(SAMPLE_LAKE), "out": str(out), "bootstrap_replicates": 50, "report_homes": 1}
    state = thermal_ledger_run(None, overrides, return_state=True)
    return out, state, state.result()


def test_flow_writes_the_report_and_publishes_two_keyed_artifacts(flow_state):
    """The flow run ends with the report file and a table and a markdown artifact under their keys."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterFlowRunId

    from flows.thermal_run import REPORT_ARTIFACT, SUMMARY_ARTIFACT

    out, state, summary = flow_state
    html = out / "report" / summary.run_id / "report.html"
    assert html.is_file() and "Savings per policy, whole program" in html.read_text()
    with get_client(sync_client=True) as client:
        made = client.read_artifacts(
            artifact_filter=ArtifactFilter(
                flow_run_id=ArtifactFilterFlowRunId(any_=[state.state_details.flow_run_id])
            )
        )
    by_key = {a.key: a for a in made}
    assert {SUMMARY_ARTIFACT, REPORT_ARTIFACT} <= set(by_key)
    for key in (SUMMARY_ARTIFACT, REPORT_ARTIFACT):
        assert re.fullmatch(r"[a-z0-9-]+", key)
    table = by_key[SUMMARY_ARTIFACT]
    assert table.type == "table"
    rows = json.loads(table.data) if isinstance(table.data, str) else table.data
    con = store.connect_ledger(out / "ledger")
    expected = con.execute(
        "select policy_name, round(savings_usd_per_episode, 3) from savings where run_id = $r"
        " and scope = 'portfolio' and recommended order by policy_name, mode",
        {"r": summary.run_id},
    ).fetchall()
    assert [(r["policy"], r["savings_usd_per_episode"]) for r in rows] == expected
    markdown = by_key[REPORT_ARTIFACT]
    assert markdown.type == "markdown" and html.resolve().as_uri() in markdown.data
