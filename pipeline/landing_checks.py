"""Checks that a landing file was whole while it was read: one still being written is refused.

A file whose size or modification time changed between the moment ingest started reading it and
the moment its rows would be committed was being written meanwhile; its rows are rolled back and
it gets no log entry, so the next run reads it again, whole. (A zero-byte file, a truncated gzip
or Parquet file is refused by the readers; its log entry keeps its hash, so the finished file,
whose hash differs, is read again.)
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class FileState:
    """What ``os.stat`` says of a file: enough to see that someone wrote it meanwhile."""

    size: int
    """Bytes."""
    mtime_ns: int
    """Modification time, nanoseconds since the epoch."""


def file_state(path: Path) -> FileState:
    """The size and modification time of ``path`` now."""
    stat = os.stat(path)
    return FileState(stat.st_size, stat.st_mtime_ns)


def changed_while_read(path: Path, before: FileState, name: str) -> str | None:
    """The refusal message if ``path`` changed (or went) since ``before``, else None."""
    try:
        now = file_state(path)
    except FileNotFoundError:
        return f"{name}: removed while it was read; not loaded"
    if now == before:
        return None
    what = "size" if now.size != before.size else "modification time"
    return (
        f"{name}: still being written ({what} changed while it was read: {before.size} -> {now.size} bytes);"
        " not loaded, the next run reads it whole"
    )


def outside_lake(paths: list[Path], lake: Path) -> list[Path]:
    """The ``paths`` that resolve outside ``lake`` (a symlink out of it): refused without being read."""
    root = Path(lake).resolve()
    return [p for p in paths if not p.resolve().is_relative_to(root)]
