"""Versioned binary state records: round trips, refusals and size."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pytest

from models import (CorruptState, ModelError, ModelSettings, StateSignatureMismatch,
                    UnsupportedStateVersion, build_model, decode_state, encode_state)
from models.persistence import FORMAT_VERSION, MAGIC

KEY = b"tidewatch-test-key"


def rows(seed: int, n: int, n_features: int = 8) -> list[dict[str, float]]:
    rng = np.random.default_rng(seed)
    names = [f"metric_{i}.mean" for i in range(n_features - 1)] + ["count"]
    data = rng.normal(100.0, 5.0, size=(n, n_features))
    return [dict(zip(names, map(float, r))) for r in data]


def trained(kind: str = "combined", n: int = 500, service: str = "ticket-api"):
    model = build_model(service, ModelSettings(kind=kind))
    for row in rows(1, n):
        model.assess(row)
    return model


def _reseal(record: bytes) -> bytes:
    """Recompute the trailing BLAKE2b-128 digest after a deliberate edit."""
    body = record[:-16]
    return body + hashlib.blake2b(body, digest_size=16).digest()


@pytest.mark.parametrize("kind", ["half_space_trees", "adaptive_baseline", "combined"])
@pytest.mark.parametrize("key", [None, KEY])
def test_round_trip_gives_identical_subsequent_scores(kind: str, key: bytes | None) -> None:
    model = trained(kind, n=300)
    service, restored = decode_state(encode_state("ticket-api", model, key=key), key=key)
    assert service == "ticket-api" and restored.windows_seen == 300
    for row in rows(2, 200):
        assert model.assess(row) == restored.assess(row)
    # Encoding is deterministic: the same state gives the same bytes.
    assert encode_state("ticket-api", model, key=key) == encode_state("ticket-api", restored, key=key)


def test_fresh_model_and_unicode_service_round_trip() -> None:
    model = build_model("fähre-tickets/ø", ModelSettings())
    service, restored = decode_state(encode_state("fähre-tickets/ø", model))
    assert service == "fähre-tickets/ø" and restored.windows_seen == 0
    first = rows(3, 50)
    assert [model.assess(r) for r in first] == [restored.assess(r) for r in first]


def test_every_flipped_byte_is_corrupt() -> None:
    record = encode_state("ticket-api", trained(n=60))
    # Every byte of the preamble, name, header start and trailer, and a stride through the rest.
    positions = sorted(set(range(64)) | set(range(len(record) - 64, len(record)))
                       | set(range(0, len(record), 97)))
    for pos in positions:
        damaged = bytearray(record)
        damaged[pos] ^= 0x01
        with pytest.raises(CorruptState):
            decode_state(bytes(damaged))


@pytest.mark.parametrize("keep", [0, 3, 12, 200, -1, -16, -17])
def test_truncated_records_are_corrupt(keep: int) -> None:
    record = encode_state("ticket-api", trained(n=40), key=KEY)
    with pytest.raises(CorruptState):
        decode_state(record[:keep], key=KEY)


def test_bad_magic_and_garbage_are_corrupt() -> None:
    record = encode_state("ticket-api", trained(n=10))
    with pytest.raises(CorruptState, match="magic"):
        decode_state(b"PK\x03\x04" + record[4:])
    with pytest.raises(CorruptState):
        decode_state(b"\x00" * 200)
    with pytest.raises(CorruptState):
        decode_state("not bytes")  # type: ignore[arg-type]


def test_newer_format_version_is_unsupported() -> None:
    record = bytearray(encode_state("ticket-api", trained(n=10)))
    struct.pack_into("<H", record, 4, FORMAT_VERSION + 1)
    with pytest.raises(UnsupportedStateVersion):
        decode_state(_reseal(bytes(record)))


def test_wrong_key_and_missing_signature_are_refused() -> None:
    model = trained(n=30)
    signed = encode_state("ticket-api", model, key=KEY)
    with pytest.raises(StateSignatureMismatch):
        decode_state(signed, key=b"another-key")
    unsigned = encode_state("ticket-api", model)
    with pytest.raises(StateSignatureMismatch):
        decode_state(unsigned, key=KEY)
    # Forged: altered and re-sealed with a valid checksum, but the HMAC no longer matches.
    forged = bytearray(signed)
    forged[40] ^= 0x20
    with pytest.raises(StateSignatureMismatch):
        decode_state(_reseal(bytes(forged)), key=KEY)
    # Without a key a signed record still decodes (the checksum still guards it).
    assert decode_state(signed)[0] == "ticket-api"


def _rebuild(record: bytes, header_edit) -> bytes:
    """Re-encode a version-1 record with an edited JSON header (valid checksum, unsigned)."""
    import orjson

    (name_len,) = struct.unpack_from("<H", record, 8)
    pos = 10 + name_len
    (header_len,) = struct.unpack_from("<I", record, pos)
    header = orjson.loads(record[pos + 4 : pos + 4 + header_len])
    rest = record[pos + 4 + header_len : -16]
    new_header = orjson.dumps(header_edit(header))
    body = record[:pos] + struct.pack("<I", len(new_header)) + new_header + rest
    return _reseal(body + b"\x00" * 16)


@pytest.mark.parametrize("edit", [
    lambda h: {**h, "arrays": [{**a, "dtype": "|O"} for a in h["arrays"]]},
    lambda h: {**h, "arrays": [{**a, "shape": [10 ** 12]} for a in h["arrays"]]},
    lambda h: {**h, "arrays": h["arrays"][:-1]},
    lambda h: {**h, "state": {**h["state"], "windows_seen": "many"}},
    lambda h: {**h, "state": {**h["state"], "service": "berth-planner"}},
    lambda h: {**h, "state": {**h["state"], "baseline": {"__ndarray__": 10 ** 6}}},
    lambda h: {"state": h["state"]},
    lambda h: [1, 2, 3],
])
def test_well_sealed_but_malformed_headers_are_corrupt(edit) -> None:
    record = encode_state("ticket-api", trained(n=40))
    assert decode_state(_rebuild(record, lambda h: h))[1].windows_seen == 40  # the tool is sound
    with pytest.raises(CorruptState):
        decode_state(_rebuild(record, edit))


def test_service_name_must_match_the_model() -> None:
    with pytest.raises(ModelError):
        encode_state("berth-planner", trained(n=5))


def test_record_layout_starts_with_magic_and_version() -> None:
    record = encode_state("ticket-api", trained(n=5), key=KEY)
    magic, version, flags, name_len = struct.unpack_from("<4sHHH", record)
    assert (magic, version, flags, name_len) == (MAGIC, FORMAT_VERSION, 1, len("ticket-api"))
    assert record[10:20] == b"ticket-api"
    (header_len,) = struct.unpack_from("<I", record, 20)
    assert record[24:25] == b"{"  # a JSON header follows, not a pickle stream
    assert len(record) > 24 + header_len + 8 + 32 + 16


@pytest.mark.parametrize("kind", ["combined", "half_space_trees"])
@pytest.mark.parametrize("windows", [500, 1200])
def test_state_size_at_defaults_is_under_60_kib(kind: str, windows: int) -> None:
    # 8 features, default settings: the seasonal baseline (24 + 168 profile slots per feature),
    # and for the trees kind 10 trees of height 8 and a calibration history of up to 1000 raw
    # scores. The budget is about 60 KiB per model at fleet scale (thousands of services).
    model = trained(kind, n=windows)
    size = len(encode_state("ticket-api", model, key=KEY))
    print(f"{kind} state record after {windows} windows, 8 features, defaults: {size} bytes "
          f"({size / 1024:.1f} KiB)")
    assert size < 60 * 1024
