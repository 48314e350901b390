"""Exception hierarchy of the ``models`` package.

Everything the package raises on purpose derives from :class:`ModelError`, so the runtime can
catch one class per concern:

* :class:`SettingsError` -- a :class:`~models.settings.ModelSettings` value is out of range;
* :class:`FeatureError` -- a window's feature mapping cannot be read as numbers;
* :class:`StateError` and its subclasses -- a saved model state cannot be restored.

Examples
--------
>>> from models.errors import CorruptState, StateError, ModelError
>>> issubclass(CorruptState, StateError) and issubclass(StateError, ModelError)
True
"""

from __future__ import annotations

__all__ = [
    "ModelError",
    "SettingsError",
    "FeatureError",
    "StateError",
    "CorruptState",
    "UnsupportedStateVersion",
    "StateSignatureMismatch",
]


class ModelError(Exception):
    """Base class of every error raised on purpose by ``models``."""


class SettingsError(ModelError, ValueError):
    """A model setting is missing, of the wrong type or out of range."""


class FeatureError(ModelError, ValueError):
    """A feature name or value in a window cannot be used (e.g. a value that is not a number)."""


class StateError(ModelError):
    """A saved model state cannot be restored."""


class CorruptState(StateError):
    """The record is damaged: bad magic bytes, checksum mismatch, truncation or a malformed header."""


class UnsupportedStateVersion(StateError):
    """The record was written in a format version this code does not know (usually a newer one)."""


class StateSignatureMismatch(StateError):
    """A signing key is configured and the record's HMAC is wrong or missing."""
