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


def _encode_v1(service: str, model, key: bytes | None = None) -> bytes:
    """A format-1 record, as the code before format 2 wrote it (the layout in the module docstring
    of ``models.persistence``): one JSON header with ``{"__ndarray__": i}`` placeholders."""
    import hmac

    import orjson

    arrays: list[np.ndarray] = []

    def extract(value):
        if isinstance(value, np.ndarray):
            arrays.append(np.ascontiguousarray(value.astype(value.dtype.newbyteorder("<"), copy=False)))
            return {"__ndarray__": len(arrays) - 1}
        if isinstance(value, dict):
            return {k: extract(v) for k, v in value.items()}
        if isinstance(value, (list, tuple)):
            return [extract(v) for v in value]
        return value

    state = extract(model.to_state())
    table = [{"dtype": a.dtype.str, "shape": list(a.shape)} for a in arrays]
    header = orjson.dumps({"state": state, "arrays": table})
    payload = b"".join(a.tobytes() for a in arrays)
    name = service.encode()
    record = struct.pack("<4sHHH", MAGIC, 1, 1 if key else 0, len(name)) + name
    record += struct.pack("<I", len(header)) + header + struct.pack("<Q", len(payload)) + payload
    if key:
        record += hmac.new(key, record, hashlib.sha256).digest()
    return record + hashlib.blake2b(record, digest_size=16).digest()


def _rebuild_v1(record: bytes, header_edit) -> bytes:
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


def _sections(record: bytes) -> tuple[int, bytes, bytes, bytes]:
    """Format-2 record split into (end of the name, state JSON, table JSON, payload)."""
    (name_len,) = struct.unpack_from("<H", record, 8)
    pos = 10 + name_len
    (state_len,) = struct.unpack_from("<I", record, pos)
    state = record[pos + 4 : pos + 4 + state_len]
    at = pos + 4 + state_len
    (table_len,) = struct.unpack_from("<I", record, at)
    table = record[at + 4 : at + 4 + table_len]
    at += 4 + table_len
    (payload_len,) = struct.unpack_from("<Q", record, at)
    at += 8 + (-(at + 8) % 8)
    return pos, state, table, record[at : at + payload_len]


def _rebuild(record: bytes, state_edit=None, table_edit=None, payload=None, pad: bytes | None = None) -> bytes:
    """Re-encode an unsigned format-2 record with edited sections and a valid checksum."""
    import orjson

    pos, state, table, old_payload = _sections(record)
    if state_edit is not None:
        state = orjson.dumps(state_edit(orjson.loads(state)))
    if table_edit is not None:
        table = orjson.dumps(table_edit(orjson.loads(table)))
    payload = old_payload if payload is None else payload
    body = record[:pos] + struct.pack("<I", len(state)) + state + struct.pack("<I", len(table)) + table
    body += struct.pack("<Q", len(payload))
    body += bytes(-len(body) % 8) if pad is None else pad
    return _reseal(body + payload + b"\x00" * 16)


def _entry(table: list, *path: str) -> int:
    return next(i for i, (p, _, _) in enumerate(table) if p == list(path))


@pytest.mark.parametrize("edit", [
    {"table_edit": lambda t: [[p, "|O", s] for p, _, s in t]},
    {"table_edit": lambda t: [[p, d, [10 ** 12]] for p, d, _ in t]},
    {"table_edit": lambda t: t[:-1]},
    {"table_edit": lambda t: [[["baseline", "nowhere", "x"], d, s] if i == 0 else [p, d, s]
                              for i, (p, d, s) in enumerate(t)]},
    {"table_edit": lambda t: [[["windows_seen"], d, s] if i == 0 else [p, d, s]
                              for i, (p, d, s) in enumerate(t)]},  # points at a value, not a null
    {"table_edit": lambda t: [[[], d, s] if i == 0 else [p, d, s] for i, (p, d, s) in enumerate(t)]},
    {"table_edit": lambda t: [[p + [True], d, s] if i == 0 else [p, d, s] for i, (p, d, s) in enumerate(t)]},
    {"table_edit": lambda t: [[["baseline", "names", -1], d, s] if i == 0 else [p, d, s]
                              for i, (p, d, s) in enumerate(t)]},
    {"table_edit": lambda t: [[p, d, [s[0], -1]] if len(s) == 2 else [p, d, s] for p, d, s in t]},
    {"table_edit": lambda t: [[p, d] for p, d, _ in t]},
    {"table_edit": lambda t: {"arrays": t}},
    {"state_edit": lambda s: {**s, "windows_seen": "many"}},
    {"state_edit": lambda s: {**s, "service": "berth-planner"}},
    {"state_edit": lambda s: {**s, "baseline": None}},
    {"state_edit": lambda s: [s]},
    {"payload_edit": lambda p: p + b"\x00" * 8},
    {"pad": b"\x01" * 8},
])
def test_well_sealed_but_malformed_records_are_corrupt(edit: dict) -> None:
    record = encode_state("ticket-api", trained(n=40))
    assert _rebuild(record) == record  # the tool is sound
    kwargs = dict(edit)
    payload_edit = kwargs.pop("payload_edit", None)
    if payload_edit is not None:
        kwargs["payload"] = payload_edit(_sections(record)[3])
    if "pad" in kwargs:  # non-zero padding of the record's own length
        kwargs["pad"] = b"\x01" * (len(_sections_pad(record)) or 8)
    with pytest.raises(CorruptState):
        decode_state(_rebuild(record, **kwargs))
    # A refused table never poisons the table cache: the genuine record still decodes.
    assert decode_state(record)[1].windows_seen == 40


