"""Decoding of native metric messages, one JSON object per line or bus message.

The fast path is one ``orjson.loads`` and a handful of type checks; nothing is
logged and nothing is allocated beyond what orjson returns. A message that cannot
be used raises :class:`Rejected` with a stable reason code and a human sentence;
the caller counts it and routes it, with its original bytes, to the rejects sink.

Accepted message::

    {"service": "ticket-api", "ts": "2026-03-02T00:01:00Z",
     "metrics": {"latency_p95_ms": 212.0, "errors": 3}, "labels": {"region": "north"}}

``ts`` is an RFC 3339 string, or epoch seconds or milliseconds as a number
(numbers above 1e11 are milliseconds).

>>> d = NativeDecoder(now=lambda: 1.9e9)
>>> d.decode(b'{"service": "a", "ts": 1772409600, "metrics": {"x": 1}}')
('a', 1772409600.0, {'x': 1})
>>> try:
...     d.decode(b'{"service": "a", "ts": 1772409600, "metrics": {"x": "1"}}')
... except Rejected as r:
...     print(r.code)
bad_metric_value
"""

from __future__ import annotations

import json
import math
import re
import time
from collections.abc import Callable
from datetime import datetime, timezone

import orjson

from service.timefmt import MS_THRESHOLD

__all__ = ["Rejected", "NativeDecoder", "REASONS", "MIN_EVENT_TS"]

# Every reason code a message can be rejected with, and what it means. The codes are
# stable: they label the rejects counter and appear in the rejects sink.
REASONS: dict[str, str] = {
    "empty": "the line or message is empty",
    "too_large": "the message is larger than limits.max_message_bytes",
    "not_utf8": "the message bytes are not valid UTF-8",
    "not_json": "the message is not valid JSON",
    "not_object": "the message is JSON but not an object",
    "missing_service": "the message has no 'service' field",
    "bad_service": "'service' is not a non-empty string of printable characters within the length limit",
    "missing_ts": "the message has no 'ts' field",
    "bad_ts": "'ts' is neither an RFC 3339 string nor a finite epoch number",
    "ts_out_of_range": "'ts' is before 2000-01-01 or further in the future than limits.max_future_skew",
    "missing_metrics": "the message has no 'metrics' field",
    "bad_metrics": "'metrics' is not a non-empty object within limits.max_metrics",
    "bad_metric_value": "a metric value is not a finite number",
    "bad_labels": "'labels' is not a flat object of strings, numbers, booleans or nulls",
    "duplicate_key": "an object in the message names the same key twice (JSON leaves the meaning open)",
    "unaligned_key": "the service's messages arrive on more than one input partition (key input by service, or turn on repartitioning)",
    "service_limit": "a new service arrived while the process already tracks limits.max_services services",
    "new_service_rate": "a new service arrived faster than limits.new_services_per_second (past limits.new_services_burst) allows",
    "late": "the event's window had already closed when it arrived (its time is behind the watermark)",
}

# 2000-01-01T00:00:00Z: earlier event times are taken as clock faults (common practice:
# a device with an unset clock reports 1970).
MIN_EVENT_TS = 946_684_800.0
_LABEL_TYPES = frozenset((str, int, float, bool, type(None)))
# A key followed by optional whitespace and a colon; a match with whitespace means the raw count of
# '":' below undercounts the keys, so the exact check has to run.
_SPACED_KEY = re.compile(rb'"[ \t\r\n]+:')
# Module-level names for the per-message path (one lookup instead of a global and an attribute).
_loads = orjson.loads
_JSONDecodeError = orjson.JSONDecodeError
_isfinite = math.isfinite


def _refuse_duplicates(pairs: list) -> dict:
    seen = dict(pairs)
    if len(seen) != len(pairs):
        names = [k for k, _ in pairs]
        dup = next(k for k in names if names.count(k) > 1)
        raise Rejected("duplicate_key", f"key {dup[:64]!r} appears more than once in one object")
    return seen


def _check_duplicates(raw: bytes) -> None:
    """The exact (slow) duplicate-key check: the stdlib parser hands over every pair."""
    try:
        json.loads(raw, object_pairs_hook=_refuse_duplicates)
    except RecursionError:  # pragma: no cover - orjson refuses deeper nesting first
        raise Rejected("not_json", "nested too deeply") from None
    except ValueError:
        # orjson took it and the stdlib did not (e.g. a lone surrogate escape): no duplicates to name.
        pass


class Rejected(Exception):
    """A message that cannot be used; ``code`` is one of :data:`REASONS`."""

    __slots__ = ("code", "detail")

    def __init__(self, code: str, detail: str) -> None:
        super().__init__(code, detail)
        self.code = code
        self.detail = detail


def _parse_ts_text(text: str) -> float:
    try:
        dt = datetime.fromisoformat(text)
    except ValueError:
        raise Rejected("bad_ts", f"'ts' {text[:64]!r} is not an RFC 3339 timestamp") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.timestamp()


