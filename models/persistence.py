"""Versioned binary records of a service's model state (never pickle).

Layout of format version 1, all integers little-endian::

    offset  size  field
    0       4     magic b"TWMS"
    4       2     format version (uint16)
    6       2     flags (uint16); bit 0: an HMAC is present; other bits must be 0
    8       2     length N of the service name (uint16)
    10      N     service name, UTF-8
    .       4     length H of the header (uint32)
    .       H     header, JSON: {"state": ..., "arrays": [{"dtype": "<f8", "shape": [..]}, ...]}
    .       8     length P of the array payload (uint64)
    .       P     the arrays' raw little-endian bytes, back to back, in header order
    .       32    HMAC-SHA256(key, every byte before this field)   -- only if flag bit 0
    .       16    BLAKE2b-128 of every byte before this field

In the header's ``state`` each numpy array is replaced by ``{"__ndarray__": i}``, ``i`` being
its position in ``arrays``. Every format version ends with the same 16-byte BLAKE2b digest, so
damage is told apart from a newer format: the digest is checked first, then the version.

Decoding checks, in order: length and magic, digest (:class:`~models.errors.CorruptState`),
version (:class:`~models.errors.UnsupportedStateVersion` when newer), then -- when a key is
given -- the HMAC (:class:`~models.errors.StateSignatureMismatch` when wrong or absent), then
the structure. Without a key an HMAC, if present, is not checked. Only plain numeric and boolean
dtypes are accepted for arrays, and no decoding error of numpy, orjson or struct escapes: each is
re-raised as ``CorruptState``.

Examples
--------
>>> from models import ModelSettings, build_model
>>> from models.persistence import decode_state, encode_state
>>> model = build_model("billing", ModelSettings(kind="adaptive_baseline"))
>>> _ = model.assess({"count": 3.0})
>>> record = encode_state("billing", model, key=b"example key")
>>> record[:4]
b'TWMS'
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
FORMAT_VERSION = 1

_FLAG_SIGNED = 0x0001
_PREAMBLE = struct.Struct("<4sHHH")
_U32 = struct.Struct("<I")
_U64 = struct.Struct("<Q")
_DIGEST_SIZE = 16
_MAC_SIZE = 32
_ARRAY_TAG = "__ndarray__"
# Plain numbers and flags only: an "object" dtype would make np.frombuffer unsafe.
_DTYPES = frozenset({"|b1", "|u1", "<u2", "<u4", "<u8", "|i1", "<i2", "<i4", "<i8", "<f4", "<f8"})


def _digest(data: bytes | memoryview) -> bytes:
    return hashlib.blake2b(data, digest_size=_DIGEST_SIZE).digest()


def _check_key(key: bytes | None) -> None:
    if key is not None and (not isinstance(key, (bytes, bytearray)) or not key):
        raise SettingsError("the signing key must be non-empty bytes")


def _extract(value: Any, arrays: list[np.ndarray]) -> Any:
    """JSON-ready copy of ``value`` with arrays moved into ``arrays``."""
    if isinstance(value, np.ndarray):
        little = value.astype(value.dtype.newbyteorder("<"), copy=False)
        if little.dtype.str not in _DTYPES:
            raise ModelError(f"cannot store arrays of dtype {value.dtype}")
        arrays.append(np.ascontiguousarray(little))
        return {_ARRAY_TAG: len(arrays) - 1}
    if isinstance(value, dict):
        if _ARRAY_TAG in value:
            raise ModelError(f"state dicts may not use the reserved key {_ARRAY_TAG!r}")
        out = {}
        for k, v in value.items():
            if not isinstance(k, str):
                raise ModelError(f"state keys must be strings, got {k!r}")
            out[k] = _extract(v, arrays)
        return out
    if isinstance(value, (list, tuple)):
        return [_extract(v, arrays) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        # JSON has no inf/NaN (orjson would write null and the round trip would change).
        raise ModelError("non-finite floats must be stored in arrays, not in the header")
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    raise ModelError(f"cannot store a {type(value).__name__} in a model state")


def _inject(value: Any, arrays: list[np.ndarray]) -> Any:
    """Inverse of :func:`_extract`."""
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
    arrays: list[np.ndarray] = []
    header_state = _extract(model.to_state(), arrays)
    table = [{"dtype": a.dtype.str, "shape": list(a.shape)} for a in arrays]
    header = orjson.dumps({"state": header_state, "arrays": table})
    payload = b"".join(a.tobytes() for a in arrays)
    flags = _FLAG_SIGNED if key is not None else 0
    record = bytearray(_PREAMBLE.pack(MAGIC, FORMAT_VERSION, flags, len(name)))
    record += name
    record += _U32.pack(len(header))
    record += header
    record += _U64.pack(len(payload))
    record += payload
    if key is not None:
        record += hmac.new(bytes(key), record, hashlib.sha256).digest()
    record += _digest(record)
    return bytes(record)


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
    data = bytes(data)
    if len(data) < _PREAMBLE.size + _DIGEST_SIZE:
        raise CorruptState(f"record truncated: {len(data)} bytes")
    magic, version, flags, name_len = _PREAMBLE.unpack_from(data, 0)
    if magic != MAGIC:
        raise CorruptState("not a tidewatch model state (bad magic bytes)")
    end = len(data) - _DIGEST_SIZE
    if not hmac.compare_digest(_digest(data[:end]), data[end:]):
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
        expected = hmac.new(bytes(key), data[:end], hashlib.sha256).digest()
        if not hmac.compare_digest(expected, data[end : end + _MAC_SIZE]):
            raise StateSignatureMismatch("HMAC does not match: wrong key or altered record")
    try:
        service, state = _parse_body(data, _PREAMBLE.size, name_len, end)
        model = ServiceModel.from_state(state)
    except StateError:
        raise
    except (struct.error, orjson.JSONDecodeError, UnicodeDecodeError, ValueError, TypeError,
            KeyError, IndexError, AttributeError, OverflowError, RecursionError) as exc:
        raise CorruptState(f"malformed record: {exc!r}") from exc
    if model.service != service:
        raise CorruptState(f"record for {service!r} holds the model of {model.service!r}")
    return service, model


def _parse_body(data: bytes, pos: int, name_len: int, end: int) -> tuple[str, dict]:
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
