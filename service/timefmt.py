"""Parsing and formatting of timestamps and durations.

Event timestamps are carried as float seconds since the Unix epoch (UTC) everywhere
inside the runtime; this module is the only place that converts.
"""

from __future__ import annotations

import math
import re
from datetime import datetime, timezone

__all__ = ["parse_duration", "format_duration", "format_rfc3339", "parse_rfc3339", "MS_THRESHOLD"]

# A number above this is taken as epoch milliseconds, below as epoch seconds.
# 1e11 seconds is the year 5138, while 1e11 milliseconds is 1973-03-03: no real
# metric stream is ambiguous between the two (common practice in log shippers).
MS_THRESHOLD = 1e11

_DURATION = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(ms|s|m|h|d)\s*$")
_UNIT = {"ms": 0.001, "s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}


def parse_duration(text: str | int | float) -> float:
    """Parse ``30s``, ``5m``, ``1h``, ``250ms`` or ``2d`` into seconds.

    A bare number is taken as seconds.

    >>> parse_duration("5m"), parse_duration("1.5h"), parse_duration(30)
    (300.0, 5400.0, 30.0)
    """
    if isinstance(text, bool):
        raise ValueError("a duration is a string like '30s', '5m', '1h' or a number of seconds")
    if isinstance(text, (int, float)):
        value = float(text)
    else:
        match = _DURATION.match(text)
        if match is None:
            raise ValueError(
                f"{text!r} is not a duration; write a number and a unit, e.g. '30s', '5m', '1h', '250ms', '2d'"
            )
        value = float(match.group(1)) * _UNIT[match.group(2)]
    if not math.isfinite(value) or value < 0:
        raise ValueError(f"{text!r} is not a finite, non-negative duration")
    return value


def format_duration(seconds: float) -> str:
    """Render seconds with the largest unit that divides them.

    >>> format_duration(300), format_duration(90), format_duration(0.25)
    ('5m', '90s', '250ms')
    """
    for unit, size in (("d", 86400.0), ("h", 3600.0), ("m", 60.0), ("s", 1.0)):
        if seconds >= size and float(seconds / size).is_integer():
            return f"{int(seconds // size)}{unit}"
    if float(seconds * 1000).is_integer():
        return f"{int(seconds * 1000)}ms"
    return f"{seconds}s"


_FORMAT_CACHE: dict[float, str] = {}


def format_rfc3339(ts: float) -> str:
    """Format epoch seconds as RFC 3339 UTC with a ``Z`` suffix.

    Window bounds are whole seconds in practice, so the result is cached (window
    starts repeat across thousands of services).

    >>> format_rfc3339(0.0), format_rfc3339(1.5)
    ('1970-01-01T00:00:00Z', '1970-01-01T00:00:01.500Z')
    """
    text = _FORMAT_CACHE.get(ts)
    if text is not None:
        return text
    dt = datetime.fromtimestamp(ts, tz=timezone.utc)
    if dt.microsecond:
        text = dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"
    else:
        text = dt.strftime("%Y-%m-%dT%H:%M:%SZ")
    if len(_FORMAT_CACHE) > 100_000:  # bounded: a long run sees many windows
        _FORMAT_CACHE.clear()
    _FORMAT_CACHE[ts] = text
    return text


def parse_rfc3339(text: str) -> float:
    """Parse an RFC 3339 timestamp into epoch seconds; a missing offset means UTC.

    >>> parse_rfc3339("2026-03-02T00:05:00Z")
    1772409900.0
    """
    dt = datetime.fromisoformat(text)
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()