def test_an_array_placed_twice_is_corrupt() -> None:
    import orjson

    record = encode_state("ticket-api", trained(n=40))
    _, _, table, payload = _sections(record)
    first_path, first_dtype, first_shape = orjson.loads(table)[0]
    nbytes = int(np.prod(first_shape)) * np.dtype(first_dtype).itemsize
    # The first array listed again, with its bytes: table and payload agree, the place does not.
    twice = _rebuild(record, table_edit=lambda t: t + [t[0]], payload=payload + payload[:nbytes])
    with pytest.raises(CorruptState, match="placeholder"):
        decode_state(twice)


def _sections_pad(record: bytes) -> bytes:
    pos, state, table, _ = _sections(record)
    at = pos + 4 + len(state) + 4 + len(table) + 8
    return record[at : at + (-at % 8)]


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
def test_well_sealed_but_malformed_v1_headers_are_corrupt(edit) -> None:
    record = _encode_v1("ticket-api", trained(n=40))
    assert decode_state(_rebuild_v1(record, lambda h: h))[1].windows_seen == 40  # the tool is sound
    with pytest.raises(CorruptState):
        decode_state(_rebuild_v1(record, edit))


@pytest.mark.parametrize("kind", ["half_space_trees", "adaptive_baseline", "combined"])
@pytest.mark.parametrize("key", [None, KEY])
def test_format_1_records_still_load_and_behave_identically(kind: str, key: bytes | None) -> None:
    model = trained(kind, n=300)
    old = _encode_v1("ticket-api", model, key=key)
    assert struct.unpack_from("<H", old, 4) == (1,)
    service, restored = decode_state(old, key=key)
    assert service == "ticket-api" and restored.windows_seen == 300
    # Re-encoded, a format-1 model is the same format-2 record as the original.
    assert encode_state("ticket-api", restored, key=key) == encode_state("ticket-api", model, key=key)
    for row in rows(2, 100):
        assert model.assess(row) == restored.assess(row)
    if key is not None:
        with pytest.raises(StateSignatureMismatch):
            decode_state(old, key=b"another-key")


def test_decoded_arrays_are_read_only_views_and_the_model_owns_its_own() -> None:
    from models.persistence import _parse_body

    model = trained("combined", n=120)
    record = encode_state("ticket-api", model)
    _, state = _parse_body(record, 10, len("ticket-api"), len(record) - 16)
    day = state["baseline"]["day"]
    assert isinstance(day, np.ndarray) and not day.flags.writeable  # a view of the record
    assert np.array_equal(day, np.array(model.to_state()["baseline"]["day"]))
    # The restored trees copied theirs: learning changes them, never the record.
    _, restored = decode_state(record)
    before = bytes(record)
    for row in rows(4, 60):
        restored.assess(row)
    assert restored._trees._l_mass.flags.writeable and record == before
    assert encode_state("ticket-api", restored) != record


def test_arrays_are_aligned_in_the_record() -> None:
    record = encode_state("ticket-api", trained(n=50), key=KEY)
    pos, state, table, payload = _sections(record)
    import orjson

    offset = pos + 4 + len(state) + 4 + len(table) + 8
    offset += -offset % 8
    assert offset % 8 == 0
    for path, dtype, shape in orjson.loads(table):
        itemsize = np.dtype(dtype).itemsize
        assert (offset % itemsize) == 0, (path, dtype, offset)
        offset += int(np.prod(shape, dtype=np.int64)) * itemsize
    assert offset == pos + 4 + len(state) + 4 + len(table) + 8 + len(_sections_pad(record)) + len(payload)


