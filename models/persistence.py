"""Versioned binary records of a service's model state (never pickle).

Layout of format version 2 (written), all integers little-endian::

    offset  size  field
    0       4     magic b"TWMS"
    4       2     format version (uint16)
    6       2     flags (uint16); bit 0: an HMAC is present; other bits must be 0
    8       2     length N of the service name (uint16)
    10      N     service name, UTF-8
    .       4     length S of the state (uint32)
    .       S     state, JSON, every numpy array replaced by null
    .       4     length T of the array table (uint32)
    .       T     array table, JSON: [[path, dtype, shape], ...], one entry per array, in payload order
    .       8     length P of the array payload (uint64)
    .       0-7   zero bytes, so that the payload starts at a multiple of 8 from the record start
    .       P     the arrays' raw little-endian bytes, back to back, in table order
    .       32    HMAC-SHA256(key, every byte before this field)   -- only if flag bit 0
    .       16    BLAKE2b-128 of every byte before this field

An array's ``path`` is the list of keys (strings) and list positions (integers >= 0) that lead
from the state's top level to its null; ``dtype`` is a numpy dtype string such as ``"<f8"``.
The encoder puts arrays of wider items first, so every array of the payload is aligned to its
item size. The table of a model depends only on its shape (kind, feature count, history length),
so decoders keep recently seen tables parsed and checked, keyed by their exact bytes.

Format version 1 (still read) has no table: one JSON header
``{"state": ..., "arrays": [{"dtype": "<f8", "shape": [..]}, ...]}`` after the name (uint32
length), each array replaced in ``state`` by ``{"__ndarray__": i}``, then the payload (uint64
length, no padding), the optional HMAC and the digest as above.

Every format version ends with the same 16-byte BLAKE2b digest, so damage is told apart from a
newer format: the digest is checked first, then the version. A signed record is therefore read
twice (digest, then HMAC) on purpose: an HMAC over the 128-bit digest instead of the bytes would
save a pass but be only as strong as that digest's 64-bit collision bound.

Decoding checks, in order: length and magic, digest (:class:`~models.errors.CorruptState`),
version (:class:`~models.errors.UnsupportedStateVersion` when newer), then -- when a key is
given -- the HMAC (:class:`~models.errors.StateSignatureMismatch` when wrong or absent), then
the structure. Without a key an HMAC, if present, is not checked. Only plain numeric and boolean
dtypes are accepted for arrays, and no decoding error of numpy, orjson or struct escapes: each is
re-raised as ``CorruptState``.

The arrays handed to ``ServiceModel.from_state`` by a format-2 decode are read-only views of the
record's bytes (no copy is made here): a component copies what it keeps, once, into its own
storage, and a write to a view it forgot to copy fails loudly instead of changing the record.

Examples
--------
>>> from models import ModelSettings, build_model
>>> from models.persistence import decode_state, encode_state
>>> model = build_model("billing", ModelSettings(kind="adaptive_baseline"))
>>> _ = model.assess({"count": 3.0})
>>> record = encode_state("billing", model, key=b"example key")
>>> record[:4], int.from_bytes(record[4:6], "little")
(b'TWMS', 2)
>>> service, restored = decode_state(record, key=b"example key")
>>> service, restored.windows_seen
('billing', 1)
>>> decode_state(record, key=b"another key")
Traceback (most recent call last):
...
models.errors.StateSignatureMismatch: HMAC does not match: wrong key or altered record
"""

from __future__ import annotations

import hashlib
import hmac
import math
import struct
from typing import Any

import numpy as np
import orjson

from models.errors import (
    CorruptState,
    ModelError,
    SettingsError,
    StateError,
    StateSignatureMismatch,
    UnsupportedStateVersion,
)
from models.service_model import ServiceModel

__all__ = ["FORMAT_VERSION", "MAGIC", "decode_state", "encode_state"]

MAGIC = b"TWMS"
FORMAT_VERSION = 2

