"""The ``thermal-ledger`` command: one subcommand per stage, plus ``run`` for all of them.

Exit code 0 on success; 1 when any landing file was refused (the rest still
loads); 2 for unusable settings or a stage that cannot run.
"""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path
from typing import Any

import polars as pl

from pipeline import config as config_module
from pipeline import ingest as ingestion
from pipeline import stages
from pipeline.config import ConfigError
from pipeline.ingest import IngestError
from pipeline.ledger import Run
from pipeline.store import StoreError

EXIT_OK, EXIT_REFUSED, EXIT_USAGE = 0, 1, 2


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--lake", type=Path, help="folder holding landing/ (default: sample_lake)")
    parser.add_argument("--out", type=Path, help="folder for warehouse.duckdb and ledger/ (default: out)")
    parser.add_argument("--config", type=Path, help="TOML file of settings (see DEVELOPERS.md)")
    parser.add_argument("--seed", type=int, help="seed for every random draw")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="KEY=VALUE",
        help="override one setting, TOML syntax (repeatable), e.g. --set recovery_hours=2",
    )


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand."""
    parser = argparse.ArgumentParser(
        prog="thermal-ledger",
        description="Learn and audit thermostat setpoint policies from utility interval data.",
    )
    sub = parser.add_subparsers(dest="stage", required=True, metavar="STAGE")
    helps = {
        "ingest": "load landing files into the warehouse; rows that fail checks go to quarantine",
        "episodes": "build the hourly grid, away episodes and decision steps",
        "learn": "estimate the residents' behaviour policy from the logged steps",
        "evaluate": "estimate each candidate policy's value and savings off-policy",
        "run": "all stages in order as one Prefect flow, then print a summary",
    }
    sim = sub.add_parser(
        "simulate",
        help="write an invented demo lake (with its true values) from a seed",
        description="Simulate homes and write landing files a utility would receive, plus truth/ side files "
        "the pipeline never reads. The same seed gives the same files, bit for bit.",
    )
    sim.add_argument("--premises", type=int, default=60, help="number of homes (default 60)")
    sim.add_argument("--seed", type=int, default=20260601, help="seed of every draw (default 20260601)")
    sim.add_argument("--out", type=Path, required=True, help="folder to write landing/ and truth/ into")
    sim.add_argument("--start", type=dt.date.fromisoformat, default=dt.date(2026, 6, 1), help="first day")
    sim.add_argument("--days", type=int, default=92, help="number of days (default 92)")
    sim.add_argument(
        "--hidden-confounder",
        action="store_true",
        help="residents also react to a daily state no file records (shows what confounding does)",
    )
    sim.add_argument("--manifest", action="store_true", help="write MANIFEST.sha256 of the generated files")
    sim.add_argument(
        "--policy-values",
        action="store_true",
        help="also roll out the default candidates for their true values",
    )
    for name, text in helps.items():
        p = sub.add_parser(name, help=text, description=text)
        _common(p)
        if name == "run":
            p.add_argument(
                "--no-prefect", action="store_true", help="run the stages directly, without a Prefect flow"
            )
    return parser


def overrides_from(args: argparse.Namespace) -> dict[str, Any]:
    """Settings given on the command line: --set items, then the explicit flags."""
    overrides: dict[str, Any] = {}
    for item in args.set:
        overrides.update(config_module.parse_override(item))
    for flag in ("lake", "out", "seed"):
        value = getattr(args, flag, None)
        if value is not None:
            overrides[flag] = str(value) if isinstance(value, Path) else value
    return overrides


def _table(frame: pl.DataFrame) -> str:
    with pl.Config(
        tbl_rows=60, tbl_cols=20, tbl_width_chars=160, tbl_hide_dataframe_shape=True, fmt_str_lengths=40
    ):
        return str(frame)


def print_ingest(summary: stages.IngestSummary) -> None:
    """The per-file table of counts, then a line for every refused or missing file."""
    files = summary.files.with_columns(pl.col("seconds").round(2))
    print(_table(files.drop("message")))
    totals = files.select(pl.sum("rows_read", "rows_loaded", "rows_quarantined", "rows_duplicate")).row(0)
    print("total rows read {:,}, loaded {:,}, quarantined {:,}, duplicate {:,}".format(*totals))
    unchanged = files.filter(pl.col("status") == "unchanged").height
    if unchanged:
        print(f"{unchanged} of {files.height} landing files already loaded and unchanged: not read again")
    for row in files.filter(pl.col("status").is_in(["refused", "missing"])).iter_rows(named=True):
        print(f"{row['status']}: {row['message']}")


def _progress(done: int, total: int, result: ingestion.FileResult) -> None:
    print(
        f"[{done}/{total}] {result.source_file}: {result.status}, {result.rows_read:,} rows read,"
        f" {result.rows_quarantined:,} quarantined ({result.seconds:.1f} s)",
        file=sys.stderr,
        flush=True,
    )


def print_summary(summary: stages.RunSummary) -> None:
    """The short end-of-run table: premises, episodes, policies, savings with intervals."""
    counts = summary.episodes
    savings = summary.evaluation.savings
    premises = savings.filter(pl.col("scope") == "premise")["key"].n_unique()
    print(f"\nrun {summary.run_id}")
    print(
        f"premises evaluated: {premises}   episodes used: {counts.episodes_used} of {counts.episodes}"
        f"   decision steps: {counts.steps}"
    )
    print(
        f"weekday away episodes per premise and weekday: {counts.weekday_episodes_per_weekday:.2f}"
        f"   decisions per episode: {counts.mean_decisions:.1f}   clipped actions: {counts.clipped_actions}"
    )
    if counts.excluded:
        print("episodes excluded: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.excluded.items())))
    print(summary.behavior.describe())
    portfolio = savings.filter(pl.col("scope") == "portfolio").select(
        "policy_name",
        "mode",
        pl.when(pl.col("recommended"))
        .then(pl.col("estimator") + " *")
        .otherwise("estimator")
        .alias("estimator"),
        "status",
        "n_episodes",
        pl.col("savings_usd_per_episode").round(3),
        pl.col("ci_low").round(3),
        pl.col("ci_high").round(3),
        pl.col("lower_bound_usd").round(3),
        pl.col("ess").round(1),
        pl.col("savings_usd_annual").round(2),
    )
    horizon = summary.evaluation.horizon.select(
        "decision_points",
        "mode",
        "policy_name",
        pl.col("mean_decisions").round(1),
        pl.col("ess").round(1),
        pl.col("ess_share").round(3),
        pl.col("max_weight_share").round(3),
    )
    print("importance-weight spread per choice of decision points (fewer decisions, tamer weights):")
    print(_table(horizon))
    print(
        "portfolio savings per episode, USD (95 % interval, lower bound), and per premise per year"
        " (* recommended estimator):"
    )
    print(_table(portfolio))
    print("Estimates only: local codes, program rules and licensed practice govern what is sent to a device.")


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``thermal-ledger``."""
    args = build_parser().parse_args(argv)
    if args.stage == "simulate":
        from pipeline.simulate import main_simulate

        summary = main_simulate(args)
        print(", ".join(f"{k}: {v}" for k, v in summary.items() if not isinstance(v, dict | list)))
        return EXIT_OK
    try:
        overrides = overrides_from(args)
        config = config_module.load(args.config, overrides)
        if args.stage == "ingest":
            run = Run(config)
            summary = stages.ingest(config, run, progress=_progress)
            print_ingest(summary)
            return EXIT_REFUSED if summary.refused else EXIT_OK
        if args.stage == "run":
            if args.no_prefect:
                result = stages.run_all(config)
            else:
                from flows.thermal_run import thermal_ledger_run

                result = thermal_ledger_run(str(args.config) if args.config else None, overrides)
            print_ingest(result.ingest)
            print_summary(result)
            return EXIT_REFUSED if result.ingest.refused else EXIT_OK
        run = Run(config)
        result = stages.STAGE_FUNCTIONS[args.stage](config, run)
        if args.stage == "episodes":
            print(result.counts)
        elif args.stage == "learn":
            print(f"{result.describe()}; behaviour policy rows: {result.rows}")
        elif args.stage == "evaluate":
            print(_table(result.savings))
        stages.finish(config, run, {args.stage: result})
        return EXIT_OK
    except (ConfigError, stages.StageError, IngestError, StoreError) as exc:
        print(f"thermal-ledger: {exc}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
