"""Progress of long commands: a thin layer over rich, silent unless someone is watching a terminal.

Stage code only reports steps (``progress.begin(name, total)``, ``progress.advance(name)``,
``progress.done(name)``); whether anything is drawn is decided once, by the command, with
``progress.shown()``. Outside ``shown()`` (tests, the Prefect UI, Dask workers, a pipe) every
call is a no-op, so the stages stay pure functions that run anywhere.
"""

from __future__ import annotations

import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TextIO

from rich.console import Console
from rich.progress import (
    BarColumn,
    MofNCompleteColumn,
    Progress,
    SpinnerColumn,
    TextColumn,
    TimeElapsedColumn,
)

_lock = threading.Lock()
_active: Progress | None = None
_tasks: dict[str, int] = {}


def watching(stream: TextIO | None = None) -> bool:
    """Whether the command's output goes to a terminal (progress is drawn only then)."""
    stream = stream if stream is not None else sys.stdout
    return bool(getattr(stream, "isatty", lambda: False)())


@contextmanager
def shown(enabled: bool | None = None, stream: TextIO | None = None) -> Iterator[None]:
    """Draw the steps reported inside on ``stream`` (stderr) when ``enabled`` (default: stdout is a terminal).

    Progress goes to stderr so it never mixes into tables or CSV written to stdout; the bars
    disappear when the work is done (``transient``).
    """
    global _active
    enabled = watching() if enabled is None else enabled
    if not enabled:
        yield
        return
    # Asked for explicitly (or a terminal is watching): draw even if the stream is not a terminal.
    console = Console(file=stream if stream is not None else sys.stderr, force_terminal=True)
    bar = Progress(
        SpinnerColumn(),
        TextColumn("{task.description}"),
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=console,
        transient=True,
    )
    with _lock:
        _active, _tasks_before = bar, dict(_tasks)
        _tasks.clear()
    try:
        with bar:
            yield
    finally:
        with _lock:
            _active = None
            _tasks.clear()
            _tasks.update(_tasks_before)


def begin(name: str, total: int | None = None, description: str | None = None) -> None:
    """Start (or restart) the step ``name`` of ``total`` parts (None: parts unknown, a spinner)."""
    with _lock:
        if _active is None:
            return
        if name in _tasks:
            _active.remove_task(_tasks.pop(name))
        _tasks[name] = _active.add_task(description or name, total=total)


def advance(name: str, parts: int = 1, description: str | None = None) -> None:
    """Count ``parts`` more parts of step ``name`` done (and optionally say what is being done now)."""
    with _lock:
        if _active is None or name not in _tasks:
            return
        if description is None:
            _active.advance(_tasks[name], parts)
        else:
            _active.update(_tasks[name], advance=parts, description=description)


def done(name: str) -> None:
    """Step ``name`` is finished: its line is removed."""
    with _lock:
        if _active is None or name not in _tasks:
            return
        _active.remove_task(_tasks.pop(name))


def counter(name: str):
    """A ``(done, total, item)`` callback (as ``ingest.ingest`` takes) that reports step ``name``'s parts."""

    def report(finished: int, total: int, item: object) -> None:
        if finished == 1:
            begin(name, total)
        label = getattr(item, "source_file", None)
        advance(name, description=f"{name}: {label}" if label else None)
        if finished >= total:
            done(name)

    return report