class NativeDecoder:
    """Decode native messages into ``(service, ts_seconds, metrics)``.

    Parameters
    ----------
    max_message_bytes, max_service_name, max_metrics, max_future_skew
        The input limits (see the config reference).
    now
        Wall clock in epoch seconds, injected so tests can drive it.
    """

    __slots__ = ("max_message_bytes", "max_service_name", "max_metrics", "max_future_skew", "now", "_ceiling", "_ceiling_at")

    def __init__(
        self,
        *,
        max_message_bytes: int = 65_536,
        max_service_name: int = 200,
        max_metrics: int = 256,
        max_future_skew: float = 86_400.0,
        now: Callable[[], float] = time.time,
    ) -> None:
        self.max_message_bytes = max_message_bytes
        self.max_service_name = max_service_name
        self.max_metrics = max_metrics
        self.max_future_skew = max_future_skew
        self.now = now
        self._ceiling = 0.0
        self._ceiling_at = -1e18
        self.refresh_clock()

    def refresh_clock(self) -> None:
        """Read the wall clock for the future-skew check; the engine calls this once per batch
        (reading the clock per message costs, and a skew limit is measured in hours)."""
        now = self.now()
        self._ceiling_at = now
        self._ceiling = now + self.max_future_skew

    def decode(self, raw: bytes) -> tuple[str, float, dict]:
        if len(raw) > self.max_message_bytes:
            raise Rejected("too_large", f"{len(raw)} bytes is over the limit of {self.max_message_bytes}")
        try:
            obj = _loads(raw)
        except _JSONDecodeError as exc:
            if not raw.strip():
                raise Rejected("empty", "the line is empty") from None
            try:
                raw.decode("utf-8")
            except UnicodeDecodeError:
                raise Rejected("not_utf8", "the bytes are not valid UTF-8") from None
            raise Rejected("not_json", f"not valid JSON: {exc}") from None
        if type(obj) is not dict:
            raise Rejected("not_object", f"expected a JSON object, got {type(obj).__name__}")

        # Subscripts rather than ``.get`` (the cheaper operation; a missing field is the rare case),
        # and a null field, which counts as missing, is told apart only once a check has failed.
        try:
            service = obj["service"]
        except KeyError:
            service = None
        if type(service) is not str or not service or len(service) > self.max_service_name or not service.isprintable():
            if service is None:
                raise Rejected("missing_service", "the message has no 'service' field")
            raise Rejected("bad_service", f"'service' {str(service)[:64]!r} is not a usable service name")

        try:
            ts = obj["ts"]
        except KeyError:
            ts = None
        tt = type(ts)
        ts_text = None
        if tt is int:
            # An int is always finite; orjson's are within 64 bits, so the float is finite too.
            ts = float(ts)
            if ts > MS_THRESHOLD:
                ts = ts / 1000.0
        elif tt is float:
            if not _isfinite(ts):
                raise Rejected("bad_ts", f"'ts' {ts!r} is not finite")
            if ts > MS_THRESHOLD:
                ts = ts / 1000.0
        elif tt is str:
            ts_text = ts
            ts = _parse_ts_text(ts)
        elif ts is None:
            raise Rejected("missing_ts", "the message has no 'ts' field")
        else:
            raise Rejected("bad_ts", f"'ts' must be a string or a number, got {tt.__name__}")
        if ts < MIN_EVENT_TS or ts > self._ceiling:
            raise Rejected("ts_out_of_range", f"'ts' {ts!r} is before 2000 or too far in the future")

        try:
            metrics = obj["metrics"]
        except KeyError:
            metrics = None
        if type(metrics) is not dict or not metrics or len(metrics) > self.max_metrics:
            if metrics is None:
                raise Rejected("missing_metrics", "the message has no 'metrics' field")
            raise Rejected("bad_metrics", "'metrics' must be a non-empty object within the metrics limit")
        # Exact types on purpose: bool is a subclass of int. orjson never yields NaN, infinities or
        # integers past 64 bits (it refuses such input as not JSON), so a float or int from it is
        # always a finite number within float range. (A plain loop over the values costs less than
        # a C-level ``issuperset(map(type, ...))`` for a handful of metrics.)
        for value in metrics.values():
            vt = type(value)
            if vt is not float and vt is not int:
                for name, value in metrics.items():
                    vt = type(value)
                    if vt is not float and vt is not int:
                        raise Rejected("bad_metric_value", f"metric {name[:64]!r} is a {vt.__name__}, not a number")
        labels = obj.get("labels")
        keys = len(obj) + len(metrics)
        if labels is not None:
            if type(labels) is not dict or not _LABEL_TYPES.issuperset(map(type, labels.values())):
                raise Rejected("bad_labels", "'labels' must be a flat object of strings, numbers, booleans or nulls")
            keys += len(labels)
        # Duplicate keys: orjson keeps the last one silently, which would let two senders' values
        # of one metric pass as one. Cheapest first, each exact when it says "no duplicates":
        # 1. without escapes, every colon outside a string ends a key; if the colons left after
        #    those in the service name and an RFC 3339 ts are exactly the keys parsed, none repeats;
        # 2. compact or indented JSON writes each key as '"name":'; if that count equals the keys
        #    parsed and no key has space before its colon, none repeats;
        # 3. otherwise (duplicates, colons in other strings, nested extra fields) the exact check.
        colons = raw.count(b":") - keys
        if colons:
            colons -= service.count(":") + (ts_text.count(":") if ts_text is not None else 0)
        # ``92 in raw`` (a backslash) is one memchr; ``b"\\" in raw`` runs the general substring search.
        if colons or 92 in raw:
            if raw.count(b'":') != keys or _SPACED_KEY.search(raw) is not None:
                _check_duplicates(raw)
        return service, ts, metrics
