"""The exception hierarchy of the tidewatch runtime.

Lower-level errors (pydantic, OS, confluent-kafka) are translated at the boundary
with ``raise ... from exc`` so callers only ever catch these.
"""

from __future__ import annotations

__all__ = [
    "TidewatchError",
    "ConfigError",
    "StateStoreError",
    "OutputError",
    "BusFatalError",
]


class TidewatchError(Exception):
    """Base class of every error the runtime raises on purpose."""


class ConfigError(TidewatchError):
    """The config file cannot be read, parsed or validated.

    ``problems`` holds one human line per problem, each naming the file, the field
    path, the bad value and what is allowed.
    """

    def __init__(self, message: str, problems: list[str] | None = None) -> None:
        super().__init__(message)
        self.problems = problems or []

    def __str__(self) -> str:
        if not self.problems:
            return super().__str__()
        return super().__str__() + "\n" + "\n".join(f"  - {p}" for p in self.problems)


class StateStoreError(TidewatchError):
    """The state directory cannot be read or written."""


class OutputError(TidewatchError):
    """The score or rejects sink refused a write; nothing past it is acknowledged."""


class BusFatalError(TidewatchError):
    """The message bus reported an error the process cannot recover from (e.g. fenced)."""