_FLAG_SIGNED = 0x0001
_PREAMBLE = struct.Struct("<4sHHH")
_U32 = struct.Struct("<I")
_U64 = struct.Struct("<Q")
_DIGEST_SIZE = 16
_MAC_SIZE = 32
_ALIGN = 8
_ARRAY_TAG = "__ndarray__"
# Plain numbers and flags only: an "object" dtype would make np.frombuffer unsafe.
_DTYPES = frozenset({"|b1", "|u1", "<u2", "<u4", "<u8", "|i1", "<i2", "<i4", "<i8", "<f4", "<f8"})
_DTYPE_OBJECTS = {s: np.dtype(s) for s in _DTYPES}
# The same, by dtype, for the dtypes stored as they are (``dtype.str`` builds a string per call).
_STORED_AS = {dt: s for s, dt in _DTYPE_OBJECTS.items() if dt.isnative}
# Parsed and checked array tables of format 2, by their exact bytes (a pure function of them, so
# a hit is as good as a parse). Bounded: at most _TABLES_MAX tables of at most _TABLE_CACHED_BYTES
# each (a model's is about 2 KiB), cleared when full.
#: A parsed array table: runs of consecutive same-dtype arrays ``(dtype, byte offset in the
#: payload, items)``; the arrays grouped by the path of their parent, each ``(key, run, first item,
#: end item, shape or None for 1-d)``; and the payload bytes the table describes.
_Table = tuple[tuple[tuple[np.dtype, int, int], ...],
               tuple[tuple[tuple[str | int, ...], tuple[tuple[str | int, int, int, int, tuple[int, ...] | None], ...]], ...],
               int]
_TABLES: dict[bytes, _Table] = {}
_TABLES_MAX = 256
_TABLE_CACHED_BYTES = 16 * 1024
_CORRUPT_ERRORS = (struct.error, orjson.JSONDecodeError, UnicodeDecodeError, ValueError, TypeError,
                   KeyError, IndexError, AttributeError, OverflowError, RecursionError)


def _digest(data: bytes | memoryview) -> bytes:
    return hashlib.blake2b(data, digest_size=_DIGEST_SIZE).digest()


def _check_key(key: bytes | None) -> None:
    if key is not None and (not isinstance(key, (bytes, bytearray)) or not key):
        raise SettingsError("the signing key must be non-empty bytes")


# ---------------------------------------------------------------------- encoding
def _storable(value: np.ndarray) -> tuple[np.ndarray, str]:
    """``value`` as C-contiguous little-endian bytes of an allowed dtype (no copy when it is one),
    and that dtype's string."""
    stored = _STORED_AS.get(value.dtype)
    if stored is not None and value.flags.c_contiguous:
        return value, stored
    little = value.astype(value.dtype.newbyteorder("<"), copy=False)
    if little.dtype.str not in _DTYPES:
        raise ModelError(f"cannot store arrays of dtype {value.dtype}")
    return np.ascontiguousarray(little), little.dtype.str


def _scan(value: Any, path: tuple[str | int, ...], found: dict[int, tuple[list, list]]) -> None:
    """Check that ``value`` (a dict or list) holds only storable values; list its arrays.

    Each array goes to ``found[itemsize]``, a pair of lists: its table entry ``(path, dtype string,
    shape)`` to the first (orjson writes the tuples as the table's JSON arrays), the array itself to
    the second. Exact types are tested first, arrays first of all: states are made of plain dicts,
    lists, strings, numbers and arrays, and this walk is on the commit path.
    """
    if type(value) is dict:
        items = value.items()
        for k in value:
            if type(k) is not str:
                raise ModelError(f"state keys must be strings, got {k!r}")
    else:
        items = enumerate(value)
    ndarray = np.ndarray
    stored_as = _STORED_AS
    for k, v in items:
        t = type(v)
        if t is ndarray:
            stored = stored_as.get(v.dtype)
            if stored is None or not v.flags.c_contiguous:
                v, stored = _storable(v)
            entries, arrays = found[v.itemsize]
            entries.append(((*path, k), stored, v.shape))
            arrays.append(v)
        elif t is float:
            if not math.isfinite(v):
                # JSON has no inf/NaN (orjson would write null and the round trip would change).
                raise ModelError("non-finite floats must be stored in arrays, not in the header")
        elif t is str or t is int or t is bool or v is None:
            pass
        elif t is dict or t is list or t is tuple:
            _scan(v, (*path, k), found)
        else:
            _scan_other(v, (*path, k), found)


