"""Records of the Kafka state changelog: keys, values, and reading a partition back.

The changelog is a compacted topic partition-aligned with the scoring topic:
partition ``p`` holds the state of the services whose messages arrive on scoring
partition ``p``. Three kinds of record, told apart by a key prefix:

=====================  ==============================================================
key                    value
=====================  ==============================================================
``m\\0<service>``       the service's model (``models.encode_state``: versioned, checksummed, optional HMAC)
``w\\0<service>``       ``{"v": 1, "source": ..., "windows": [...]}`` — the open windows' partial aggregates
``h\\0<source>``        ``{"v": 1, "high_mark": ...}`` — the source's newest event time
=====================  ==============================================================

Each value fits far below Kafka's 1 MB default message limit (a model record is
tens of kilobytes at the default settings).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import orjson

__all__ = ["model_key", "windows_key", "mark_key", "encode_windows", "encode_mark", "PartitionState", "apply_record", "RECORD_FORMAT"]

RECORD_FORMAT = 1
_M, _W, _H = b"m\x00", b"w\x00", b"h\x00"


def model_key(service: str) -> bytes:
    return _M + service.encode("utf-8")


def windows_key(service: str) -> bytes:
    return _W + service.encode("utf-8")


def mark_key(source: str) -> bytes:
    return _H + source.encode("utf-8")


def encode_windows(source: str, windows: list) -> bytes:
    return orjson.dumps({"v": RECORD_FORMAT, "source": source, "windows": windows})


def encode_mark(high_mark: float) -> bytes:
    return orjson.dumps({"v": RECORD_FORMAT, "high_mark": high_mark})


@dataclass
class PartitionState:
    """The latest record of each key read back from one changelog partition."""

    models: dict[str, bytes] = field(default_factory=dict)
    windows: dict[str, dict[str, Any]] = field(default_factory=dict)
    marks: dict[str, float] = field(default_factory=dict)
    refused: list[str] = field(default_factory=list)


def apply_record(state: PartitionState, key: bytes | None, value: bytes | None) -> None:
    """Fold one changelog record into ``state`` (later records win; a None value deletes)."""
    if not key or len(key) < 2:
        state.refused.append("a changelog record without a usable key")
        return
    prefix, name = key[:2], key[2:].decode("utf-8", errors="replace")
    if prefix == _M:
        if value is None:
            state.models.pop(name, None)
        else:
            state.models[name] = value
        return
    if prefix not in (_W, _H):
        state.refused.append(f"a changelog record with an unknown key prefix {prefix!r}")
        return
    if value is None:
        (state.windows if prefix == _W else state.marks).pop(name, None)
        return
    try:
        doc = orjson.loads(value)
        if not isinstance(doc, dict) or int(doc.get("v", 0)) > RECORD_FORMAT:
            raise ValueError("unsupported record format")
        if prefix == _W:
            if not isinstance(doc.get("windows"), list) or not isinstance(doc.get("source"), str):
                raise ValueError("windows record without source or windows")
            state.windows[name] = doc
        else:
            state.marks[name] = float(doc["high_mark"])
    except (ValueError, TypeError, KeyError, orjson.JSONDecodeError) as exc:
        state.refused.append(f"changelog record for {name!r} refused: {exc}")
