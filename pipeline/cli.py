"""The ``thermal-ledger`` command: one subcommand per stage, ``run`` for all of them, ``serve`` on a schedule.

Exit code 0 on success; 1 when any landing file was refused (the rest still
loads); 2 for unusable settings or a stage that cannot run. A user's mistake is
answered by one line on stderr, never a traceback.
"""

from __future__ import annotations

import argparse
import ctypes
import datetime as dt
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import polars as pl
from rich import box
from rich.console import Console
from rich.table import Table
from rich.text import Text

from pipeline import config as config_module
from pipeline import progress, stages, store
from pipeline.behavior import BehaviorInputError
from pipeline.config import Config, ConfigError
from pipeline.estimators import EstimatorInputError
from pipeline.ingest import IngestError
from pipeline.ledger import OutputInUseError, Run, exclusive_output
from pipeline.policies import PolicyError
from pipeline.report.ledger_data import ReportError, report_path
from pipeline.simulate.lake import CHUNK_PREMISES
from pipeline.simulate.params import SimulationError
from pipeline.store import StoreError
from pipeline.truth import TruthError

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_BUSY = 0, 1, 2, 3

SAVINGS_BASELINE = (
    "Savings are measured against the residents' current behaviour (their logged setpoint habits).\n"
    "Annual figures: episodes per observed day times the season length (days_observed, season_days)."
)

USER_ERRORS: tuple[type[Exception], ...] = (
    ConfigError,
    stages.StageError,
    IngestError,
    StoreError,
    BehaviorInputError,
    EstimatorInputError,
    PolicyError,
    ReportError,
)
"""Errors caused by the user's settings, files or order of stages: one line and exit 2."""

