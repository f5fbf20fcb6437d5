"""The run report: one self-contained HTML file per run, with its figures as PNGs, from the ledger only.

``ledger_data`` (what the report reads) imports no plotting library, so the command can name
``ReportError`` without loading matplotlib; the rest is imported when first used.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from pipeline.report.ledger_data import ReportError, RunData, open_run, report_path

_BUILD = ("CAUTION", "Report", "report_run", "summary_rows", "write_report")

__all__ = ["ReportError", "RunData", "open_run", "report_path", *_BUILD]


def __getattr__(name: str) -> Any:
    if name in _BUILD:
        return getattr(import_module("pipeline.report.build"), name)
    raise AttributeError(f"module 'pipeline.report' has no attribute {name!r}")
