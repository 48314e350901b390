"""Checkpoints of learned state in a local directory (embedded mode).

A checkpoint is one *segment* file written atomically (temporary file, fsync,
rename): the models that changed since the previous checkpoint plus one runtime
record (input and output positions, watermarks and open windows). The rename is
the commit, so a crash leaves either the old set of segments or the new one.
Restoring reads segments in generation order from the newest *base* segment (a
full snapshot) and lets the last record of each service win. When the deltas
grow past a few times the base, a new base is written and older segments go.

Segment layout (all integers little-endian)::

    b"TWCK" | u16 format | u8 flags (1 = base) | u64 generation
    frame*  : u8 kind (1 model, 2 runtime) | u32 length | u32 crc32(payload) | payload
    trailer : u8 0xFF | u32 crc32(everything before the trailer)

Model payloads are ``models.encode_state`` records, which carry their own format
version, checksum and optional HMAC; runtime payloads are JSON. A frame or record
that fails its check is reported, counted, and skipped: that service starts
fresh; the file is set aside as ``*.corrupt``. Nothing is ever unpickled.

A *torn* segment (one that ends before its trailer: a write cut short) was never a
committed checkpoint: none of its records is used and it can never stand in for
the newest base, so the segments before it are restored as they were. A
temporary file left by a process killed mid-save is removed on the next load.
A failed save raises :class:`CheckpointSaveError` naming a reason
(``service.stats.SAVE_FAILURE_REASONS``) and is counted by it; the previous segments stay valid.
"""

from __future__ import annotations

import errno
import logging
import os
import re
import struct
import time
import zlib
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import orjson

from models import ServiceModel, decode_state, encode_state
from models.errors import CorruptState, StateError
from service.errors import StateStoreError
from service.stats import RuntimeStats

__all__ = ["CheckpointSaveError", "CheckpointStore", "Restored", "RestoredModels", "SEGMENT_FORMAT", "save_failure_reason"]

log = logging.getLogger("tidewatch.checkpoint")

SEGMENT_FORMAT = 1
_MAGIC = b"TWCK"
_HEADER = struct.Struct("<4sHBQ")
_FRAME = struct.Struct("<BII")
_TRAILER = struct.Struct("<BI")
_KIND_MODEL, _KIND_RUNTIME, _KIND_END = 1, 2, 0xFF
_NAME = re.compile(r"^ckpt-(\d{12})\.twc$")
_TMP_NAME = re.compile(r"^\.ckpt-(\d{12})\.tmp$")
_NO_SPACE = {errno.ENOSPC, errno.EDQUOT}
_PERMISSION = {errno.EACCES, errno.EPERM}
# A new base is written once the deltas since the last base are this many times its size.
_COMPACT_RATIO = 3.0


class CheckpointSaveError(StateStoreError):
    """A checkpoint could not be written; ``reason`` is one of ``service.stats.SAVE_FAILURE_REASONS``."""

    def __init__(self, message: str, reason: str) -> None:
        super().__init__(message)
        self.reason = reason


def save_failure_reason(exc: OSError) -> str:
    """Classify why the state directory refused a write.

    >>> save_failure_reason(OSError(errno.ENOSPC, "No space left on device"))
    'no_space'
    >>> save_failure_reason(OSError(errno.EROFS, "Read-only file system"))
    'read_only'
    """
    if exc.errno in _NO_SPACE:
        reason = "no_space"
    elif exc.errno == errno.EROFS:
        reason = "read_only"
    elif exc.errno in _PERMISSION:
        reason = "permission"
    else:
        reason = "io_error"
    return reason


