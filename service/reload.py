"""Config reload on SIGHUP, applied between batches of the processing loop.

The signal handler only sets a flag; the loop calls :meth:`ConfigReloader.poll`
between batches, so a reload never lands in the middle of a batch. A file that
does not validate is reported and the running config is kept.
"""

from __future__ import annotations

import logging
import signal
import threading

from service.config import Config, load_config
from service.errors import ConfigError

__all__ = ["ConfigReloader"]

log = logging.getLogger("tidewatch.reload")


class ConfigReloader:
    """Re-reads ``path`` when asked (SIGHUP) and hands the result to the engine."""

    def __init__(self, path: str | None) -> None:
        self.path = path
        self.requested = threading.Event()
        self.reloads = 0
        self.failures = 0

    def install(self) -> "ConfigReloader":
        if hasattr(signal, "SIGHUP"):
            signal.signal(signal.SIGHUP, lambda signum, frame: self.requested.set())
        return self

    def poll(self, engine) -> Config | None:
        """Apply a pending reload to ``engine``; return the new config, or None."""
        if not self.requested.is_set():
            return None
        self.requested.clear()
        if self.path is None:
            log.warning("SIGHUP ignored: running on built-in defaults, no config file to reload",
                        extra={"event": "reload_skipped"})
            return None
        try:
            config = load_config(self.path)
        except ConfigError as exc:
            self.failures += 1
            log.error("config reload refused; keeping the running config",
                      extra={"event": "reload_failed", "problems": exc.problems or [str(exc)]})
            return None
        if config.kafka != engine.config.kafka:
            log.warning("[kafka] changes take effect on the next restart; the rest is applied now",
                        extra={"event": "reload_partial"})
            config = config.model_copy(update={"kafka": engine.config.kafka})
        kept, rebuilt = engine.reconfigure(config)
        self.reloads += 1
        log.info("config reloaded", extra={"event": "reloaded", "models_kept": kept, "models_rebuilt": rebuilt})
        return config