SETTINGS_HINT = (
    "Every setting, its unit, default and allowed values: SETTINGS.md, or `thermal-ledger settings`."
)


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--lake", type=Path, help="folder holding landing/ (default: sample_lake)")
    parser.add_argument("--out", type=Path, help="folder for warehouse.duckdb and ledger/ (default: out)")
    parser.add_argument(
        "--config",
        type=Path,
        help="TOML file of settings (example: sample_lake/settings.toml; see SETTINGS.md)",
    )
    parser.add_argument("--seed", type=int, help="seed for every random draw")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override one setting, TOML syntax (repeatable), e.g. --set recovery_hours=2;"
        " dotted keys reach into tables: --set state.price_tiers=2",
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand."""
    parser = argparse.ArgumentParser(
        prog="thermal-ledger",
        description="Learn and audit thermostat setpoint policies from utility interval data.",
        epilog=SETTINGS_HINT,
    )
    sub = parser.add_subparsers(dest="stage", required=True, metavar="STAGE")
    helps = {
        "ingest": "load landing files into the warehouse; rows that fail checks go to quarantine",
        "episodes": "build the hourly grid, away episodes and decision steps",
        "learn": "estimate the residents' behaviour policy from the logged steps",
        "evaluate": "estimate each candidate policy's value and savings off-policy",
        "improve": "learn setpoint policies per scope and test them on later, held-out episodes",
        "run": "all stages in order as one Prefect flow, then print a summary",
    }
    sim = sub.add_parser(
        "simulate",
        help="write an invented demo lake (with its true values) from a seed",
        description="Simulate homes and write landing files a utility would receive, plus truth/ side files "
        "the pipeline never reads. The same seed gives the same files, bit for bit.",
    )
    sim.add_argument(
        "--season",
        choices=("summer", "winter"),
        default="summer",
        help="summer: air conditioning; winter: gas furnaces and heat pumps, heating setpoints"
        " (default summer); the defaults below are the season's",
    )
    sim.add_argument("--premises", type=int, help="number of homes (default 60 summer, 40 winter)")
    sim.add_argument("--seed", type=int, help="seed of every draw (default 20260601 summer, 20261201 winter)")
    sim.add_argument("--out", type=Path, required=True, help="folder to write landing/ and truth/ into")
    sim.add_argument(
        "--start", type=dt.date.fromisoformat, help="first day (default 2026-06-01 summer, 2026-12-01 winter)"
    )
    sim.add_argument("--days", type=int, help="number of days (default 92 summer, 62 winter)")
    sim.add_argument(
        "--chunk-premises",
        type=int,
        default=CHUNK_PREMISES,
        metavar="N",
        help="homes simulated at a time: peak memory grows with it, the files stay the same"
        f" (default {CHUNK_PREMISES})",
    )
    sim.add_argument(
        "--hidden-confounder",
        action="store_true",
        help="residents also react to a daily state no file records (shows what confounding does)",
    )
    truth = sub.add_parser(
        "truth",
        help="on a simulated lake, roll every policy of a run out in the simulator and score its estimates",
        description="For a lake `thermal-ledger simulate` wrote: roll every candidate and learned policy of"
        " the run (default the latest) out on the lake's own weather, prices, occupancy and base load, and"
        " write ledger/policy_truth with each estimate, its interval and bound, the true savings and whether"
        " the interval covered them and the bound held.",
        epilog=SETTINGS_HINT,
    )
    _common(truth)
    truth.add_argument("--run", help="run id to score (default: the ledger's latest run)")
    truth.add_argument(
        "--sim-seed", type=int, help="seed the lake was simulated with (default: the seed setting)"
    )
    truth.add_argument(
        "--sim-start", type=dt.date.fromisoformat, help="the lake's first day (default 2026-06-01)"
    )
    truth.add_argument("--sim-days", type=int, help="the lake's number of days (default 92)")
    sim.add_argument("--manifest", action="store_true", help="write MANIFEST.sha256 of the generated files")
    sim.add_argument(
        "--policy-values",
        action="store_true",
        help="also roll out the default candidates for their true values",
    )
    for name, text in helps.items():
        p = sub.add_parser(name, help=text, description=text, epilog=SETTINGS_HINT)
        _common(p)
        if name == "run":
            p.add_argument(
                "--no-prefect", action="store_true", help="run the stages directly, without a Prefect flow"
            )
    report = sub.add_parser(
        "report",
        help="write the run's report: one self-contained HTML file and its figures as PNGs, from the ledger",
        description="Write <out>/report/<run_id>/report.html (program, trust and home pages; opens with no"
        " network) and each figure as figures/<name>.png beside it, from the ledger of one run (default:"
        " the newest). `run` writes it too.",
        epilog=SETTINGS_HINT,
    )
    _common(report)
    report.add_argument("--run", dest="run_id", metavar="RUN_ID", help="the run to report (default: newest)")
    report.add_argument(
        "--premise",
        action="append",
        default=[],
        metavar="PREMISE_ID",
        help="also give this home a page (repeatable; the setting report_premises lists more)",
    )
    serve = sub.add_parser(
        "serve",
        help="register the run as a Prefect deployment on a cron schedule and run it here until stopped",
        description="Register the whole run (the flow thermal-ledger-run, with these settings) as a Prefect"
        " deployment on a cron schedule (serve_cron, default 04:00 UTC on the 1st of each month) and keep"
        " running its scheduled and hand-triggered runs until interrupted. Needs a running Prefect server"
        " (`prefect server start`) and PREFECT_API_URL pointing at it.",
        epilog=SETTINGS_HINT,
    )
    _common(serve)
    serve.add_argument("--cron", help="cron text of the schedule (default: the serve_cron setting)")
    serve.add_argument("--name", help="deployment name (default: the serve_name setting, 'monthly')")
    bench = sub.add_parser(
        "bench",
        help="time every stage (each in its own process) on a simulated lake, against a floor",
        description="Simulate (or reuse) a lake of N homes, run each stage in its own process and report"
        " wall seconds, rows/s and peak memory per stage, the whole run against one DuckDB query's floor,"
        " and the vectorised estimators against reference loops; also writes <work>/bench-<N>.json.",
    )
    bench.add_argument("--premises", type=int, required=True, help="number of simulated homes")
    bench.add_argument("--days", type=int, default=92, help="number of days (default 92)")
    bench.add_argument("--seed", type=int, default=7, help="seed of the simulated lake (default 7)")
    bench.add_argument(
        "--work", type=Path, default=Path("bench_out"), help="working folder (default bench_out)"
    )
    bench.add_argument("--csv", action="store_true", help="also ingest the meter files converted to CSV")
    bench.add_argument(
        "--reuse", action="store_true", help="require the lake already simulated there (never simulate)"
    )
    sql = sub.add_parser(
        "sql",
        help="run a SQL query against the analyst views of a ledger; print a table or write CSV/Parquet",
        description="Run one DuckDB SQL query against the analyst views over a ledger (sql/views*.sql:"
        " run_latest, savings_latest, savings_by_premise, savings_comfort_by_cohort, recommendation_latest,"
        " program_totals, schedule_latest, estimator_disagreement and one view per ledger table) and print"
        " the result, or write it with --out. Every saving is measured against the residents' current"
        " behaviour.",
        epilog='Example: thermal-ledger sql "select * from program_totals" --ledger out/ledger',
    )
    sql.add_argument("query", help="the SQL query, quoted")
    sql.add_argument(
        "--ledger",
        type=Path,
        help="the ledger folder a run wrote (OUT/ledger, or OUT; default out/ledger when present)",
    )
    sql.add_argument(
        "--out", type=Path, help="write the result to this .csv or .parquet file instead of printing"
    )
    sql.add_argument(
        "--max-rows",
        type=int,
        default=200,
        metavar="N",
        help="rows printed at most (default 200; --out writes all)",
    )
    ref = sub.add_parser(
        "settings",
        help="list every setting: meaning, unit, default, allowed values and the stages it shapes",
        description="The settings reference (the committed SETTINGS.md is this command's --markdown output).",
    )
    ref.add_argument(
        "--markdown", action="store_true", help="plain markdown (the default when not a terminal)"
    )
    return parser


def overrides_from(args: argparse.Namespace) -> dict[str, Any]:
    """Settings given by ``--set`` items, in order (a later one wins)."""
    overrides: dict[str, Any] = {}
    for item in args.set:
        overrides.update(config_module.parse_override(item))
    return overrides


def flags_from(args: argparse.Namespace) -> dict[str, Any]:
    """Settings given by the explicit flags --lake, --out and --seed."""
    flags = {flag: getattr(args, flag, None) for flag in ("lake", "out", "seed")}
    return {k: str(v) if isinstance(v, Path) else v for k, v in flags.items() if v is not None}


# ---- output ------------------------------------------------------------------------------------


def _console(width: int = 240) -> Console:
    # Off a terminal: no colour, and wide enough (``width``) that no header wraps.
    tty = sys.stdout.isatty()
    return Console(file=sys.stdout, no_color=not tty, highlight=False, width=None if tty else width)


def _table(title: str | None, columns: Sequence[str], rows: Sequence[Sequence[Any]]) -> Table:
    """A table with plain labels; numbers right-aligned, headers never wrapped."""
    table = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    numeric = [all(isinstance(r[i], int | float) or r[i] is None for r in rows) for i in range(len(columns))]
    for label, is_number in zip(columns, numeric, strict=True):
        table.add_column(label, justify="right" if is_number and rows else "left", no_wrap=True)
    for row in rows:
        # Text, not markup: values from files or queries may hold square brackets.
        table.add_row(*(Text(_cell(v)) for v in row))
    return table


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:,}"
    return str(value)


def print_ingest(summary: stages.IngestSummary, console: Console | None = None) -> None:
    """The per-file table of counts, then a line for every refused or missing file."""
    console = console or _console()
    files = summary.files
    rows = files.select(
        "source_file",
        "folder",
        "status",
        "rows_read",
        "rows_loaded",
        "rows_quarantined",
        "rows_duplicate",
        pl.col("seconds").round(2),
    ).rows()
    labels = ("file", "folder", "status", "rows read", "loaded", "quarantined", "duplicate", "seconds")
    console.print(_table("landing files", labels, rows))
    totals = files.select(pl.sum("rows_read", "rows_loaded", "rows_quarantined", "rows_duplicate")).row(0)
    console.print("total rows read {:,}, loaded {:,}, quarantined {:,}, duplicate {:,}".format(*totals))
    unchanged = files.filter(pl.col("status") == "unchanged").height
    if unchanged:
        console.print(
            f"{unchanged} of {files.height} landing files already loaded and unchanged: not read again"
        )
    for row in files.filter(pl.col("status").is_in(["refused", "missing"])).iter_rows(named=True):
        console.print(f"{row['status']}: {row['message']}", markup=False)


def print_episodes(counts: stages.EpisodeCounts, console: Console | None = None) -> None:
    """What the episode build made, and why episodes were left out."""
    console = console or _console()
    rows = [
        ("premise-hours on the grid", counts.hours),
        ("away episodes found", counts.episodes),
        ("away episodes used", counts.episodes_used),
        ("decision steps", counts.steps),
        ("decisions per used episode", round(counts.mean_decisions, 2)),
        ("weekday away episodes per premise and weekday", round(counts.weekday_episodes_per_weekday, 2)),
        ("logged actions clipped to the action set", counts.clipped_actions),
    ]
    console.print(_table("episodes", ("", "count"), rows))
    if counts.excluded:
        excluded = sorted(counts.excluded.items())
        console.print(_table("episodes excluded, by reason", ("reason", "episodes"), excluded))


def _savings_rows(savings: pl.DataFrame, scopes: tuple[str, ...]) -> list[tuple]:
    return (
        savings.filter(pl.col("scope").is_in(scopes))
        .sort(
            "scope", "key", "policy_name", "mode", "estimator", descending=[True, False, False, False, False]
        )
        .select(
            "scope",
            "key",
            "policy_name",
            "mode",
            pl.when(pl.col("recommended"))
            .then(pl.col("estimator") + " *")
            .otherwise("estimator")
            .alias("estimator"),
            "status",
            "n_episodes",
            pl.col("savings_usd_per_episode", "ci_low", "ci_high", "lower_bound_usd").round(3),
            pl.col("ess").round(1),
            pl.col("savings_usd_annual").round(2),
        )
        .rows()
    )


_SAVINGS_LABELS = (
    "scope",
    "key",
    "policy",
    "mode",
    "estimator",
    "status",
    "episodes",
    "savings USD/episode",
    "interval low USD",
    "interval high USD",
    "lower bound USD",
    "ESS",
    "USD/premise/year",
)


def print_evaluation(
    evaluation: stages.EvaluationSummary, confidence: float, console: Console | None = None
) -> None:
    """Portfolio and cohort savings, the weight spread per decision-point choice, where premise rows are."""
    console = console or _console()
    level = f"{confidence:.0%}"
    horizon = evaluation.horizon.select(
        "decision_points",
        "mode",
        "policy_name",
        pl.col("mean_decisions").round(1),
        pl.col("ess").round(1),
        pl.col("ess_share").round(3),
        pl.col("max_weight_share").round(3),
    ).rows()
    console.print(
        _table(
            "importance-weight spread per choice of decision points (fewer decisions, tamer weights)",
            (
                "decision points",
                "mode",
                "policy",
                "decisions/episode",
                "ESS",
                "ESS share",
                "max weight share",
            ),
            horizon,
        )
    )
    title = f"savings per episode with {level} interval and lower bound, per premise per year (* recommended)"
    console.print(_table(title, _SAVINGS_LABELS, _savings_rows(evaluation.savings, ("portfolio", "cohort"))))
    premises = evaluation.savings.filter(pl.col("scope") == "premise")
    console.print(
        f"{premises.height:,} premise rows ({premises['key'].n_unique():,} premises) not shown:"
        " see the ledger's savings table (scope = 'premise')"
        " or the analyst view savings_by_premise (sql/views.sql)."
    )
    print_recommendation(evaluation.recommendation_total, level, console)
    if (evaluation.savings["mode"] == "heat").any():
        from pipeline.evaluate import BILL_NOTES

        console.print(f"Heating rows: {BILL_NOTES['heat']} (column bill_note).")


def print_recommendation(totals: pl.DataFrame, level: str, console: Console) -> None:
    """The program's recommendation: homes per policy (or kept, by reason) and their annual bill and kWh."""
    if totals.is_empty():
        return
    rows = (
        totals.filter(pl.col("scope") == "program")
        .select(
            "mode",
            "decision",
            pl.col("policy").fill_null("-"),
            "reason",
            "homes",
            pl.col("bill_savings_usd_annual", "bill_ci_low_annual", "bill_ci_high_annual").round(0),
            pl.col("savings_kwh_annual", "savings_kwh_ci_low_annual", "savings_kwh_ci_high_annual").round(0),
        )
        .rows()
    )
    labels = (
        "mode",
        "decision",
        "policy",
        "reason",
        "homes",
        "bill USD/year",
        "low",
        "high",
        "kWh/year",
        "low",
        "high",
    )
    title = f"recommendation for the program: annual bill and kWh savings with {level} intervals"
    console.print(_table(title, labels, rows))
    console.print(SAVINGS_BASELINE)