class RestoredModels(Mapping[str, ServiceModel]):
    """Verified model records by service, decoded each time one is read.

    A restore keeps the records (bytes), not the decoded models, so a state directory holding more
    models than ``limits.max_live_models`` is never in memory as live models all at once:
    :meth:`service.registry.ModelRegistry.restore` takes :meth:`records` and decodes only as many as
    fit, parking the rest in the spill store as they are.
    """

    def __init__(self, key: bytes | None = None) -> None:
        self.key = key
        self._records: dict[str, bytes] = {}

    def add(self, service: str, record: bytes) -> None:
        self._records[service] = record

    def records(self) -> Iterator[tuple[str, bytes]]:
        return iter(self._records.items())

    def __getitem__(self, service: str) -> ServiceModel:
        return decode_state(self._records[service], key=self.key)[1]

    def __iter__(self) -> Iterator[str]:
        return iter(self._records)

    def __len__(self) -> int:
        return len(self._records)


@dataclass
class Restored:
    """What a restore found."""

    models: RestoredModels = field(default_factory=RestoredModels)
    runtime: dict[str, Any] | None = None
    refused: list[str] = field(default_factory=list)  # one human line per refused record or file
    generation: int = 0


class CheckpointStore:
    """Segment files in ``directory``.

    Parameters
    ----------
    directory
        Created if missing.
    key
        HMAC key for model records; when set, unsigned or wrongly signed records are refused.
    """

    def __init__(self, directory: str | os.PathLike[str], *, stats: RuntimeStats, key: bytes | None = None) -> None:
        self.dir = Path(directory)
        self.key = key
        self.stats = stats
        self.generation = 0
        self._base_bytes = 0
        self._delta_bytes = 0
        self._base_models = 0  # model records in the newest base
        self._force_base = False  # after a refused record, the next checkpoint rewrites everything
        try:
            self.dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StateStoreError(f"cannot create the state directory {self.dir}: {exc}") from exc

    # --- reading ---------------------------------------------------------------------
    def _segments(self) -> list[tuple[int, Path]]:
        out = []
        for p in self.dir.iterdir():
            m = _NAME.match(p.name)
            if m:
                out.append((int(m.group(1)), p))
        out.sort()
        return out

    def _refuse(self, restored: Restored, kind: str, line: str) -> None:
        self._force_base = True
        self.stats.state_records_refused[kind] += 1
        restored.refused.append(line)
        log.warning("state record refused", extra={"event": "state_refused", "kind": kind, "detail": line})

    def load(self) -> Restored:
        """Read the newest base and every later segment; never raises on bad content."""
        restored = Restored(models=RestoredModels(self.key))
        self._remove_stale_temporaries()
        segments = self._segments()
        parsed: list[tuple[int, Path, bool, list[tuple[int, bytes]], bool]] = []
        newest = 0
        for gen, path in segments:
            newest = max(newest, gen)
            try:
                data = path.read_bytes()
            except OSError as exc:
                self._refuse(restored, "unreadable", f"{path}: cannot read: {exc}")
                continue
            is_base, frames, intact, torn = self._parse(path, data, restored)
            if torn:
                # Never committed: using its records (or letting it be the newest base) would put
                # models ahead of the saved position, or hide the last good base.
                self._set_aside(path)
                continue
            parsed.append((gen, path, is_base, frames, intact))
        start = 0
        for i, item in enumerate(parsed):
            if item[2]:
                start = i
        for gen, path, is_base, frames, intact in parsed[start:]:
            for kind, payload in frames:
                if kind == _KIND_MODEL:
                    try:
                        service, _model = decode_state(payload, key=self.key)  # verified now, decoded again when read
                    except StateError as exc:
                        self._refuse(restored, type(exc).__name__, f"{path}: a model record was refused: {exc}")
                        continue
                    restored.models.add(service, payload)
                elif kind == _KIND_RUNTIME:
                    try:
                        restored.runtime = orjson.loads(payload)
                    except orjson.JSONDecodeError as exc:
                        self._refuse(restored, "CorruptState", f"{path}: the runtime record is not JSON: {exc}")
            if not intact:
                self._set_aside(path)
            restored.generation = gen
            sz = sum(len(p) for _, p in frames)
            if is_base:
                self._base_bytes, self._delta_bytes = sz, 0
                self._base_models = sum(1 for kind, _ in frames if kind == _KIND_MODEL)
            else:
                self._delta_bytes += sz
        # Past every segment seen, torn ones included, so a new save never reuses a name in doubt.
        self.generation = max(restored.generation, newest)
        return restored

    def _remove_stale_temporaries(self) -> None:
        # A process killed mid-save leaves its temporary file; on a full disk it holds the space.
        for p in self.dir.iterdir():
            if _TMP_NAME.match(p.name):
                try:
                    p.unlink()
                    log.info("removed an unfinished checkpoint", extra={"event": "state_tmp_removed", "path": str(p)})
                except OSError:
                    pass

    def _parse(self, path: Path, data: bytes, restored: Restored) -> tuple[bool, list[tuple[int, bytes]], bool, bool]:
        """Return (is_base, frames that passed their checks, intact, torn)."""
        frames: list[tuple[int, bytes]] = []
        if len(data) < _HEADER.size:
            self._refuse(restored, "CorruptState", f"{path}: truncated before the header")
            return False, frames, False, True
        magic, fmt, flags, _gen = _HEADER.unpack_from(data, 0)
        if magic != _MAGIC:
            self._refuse(restored, "CorruptState", f"{path}: not a tidewatch checkpoint (bad magic)")
            return False, frames, False, False
        if fmt > SEGMENT_FORMAT:
            self._refuse(restored, "UnsupportedStateVersion", f"{path}: segment format {fmt} is newer than {SEGMENT_FORMAT}")
            return False, frames, False, False
        pos = _HEADER.size
        intact = False
        torn = True  # until the trailer is reached
        while pos < len(data):
            kind = data[pos]
            if kind == _KIND_END:
                if pos + _TRAILER.size <= len(data):
                    torn = False
                    _, crc = _TRAILER.unpack_from(data, pos)
                    intact = crc == zlib.crc32(data[:pos])
                break
            if pos + _FRAME.size > len(data):
                break
            kind, length, crc = _FRAME.unpack_from(data, pos)
            pos += _FRAME.size
            payload = data[pos : pos + length]
            pos += length
            if len(payload) != length:
                break
            if zlib.crc32(payload) != crc:
                self._refuse(restored, "CorruptState", f"{path}: a record failed its checksum")
                continue
            frames.append((kind, payload))
        if torn:
            self._refuse(restored, "CorruptState", f"{path}: the segment is truncated (an unfinished write); none of it is used")
        elif not intact:
            self._refuse(restored, "CorruptState", f"{path}: the segment's checksum does not match")
        return bool(flags & 1), frames, intact, torn

    def _set_aside(self, path: Path) -> None:
        target = path.with_name(f"{path.name}.corrupt-{int(time.time())}")
        try:
            path.rename(target)
            log.error("corrupt checkpoint set aside", extra={"event": "state_set_aside", "path": str(target)})
        except OSError:
            pass

    # --- writing ---------------------------------------------------------------------
    def save(self, models: Mapping[str, ServiceModel], dirty: set[str], runtime: dict[str, Any]) -> int:
        """Write one checkpoint of the ``dirty`` models and the runtime record.

        ``models`` are the live models; when it is a registry's
        :class:`~service.registry.LiveModels`, the models evicted to its spill store are part of the
        checkpoint too (a base holds them all, a delta the dirty ones), so a restart loses none.
        Problems the registry noted while scoring are logged here, off the hot path.

        Returns the bytes written. Raises :class:`StateStoreError` when the
        directory refuses the write (:class:`CheckpointSaveError`, with its reason); the
        previous checkpoints stay intact and nothing of this one is left behind.
        """
        started = time.perf_counter()
        spill = getattr(models, "spill", None)
        notes = getattr(models, "notes", None)
        if notes:
            for msg, fields in notes:
                log.error(msg, extra=fields)
            notes.clear()
        # A base without models (a run's first checkpoint, before anything was learned) is replaced by
        # the first save that has some, so its deltas are not measured against an empty base.
        base = (self._force_base or self.generation == 0 or (self._base_models == 0 and bool(models))
                or self._delta_bytes > _COMPACT_RATIO * max(self._base_bytes, 1))
        names = models.keys() if base else sorted(dirty)
        gen = self.generation + 1
        parts = [_HEADER.pack(_MAGIC, SEGMENT_FORMAT, 1 if base else 0, gen)]
        model_bytes = 0
        n_models = 0
        for service, payload in self._records(models, names, spill, base):
            model_bytes += len(payload)
            n_models += 1
            parts.append(_FRAME.pack(_KIND_MODEL, len(payload), zlib.crc32(payload)))
            parts.append(payload)
        rt = orjson.dumps(runtime)
        parts.append(_FRAME.pack(_KIND_RUNTIME, len(rt), zlib.crc32(rt)))
        parts.append(rt)
        body = b"".join(parts)
        data = body + _TRAILER.pack(_KIND_END, zlib.crc32(body))
        final = self.dir / f"ckpt-{gen:012d}.twc"
        tmp = self.dir / f".ckpt-{gen:012d}.tmp"
        try:
            with open(tmp, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, final)
            _fsync_dir(self.dir)
        except OSError as exc:
            reason = save_failure_reason(exc)
            self.stats.state_save_failures += 1
            self.stats.state_save_failure_reasons[reason] += 1
            try:
                tmp.unlink(missing_ok=True)  # a partial file on a full disk would hold the space
            except OSError:
                pass
            raise CheckpointSaveError(f"cannot write checkpoint {final} ({reason}): {exc}", reason) from exc
        self.generation = gen
        if base:
            self._force_base = False
            self._base_bytes, self._delta_bytes = model_bytes + len(rt), 0
            self._base_models = n_models
            for g, p in self._segments():
                if g < gen:
                    try:
                        p.unlink()
                    except OSError:
                        pass
        else:
            self._delta_bytes += model_bytes + len(rt)
        elapsed = time.perf_counter() - started
        self.stats.state_saves += 1
        self.stats.last_save_seconds = elapsed
        self.stats.save_seconds.observe(elapsed)
        return len(data)


    def _records(self, models: Mapping[str, ServiceModel], names: Iterable[str], spill: Any,
                 base: bool) -> Iterator[tuple[str, bytes]]:
        """(service, record) of the named live models, then spilled ones: all of them in a base, the
        named (dirty) ones in a delta. A spilled record signed with this store's key is copied as it is."""
        for service in names:
            model = models.get(service)
            if model is not None:
                yield service, encode_state(service, model, key=self.key)
            elif not base and spill is not None and service in spill:
                record = self._spilled(spill, service, spill.get(service))
                if record is not None:
                    yield service, record
        if base and spill is not None:
            for service, record in spill.records():
                if service not in models:
                    record = self._spilled(spill, service, record)
                    if record is not None:
                        yield service, record

    def _spilled(self, spill: Any, service: str, record: bytes | None) -> bytes | None:
        if record is not None and spill.key == self.key:
            return record
        try:
            if record is None:
                raise CorruptState("the spill store could not give the record back")
            _, model = decode_state(record, key=spill.key)
        except StateError as exc:
            # Not hot: a checkpoint. That service's last saved record (if any) stays the one restored.
            self.stats.state_records_refused[type(exc).__name__] += 1
            log.error("a spilled model could not be checkpointed", extra={"event": "state_refused", "service": service,
                                                                          "error": str(exc)})
            return None
        return encode_state(service, model, key=self.key)


def _fsync_dir(path: Path) -> None:
    # The rename is only durable once the directory entry is on disk.
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
