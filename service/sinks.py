"""Line-oriented sinks for embedded mode: score messages and rejects as JSON lines."""

from __future__ import annotations

import base64
import os
import sys
from typing import Any, BinaryIO

import orjson

from service.errors import OutputError

__all__ = ["LineSink", "encode_reject"]


class LineSink:
    """Append JSON lines to a file, or write them to stdout for ``-``.

    ``truncate_to`` cuts a file back to a checkpointed size before appending, so
    lines written after the last checkpoint of a crashed run are not repeated.
    """

    def __init__(self, target: str, *, truncate_to: int | None = None) -> None:
        self.target = target
        self.is_file = target != "-"
        self.lines = 0
        try:
            if self.is_file:
                f = open(target, "ab")
                if truncate_to is not None and f.tell() > truncate_to:
                    f.truncate(truncate_to)
                    f.seek(truncate_to)
                self._f: BinaryIO = f
            else:
                self._f = sys.stdout.buffer
        except OSError as exc:
            raise OutputError(f"cannot open {target} for writing: {exc}") from exc

    def write(self, payload: bytes) -> None:
        try:
            self._f.write(payload)
            self._f.write(b"\n")
        except OSError as exc:
            raise OutputError(f"cannot write to {self.target}: {exc}") from exc
        self.lines += 1

    def sync(self) -> int | None:
        """Flush (and fsync a file); return the file size, or None for stdout."""
        try:
            self._f.flush()
            if self.is_file:
                os.fsync(self._f.fileno())
                return self._f.tell()
        except OSError as exc:
            raise OutputError(f"cannot flush {self.target}: {exc}") from exc
        return None

    def close(self) -> None:
        try:
            self.sync()
        finally:
            if self.is_file:
                try:
                    self._f.close()
                except OSError as exc:
                    raise OutputError(f"cannot close {self.target}: {exc}") from exc

    def abandon(self) -> None:
        """Close after a failure, raising nothing: what is buffered may or may not reach the file,
        which is fine because the next start cuts the file back to its checkpointed size."""
        if not self.is_file:
            try:
                self._f.flush()
            except (OSError, ValueError):
                pass
            return
        try:
            self._f.close()
        except (OSError, ValueError):
            pass


def encode_reject(code: str, detail: str, raw: bytes, origin: Any) -> bytes:
    """One rejects-sink line: reason, sentence, where it came from, and the original bytes.

    The original is kept as text when it is UTF-8 and as base64 otherwise.

    >>> encode_reject("not_json", "not valid JSON", b"oops", {"line": 3})
    b'{"reason":"not_json","detail":"not valid JSON","origin":{"line":3},"raw":"oops"}'
    """
    record: dict[str, Any] = {"reason": code, "detail": detail, "origin": origin}
    try:
        record["raw"] = raw.decode("utf-8").rstrip("\r\n")
    except UnicodeDecodeError:
        record["raw_b64"] = base64.b64encode(raw.rstrip(b"\r\n")).decode("ascii")  # the line, as "raw" is
    return orjson.dumps(record)