@pytest.mark.parametrize("state, message", [
    ({"x": float("nan")}, "non-finite"),
    ({"x": [1.0, float("inf")]}, "non-finite"),
    ({"x": {1: 2}}, "keys must be strings"),
    ({"x": {1, 2}}, "cannot store"),
    ({"x": np.array([object()], dtype=object)}, "dtype"),
    ({"x": np.float64("inf")}, "non-finite"),
])
def test_unstorable_states_are_refused_on_encode(monkeypatch, state: dict, message: str) -> None:
    from models import ServiceModel

    model = trained(n=5)
    monkeypatch.setattr(ServiceModel, "to_state", lambda self: state)
    with pytest.raises(ModelError, match=message):
        encode_state("ticket-api", model)


def test_odd_but_storable_values_round_trip_through_the_codec(monkeypatch) -> None:
    """Subclasses, tuples, big-endian and strided arrays, arrays in lists: stored as plain values."""
    import orjson

    from models.persistence import _parse_body

    model = trained(n=5)
    big_endian = np.arange(6, dtype=">f8").reshape(2, 3)
    strided = np.arange(10, dtype=np.int64)[::2]
    weird = {"t": (1, "two", None), "f": np.float64(0.25), "arrays": [big_endian, {"s": strided}],
             "empty": np.zeros((0, 4), dtype=np.uint16), "scalar": np.array(7, dtype=np.int32)}
    from models import ServiceModel

    original = ServiceModel.to_state
    monkeypatch.setattr(ServiceModel, "to_state", lambda self: {**original(self), "extra": weird})
    record = encode_state("ticket-api", model)
    _, state = _parse_body(record, 10, len("ticket-api"), len(record) - 16)
    extra = state["extra"]
    assert extra["t"] == [1, "two", None] and extra["f"] == 0.25
    assert np.array_equal(extra["arrays"][0], big_endian) and extra["arrays"][0].dtype == np.float64
    assert np.array_equal(extra["arrays"][1]["s"], strided)
    assert extra["empty"].shape == (0, 4) and extra["empty"].dtype == np.uint16
    assert extra["scalar"].shape == () and int(extra["scalar"]) == 7
    assert orjson.loads(_sections(record)[1])["extra"]["arrays"] == [None, {"s": None}]


def test_service_name_must_match_the_model() -> None:
    with pytest.raises(ModelError):
        encode_state("berth-planner", trained(n=5))


def test_record_layout_starts_with_magic_and_version() -> None:
    record = encode_state("ticket-api", trained(n=5), key=KEY)
    magic, version, flags, name_len = struct.unpack_from("<4sHHH", record)
    assert (magic, version, flags, name_len) == (MAGIC, FORMAT_VERSION, 1, len("ticket-api"))
    assert FORMAT_VERSION == 2
    assert record[10:20] == b"ticket-api"
    pos, state, table, payload = _sections(record)
    assert record[24:25] == b"{" and state[:1] == b"{"  # JSON state follows, not a pickle stream
    assert table[:1] == b"["
    assert len(record) == (24 + len(state) + 4 + len(table) + 8 + len(_sections_pad(record))
                           + len(payload) + 32 + 16)


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


def _array_bytes(obj, seen: set[int]) -> int:
    """Bytes of every numpy array reachable from ``obj`` through slots, dicts, lists and tuples (views of
    one buffer counted once)."""
    if id(obj) in seen:
        return 0
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        base = obj if obj.base is None else obj.base
        if isinstance(base, np.ndarray) and base is not obj:
            return _array_bytes(base, seen)
        return obj.nbytes
    if isinstance(obj, dict):
        return sum(_array_bytes(v, seen) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return sum(_array_bytes(v, seen) for v in obj)
    total = 0
    for cls in type(obj).__mro__:
        for name in getattr(cls, "__slots__", ()):
            if hasattr(obj, name):
                total += _array_bytes(getattr(obj, name), seen)
    return total


def test_a_live_model_holds_no_more_arrays_than_its_state_needs() -> None:
    # Memory per live model is what a fleet pays for (BENCHMARKS: under 100 KiB a service). Caches of wider
    # copies of the trees' arrays once added 40 KiB a model unnoticed; the arrays a scored model keeps must
    # stay within its saved state's arrays plus a little.
    model = build_model("svc", ModelSettings())
    for k in range(300):
        model.assess({f"m{j}.mean": float(j + (k % 7)) for j in range(5)} | {"count": 6.0},
                     at=1772409600.0 + 300.0 * k)
    state_bytes = _array_bytes(model.to_state(), set())
    live_bytes = _array_bytes(model, set())
    assert live_bytes <= state_bytes + 4096, (live_bytes, state_bytes)
