"""The one clock every record uses, so timestamps have one format everywhere."""

from __future__ import annotations

import datetime as _dt

__all__ = ["now"]


def now() -> str:
    """A UTC timestamp for the history, to the second."""
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
