"""The audit's window: dates given on the command line as epoch seconds, and back to ISO-8601 UTC."""

from __future__ import annotations

import time
from datetime import date, datetime, timedelta, timezone

from verifier.audit.model import DAY
from verifier.errors import UsageError


def parse_when(text: str, *, end_of_day: bool) -> int:
    """Epoch seconds of a date (``YYYY-MM-DD``, UTC; with ``end_of_day`` the next midnight, so that
    ``--until`` names the last day included) or an ISO-8601 date and time (exact; UTC when no zone)."""
    try:
        if len(text) == 10:
            day = date.fromisoformat(text)
            moment = datetime(day.year, day.month, day.day, tzinfo=timezone.utc)
            return int((moment + timedelta(days=1 if end_of_day else 0)).timestamp())
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError as error:
        raise UsageError(f"'{text}' is not a date", hint="use YYYY-MM-DD or an ISO-8601 date and time") from error
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return int(moment.timestamp())


def window_bounds(since: str | None, until: str | None, now: float | None = None) -> tuple[int, int]:
    """The window as epoch seconds [since, until); by default the last 7 days."""
    end = parse_when(until, end_of_day=True) if until else int(now if now is not None else datetime.now().timestamp())
    start = parse_when(since, end_of_day=False) if since else end - 7 * DAY
    if start >= end:
        raise UsageError("the window is empty: --since is not before --until", hint="swap or widen the dates")
    return start, end


def iso(seconds: int) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(seconds))  # datetime's own took twice as long


def parse_iso(text: str) -> int:
    return int(datetime.strptime(text, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc).timestamp())
