"""Checkpoints of learned state in a local directory (embedded mode).

A checkpoint is one *segment* file written atomically (temporary file, fsync,
rename): the models that changed since the previous checkpoint plus one runtime
record (input and output positions, watermarks and open windows). The rename is
the commit, so a crash leaves either the old set of segments or the new one.
Restoring reads segments in generation order from the newest *base* segment (a
full snapshot) and lets the last record of each service win.

A save streams: each model's record is encoded, framed, checksummed and handed to a
buffered file as it is produced, so the memory a save needs is one record plus the
write buffer (``_WRITE_BUFFER``), never the whole checkpoint or a copy of it.

Compaction. The store tracks *live* bytes (the newest record of each service and the
newest runtime record) and *dead* bytes (older records later segments superseded).
A save becomes a new base when, after it, the dead bytes would reach ``_COMPACT_RATIO``
times the live bytes (so the directory stays under about twice the live state plus
one interval's delta), or after ``_MAX_DELTAS`` deltas (so a restore reads a bounded
number of files). When the save supersedes at least ``_REWRITE_SHARE`` of the live
bytes (most services changed in the interval), that save is the base: it costs at most
twice the delta and leaves nothing dead. A base does not re-encode the models that did
not change since their last record: it copies that record's bytes from the segment
holding it (checked against its frame CRC; on any mismatch or read error the live model
is encoded instead). Copying is bounded by what was written: a base for dead bytes copies
at most the live bytes after at least ``_COMPACT_RATIO`` times as many were written and
superseded, a base for a large delta copies less than the delta. So the work and the
bytes per interval stay linear in the services that changed, plus the runtime record.

Segment layout (all integers little-endian)::

    b"TWCK" | u16 format | u8 flags (1 = base) | u64 generation
    frame*  : u8 kind (1 model, 2 runtime) | u32 length | u32 crc32(payload) | payload
    trailer : u8 0xFF | u32 crc32(everything before the trailer)

Format 1 is the only format so far; the streaming writer writes it byte for byte as the
earlier whole-file writer did, so older segments load unchanged.

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
from typing import IO, Any

import orjson

from models import ServiceModel, decode_state, encode_state
from models.errors import CorruptState, StateError
from service.errors import StateStoreError
from service.stats import RuntimeStats

__all__ = ["CheckpointSaveError", "CheckpointStore", "Restored", "RestoredModels", "SEGMENT_FORMAT", "SaveReport",
           "save_failure_reason"]

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
# A new base is written once the bytes superseded by later records reach this many times the live bytes ...
_COMPACT_RATIO = 1.0
# ... or when the save supersedes at least this share of the live bytes (most services changed) ...
_REWRITE_SHARE = 0.5
# ... or once this many deltas follow the base, so a restore opens a bounded number of files.
_MAX_DELTAS = 128
# Write buffer of a save: records (tens of KiB each) go to the kernel in chunks of about this size.
_WRITE_BUFFER = 1 << 20


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


@dataclass
class SaveReport:
    """What the last successful save wrote (for benchmarks and logs; not part of the file).

    ``encoded`` model records were encoded from live models, ``copied`` were taken as bytes from the
    spill store or an earlier segment; ``live_bytes`` and ``dead_bytes`` are the store's totals after it.
    """

    generation: int = 0
    base: bool = False
    bytes: int = 0
    encoded: int = 0
    copied: int = 0
    runtime_bytes: int = 0
    live_bytes: int = 0
    dead_bytes: int = 0
    seconds: float = 0.0


# Where the newest record of a service is: (generation of its segment, payload offset, length, crc32).
_Place = tuple[int, int, int, int]


class _SegmentWriter:
    """Frames written to a file as they come, with the running CRC the trailer needs."""

    def __init__(self, f: IO[bytes], generation: int, base: bool) -> None:
        self.f = f
        self.crc = 0
        self.size = 0
        self._put(_HEADER.pack(_MAGIC, SEGMENT_FORMAT, 1 if base else 0, generation))

    def _put(self, data: bytes) -> None:
        self.f.write(data)
        self.crc = zlib.crc32(data, self.crc)
        self.size += len(data)

    def frame(self, kind: int, payload: bytes, crc: int | None = None) -> tuple[int, int]:
        """Write one frame; return (payload offset, payload crc)."""
        if crc is None:
            crc = zlib.crc32(payload)
        self._put(_FRAME.pack(kind, len(payload), crc))
        at = self.size
        self._put(payload)
        return at, crc

    def finish(self) -> None:
        self.f.write(_TRAILER.pack(_KIND_END, self.crc))
        self.size += _TRAILER.size


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
        self._base_models = 0  # model records in the newest base
        self._force_base = False  # after a refused record, the next checkpoint rewrites everything
        # The newest record of each service in the segments since the newest base (only records of
        # intact segments this store read or wrote), so a base can copy the ones that did not change.
        self._places: dict[str, _Place] = {}
        self._runtime_bytes = 0  # the newest runtime record
        self._live_bytes = 0  # sum of the lengths in _places, plus _runtime_bytes
        self._dead_bytes = 0  # payload bytes in the segments superseded by later records
        self._deltas = 0  # segments after the newest base
        self.last_save = SaveReport()
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

    def _path(self, generation: int) -> Path:
        return self.dir / f"ckpt-{generation:012d}.twc"

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
        parsed: list[tuple[int, Path, bool, list[tuple[int, bytes, int, int]], bool]] = []
        newest = 0
        for gen, path in segments:
            newest = max(newest, gen)
            try:
                # Read frame by frame: a restore holds the records, never a whole file besides them.
                with open(path, "rb") as f:
                    is_base, frames, intact, torn = self._parse(path, f, os.fstat(f.fileno()).st_size, restored)
            except OSError as exc:
                self._refuse(restored, "unreadable", f"{path}: cannot read: {exc}")
                continue
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
        places: dict[str, _Place] = {}
        total = 0
        runtime_bytes = 0
        deltas = 0
        for gen, path, is_base, frames, intact in parsed[start:]:
            for kind, payload, offset, crc in frames:
                total += len(payload)
                if kind == _KIND_MODEL:
                    try:
                        service, _model = decode_state(payload, key=self.key)  # verified now, decoded again when read
                    except StateError as exc:
                        self._refuse(restored, type(exc).__name__, f"{path}: a model record was refused: {exc}")
                        continue
                    restored.models.add(service, payload)
                    if intact:
                        places[service] = (gen, offset, len(payload), crc)
                    else:
                        # Set aside below (renamed): its records cannot be copied from it later.
                        places.pop(service, None)
                elif kind == _KIND_RUNTIME:
                    try:
                        restored.runtime = orjson.loads(payload)
                        runtime_bytes = len(payload)
                    except orjson.JSONDecodeError as exc:
                        self._refuse(restored, "CorruptState", f"{path}: the runtime record is not JSON: {exc}")
            if not intact:
                self._set_aside(path)
            restored.generation = gen
            if is_base:
                self._base_models = sum(1 for kind, *_ in frames if kind == _KIND_MODEL)
                deltas = 0
            else:
                deltas += 1
        self._places = places
        self._runtime_bytes = runtime_bytes
        self._live_bytes = sum(p[2] for p in places.values()) + runtime_bytes
        self._dead_bytes = max(0, total - self._live_bytes)
        self._deltas = deltas
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

    def _parse(self, path: Path, f: IO[bytes], size: int,
               restored: Restored) -> tuple[bool, list[tuple[int, bytes, int, int]], bool, bool]:
        """Return (is_base, frames that passed their checks as (kind, payload, offset, crc), intact, torn)."""
        frames: list[tuple[int, bytes, int, int]] = []
        head = f.read(_HEADER.size)
        if len(head) < _HEADER.size:
            self._refuse(restored, "CorruptState", f"{path}: truncated before the header")
            return False, frames, False, True
        magic, fmt, flags, _gen = _HEADER.unpack(head)
        if magic != _MAGIC:
            self._refuse(restored, "CorruptState", f"{path}: not a tidewatch checkpoint (bad magic)")
            return False, frames, False, False
        if fmt > SEGMENT_FORMAT:
            self._refuse(restored, "UnsupportedStateVersion", f"{path}: segment format {fmt} is newer than {SEGMENT_FORMAT}")
            return False, frames, False, False
        running = zlib.crc32(head)  # of everything before the trailer
        pos = _HEADER.size
        intact = False
        torn = True  # until the trailer is reached
        while pos < size:
            fh = f.read(_FRAME.size)
            if not fh:
                break
            if fh[0] == _KIND_END:
                if len(fh) >= _TRAILER.size:
                    torn = False
                    _, crc = _TRAILER.unpack_from(fh, 0)
                    intact = crc == running
                break
            if len(fh) < _FRAME.size:
                break
            kind, length, crc = _FRAME.unpack(fh)
            pos += _FRAME.size
            if pos + length > size:
                break  # a length past the end (cut short, or damaged): never read (or allocated)
            payload = f.read(length)
            if len(payload) != length:
                break
            running = zlib.crc32(payload, zlib.crc32(fh, running))
            at = pos
            pos += length
            if zlib.crc32(payload) != crc:
                self._refuse(restored, "CorruptState", f"{path}: a record failed its checksum")
                continue
            frames.append((kind, payload, at, crc))
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
    def _wants_base(self, models: Mapping[str, ServiceModel], dirty: set[str]) -> bool:
        if self._force_base or self.generation == 0 or self._deltas >= _MAX_DELTAS:
            return True
        # A base without models (a run's first checkpoint, before anything was learned) is replaced by
        # the first save that has some, so its deltas are not measured against an empty base.
        if self._base_models == 0 and bool(models):
            return True
        places = self._places
        superseded = self._runtime_bytes + sum(places[s][2] for s in dirty if s in places)
        live = max(self._live_bytes, 1)
        # Most of the state changed: a base costs at most twice this delta, and leaves nothing dead.
        return superseded >= _REWRITE_SHARE * live or self._dead_bytes + superseded >= _COMPACT_RATIO * live

    def save(self, models: Mapping[str, ServiceModel], dirty: set[str], runtime: dict[str, Any]) -> int:
        """Write one checkpoint of the ``dirty`` models and the runtime record, streaming it to the file.

        ``models`` are the live models; when it is a registry's
        :class:`~service.registry.LiveModels`, the models evicted to its spill store are part of the
        checkpoint too (a base holds them all, a delta the dirty ones), so a restart loses none.
        ``dirty`` must hold every service whose model changed since the last successful save: a base
        copies the last record of the others. Problems the registry noted while scoring are logged
        here, off the hot path.

        Returns the bytes written (:attr:`last_save` has the details). Raises :class:`StateStoreError`
        when the directory refuses the write (:class:`CheckpointSaveError`, with its reason); the
        previous checkpoints stay intact and nothing of this one is left behind.
        """
        started = time.perf_counter()
        spill = getattr(models, "spill", None)
        notes = getattr(models, "notes", None)
        if notes:
            for msg, fields in notes:
                log.error(msg, extra=fields)
            notes.clear()
        base = self._wants_base(models, dirty)
        gen = self.generation + 1
        final = self._path(gen)
        tmp = self.dir / f".ckpt-{gen:012d}.tmp"
        # The places of the records this save writes; merged into (a delta) or replacing (a base)
        # self._places only once the rename committed.
        places: dict[str, _Place] = {}
        counts = [0, 0]  # encoded, copied
        sources: dict[int, int] = {}  # generation -> open descriptor of a segment records are copied from
        try:
            try:
                with open(tmp, "wb", buffering=_WRITE_BUFFER) as f:
                    w = _SegmentWriter(f, gen, base)
                    for service, payload, crc, copied in self._records(models, dirty, spill, base, sources):
                        offset, crc = w.frame(_KIND_MODEL, payload, crc)
                        places[service] = (gen, offset, len(payload), crc)
                        counts[copied] += 1
                    rt = orjson.dumps(runtime)
                    w.frame(_KIND_RUNTIME, rt)
                    w.finish()
                    f.flush()
                    os.fsync(f.fileno())
                os.replace(tmp, final)
                _fsync_dir(self.dir)
            finally:
                for fd in sources.values():
                    try:
                        os.close(fd)
                    except OSError:
                        pass  # a read-only descriptor: nothing of the checkpoint depends on it
        except OSError as exc:
            reason = save_failure_reason(exc)
            self.stats.state_save_failures += 1
            self.stats.state_save_failure_reasons[reason] += 1
            _discard(tmp)  # a partial file on a full disk would hold the space
            raise CheckpointSaveError(f"cannot write checkpoint {final} ({reason}): {exc}", reason) from exc
        except BaseException:
            # Anything else (a model that cannot be encoded, an interrupt): nothing of this save stays.
            _discard(tmp)
            raise
        self.generation = gen
        if base:
            self._force_base = False
            self._base_models = len(places)
            self._places = places
            self._live_bytes = sum(p[2] for p in places.values()) + len(rt)
            self._dead_bytes = 0
            self._deltas = 0
            for g, p in self._segments():
                if g < gen:
                    try:
                        p.unlink()
                    except OSError:
                        pass
        else:
            old = self._places
            live, dead = self._live_bytes, self._dead_bytes + self._runtime_bytes
            for service, place in places.items():
                prev = old.get(service)
                if prev is not None:
                    dead += prev[2]
                    live -= prev[2]
                live += place[2]
                old[service] = place
            self._live_bytes = live - self._runtime_bytes + len(rt)
            self._dead_bytes = dead
            self._deltas += 1
        self._runtime_bytes = len(rt)
        elapsed = time.perf_counter() - started
        self.stats.state_saves += 1
        self.stats.last_save_seconds = elapsed
        self.stats.save_seconds.observe(elapsed)
        self.last_save = SaveReport(generation=gen, base=base, bytes=w.size, encoded=counts[0], copied=counts[1],
                                    runtime_bytes=len(rt), live_bytes=self._live_bytes, dead_bytes=self._dead_bytes,
                                    seconds=elapsed)
        return w.size

    def _records(self, models: Mapping[str, ServiceModel], dirty: set[str], spill: Any, base: bool,
                 sources: dict[int, int]) -> Iterator[tuple[str, bytes, int | None, int]]:
        """(service, record, its crc32 when known, 1 if copied else 0), one at a time: in a base every
        live model (the unchanged ones copied from their last segment) then every spilled one, in a
        delta the dirty ones. A spilled record signed with this store's key is copied as it is."""
        names: Iterable[str] = models.keys() if base else sorted(dirty)
        for service in names:
            model = models.get(service)
            if model is not None:
                if base and service not in dirty:
                    copy = self._copy(service, sources)
                    if copy is not None:
                        yield service, copy[0], copy[1], 1
                        continue
                yield service, encode_state(service, model, key=self.key), None, 0
            elif not base and spill is not None and service in spill:
                record = self._spilled(spill, service, spill.get(service))
                if record is not None:
                    yield service, record, None, 1
        if base and spill is not None:
            for service, record in spill.records():
                if service not in models:
                    record = self._spilled(spill, service, record)
                    if record is not None:
                        yield service, record, None, 1

    def _copy(self, service: str, sources: dict[int, int]) -> tuple[bytes, int] | None:
        """The bytes and crc32 of the service's newest record, read back from its segment; None when
        there is none or it does not read back intact (the caller encodes the live model instead)."""
        place = self._places.get(service)
        if place is None:
            return None
        gen, offset, length, crc = place
        try:
            fd = sources.get(gen)
            if fd is None:
                fd = sources[gen] = os.open(self._path(gen), os.O_RDONLY)
            payload = os.pread(fd, length, offset)
        except OSError:
            return None
        if len(payload) != length or zlib.crc32(payload) != crc:
            return None
        return payload, crc

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


def _discard(path: Path) -> None:
    try:
        path.unlink(missing_ok=True)
    except OSError:
        pass


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
