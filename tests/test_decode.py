"""Native message decoding: accepted forms and every reject reason."""

from __future__ import annotations

import pytest

from service.decode import REASONS, NativeDecoder, Rejected

NOW = 1_800_000_000.0  # 2027-01-15, a fixed wall clock


def dec(**kw) -> NativeDecoder:
    return NativeDecoder(now=lambda: NOW, **kw)


def test_rfc3339_epoch_seconds_and_epoch_milliseconds_are_the_same_instant():
    d = dec()
    a = d.decode(b'{"service":"s","ts":"2026-03-02T00:05:00Z","metrics":{"x":1}}')[1]
    b = d.decode(b'{"service":"s","ts":1772409900,"metrics":{"x":1}}')[1]
    c = d.decode(b'{"service":"s","ts":1772409900000,"metrics":{"x":1}}')[1]
    e = d.decode(b'{"service":"s","ts":"2026-03-02T01:05:00+01:00","metrics":{"x":1}}')[1]
    assert a == b == c == e == 1772409900.0


def test_labels_are_optional_and_ignored_for_scoring():
    svc, ts, m = dec().decode(b'{"service":"s","ts":1772409900,"metrics":{"x":1.5},"labels":{"az":"b"}}')
    assert (svc, m) == ("s", {"x": 1.5})


CASES = [
    (b"", "empty"),
    (b"   \n", "empty"),
    (b"{not json", "not_json"),
    (b"\xff\xfe{}", "not_utf8"),
    (b"[1, 2]", "not_object"),
    (b'"text"', "not_object"),
    (b'{"ts":1772409900,"metrics":{"x":1}}', "missing_service"),
    (b'{"service":"","ts":1772409900,"metrics":{"x":1}}', "bad_service"),
    (b'{"service":7,"ts":1772409900,"metrics":{"x":1}}', "bad_service"),
    (b'{"service":"a\\u0007b","ts":1772409900,"metrics":{"x":1}}', "bad_service"),
    (b'{"service":"' + b"s" * 201 + b'","ts":1772409900,"metrics":{"x":1}}', "bad_service"),
    (b'{"service":"s","metrics":{"x":1}}', "missing_ts"),
    (b'{"service":"s","ts":"yesterday","metrics":{"x":1}}', "bad_ts"),
    (b'{"service":"s","ts":true,"metrics":{"x":1}}', "bad_ts"),
    (b'{"service":"s","ts":[1],"metrics":{"x":1}}', "bad_ts"),
    (b'{"service":"s","ts":"1999-12-31T23:59:59Z","metrics":{"x":1}}', "ts_out_of_range"),
    (b'{"service":"s","ts":1900000000,"metrics":{"x":1}}', "ts_out_of_range"),
    (b'{"service":"s","ts":1772409900}', "missing_metrics"),
    (b'{"service":"s","ts":1772409900,"metrics":{}}', "bad_metrics"),
    (b'{"service":"s","ts":1772409900,"metrics":[1]}', "bad_metrics"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":"1"}}', "bad_metric_value"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":true}}', "bad_metric_value"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":null}}', "bad_metric_value"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":{"y":1}}}', "bad_metric_value"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":[1]}', "bad_labels"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1e999}}', "not_json"),  # orjson refuses out-of-range floats
    (b'{"service":"s","ts":1772409900,"metrics":{"x":-1e999}}', "not_json"),
    # NaN and the infinities are not JSON (RFC 8259 section 6), whatever a sender's library writes
    (b'{"service":"s","ts":NaN,"metrics":{"x":1}}', "not_json"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":NaN}}', "not_json"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":Infinity}}', "not_json"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":-Infinity}}', "not_json"),
    (b'{"service":"s","ts":"NaN","metrics":{"x":1}}', "bad_ts"),
    (b'{"service":"s","ts":"2026-13-45T99:00:00Z","metrics":{"x":1}}', "bad_ts"),
    (b'{"service":"s","ts":946684799,"metrics":{"x":1}}', "ts_out_of_range"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":{"a":{"b":{"c":1}}}}', "bad_labels"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":{"a":[1]}}', "bad_labels"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":' + b'{"a":' * 200 + b'1' + b'}' * 201, "bad_labels"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":' + b'[' * 5000 + b']' * 5000 + b'}', "not_json"),
    # duplicate keys (RFC 8259 section 4: names SHOULD be unique; receivers' behaviour differs)
    (b'{"service":"s","service":"t","ts":1772409900,"metrics":{"x":1}}', "duplicate_key"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1,"x":2}}', "duplicate_key"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"labels":{"a":"1","a":"2"}}', "duplicate_key"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1 , "x" :2}}', "duplicate_key"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x":1},"extra":{"k":1,"k":2}}', "duplicate_key"),
    (b'{"service":"s","ts":1772409900,"metrics":{"x\\":":1,"x\\":":2}}', "duplicate_key"),
]