def print_improvement(result: stages.ImprovementSummary, console: Console | None = None) -> None:
    """The safety test's outcome of every scope that had enough evidence, and a count of the rest."""
    console = console or _console()
    tested = result.safety_test.filter(pl.col("learner").is_not_null())
    rows = tested.select(
        "mode",
        "scope",
        "key",
        "learner",
        "n_held_out_episodes",
        pl.col("savings_estimate_usd").round(3),
        pl.col("lower_bound_usd").round(3),
        "outcome",
        "reason",
    ).rows()
    console.print(
        _table(
            "learned policies: safety test on held-out episodes (USD per episode)",
            ("mode", "scope", "key", "learner", "held-out", "savings", "lower bound", "outcome", "why"),
            rows,
        )
    )
    console.print(result.describe(), markup=False)


def print_summary(
    summary: stages.RunSummary, confidence: float = 0.95, console: Console | None = None
) -> None:
    """The end-of-run summary: episodes, behaviour model, savings with intervals, and the caution."""
    console = console or _console()
    console.print(f"\nrun {summary.run_id}", markup=False)
    print_episodes(summary.episodes, console)
    console.print(summary.behavior.describe(), markup=False)
    print_evaluation(summary.evaluation, confidence, console)
    if summary.improvement is not None:
        print_improvement(summary.improvement, console)
    console.print(
        "Estimates only: local codes, program rules and licensed practice govern what is sent to a device."
    )


