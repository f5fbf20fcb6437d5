"""Checks of cron text (the schedule of the served monthly run), without importing Prefect.

The grammar is the classic five fields, minute hour day-of-month month day-of-week, each a
comma list of ``*``, ``N`` or ``N-M``, optionally ``/STEP``; months and weekdays may be named
(jan..dec, sun..sat; 0 and 7 are both Sunday); and the ``@hourly`` ... ``@yearly`` shorthands.
Prefect's scheduler reads a wider dialect; this is the part of it every cron reader agrees on,
so a schedule accepted here means the same thing wherever it is read.
"""

from __future__ import annotations

import re

SHORTHANDS: dict[str, str] = {
    "@yearly": "0 0 1 1 *",
    "@annually": "0 0 1 1 *",
    "@monthly": "0 0 1 * *",
    "@weekly": "0 0 * * 0",
    "@daily": "0 0 * * *",
    "@midnight": "0 0 * * *",
    "@hourly": "0 * * * *",
}
"""The named schedules and the five fields each stands for."""

_MONTHS = ("jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec")
_WEEKDAYS = ("sun", "mon", "tue", "wed", "thu", "fri", "sat")
_FIELDS: tuple[tuple[str, int, int, dict[str, int]], ...] = (
    ("minute", 0, 59, {}),
    ("hour", 0, 23, {}),
    ("day of month", 1, 31, {}),
    ("month", 1, 12, {name: i for i, name in enumerate(_MONTHS, start=1)}),
    ("day of week", 0, 7, {name: i for i, name in enumerate(_WEEKDAYS)}),
)
_LONGEST_MONTH = (31, 29, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)
_ITEM = re.compile(r"^(?P<base>\*|[0-9a-z]+(?:-[0-9a-z]+)?)(?:/(?P<step>[0-9]+))?$")

FORM = "five fields, minute hour day-of-month month day-of-week (e.g. '0 4 1 * *', 04:00 on the 1st)"


class CronError(ValueError):
    """Cron text that does not name a schedule; the message says which field and why."""


def _value(text: str, field: str, low: int, high: int, names: dict[str, int]) -> int:
    if text in names:
        return names[text]
    if not text.isdigit():
        raise CronError(f"{field} {text!r} is not a number{' or a name' if names else ''}")
    number = int(text)
    if not low <= number <= high:
        raise CronError(f"{field} {number} is outside {low}-{high}")
    return number


def _field(text: str, field: str, low: int, high: int, names: dict[str, int]) -> set[int]:
    """The values one field selects."""
    chosen: set[int] = set()
    for item in text.split(","):
        match = _ITEM.match(item)
        if match is None:
            raise CronError(f"{field} {text!r} is not a list of *, N, N-M with an optional /STEP")
        base, step = match["base"], int(match["step"] or 1)
        if step < 1:
            raise CronError(f"{field} {text!r}: a step must be 1 or more")
        if base == "*":
            first, last = low, high
        elif "-" in base:
            first, last = (_value(part, field, low, high, names) for part in base.split("-"))
            if first > last:
                raise CronError(f"{field} range {base!r} runs backwards")
        else:
            if match["step"] is not None:
                raise CronError(f"{field} {item!r}: a step needs * or a range before it")
            first = last = _value(base, field, low, high, names)
        chosen.update(range(first, last + 1, step))
    return chosen


def check_cron(text: str) -> str:
    """``text`` unchanged if it is a cron schedule that fires; CronError saying what is wrong otherwise."""
    if not isinstance(text, str):
        raise CronError(f"must be cron text in quotes: {FORM}")
    words = SHORTHANDS.get(text.strip().lower(), text).lower().split()
    if len(words) != len(_FIELDS):
        raise CronError(f"has {len(words)} field(s); cron text is {FORM}")
    try:
        values = [_field(word, *spec) for word, spec in zip(words, _FIELDS, strict=True)]
    except CronError as exc:
        raise CronError(f"{exc}; cron text is {FORM}") from None
    days, months = values[2], values[3]
    # With a day of week given, cron fires on either match; with '*' only the days of month count.
    if words[4] == "*" and min(days) > max(_LONGEST_MONTH[m - 1] for m in months):
        raise CronError(f"never fires: no month selected has day {min(days)}")
    return text
