"""Times and durations as people read them: RFC 3339 in UTC, and "1 h 05 min"."""

from __future__ import annotations

from datetime import datetime, timezone

__all__ = ["human_duration", "rfc3339"]


def rfc3339(ts: float) -> str:
    """Epoch seconds as an RFC 3339 time in UTC (``2026-05-28T12:00:00Z``); repr for times out of range."""
    try:
        return datetime.fromtimestamp(ts, timezone.utc).isoformat().replace("+00:00", "Z")
    except (OverflowError, ValueError, OSError):  # configured bounds beyond datetime's range
        return repr(ts)


def human_duration(seconds: float) -> str:
    """A duration to the second, in hours and minutes or minutes and seconds."""
    minutes, sec = divmod(int(round(seconds)), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min" if hours else f"{minutes} min {sec:02d} s"
