"""Structured logs: one JSON object per line on stderr.

Stable fields: ``ts`` (RFC 3339), ``level``, ``logger``, ``event`` (a snake_case
name per kind of event), ``msg``, then the event's own fields. The level comes from
``--log-level`` or ``TIDEWATCH_LOG_LEVEL`` (default ``info``). The hot path never
logs per message; secrets never reach a log line (config values are not logged).
"""

from __future__ import annotations

import logging
import os
import sys
import time

import orjson

__all__ = ["configure_logging", "JsonFormatter"]

_STANDARD = set(vars(logging.LogRecord("", 0, "", 0, "", None, None))) | {"message", "asctime", "taskName"}


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        t = record.created
        doc = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(t)) + f".{int(t % 1 * 1000):03d}Z",
            "level": record.levelname.lower(),
            "logger": record.name,
            "event": getattr(record, "event", "message"),
            "msg": record.getMessage(),
        }
        for key, value in vars(record).items():
            if key not in _STANDARD and key != "event":
                doc[key] = value
        if record.exc_info:
            doc["error"] = self.formatException(record.exc_info)
        return orjson.dumps(doc, default=str).decode()


def configure_logging(level: str | None = None, config_level: str | None = None) -> None:
    """Level: the command line's, else ``TIDEWATCH_LOG_LEVEL``, else the config file's, else info."""
    level = (level or os.environ.get("TIDEWATCH_LOG_LEVEL") or config_level or "info").upper()
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonFormatter())
    root = logging.getLogger("tidewatch")
    root.handlers[:] = [handler]
    root.setLevel(level)
    root.propagate = False