def print_report_path(path: Path, console: Console | None = None) -> None:
    """Where the run's report is."""
    (console or _console()).print(
        f"report: {path} (opens in any browser, no network needed)", markup=False, soft_wrap=True
    )


def settings_markdown() -> str:
    """The settings reference as markdown: the text of the committed SETTINGS.md."""
    lines = [
        "# Settings",
        "",
        "Generated by `thermal-ledger settings --markdown` from `pipeline/config.py`; do not edit by hand.",
        "Give them in a TOML file (`--config FILE.toml`, example: `sample_lake/settings.toml`) or one at a",
        "time with `--set key=value` (TOML value syntax; dotted keys reach into tables, e.g.",
        "`--set state.price_tiers=2`). Every value is checked when the settings are read. `stages` are the",
        "stages whose results a setting shapes: change it and those stages (and the ones after) must run",
        "again.",
        "",
        "| setting | default | unit | allowed | stages | meaning |",
        "|---|---|---|---|---|---|",
    ]
    for row in config_module.settings_reference():
        cells = (
            f"`{row.key}`",
            f"`{row.default}`" if row.default else "",
            row.unit,
            row.allowed,
            ", ".join(row.stages),
            row.meaning,
        )
        lines.append("| " + " | ".join(c.replace("|", "\\|") for c in cells) + " |")
    return "\n".join(lines) + "\n"