def _scan_other(v: Any, path: tuple[str | int, ...], found: dict[int, tuple[list, list]]) -> None:
    """:func:`_scan` of a value of a subclass (or an unsupported type)."""
    if isinstance(v, np.ndarray):
        arr, stored = _storable(np.asarray(v))
        entries, arrays = found[arr.itemsize]
        entries.append((path, stored, arr.shape))
        arrays.append(arr)
    elif isinstance(v, dict):
        for key in v:
            if not isinstance(key, str):
                raise ModelError(f"state keys must be strings, got {key!r}")
        _scan(dict(v), path, found)
    elif isinstance(v, (list, tuple)):
        _scan(list(v), path, found)
    elif isinstance(v, float):
        if not math.isfinite(v):
            raise ModelError("non-finite floats must be stored in arrays, not in the header")
    elif not isinstance(v, (bool, int, str)):
        raise ModelError(f"cannot store a {type(v).__name__} in a model state")


def _json_default(value: Any) -> Any:
    """orjson's fallback: arrays become null (their place is in the table), subclasses plain."""
    if isinstance(value, np.ndarray):
        return None
    if isinstance(value, bool):
        return bool(value)
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return float(value)
    if isinstance(value, str):
        return str(value)
    raise TypeError(f"cannot store a {type(value).__name__} in a model state")


def encode_state(service: str, model: ServiceModel, *, key: bytes | None = None) -> bytes:
    """Serialise ``model`` (the model of ``service``) into a self-checking record.

    Parameters
    ----------
    service
        The service the model belongs to; must equal ``model.service``.
    model
        The model to store.
    key
        When given, the record carries an HMAC-SHA256 made with this key.
    """
    _check_key(key)
    if not isinstance(model, ServiceModel):
        raise ModelError(f"expected a ServiceModel, got {type(model).__name__}")
    if model.service != service:
        raise ModelError(f"model belongs to {model.service!r}, not {service!r}")
    name = service.encode("utf-8")
    if len(name) > 0xFFFF:
        raise ModelError("service name longer than 65535 bytes")
    state = model.to_state()
    if type(state) is not dict:
        raise ModelError("a model state must be a dict")
    # Arrays by item size, widest first in the payload: every array then starts at a multiple of
    # its item size (the order within a size is the state's, so equal states give equal bytes).
    found: dict[int, tuple[list, list]] = {8: ([], []), 4: ([], []), 2: ([], []), 1: ([], [])}
    _scan(state, (), found)
    try:
        state_json = orjson.dumps(state, default=_json_default)
    except TypeError as exc:  # orjson.JSONEncodeError: e.g. a state nested too deep
        raise ModelError(f"cannot store the model state: {exc}") from exc
    e8, a8 = found[8]
    e4, a4 = found[4]
    e2, a2 = found[2]
    e1, a1 = found[1]
    table = orjson.dumps(e8 + e4 + e2 + e1)
    flags = _FLAG_SIGNED if key is not None else 0
    pos = _PREAMBLE.size + len(name) + 4 + len(state_json) + 4 + len(table) + 8
    pad = -pos % _ALIGN
    # The arrays go to the join as they are (C-contiguous, so each is its own bytes-like buffer): one
    # copy, into the body. The payload length is known once the body is joined; its field is filled then.
    body = bytearray().join([_PREAMBLE.pack(MAGIC, FORMAT_VERSION, flags, len(name)), name,
                             _U32.pack(len(state_json)), state_json, _U32.pack(len(table)), table,
                             bytes(8 + pad), *a8, *a4, *a2, *a1])
    _U64.pack_into(body, pos - 8, len(body) - pos - pad)
    mac = hmac.digest(bytes(key), body, "sha256") if key is not None else b""
    check = hashlib.blake2b(body, digest_size=_DIGEST_SIZE)
    check.update(mac)
    return b"".join((body, mac, check.digest()))


