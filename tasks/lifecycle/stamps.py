"""Who and when, as every record of entivec writes them (history entries, reports, run tags)."""

from __future__ import annotations

import getpass
from datetime import UTC, datetime


def operator() -> str:
    """The user running the command, or "unknown" where the system has no entry for them."""
    try:
        return getpass.getuser()
    except Exception:  # no user database entry (some containers)
        return "unknown"


def now_iso() -> str:
    """The current UTC time to the second, ISO 8601."""
    return datetime.now(UTC).isoformat(timespec="seconds")