def print_settings(markdown: bool) -> None:
    """The settings reference: a rich table on a terminal, markdown otherwise or when asked."""
    if markdown or not sys.stdout.isatty():
        sys.stdout.write(settings_markdown())
        return
    rows = [
        (r.key, r.default, r.unit, r.allowed, ", ".join(r.stages), r.meaning)
        for r in config_module.settings_reference()
    ]
    table = Table(title="settings", box=box.SIMPLE_HEAD, show_lines=True)
    for label in ("setting", "default", "unit", "allowed", "stages", "meaning"):
        table.add_column(label, overflow="fold")
    for row in rows:
        table.add_row(*row)
    Console().print(table)


# ---- running -----------------------------------------------------------------------------------


def _require_lake(config: Config) -> None:
    landing = Path(config.lake) / "landing"
    if not landing.is_dir():
        raise IngestError(
            f"--lake {config.lake}: no landing/ folder there; give the folder that holds landing/"
            " (e.g. thermal-ledger run --lake sample_lake)"
        )


def _run_flow(args: argparse.Namespace, overrides: dict[str, Any]) -> stages.RunSummary:
    from flows.thermal_run import quiet_tracebacks, thermal_ledger_run

    with quiet_tracebacks(USER_ERRORS):
        state = thermal_ledger_run(str(args.config) if args.config else None, overrides, return_state=True)
    # A failed flow's state re-raises the stage's own exception, so user errors stay one line.
    return state.result()