# ---------------------------------------------------------------------- decoding
def decode_state(data: bytes, *, key: bytes | None = None) -> tuple[str, ServiceModel]:
    """Restore ``(service, model)`` from a record made by :func:`encode_state`.

    Raises
    ------
    CorruptState
        Bad magic, checksum mismatch, truncation or a malformed header or state.
    UnsupportedStateVersion
        The record uses a format version newer than this code.
    StateSignatureMismatch
        ``key`` is given and the HMAC is wrong or missing.
    """
    _check_key(key)
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise CorruptState(f"a state record is bytes, got {type(data).__name__}")
    data = bytes(data)  # no copy for bytes; arrays of a format-2 record are views of these bytes
    if len(data) < _PREAMBLE.size + _DIGEST_SIZE:
        raise CorruptState(f"record truncated: {len(data)} bytes")
    magic, version, flags, name_len = _PREAMBLE.unpack_from(data, 0)
    if magic != MAGIC:
        raise CorruptState("not a tidewatch model state (bad magic bytes)")
    end = len(data) - _DIGEST_SIZE
    view = memoryview(data)
    if not hmac.compare_digest(_digest(view[:end]), data[end:]):
        raise CorruptState("checksum mismatch: record damaged or truncated")
    if version > FORMAT_VERSION:
        raise UnsupportedStateVersion(
            f"record format version {version} is newer than the supported {FORMAT_VERSION}")
    if version < 1:
        raise CorruptState(f"invalid record format version {version}")
    if flags & ~_FLAG_SIGNED:
        raise CorruptState(f"unknown record flags 0x{flags:04x}")
    if flags & _FLAG_SIGNED:
        end -= _MAC_SIZE
        if end < _PREAMBLE.size:
            raise CorruptState("record truncated before its HMAC")
    if key is not None:
        if not flags & _FLAG_SIGNED:
            raise StateSignatureMismatch("record is not signed but a signing key is configured")
        expected = hmac.digest(bytes(key), view[:end], "sha256")
        if not hmac.compare_digest(expected, data[end : end + _MAC_SIZE]):
            raise StateSignatureMismatch("HMAC does not match: wrong key or altered record")
    try:
        parse = _parse_body if version == 2 else _parse_body_v1
        service, state = parse(data, _PREAMBLE.size, name_len, end)
        model = ServiceModel.from_state(state)
    except StateError:
        raise
    except _CORRUPT_ERRORS as exc:
        raise CorruptState(f"malformed record: {exc!r}") from exc
    if model.service != service:
        raise CorruptState(f"record for {service!r} holds the model of {model.service!r}")
    return service, model


def _section(data: bytes, pos: int, n: int, end: int) -> int:
    """End of the ``n`` bytes at ``pos``; refuses a length that points past ``end``."""
    if n > end - pos:
        raise CorruptState("record truncated: a length field points past the end")
    return pos + n


def _parse_body(data: bytes, pos: int, name_len: int, end: int) -> tuple[str, dict]:
    """Service name and state of a format-2 record (digest and HMAC already checked)."""
    view = memoryview(data)
    at = _section(data, pos, name_len, end)
    service = str(data[pos:at], "utf-8")
    pos = _section(data, at, 4, end)
    (state_len,) = _U32.unpack_from(data, at)
    at = _section(data, pos, state_len, end)
    state = orjson.loads(view[pos:at])
    pos = _section(data, at, 4, end)
    (table_len,) = _U32.unpack_from(data, at)
    at = _section(data, pos, table_len, end)
    table_bytes = data[pos:at]
    pos = _section(data, at, 8, end)
    (payload_len,) = _U64.unpack_from(data, at)
    at = _section(data, pos, -pos % _ALIGN, end)
    if data[pos:at].strip(b"\0"):
        raise CorruptState("non-zero padding before the payload")
    start = at
    if _section(data, start, payload_len, end) != end:
        raise CorruptState(f"{end - start - payload_len} unexpected bytes after the payload")
    if type(state) is not dict:
        raise CorruptState("the state must be a mapping")
    runs, parents, total = _table(table_bytes)
    if total != payload_len:
        raise CorruptState("the array table and the payload length disagree")
    # One view per run of same-dtype arrays; each array is a slice of its run (no copies).
    blocks = []
    for dtype, offset, count in runs:
        block = np.frombuffer(data, dtype, count, start + offset)
        blocks.append(block if dtype.isnative else block.astype(dtype.newbyteorder("=")))
    for parent, children in parents:
        node = state
        for k in parent:
            node = node[k]  # KeyError/IndexError/TypeError: a path that leads nowhere is corrupt
        for last, run, lo, hi, shape in children:
            if node[last] is not None:
                raise CorruptState(f"array path {[*parent, last]!r} does not lead to a placeholder")
            arr = blocks[run][lo:hi]
            node[last] = arr if shape is None else arr.reshape(shape)
    return service, state


