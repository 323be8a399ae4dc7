"""The one clock: every timestamp the tool writes (ledger, labels, baseline metadata, run
records) is ISO 8601 local time with its UTC offset, so times from different machines and
seasons compare correctly."""

from __future__ import annotations

from datetime import datetime


def now() -> datetime:
    """The current local time, timezone-aware (carries its UTC offset)."""
    return datetime.now().astimezone()


def iso_time(t: datetime) -> str:
    """ISO 8601, to the second (milliseconds when the time has them)."""
    return t.isoformat(timespec="milliseconds" if t.microsecond else "seconds")


def now_iso() -> str:
    """The current local time, ISO 8601 with milliseconds and UTC offset."""
    return now().isoformat(timespec="milliseconds")