def _run_stage(args: argparse.Namespace) -> int:
    overrides, flags = overrides_from(args), flags_from(args)
    config = config_module.load(args.config, overrides, flags)
    with exclusive_output(config.out, f"(thermal-ledger {args.stage})"):
        return _stage_locked(args, config, overrides, flags)


def _stage_locked(
    args: argparse.Namespace, config: Config, overrides: dict[str, Any], flags: dict[str, Any]
) -> int:
    if args.stage == "ingest":
        _require_lake(config)
        summary = stages.ingest(config, Run(config))
        print_ingest(summary)
        return EXIT_REFUSED if summary.refused else EXIT_OK
    if args.stage == "run":
        _require_lake(config)
        result = stages.run_all(config) if args.no_prefect else _run_flow(args, {**overrides, **flags})
        console = _console()
        print_ingest(result.ingest, console)
        print_summary(result, config.confidence, console)
        if args.no_prefect:
            from pipeline.report import report_run

            report_run(config, result.run_id)
        print_report_path(report_path(config.out, result.run_id), console)
        return EXIT_REFUSED if result.ingest.refused else EXIT_OK
    if args.stage == "report":
        from pipeline.report import report_run

        made = report_run(config, args.run_id, tuple(args.premise))
        _console().print(
            f"report of run {made.run_id}: {made.html} ({len(made.pngs)} figures, also as PNG in"
            f" {made.html.parent / 'figures'}; home pages: {', '.join(made.homes) or 'none'})",
            markup=False,
            soft_wrap=True,
        )
        return EXIT_OK
    run = Run(config)
    result = stages.STAGE_FUNCTIONS[args.stage](config, run)
    if args.stage == "episodes":
        print_episodes(result.counts)
    elif args.stage == "learn":
        _console().print(f"{result.describe()}; behaviour policy rows: {result.rows:,}", markup=False)
    elif args.stage == "evaluate":
        print_evaluation(result, config.confidence)
    elif args.stage == "improve":
        print_improvement(result)
    stages.finish(config, run, {args.stage: result})
    return EXIT_OK


def _truth(args: argparse.Namespace) -> int:
    """Score a run's estimates against the simulator's roll-outs; write ledger/policy_truth; one line."""
    from pipeline import truth

    config = config_module.load(args.config, overrides_from(args), flags_from(args))
    stages._require_warehouse(config, "truth")
    run_id, run_date, ledger = truth.read_run(config.ledger_path, args.run)
    params = truth.lake_params(
        config.lake, config.seed if args.sim_seed is None else args.sim_seed, args.sim_start, args.sim_days
    )
    with store.warehouse(config.warehouse_path, read_only=True, settings=config.duckdb) as con:
        behavior = stages._load_behavior(con, "behavior", config)
        premises = store.frame(con, "select premise_id, cohort, comfort_cool_c, comfort_heat_c from premise")
    rows = truth.policy_truth(config, ledger, behavior, premises, params)
    stamped = rows.select(pl.lit(run_id).alias("run_id"), pl.all())
    path = store.write_ledger(config.ledger_path, "policy_truth", stamped, run_id, run_date)
    _console().print(f"{truth.summary_line(rows)} (run {run_id}; {path})", markup=False)
    return EXIT_OK


def _serve(args: argparse.Namespace) -> int:
    """Check the settings and the lake, then serve the run until interrupted (exit 2 without Prefect API)."""
    overrides, flags = overrides_from(args), flags_from(args)
    schedule = {key: value for key, value in (("serve_cron", args.cron), ("serve_name", args.name)) if value}
    config = config_module.load(args.config, overrides, {**flags, **schedule})
    _require_lake(config)
    # The served runs may start from another folder: give them absolute paths.
    parameters = {**overrides, **flags}
    for key in ("lake", "out"):
        if key in parameters:
            parameters[key] = str(Path(parameters[key]).resolve())
    config_path = str(args.config.resolve()) if args.config else None
    from flows import serve as serving

    served = serving.deployment(
        config_path, parameters, config.serve_cron, config.serve_name, config.serve_timezone
    )
    try:
        serving.serve(served)
    except serving.PrefectUnavailable as exc:
        print(f"thermal-ledger: {exc}", file=sys.stderr)
        return EXIT_USAGE
    return EXIT_OK


