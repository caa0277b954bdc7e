"""Facts about the running host that several modules record: UTC time stamps and live processes."""

from __future__ import annotations

import os
from datetime import UTC, datetime


def utc_now(timespec: str = "seconds") -> str:
    """The current UTC time in ISO 8601 (``2026-12-01T22:30:00+00:00``), for records and events."""
    return datetime.now(UTC).isoformat(timespec=timespec)


def pid_alive(pid: int) -> bool:
    """Whether process ``pid`` exists on this host (used to tell stale claims and folders).

    A process owned by another user counts as alive; on platforms without signals every
    process is assumed alive, so nothing of a live writer is ever swept away.
    """
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    except OSError:  # pragma: no cover - platforms without signals: assume alive
        return True
    return True