@pytest.mark.parametrize("raw,code", CASES)
def test_bad_messages_are_rejected_with_a_stable_reason(raw, code):
    with pytest.raises(Rejected) as info:
        dec().decode(raw)
    assert info.value.code == code
    assert code in REASONS and info.value.detail


ACCEPTED_SHAPES = [
    b'{ "service" : "s", "ts" : 1772409900, "metrics" : { "x" : 1, "y" : 2 } }',
    b'{\n  "service": "s",\n  "ts": 1772409900,\n  "metrics": {\n    "x": 1,\n    "y": 2\n  }\n}',
    b'{"service":"s","ts":1772409900,"metrics":{"x":1,"y":2},"labels":{"note":"a\\":b","n":3,"on":true,"z":null}}',
    b'{"service":"s","ts":1772409900,"metrics":{"x":1,"y":2},"extra":{"k":1,"j":{"k":2}}}',
]


@pytest.mark.parametrize("raw", ACCEPTED_SHAPES)
def test_unusual_but_valid_layouts_are_accepted(raw):
    """Whitespace, '":' inside strings and nested extra fields take the exact duplicate check and pass it."""
    assert dec().decode(raw) == ("s", 1772409900.0, {"x": 1, "y": 2})


def test_duplicate_detection_agrees_with_the_stdlib_parser_on_generated_objects():
    """Reference: Python's json module with object_pairs_hook sees every pair (docs.python.org, json)."""
    import json
    import random

    rng = random.Random(7)
    names = ["a", "b", "c", "a\\\"", "d:e"]
    for _ in range(2000):
        keys = [rng.choice(names) for _ in range(rng.randint(1, 4))]
        sep = rng.choice([":", " :", ": ", "\t:"])
        metrics = "{" + ",".join(f'{json.dumps(k)}{sep}{i}' for i, k in enumerate(keys)) + "}"
        raw = ('{"service":"s","ts":1772409900,"metrics":' + metrics + "}").encode()
        pairs = json.loads(raw, object_pairs_hook=lambda p: p)[2][1]
        has_dup = len({k for k, _ in pairs}) != len(pairs)
        try:
            dec().decode(raw)
            got = None
        except Rejected as r:
            got = r.code
        assert got == ("duplicate_key" if has_dup else None), raw


def test_size_and_metric_count_limits():
    d = dec(max_message_bytes=100, max_metrics=2)
    with pytest.raises(Rejected) as info:
        d.decode(b'{"service":"s","ts":1772409900,"metrics":{"x":1},"pad":"' + b"x" * 100 + b'"}')
    assert info.value.code == "too_large"
    with pytest.raises(Rejected) as info:
        d.decode(b'{"service":"s","ts":1772409900,"metrics":{"a":1,"b":2,"c":3}}')
    assert info.value.code == "bad_metrics"


def test_future_skew_is_measured_against_the_injected_clock():
    d = dec(max_future_skew=60.0)
    d.decode(b'{"service":"s","ts":%d,"metrics":{"x":1}}' % int(NOW + 59))
    with pytest.raises(Rejected):
        d.decode(b'{"service":"s","ts":%d,"metrics":{"x":1}}' % int(NOW + 61))