def _ledger_folder(given: Path | None) -> Path:
    """The ledger folder to query: the one given (or its ledger/), else out/ledger when a run wrote it."""
    if given is None:
        default = Path("out") / "ledger"
        if (default / "run").is_dir():
            return default
        raise StoreError(
            "no ledger folder given: pass --ledger OUT/ledger, the ledger/ a run wrote under its --out folder"
            ' (e.g. thermal-ledger sql "select * from program_totals" --ledger out/ledger)'
        )
    if not (given / "run").is_dir() and (given / "ledger" / "run").is_dir():
        return given / "ledger"
    return given


def _sql(args: argparse.Namespace) -> int:
    """``thermal-ledger sql``: one query against the analyst views; a table on screen or a file."""
    import duckdb

    from pipeline import store

    if args.out is not None and args.out.suffix.lower() not in (".csv", ".parquet"):
        raise StoreError(f"--out {args.out}: give a file ending in .csv or .parquet")
    con = store.connect_ledger(_ledger_folder(args.ledger))
    try:
        relation = con.sql(args.query)
        result = pl.DataFrame() if relation is None else relation.pl()
    except duckdb.Error as exc:
        detail = str(exc).splitlines()[0]
        views = [
            r[0] for r in con.execute("select view_name from duckdb_views() where not internal").fetchall()
        ]
        absent = " (a view over a table no run of this ledger wrote is absent)" if "Catalog" in detail else ""
        raise StoreError(f"query refused: {detail}{absent}; views: {', '.join(sorted(views))}") from None
    finally:
        con.close()
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        if args.out.suffix.lower() == ".csv":
            result.write_csv(args.out)
        else:
            result.write_parquet(args.out)
        print(f"{result.height:,} rows written to {args.out}")
        return EXIT_OK
    # Off a terminal every column is printed whole, however wide the result.
    console = _console(width=100_000)
    shown = result.head(max(args.max_rows, 0))
    console.print(_table(None, shown.columns, shown.rows()))
    more = result.height - shown.height
    console.print(
        f"{result.height:,} rows" + (f", {more:,} not shown (use --out to write all)" if more else "")
    )
    return EXIT_OK


# glibc's mallopt parameters and the values the command sets (bytes).
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_MMAP_THRESHOLD = 32 << 20
_TRIM_THRESHOLD = 64 << 20


def _keep_freed_memory() -> None:
    """Let glibc keep freed blocks of up to 32 MiB for reuse instead of unmapping them at once.

    The estimators' step-sized numpy temporaries (a MiB at 130,000 steps) are above glibc's
    default mmap threshold, so each is a fresh mapping whose pages fault in again on every
    call: on the benchmark machine about half of a weighted IS call over a 1,000-home
    season was page faults. Only the command's own process is affected; where the C
    library is not glibc nothing changes.
    """
    try:
        libc = ctypes.CDLL("libc.so.6")
    except OSError:
        return
    libc.mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD)
    libc.mallopt(_M_TRIM_THRESHOLD, _TRIM_THRESHOLD)


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``thermal-ledger``."""
    args = build_parser().parse_args(argv)
    _keep_freed_memory()
    if args.stage == "simulate":
        from pipeline.simulate import main_simulate

        try:
            summary = main_simulate(args)
        except SimulationError as exc:
            print(f"thermal-ledger simulate: {exc}", file=sys.stderr)
            return EXIT_USAGE
        print(", ".join(f"{k}: {v}" for k, v in summary.items() if not isinstance(v, dict | list)))
        return EXIT_OK
    if args.stage == "bench":
        from pipeline.bench import main_bench

        with progress.shown():
            return main_bench(args.premises, args.days, args.seed, args.work, args.csv, args.reuse)
    if args.stage == "settings":
        print_settings(args.markdown)
        return EXIT_OK
    try:
        if args.stage == "truth":
            return _truth(args)
        if args.stage == "sql":
            return _sql(args)
        if args.stage == "serve":
            return _serve(args)
        with progress.shown():
            return _run_stage(args)
    except OutputInUseError as exc:
        print(f"thermal-ledger: {exc}", file=sys.stderr)
        return EXIT_BUSY
    except (*USER_ERRORS, TruthError, SimulationError) as exc:
        print(f"thermal-ledger: {exc}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