def _table(raw: bytes) -> _Table:
    """Parsed and checked format-2 array table (see :data:`_Table`)."""
    hit = _TABLES.get(raw)
    if hit is not None:
        return hit
    table = orjson.loads(raw)
    if type(table) is not list:
        raise CorruptState("the array table must be a list")
    runs: list[tuple[np.dtype, int, int]] = []  # (dtype, byte offset in the payload, item count)
    parents: dict[tuple[str | int, ...], list] = {}
    total = 0
    for entry in table:
        if type(entry) is not list or len(entry) != 3:
            raise CorruptState("array table entries are [path, dtype, shape]")
        path, dtype, shape = entry
        if (type(path) is not list or not path or not all(
                type(k) is str or (type(k) is int and k >= 0) for k in path)):
            raise CorruptState(f"bad array path {path!r}")
        if type(dtype) is not str or dtype not in _DTYPES:
            raise CorruptState(f"array dtype {dtype!r} is not allowed")
        if type(shape) is not list or not all(type(n) is int and n >= 0 for n in shape):
            raise CorruptState(f"bad array shape {shape!r}")
        dt = _DTYPE_OBJECTS[dtype]
        count = math.prod(shape)
        if not runs or runs[-1][0] is not dt:
            runs.append((dt, total, 0))
        run_dt, run_offset, run_count = runs[-1]
        runs[-1] = (run_dt, run_offset, run_count + count)
        parents.setdefault(tuple(path[:-1]), []).append(
            (path[-1], len(runs) - 1, run_count, run_count + count, None if len(shape) == 1 else tuple(shape)))
        total += count * dt.itemsize
    result = (tuple(runs), tuple((parent, tuple(children)) for parent, children in parents.items()), total)
    if len(raw) <= _TABLE_CACHED_BYTES:
        if len(_TABLES) >= _TABLES_MAX:
            _TABLES.clear()
        _TABLES[raw] = result
    return result


# ---------------------------------------------------------------------- format version 1
def _inject(value: Any, arrays: list[np.ndarray]) -> Any:
    """Put the arrays of a format-1 state back in place of their ``{"__ndarray__": i}``."""
    if isinstance(value, dict):
        if _ARRAY_TAG in value:
            if len(value) != 1:
                raise CorruptState("malformed array reference")
            i = value[_ARRAY_TAG]
            if isinstance(i, bool) or not isinstance(i, int) or not 0 <= i < len(arrays):
                raise CorruptState(f"array reference {i!r} out of range")
            return arrays[i]
        return {k: _inject(v, arrays) for k, v in value.items()}
    if isinstance(value, list):
        return [_inject(v, arrays) for v in value]
    return value


def _parse_body_v1(data: bytes, pos: int, name_len: int, end: int) -> tuple[str, dict]:
    """Service name and state of a format-1 record (digest and HMAC already checked)."""
    def take(n: int) -> bytes:
        nonlocal pos
        if n > end - pos:
            raise CorruptState("record truncated: a length field points past the end")
        chunk = data[pos : pos + n]
        pos += n
        return chunk

    service = take(name_len).decode("utf-8")
    (header_len,) = _U32.unpack(take(_U32.size))
    header = orjson.loads(take(header_len))
    (payload_len,) = _U64.unpack(take(_U64.size))
    payload = take(payload_len)
    if pos != end:
        raise CorruptState(f"{end - pos} unexpected bytes after the payload")
    if not isinstance(header, dict) or set(header) != {"state", "arrays"}:
        raise CorruptState("header must hold exactly 'state' and 'arrays'")
    table = header["arrays"]
    if not isinstance(table, list):
        raise CorruptState("header 'arrays' must be a list")
    arrays: list[np.ndarray] = []
    offset = 0
    for entry in table:
        if not isinstance(entry, dict) or set(entry) != {"dtype", "shape"}:
            raise CorruptState("array entries need exactly 'dtype' and 'shape'")
        dtype, shape = entry["dtype"], entry["shape"]
        if dtype not in _DTYPES:
            raise CorruptState(f"array dtype {dtype!r} is not allowed")
        if not isinstance(shape, list) or not all(
                isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in shape):
            raise CorruptState(f"bad array shape {shape!r}")
        dt = np.dtype(dtype)
        count = math.prod(shape)
        nbytes = count * dt.itemsize
        if nbytes > payload_len - offset:
            raise CorruptState("array table describes more bytes than the payload holds")
        native = dt.newbyteorder("=")
        if count == 0:
            arrays.append(np.zeros(shape, dtype=native))
        else:
            arr = np.frombuffer(payload, dtype=dt, count=count, offset=offset).reshape(shape)
            # Native byte order and an owned, writable copy (frombuffer views the input bytes).
            arrays.append(arr.astype(native, copy=True))
        offset += nbytes
    if offset != payload_len:
        raise CorruptState("payload holds bytes no array accounts for")
    state = _inject(header["state"], arrays)
    if not isinstance(state, dict):
        raise CorruptState("header 'state' must be a mapping")
    return service, state
