"""UTC time stamps in one format for every record, event and log the modules write."""

from __future__ import annotations

from datetime import UTC, datetime


def utc_now(timespec: str = "seconds") -> str:
    """The current UTC time in ISO 8601 (``2026-12-01T22:30:00+00:00``), for records and events."""
    return datetime.now(UTC).isoformat(timespec=timespec)
