"""OTLP metrics input: real export requests, both encodings, every feature rule.

Payloads are built with the opentelemetry-proto generated classes (the reference
library for the OTLP wire format) and serialised with protobuf itself:
``SerializeToString`` for ``otlp_proto``, ``json_format.MessageToJson`` for
``otlp_json``. Expected values are worked out by hand in the comments beside each check.
"""

from __future__ import annotations

import base64
import doctest
import json
import math

import orjson
import pytest
from google.protobuf import json_format
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest
from opentelemetry.proto.metrics.v1 import metrics_pb2

import service.otlp as otlp
from service.decode import REASONS, Rejected
from service.otlp import OTLP_REASONS, OTLP_SKIPS, OtlpDecoder, OtlpStateError, histogram_quantile, quantile_suffix

NOW = 1_800_000_000.0  # 2027-01-15, a fixed wall clock
S = 10**9  # nanoseconds per second
T0 = 1_772_409_600 * S  # 2026-03-02T00:00:00Z
T0_S = 1_772_409_600.0
DELTA = metrics_pb2.AGGREGATION_TEMPORALITY_DELTA
CUMULATIVE = metrics_pb2.AGGREGATION_TEMPORALITY_CUMULATIVE
ENCODINGS = ["otlp_proto", "otlp_json"]


# ---------------------------------------------------------------------- payload builders


def _set_attrs(container, attrs: dict | None) -> None:
    for key, value in (attrs or {}).items():
        kv = container.add()
        kv.key = key
        if isinstance(value, bool):
            kv.value.bool_value = value
        elif isinstance(value, int):
            kv.value.int_value = value
        elif isinstance(value, float):
            kv.value.double_value = value
        else:
            kv.value.string_value = value


def add_resource(req: ExportMetricsServiceRequest, attrs: dict, scope: str = "harbour.meter"):
    """Append a resource with one scope; returns the ScopeMetrics to add metrics to."""
    rm = req.resource_metrics.add()
    _set_attrs(rm.resource.attributes, attrs)
    sm = rm.scope_metrics.add()
    sm.scope.name = scope
    return sm


def number_points(container, *points) -> None:
    """points: (time_ns, value[, start_ns[, attrs]]); an int value goes to as_int, a float to as_double."""
    for pt in points:
        t, value, *rest = pt
        start = rest[0] if rest else 0
        attrs = rest[1] if len(rest) > 1 else None
        p = container.add()
        p.time_unix_nano = t
        p.start_time_unix_nano = start
        if isinstance(value, int):
            p.as_int = value
        else:
            p.as_double = value
        _set_attrs(p.attributes, attrs)


def gauge(sm, name: str, *points) -> None:
    m = sm.metrics.add()
    m.name = name
    number_points(m.gauge.data_points, *points)


def counter(sm, name: str, temporality: int, *points, monotonic: bool = True) -> None:
    m = sm.metrics.add()
    m.name = name
    m.sum.aggregation_temporality = temporality
    m.sum.is_monotonic = monotonic
    number_points(m.sum.data_points, *points)


def histogram(sm, name: str, temporality: int, *points) -> None:
    """points: dicts with t, bounds, counts, and optionally sum, start, attrs."""
    m = sm.metrics.add()
    m.name = name
    m.histogram.aggregation_temporality = temporality
    for pt in points:
        p = m.histogram.data_points.add()
        p.time_unix_nano = pt["t"]
        p.start_time_unix_nano = pt.get("start", 0)
        p.explicit_bounds.extend(pt["bounds"])
        p.bucket_counts.extend(pt["counts"])
        p.count = sum(pt["counts"])
        if "sum" in pt:
            p.sum = pt["sum"]
        _set_attrs(p.attributes, pt.get("attrs"))


def exp_histogram(sm, name: str, temporality: int, *points) -> None:
    """points: dicts with t, scale, offset, counts, and optionally zero, sum, start."""
    m = sm.metrics.add()
    m.name = name
    m.exponential_histogram.aggregation_temporality = temporality
    for pt in points:
        p = m.exponential_histogram.data_points.add()
        p.time_unix_nano = pt["t"]
        p.start_time_unix_nano = pt.get("start", 0)
        p.scale = pt["scale"]
        p.zero_count = pt.get("zero", 0)
        p.positive.offset = pt["offset"]
        p.positive.bucket_counts.extend(pt["counts"])
        p.count = sum(pt["counts"]) + pt.get("zero", 0)
        if "sum" in pt:
            p.sum = pt["sum"]


def summary(sm, name: str, *points) -> None:
    """points: dicts with t, count, sum, quantiles {q: value}, and optionally start."""
    m = sm.metrics.add()
    m.name = name
    for pt in points:
        p = m.summary.data_points.add()
        p.time_unix_nano = pt["t"]
        p.start_time_unix_nano = pt.get("start", 0)
        p.count = pt["count"]
        p.sum = pt["sum"]
        for q, v in pt["quantiles"].items():
            qv = p.quantile_values.add()
            qv.quantile = q
            qv.value = v


def _hex_ids(obj) -> None:
    if isinstance(obj, dict):
        for key in ("traceId", "spanId"):
            if key in obj:
                obj[key] = base64.b64decode(obj[key]).hex()
        for v in obj.values():
            _hex_ids(v)
    elif isinstance(obj, list):
        for v in obj:
            _hex_ids(v)


def encode(req: ExportMetricsServiceRequest, encoding: str) -> bytes:
    if encoding == "otlp_proto":
        return req.SerializeToString()
    # OTLP/JSON (OTLP specification, "JSON Protobuf Encoding", from memory) is the protobuf
    # JSON mapping with two differences: enums MUST be integers (MessageToJson writes names
    # unless use_integers_for_enums) and trace/span ids are hex, not base64 (fixed below).
    # camelCase keys and 64-bit integers as strings are what MessageToJson already writes.
    obj = json.loads(json_format.MessageToJson(req, use_integers_for_enums=True))
    _hex_ids(obj)
    return json.dumps(obj).encode()


def dec(encoding: str, **kw) -> OtlpDecoder:
    return OtlpDecoder(encoding, now=lambda: NOW, **kw)


def one_request(build) -> ExportMetricsServiceRequest:
    req = ExportMetricsServiceRequest()
    build(add_resource(req, {"service.name": "ticket-api", "service.instance.id": "ticket-api-0"}))
    return req


@pytest.fixture(params=ENCODINGS)
def encoding(request) -> str:
    return request.param


# ---------------------------------------------------------------------- the module's own examples


def test_module_doctests_pass():
    result = doctest.testmod(otlp)
    assert result.attempted > 0 and result.failed == 0


def test_reason_codes_are_new_and_skips_documented():
    assert set(OTLP_REASONS) == {"otlp_invalid", "otlp_no_service"}
    assert not set(OTLP_REASONS) & set(REASONS)
    assert "too_large" in REASONS  # reused from the native table
    assert all(isinstance(v, str) and v for v in OTLP_SKIPS.values())


# ---------------------------------------------------------------------- the JSON mapping itself


def test_json_payload_is_the_otlp_json_mapping():
    def build(sm):
        counter(sm, "requests", CUMULATIVE, (T0, 5, T0 - 60 * S))
        m = sm.metrics[0].sum.data_points[0]
        ex = m.exemplars.add()
        ex.trace_id = bytes(range(16))
        ex.span_id = bytes(range(8))
        ex.as_double = 1.0

    obj = json.loads(encode(one_request(build), "otlp_json"))
    sm = obj["resourceMetrics"][0]["scopeMetrics"][0]
    s = sm["metrics"][0]["sum"]
    pt = s["dataPoints"][0]
    assert s["aggregationTemporality"] == 2 and s["isMonotonic"] is True  # enum as integer, camelCase
    assert pt["timeUnixNano"] == str(T0) and pt["asInt"] == "5"  # 64-bit integers as strings
    assert pt["exemplars"][0]["traceId"] == "000102030405060708090a0b0c0d0e0f"  # hex, not base64


def test_hand_written_otlp_json_decodes():
    # Written by hand after the OTLP/JSON rules (from memory): camelCase keys, int64 as
    # strings, enum as an integer (1 = DELTA), hex exemplar ids, an unknown key to ignore.
    raw = b"""{"resourceMetrics":[{"resource":{"attributes":[
        {"key":"service.name","value":{"stringValue":"berth-planner"}}]},
      "scopeMetrics":[{"scope":{"name":"harbour.meter"},"metrics":[
        {"name":"requests","unit":"1","sum":{"aggregationTemporality":1,"isMonotonic":true,"dataPoints":[
          {"startTimeUnixNano":"1772409540000000000","timeUnixNano":"1772409600000000000","asInt":"90",
           "attributes":[{"key":"route","value":{"stringValue":"/berths"}}],
           "exemplars":[{"timeUnixNano":"1772409590000000000","asDouble":12.5,
                         "traceId":"5b8efff798038103d269b633813fc60c","spanId":"eee19b7ec3c1b174"}]}]}},
        {"name":"queue_depth","gauge":{"dataPoints":[{"timeUnixNano":"1772409600000000000","asDouble":3.5}]},
         "someFutureField":{"x":1}}]}]}]}"""
    # requests: 90 over the 60 s from start to time -> 1.5 per second
    assert dec("otlp_json").decode(raw) == [("berth-planner", T0_S, {"requests": 1.5, "queue_depth": 3.5})]


def test_json_with_enum_names_is_accepted_too():
    # A sender that followed the plain protobuf JSON mapping (enum names) still decodes.
    req = one_request(lambda sm: counter(sm, "requests", DELTA, (T0, 120, T0 - 60 * S)))
    raw = json_format.MessageToJson(req).encode()
    assert b"AGGREGATION_TEMPORALITY_DELTA" in raw
    assert dec("otlp_json").decode(raw) == [("ticket-api", T0_S, {"requests": 2.0})]


def _parse_reference(raw: bytes) -> ExportMetricsServiceRequest:
    obj = json.loads(raw)
    otlp._strip_exemplars(obj)
    return json_format.ParseDict(obj, ExportMetricsServiceRequest(), ignore_unknown_fields=True)


def test_fast_json_reader_builds_what_the_reference_parser_builds():
    # Reference: protobuf's json_format.ParseDict, on the same OTLP/JSON payloads.
    for req in (_mixed(T0, 0), _mixed(T0 + 60 * S, 3), _attribute_kinds()):
        raw = encode(req, "otlp_json")
        fast = otlp._fast_json_request(json.loads(raw))
        assert fast == _parse_reference(raw) == req


def _attribute_kinds() -> ExportMetricsServiceRequest:
    req = ExportMetricsServiceRequest()
    sm = add_resource(req, {"service.name": "ticket-api", "replicas": 3, "weight": 0.5, "canary": True})
    gauge(sm, "depth", (T0, -4, 0, {"zone": "north", "shard": -2}), (T0, 2.0, 0, {"zone": "south"}))
    kv = req.resource_metrics[0].resource.attributes.add()
    kv.key = "tags"
    kv.value.array_value.values.add().string_value = "a"
    kv.value.array_value.values.add().int_value = 1
    kv = req.resource_metrics[0].resource.attributes.add()
    kv.key = "blob"
    kv.value.bytes_value = b"\x00\x01"
    kv = req.resource_metrics[0].resource.attributes.add()
    kv.key = "nested"
    inner = kv.value.kvlist_value.values.add()
    inner.key = "k"
    inner.value.string_value = "v"
    return req


def _first_metric(o: dict) -> dict:
    return o["resourceMetrics"][0]["scopeMetrics"][0]["metrics"][0]


def _infinity_as_text(o: dict) -> None:
    _first_metric(o)["gauge"]["dataPoints"][0]["asDouble"] = "Infinity"


def _unread_fields(o: dict) -> None:
    _first_metric(o).update(description="queue depth", unit="1")


def _snake_case_key(o: dict) -> None:
    pt = _first_metric(o)["gauge"]["dataPoints"][0]
    pt["time_unix_nano"] = pt.pop("timeUnixNano")


@pytest.mark.parametrize(
    "edit,fast_reader_gives_up,expected",
    [
        (_infinity_as_text, True, {"other": 1.0}),  # an infinite gauge is skipped
        (_unread_fields, False, {"depth": 2.0, "other": 1.0}),
        (_snake_case_key, True, {"depth": 2.0, "other": 1.0}),  # the protobuf JSON parser accepts field names
    ],
)
def test_json_variants_decode_like_the_reference(edit, fast_reader_gives_up, expected):
    req = one_request(lambda sm: (gauge(sm, "depth", (T0, 2.0)), gauge(sm, "other", (T0, 1))))
    obj = json.loads(encode(req, "otlp_json"))
    edit(obj)
    raw = json.dumps(obj).encode()
    if fast_reader_gives_up:
        with pytest.raises(otlp._Slow):
            otlp._fast_json_request(json.loads(raw))
    via_proto = dec("otlp_proto").decode(_parse_reference(raw).SerializeToString())
    assert dec("otlp_json").decode(raw) == via_proto == [("ticket-api", T0_S, expected)]


# ---------------------------------------------------------------------- gauges


def test_gauges_as_double_and_as_int_become_one_event(encoding):
    def build(sm):
        gauge(sm, "queue_depth", (T0, 7))
        gauge(sm, "heap_used_ratio", (T0, 0.25))
        gauge(sm, "queue_depth_later", (T0 + 10 * S, 9))

    events = dec(encoding).decode(encode(one_request(build), encoding))
    assert events == [
        ("ticket-api", T0_S, {"queue_depth": 7.0, "heap_used_ratio": 0.25}),
        ("ticket-api", T0_S + 10, {"queue_depth_later": 9.0}),
    ]


def test_gauges_are_averaged_over_point_attributes(encoding):
    # route=/a 10 and route=/b 20 at the same time: one feature, (10 + 20) / 2 = 15
    req = one_request(lambda sm: gauge(sm, "inflight", (T0, 10.0, 0, {"route": "/a"}), (T0, 20.0, 0, {"route": "/b"})))
    assert dec(encoding).decode(encode(req, encoding)) == [("ticket-api", T0_S, {"inflight": 15.0})]


def test_events_come_out_in_time_order(encoding):
    req = one_request(lambda sm: gauge(sm, "depth", (T0 + 20 * S, 3), (T0, 1), (T0 + 10 * S, 2)))
    events = dec(encoding).decode(encode(req, encoding))
    assert [(ts, m["depth"]) for _s, ts, m in events] == [(T0_S, 1.0), (T0_S + 10, 2.0), (T0_S + 20, 3.0)]


# ---------------------------------------------------------------------- sums


def test_delta_sum_is_a_rate_summed_over_attributes(encoding):
    # 120 + 60 over the same 60 s interval: (120 + 60) / 60 = 3.0 per second
    req = one_request(lambda sm: counter(
        sm, "requests", DELTA, (T0, 120, T0 - 60 * S, {"route": "/a"}), (T0, 60.0, T0 - 60 * S, {"route": "/b"})))
    assert dec(encoding).decode(encode(req, encoding)) == [("ticket-api", T0_S, {"requests": 3.0})]


def test_delta_sum_without_a_start_time_is_skipped(encoding):
    req = one_request(lambda sm: (counter(sm, "requests", DELTA, (T0, 120)), gauge(sm, "depth", (T0, 1))))
    d = dec(encoding)
    assert d.decode(encode(req, encoding)) == [("ticket-api", T0_S, {"depth": 1.0})]
    assert d.stats.skipped["no_interval"] == 1


def test_cumulative_sum_rate_from_consecutive_points(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S
    first = one_request(lambda sm: counter(sm, "requests", CUMULATIVE, (T0, 1000, start)))
    assert d.decode(encode(first, encoding)) == []  # one point has no increase
    assert d.stats.skipped["first_point"] == 1 and d.series_count == 1
    second = one_request(lambda sm: counter(sm, "requests", CUMULATIVE, (T0 + 60 * S, 1300, start)))
    # (1300 - 1000) / 60 s = 5.0 per second
    assert d.decode(encode(second, encoding)) == [("ticket-api", T0_S + 60, {"requests": 5.0})]


def test_cumulative_points_of_one_series_in_one_payload_are_taken_in_time_order(encoding):
    start = T0 - 3600 * S
    # given out of order: 1120 at +60, 1000 at 0, 1300 at +120
    req = one_request(lambda sm: counter(
        sm, "requests", CUMULATIVE, (T0 + 60 * S, 1120, start), (T0, 1000, start), (T0 + 120 * S, 1300, start)))
    events = dec(encoding).decode(encode(req, encoding))
    # (1120 - 1000) / 60 = 2.0, then (1300 - 1120) / 60 = 3.0
    assert events == [("ticket-api", T0_S + 60, {"requests": 2.0}), ("ticket-api", T0_S + 120, {"requests": 3.0})]


def test_counter_reset_never_gives_a_negative_rate(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S

    def feed(*pts):
        req = one_request(lambda sm: counter(sm, "requests", CUMULATIVE, *pts))
        return d.decode(encode(req, encoding))

    feed((T0, 1000, start))
    assert feed((T0 + 60 * S, 1600, start)) == [("ticket-api", T0_S + 60, {"requests": 10.0})]  # 600 / 60
    # The process restarted at +100 s (new start time) and counted 40 by +120 s: 40 / 20 = 2.0
    assert feed((T0 + 120 * S, 40, T0 + 100 * S)) == [("ticket-api", T0_S + 120, {"requests": 2.0})]
    assert d.stats.resets == 1
    # Continues from the new value: (160 - 40) / 60 = 2.0
    assert feed((T0 + 180 * S, 160, T0 + 100 * S)) == [("ticket-api", T0_S + 180, {"requests": 2.0})]
    # A drop with the same start time is a reset too: 30 over the 3780 s since the start
    assert feed((T0 + 240 * S, 30, T0 + 100 * S)) == [("ticket-api", T0_S + 240, {"requests": 30 / 140})]
    assert d.stats.resets == 2


def test_new_start_time_is_a_reset_even_when_the_value_grew(encoding):
    d = dec(encoding)

    def feed(*pts):
        return d.decode(encode(one_request(lambda sm: counter(sm, "requests", CUMULATIVE, *pts)), encoding))

    feed((T0, 10, T0 - 3600 * S))
    # restarted at +100 s and already at 50 by +120 s: 50 / 20 = 2.5, not (50 - 10) / 120
    assert feed((T0 + 120 * S, 50, T0 + 100 * S)) == [("ticket-api", T0_S + 120, {"requests": 2.5})]
    assert d.stats.resets == 1


def test_counter_reset_without_start_time_emits_nothing_then_continues(encoding):
    d = dec(encoding)

    def feed(t, v):
        return d.decode(encode(one_request(lambda sm: counter(sm, "requests", CUMULATIVE, (t, v))), encoding))

    assert feed(T0, 1000) == []
    assert feed(T0 + 60 * S, 1060) == [("ticket-api", T0_S + 60, {"requests": 1.0})]  # 60 / 60
    assert feed(T0 + 120 * S, 30) == []  # dropped, no start to divide by: skipped, not negative
    assert d.stats.resets == 1
    assert feed(T0 + 180 * S, 150) == [("ticket-api", T0_S + 180, {"requests": 2.0})]  # (150 - 30) / 60


def test_redelivered_cumulative_points_are_not_counted_twice(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S
    a = encode(one_request(lambda sm: counter(sm, "requests", CUMULATIVE, (T0, 100, start))), encoding)
    b = encode(one_request(lambda sm: counter(sm, "requests", CUMULATIVE, (T0 + 60 * S, 160, start))), encoding)
    d.decode(a)
    assert d.decode(b) == [("ticket-api", T0_S + 60, {"requests": 1.0})]
    assert d.decode(b) == [] and d.decode(a) == []
    assert d.stats.skipped["not_newer"] == 2


def test_non_monotonic_sum_is_a_level_like_a_gauge(encoding):
    d = dec(encoding)
    for t, v, expected in ((T0, 40, 40.0), (T0 + 60 * S, 25, 25.0)):
        req = one_request(lambda sm: counter(sm, "connections_open", CUMULATIVE, (t, v, T0 - S), monotonic=False))
        assert d.decode(encode(req, encoding)) == [("ticket-api", t / S, {"connections_open": expected})]
    assert d.stats.resets == 0 and d.series_count == 0


def test_replicas_of_a_service_are_separate_series_and_events(encoding):
    # Two instances of one service with independent cumulative counters: keyed by the full
    # resource, their interleaved points are never mistaken for resets.
    d = dec(encoding)
    start = T0 - 3600 * S

    def payload(t, v0, v1):
        req = ExportMetricsServiceRequest()
        for inst, v in (("ticket-api-0", v0), ("ticket-api-1", v1)):
            sm = add_resource(req, {"service.name": "ticket-api", "service.instance.id": inst})
            counter(sm, "requests", CUMULATIVE, (t, v, start))
        return encode(req, encoding)

    d.decode(payload(T0, 5000, 100))
    events = d.decode(payload(T0 + 60 * S, 5600, 160))
    # instance 0: 600 / 60 = 10.0; instance 1: 60 / 60 = 1.0
    assert events == [("ticket-api", T0_S + 60, {"requests": 10.0}), ("ticket-api", T0_S + 60, {"requests": 1.0})]
    assert d.stats.resets == 0


# ---------------------------------------------------------------------- histograms

BOUNDS = [10.0, 50.0, 100.0, 250.0]


def test_delta_histogram_count_mean_and_quantile(encoding):
    # counts per bucket (-inf,10] (10,50] (50,100] (100,250] (250,inf): 4 16 40 36 4 = 100, sum 12000
    req = one_request(lambda sm: histogram(
        sm, "latency_ms", DELTA, {"t": T0, "start": T0 - 60 * S, "bounds": BOUNDS, "counts": [4, 16, 40, 36, 4], "sum": 12000.0}))
    (service, ts, m), = dec(encoding).decode(encode(req, encoding))
    assert (service, ts) == ("ticket-api", T0_S)
    assert m["latency_ms.count"] == 100.0
    assert m["latency_ms.mean"] == 120.0  # 12000 / 100
    # rank 0.95 * 100 = 95; cumulative 4, 20, 60, 96 -> bucket (100, 250] holds ranks 60..96;
    # 100 + (95 - 60) / 36 * 150 = 245.8333... (linear inside the bucket: common practice)
    assert m["latency_ms.p95"] == pytest.approx(100 + (95 - 60) / 36 * 150, rel=1e-12)
    assert set(m) == {"latency_ms.count", "latency_ms.mean", "latency_ms.p95"}


def test_quantile_name_and_value_follow_the_configured_quantile(encoding):
    req = one_request(lambda sm: histogram(
        sm, "latency_ms", DELTA, {"t": T0, "bounds": BOUNDS, "counts": [4, 16, 40, 36, 4], "sum": 12000.0}))
    (_s, _ts, m), = dec(encoding, histogram_quantile=0.5).decode(encode(req, encoding))
    # rank 50; cumulative 4, 20, 60 -> bucket (50, 100]: 50 + (50 - 20) / 40 * 50 = 87.5
    assert m["latency_ms.p50"] == pytest.approx(87.5, rel=1e-12)
    assert "latency_ms.p95" not in m


@pytest.mark.parametrize(
    "bounds,counts,q,expected",
    [
        # all bounds positive: the first bucket starts at 0; rank 0.5 * 10 = 5 -> 0 + 5 / 10 * 10 = 5
        ([10.0, 20.0], [10, 0, 0], 0.5, 5.0),
        # a non-positive bound: the first bucket is the point at its bound, -5
        ([-5.0, 5.0], [10, 0, 0], 0.5, -5.0),
        # the open-ended last bucket is the point at the last bound, 20
        ([10.0, 20.0], [0, 0, 10], 0.99, 20.0),
        # rank 0.9 * 10 = 9 falls in (-5, 5] after 2: -5 + (9 - 2) / 8 * 10 = 3.75
        ([-5.0, 5.0], [2, 8, 0], 0.9, 3.75),
    ],
)
def test_histogram_quantile_at_the_ends(encoding, bounds, counts, q, expected):
    req = one_request(lambda sm: histogram(sm, "h", DELTA, {"t": T0, "bounds": bounds, "counts": counts, "sum": 1.0}))
    (_s, _ts, m), = dec(encoding, histogram_quantile=q).decode(encode(req, encoding))
    assert m[f"h.{quantile_suffix(q)}"] == pytest.approx(expected, rel=1e-12)


def test_cumulative_histogram_uses_the_increase(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S
    p1 = {"t": T0, "start": start, "bounds": BOUNDS, "counts": [1, 2, 3, 0, 0], "sum": 300.0}
    p2 = {"t": T0 + 60 * S, "start": start, "bounds": BOUNDS, "counts": [3, 6, 13, 2, 0], "sum": 1560.0}
    assert d.decode(encode(one_request(lambda sm: histogram(sm, "latency_ms", CUMULATIVE, p1)), encoding)) == []
    (_s, ts, m), = d.decode(encode(one_request(lambda sm: histogram(sm, "latency_ms", CUMULATIVE, p2)), encoding))
    assert ts == T0_S + 60
    # increase per bucket: 2 4 10 2 0 = 18 observations, sum 1560 - 300 = 1260
    assert m["latency_ms.count"] == 18.0
    assert m["latency_ms.mean"] == 70.0  # 1260 / 18
    # rank 0.95 * 18 = 17.1; cumulative 2, 6, 16, 18 -> (100, 250]: 100 + (17.1 - 16) / 2 * 150 = 182.5
    assert m["latency_ms.p95"] == pytest.approx(182.5, rel=1e-12)


def test_cumulative_histogram_reset_and_changed_buckets(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S

    def feed(pt):
        return d.decode(encode(one_request(lambda sm: histogram(sm, "h", CUMULATIVE, pt)), encoding))

    feed({"t": T0, "start": start, "bounds": BOUNDS, "counts": [10, 10, 10, 10, 10], "sum": 5000.0})
    # restarted at +30 s: the new point's own 4 observations (1 in (10,50], 3 in (50,100]) are the increase
    (_s, _ts, m), = feed({"t": T0 + 60 * S, "start": T0 + 30 * S, "bounds": BOUNDS, "counts": [0, 1, 3, 0, 0], "sum": 240.0})
    assert (m["h.count"], m["h.mean"]) == (4.0, 60.0)
    # rank 3.8; cumulative 0, 1, 4 -> (50, 100]: 50 + (3.8 - 1) / 3 * 50 = 96.666...
    assert m["h.p95"] == pytest.approx(50 + 2.8 / 3 * 50, rel=1e-12)
    assert d.stats.resets == 1
    # new bounds with a larger count: count and mean still come from the totals, no quantile
    (_s, _ts, m), = feed({"t": T0 + 120 * S, "start": T0 + 30 * S, "bounds": [20.0, 200.0], "counts": [2, 4, 0], "sum": 480.0})
    assert m == {"h.count": 2.0, "h.mean": 120.0}  # (6 - 4), (480 - 240) / 2
    assert d.stats.skipped["buckets_changed"] == 1


def test_histograms_merge_over_attributes_even_with_different_bounds(encoding):
    # route=/a: 4 observations in (0, 10]; route=/b: 4 in the open bucket above 20 (the point 20).
    # mixture of 8: rank 0.25 * 8 = 2 -> 0 + 2 / 4 * 10 = 5.0 (linear inside (0, 10], common practice)
    req = one_request(lambda sm: histogram(
        sm, "h", DELTA,
        {"t": T0, "bounds": [10.0], "counts": [4, 0], "sum": 20.0, "attrs": {"route": "/a"}},
        {"t": T0, "bounds": [20.0], "counts": [0, 4], "sum": 100.0, "attrs": {"route": "/b"}}))
    (_s, _ts, m), = dec(encoding, histogram_quantile=0.25).decode(encode(req, encoding))
    assert m == {"h.count": 8.0, "h.mean": 15.0, "h.p25": pytest.approx(5.0, rel=1e-12)}  # mean (20 + 100) / 8


def test_histogram_with_mismatched_buckets_is_skipped(encoding):
    req = one_request(lambda sm: (histogram(sm, "h", DELTA, {"t": T0, "bounds": [10.0, 5.0], "counts": [1, 1, 1], "sum": 1.0}),
                                  histogram(sm, "g", DELTA, {"t": T0, "bounds": [10.0], "counts": [1, 1, 1], "sum": 1.0}),
                                  gauge(sm, "ok", (T0, 1))))
    d = dec(encoding)
    assert d.decode(encode(req, encoding)) == [("ticket-api", T0_S, {"ok": 1.0})]
    assert d.stats.skipped["bad_histogram"] == 2


def test_exponential_histogram_quantile(encoding):
    # scale 0: base 2, bucket i covers (2**i, 2**(i+1)] (opentelemetry-proto metrics.proto,
    # ExponentialHistogramDataPoint.scale). offset 0, counts 4 4 -> (1, 2] and (2, 4]; 2 zeros.
    # rank 0.75 * 10 = 7.5; cumulative 2 (zero), 6, 10 -> (2, 4]: 2 + (7.5 - 6) / 4 * 2 = 2.75
    req = one_request(lambda sm: exp_histogram(sm, "size", DELTA, {"t": T0, "scale": 0, "offset": 0, "counts": [4, 4], "zero": 2, "sum": 18.0}))
    (_s, _ts, m), = dec(encoding, histogram_quantile=0.75).decode(encode(req, encoding))
    assert m == {"size.count": 10.0, "size.mean": 1.8, "size.p75": pytest.approx(2.75, rel=1e-12)}


def test_cumulative_exponential_histogram_across_a_scale_change(encoding):
    d = dec(encoding, histogram_quantile=0.5)
    start = T0 - 3600 * S
    # scale 1 (base sqrt 2): buckets (1, 1.41], (1.41, 2], (2, 2.83], (2.83, 4], one each
    p1 = {"t": T0, "start": start, "scale": 1, "offset": 0, "counts": [1, 1, 1, 1], "sum": 10.0}
    # scale 0: (1, 2] holds 4, (2, 4] holds 6. The earlier point at scale 0 is 2 and 2, so
    # the increase is 2 and 4: rank 0.5 * 6 = 3 -> (2, 4]: 2 + (3 - 2) / 4 * 2 = 2.5
    p2 = {"t": T0 + 60 * S, "start": start, "scale": 0, "offset": 0, "counts": [4, 6], "sum": 28.0}
    assert d.decode(encode(one_request(lambda sm: exp_histogram(sm, "size", CUMULATIVE, p1)), encoding)) == []
    (_s, _ts, m), = d.decode(encode(one_request(lambda sm: exp_histogram(sm, "size", CUMULATIVE, p2)), encoding))
    assert m == {"size.count": 6.0, "size.mean": 3.0, "size.p50": pytest.approx(2.5, rel=1e-12)}  # (28 - 10) / 6


def test_cumulative_exponential_histogram_merges_negative_indices_down(encoding):
    d = dec(encoding, histogram_quantile=0.75)
    start = T0 - 3600 * S
    # scale 2, indices -5..-1, one each; at scale 0 index i becomes i >> 2 (floor): -5 -> -2,
    # -4..-1 -> -1, so the earlier point is 1 in (0.25, 0.5] and 4 in (0.5, 1].
    p1 = {"t": T0, "start": start, "scale": 2, "offset": -5, "counts": [1, 1, 1, 1, 1], "sum": 3.0}
    # scale 0, offset -2: 3 in (0.25, 0.5], 6 in (0.5, 1]; increase 2 and 2.
    # rank 0.75 * 4 = 3 -> (0.5, 1]: 0.5 + (3 - 2) / 2 * 0.5 = 0.75; mean (5 - 3) / 4 = 0.5
    p2 = {"t": T0 + 60 * S, "start": start, "scale": 0, "offset": -2, "counts": [3, 6], "sum": 5.0}
    assert d.decode(encode(one_request(lambda sm: exp_histogram(sm, "size", CUMULATIVE, p1)), encoding)) == []
    (_s, _ts, m), = d.decode(encode(one_request(lambda sm: exp_histogram(sm, "size", CUMULATIVE, p2)), encoding))
    assert m == {"size.count": 4.0, "size.mean": 0.5, "size.p75": pytest.approx(0.75, rel=1e-12)}


# ---------------------------------------------------------------------- summaries


def test_summary_quantile_count_and_mean(encoding):
    d = dec(encoding)
    start = T0 - 3600 * S
    s1 = {"t": T0, "start": start, "count": 100, "sum": 5000.0, "quantiles": {0.5: 40.0, 0.95: 180.0}}
    s2 = {"t": T0 + 60 * S, "start": start, "count": 130, "sum": 6800.0, "quantiles": {0.5: 42.0, 0.95: 210.0}}
    # The reported quantile needs no earlier point; count and mean do.
    assert d.decode(encode(one_request(lambda sm: summary(sm, "rpc_ms", s1)), encoding)) == [
        ("ticket-api", T0_S, {"rpc_ms.p95": 180.0})]
    # count 130 - 100 = 30, mean (6800 - 5000) / 30 = 60
    assert d.decode(encode(one_request(lambda sm: summary(sm, "rpc_ms", s2)), encoding)) == [
        ("ticket-api", T0_S + 60, {"rpc_ms.p95": 210.0, "rpc_ms.count": 30.0, "rpc_ms.mean": 60.0})]


def test_summary_without_the_configured_quantile_has_no_quantile_feature(encoding):
    s1 = {"t": T0, "count": 100, "sum": 5000.0, "quantiles": {0.5: 40.0}}
    d = dec(encoding, histogram_quantile=0.99)
    assert d.decode(encode(one_request(lambda sm: summary(sm, "rpc_ms", s1)), encoding)) == []


# ---------------------------------------------------------------------- resources and services


def test_several_services_in_one_payload(encoding):
    req = ExportMetricsServiceRequest()
    gauge(add_resource(req, {"service.name": "ticket-api"}), "depth", (T0 + 5 * S, 3))
    gauge(add_resource(req, {"service.name": "berth-planner", "host.name": "quay-7"}), "depth", (T0, 8))
    gauge(add_resource(req, {"service.name": "ticket-api"}), "errors", (T0 + 5 * S, 1))  # same resource again
    events = dec(encoding).decode(encode(req, encoding))
    assert events == [("berth-planner", T0_S, {"depth": 8.0}), ("ticket-api", T0_S + 5, {"depth": 3.0, "errors": 1.0})]


def test_service_attribute_fallback_and_missing_service(encoding):
    req = ExportMetricsServiceRequest()
    gauge(add_resource(req, {"service.name": "", "deployment.unit": "ferry-tracker"}), "depth", (T0, 1))
    raw = encode(req, encoding)
    with pytest.raises(Rejected) as exc:
        dec(encoding).decode(raw)
    assert exc.value.code == "otlp_no_service"
    # an empty service.name is not usable; the next configured attribute is
    d = dec(encoding, service_attributes=("service.name", "deployment.unit"))
    assert d.decode(raw) == [("ferry-tracker", T0_S, {"depth": 1.0})]


def test_non_string_service_attribute_is_not_a_service(encoding):
    req = ExportMetricsServiceRequest()
    gauge(add_resource(req, {"service.name": 42}), "depth", (T0, 1))
    with pytest.raises(Rejected) as exc:
        dec(encoding).decode(encode(req, encoding))
    assert exc.value.code == "otlp_no_service"


def test_anonymous_resource_is_dropped_and_counted_when_others_are_named(encoding):
    req = ExportMetricsServiceRequest()
    gauge(add_resource(req, {"host.name": "quay-7"}), "depth", (T0, 1))
    gauge(add_resource(req, {"service.name": "ticket-api"}), "depth", (T0, 2))
    d = dec(encoding)
    assert d.decode(encode(req, encoding)) == [("ticket-api", T0_S, {"depth": 2.0})]
    assert d.stats.resources_without_service == 1


# ---------------------------------------------------------------------- what is not a payload


@pytest.mark.parametrize("raw", [b"\x00\xff\x13garbage\x99", b"\x0a\xff\xff\xff\xff\x0f", b"", b"{}", b"[1, 2]",
                                 b"not json at all", b'{"resourceMetrics": 7}', b'{"resourceMetrics": [{"scopeMetrics": "x"}]}'])
def test_garbage_is_invalid(encoding, raw):
    with pytest.raises(Rejected) as exc:
        dec(encoding).decode(raw)
    assert exc.value.code == "otlp_invalid"


def test_json_on_a_protobuf_topic_says_so():
    raw = encode(one_request(lambda sm: gauge(sm, "depth", (T0, 1))), "otlp_json")
    with pytest.raises(Rejected) as exc:
        dec("otlp_proto").decode(raw)
    assert exc.value.code == "otlp_invalid" and "otlp_json" in exc.value.detail


def test_too_large_payload(encoding):
    raw = encode(one_request(lambda sm: gauge(sm, "depth", (T0, 1))), encoding)
    with pytest.raises(Rejected) as exc:
        dec(encoding, max_message_bytes=len(raw) - 1).decode(raw)
    assert exc.value.code == "too_large"


def test_unusable_points_are_skipped_not_rejected(encoding):
    def build(sm):
        gauge(sm, "nan", (T0, math.nan))
        gauge(sm, "old", (10 * S, 1))  # 1970
        gauge(sm, "future", (int((NOW + 2 * 86_400) * S), 1))
        gauge(sm, "depth", (T0, 4))
        m = sm.metrics.add()
        m.name = "flagged"
        p = m.gauge.data_points.add()
        p.time_unix_nano = T0
        p.as_double = 1.0
        p.flags = metrics_pb2.DATA_POINT_FLAGS_NO_RECORDED_VALUE_MASK
        sm.metrics.add().name = "no_data"
        counter(sm, "unspecified", metrics_pb2.AGGREGATION_TEMPORALITY_UNSPECIFIED, (T0, 5))

    d = dec(encoding)
    assert d.decode(encode(one_request(build), encoding)) == [("ticket-api", T0_S, {"depth": 4.0})]
    assert dict(d.stats.skipped) == {"not_finite": 1, "bad_time": 2, "no_value": 1, "unknown_type": 1,
                                     "unspecified_temporality": 1}


def test_features_per_event_are_capped(encoding):
    req = one_request(lambda sm: [gauge(sm, f"g{i}", (T0, i)) for i in range(5)])
    d = dec(encoding, max_metrics=3)
    (_s, _ts, m), = d.decode(encode(req, encoding))
    assert m == {"g0": 0.0, "g1": 1.0, "g2": 2.0}
    assert d.stats.skipped["too_many_metrics"] == 2


_KEYS = ["resourceMetrics", "resource", "attributes", "key", "value", "stringValue", "intValue", "scopeMetrics",
         "scope", "metrics", "name", "gauge", "sum", "histogram", "exponentialHistogram", "summary", "dataPoints",
         "timeUnixNano", "startTimeUnixNano", "asDouble", "asInt", "aggregationTemporality", "isMonotonic",
         "bucketCounts", "explicitBounds", "count", "quantileValues", "quantile", "positive", "offset", "scale",
         "exemplars", "traceId", "flags"]
_JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats(allow_nan=False) | st.text(max_size=8)
    | st.sampled_from(["service.name", "1772409600000000000", "NaN", "x"]),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.sampled_from(_KEYS), inner, max_size=4),
    max_leaves=30,
)


# derandomize: seeded, the same cases every run
@settings(max_examples=300, deadline=None, derandomize=True, database=None, suppress_health_check=[HealthCheck.too_slow])
@given(_JSON)
def test_any_json_gives_events_or_a_rejection(obj):
    try:
        raw = orjson.dumps(obj)
    except TypeError:  # integers beyond 64 bits: not JSON orjson writes
        return
    try:
        events = dec("otlp_json").decode(raw)
    except Rejected as r:
        assert r.code in OTLP_REASONS
        return
    for service, ts, metrics in events:
        assert isinstance(service, str) and math.isfinite(ts)
        assert all(math.isfinite(v) for v in metrics.values())


# OTLP/JSON-shaped payloads with valid values, written as senders may (int64 as strings or
# numbers, doubles that are whole numbers or "NaN", enum integers); broken input is the
# business of the garbage tests above.
_U64 = st.integers(0, 2**64 - 1).map(str) | st.integers(0, 2**40)
_I64 = st.integers(-(2**63), 2**63 - 1).map(str) | st.integers(-(2**40), 2**40)
_TIME = st.one_of([st.integers(T0 - 3600 * S, T0 + 3600 * S).map(str)] * 3 + [_U64])
_FLOAT = st.floats(allow_nan=False, allow_infinity=False) | st.integers(-(10**6), 10**6) | st.just("NaN")
_ANY_VALUE = st.one_of(
    st.text(max_size=4).map(lambda v: {"stringValue": v}),
    st.booleans().map(lambda v: {"boolValue": v}),
    _I64.map(lambda v: {"intValue": v}),
    _FLOAT.map(lambda v: {"doubleValue": v}),
    st.just({"bytesValue": "AAE="}),
    st.just({}),
    st.just({"arrayValue": {"values": [{"stringValue": "a"}]}}),
)
_KEY = st.sampled_from(["service.name", "route", "zone"])
_ATTRS = st.lists(st.fixed_dictionaries({"key": _KEY, "value": _ANY_VALUE}), max_size=2)
_BUCKETS = st.fixed_dictionaries({}, optional={"offset": st.integers(-5, 5), "bucketCounts": st.lists(_U64, max_size=3)})
_QUANTILE = st.fixed_dictionaries({}, optional={"quantile": _FLOAT, "value": _FLOAT})
_COMMON = {"startTimeUnixNano": _TIME, "attributes": _ATTRS, "flags": st.sampled_from([0, 0, 0, 1, 2])}
_FIELDS = {
    "gauge": {"asDouble": _FLOAT},
    "sum": {"asInt": _I64},
    "histogram": {"count": _U64, "sum": _FLOAT, "bucketCounts": st.lists(_U64, max_size=3),
                  "explicitBounds": st.lists(_FLOAT, max_size=2)},
    "exponentialHistogram": {"count": _U64, "sum": _FLOAT, "scale": st.integers(-10, 20), "zeroCount": _U64,
                             "positive": _BUCKETS, "negative": _BUCKETS},
    "summary": {"count": _U64, "sum": _FLOAT, "quantileValues": st.lists(_QUANTILE, max_size=2)},
}
_NAME = st.sampled_from(["depth", "requests", "latency", "depth", "requests", "", "a\tb"])


def _metric_of(kind: str) -> st.SearchStrategy:
    point = st.fixed_dictionaries({"timeUnixNano": _TIME}, optional={**_COMMON, **_FIELDS[kind]})
    data = st.fixed_dictionaries(
        {"dataPoints": st.lists(point, min_size=1, max_size=3), "aggregationTemporality": st.sampled_from([1, 2, 2, 0])},
        optional={"isMonotonic": st.booleans()},
    )
    return st.fixed_dictionaries({"name": _NAME, kind: data})


_NAMED = st.sampled_from([[{"key": "service.name", "value": {"stringValue": "ticket-api"}}]] * 3 + [[]])
_RESOURCE = st.fixed_dictionaries({"attributes": st.builds(lambda named, rest: named + rest, _NAMED, _ATTRS)})
_SCOPE_METRICS = st.fixed_dictionaries({
    "scope": st.fixed_dictionaries({"name": st.text(max_size=3)}),
    "metrics": st.lists(st.one_of([_metric_of(kind) for kind in _FIELDS]), min_size=1, max_size=3),
})
_PAYLOAD = st.fixed_dictionaries({"resourceMetrics": st.lists(
    st.fixed_dictionaries({"resource": _RESOURCE, "scopeMetrics": st.lists(_SCOPE_METRICS, min_size=1, max_size=1)}),
    min_size=1, max_size=2)})


@settings(max_examples=60, deadline=None, derandomize=True, database=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(_PAYLOAD)
def test_fast_json_reader_agrees_with_the_reference_or_hands_on(obj):
    # Reference: protobuf's json_format.ParseDict. The fast reader may give up (and the
    # decoder then uses the reference), but whatever it builds must be what the reference builds.
    raw = orjson.dumps(obj)
    try:
        fast = otlp._fast_json_request(json.loads(raw))
    except (otlp._Slow, ValueError, TypeError, OverflowError, json_format.ParseError):
        return
    assert fast == _parse_reference(raw)


@settings(max_examples=60, deadline=None, derandomize=True, database=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(_PAYLOAD)
def test_both_encodings_of_one_request_give_the_same_events(obj):
    raw = orjson.dumps(obj)
    try:
        ref = _parse_reference(raw)  # reference: protobuf's json_format
    except json_format.ParseError:
        return
    results = []
    for encoding, payload in (("otlp_json", raw), ("otlp_proto", ref.SerializeToString())):
        d = dec(encoding)
        try:
            results.append((d.decode(payload), dict(d.stats.skipped)))
        except Rejected as r:
            results.append((r.code, None))
    assert results[0] == results[1]


@settings(max_examples=300, deadline=None, derandomize=True, database=None)
@given(st.data())
def test_any_damaged_protobuf_gives_events_or_a_rejection(data):
    req = one_request(lambda sm: (counter(sm, "r", CUMULATIVE, (T0, 5, T0 - S)),
                                  histogram(sm, "h", DELTA, {"t": T0, "bounds": BOUNDS, "counts": [1, 2, 3, 4, 5], "sum": 9.0})))
    raw = bytearray(req.SerializeToString())
    for _ in range(data.draw(st.integers(1, 4))):
        i = data.draw(st.integers(0, len(raw) - 1))
        raw[i] = data.draw(st.integers(0, 255))
    raw = bytes(raw[: data.draw(st.integers(0, len(raw)))])
    try:
        events = dec("otlp_proto").decode(raw)
    except Rejected as r:
        assert r.code in OTLP_REASONS
        return
    assert all(math.isfinite(v) for _s, _t, m in events for v in m.values())


# ---------------------------------------------------------------------- memory: bounds and restarts


def test_series_memory_is_bounded_and_evictions_counted(encoding):
    d = dec(encoding, max_series=2)
    start = T0 - 3600 * S

    def feed(t, names):
        req = one_request(lambda sm: [counter(sm, n, CUMULATIVE, (t, 100 if t == T0 else 160, start)) for n in names])
        return d.decode(encode(req, encoding))

    feed(T0, ["a", "b", "c"])  # a is the least recently seen when c arrives
    assert d.series_count == 2 and d.stats.evicted == 1
    assert feed(T0 + 60 * S, ["b", "c"]) == [("ticket-api", T0_S + 60, {"b": 1.0, "c": 1.0})]  # 60 / 60
    assert feed(T0 + 60 * S, ["a"]) == []  # forgotten: a baseline again
    assert d.stats.evicted == 2


def _mixed(t: int, k: int) -> ExportMetricsServiceRequest:
    start = T0 - 3600 * S

    def build(sm):
        counter(sm, "requests", CUMULATIVE, (t, 1000 + 90 * k, start, {"route": "/a"}), (t, 500 + 30 * k, start, {"route": "/b"}))
        histogram(sm, "latency_ms", CUMULATIVE,
                  {"t": t, "start": start, "bounds": BOUNDS, "counts": [1 + k, 2 + 3 * k, 3 + 5 * k, 2 * k, 0], "sum": 300.0 + 700 * k})
        exp_histogram(sm, "size", CUMULATIVE, {"t": t, "start": start, "scale": 2, "offset": -1, "counts": [k, 2 * k, 1], "sum": 5.0 * k + 1})
        summary(sm, "rpc_ms", {"t": t, "start": start, "count": 10 + 7 * k, "sum": 100.0 + 77 * k, "quantiles": {0.95: 9.0 + k}})
        gauge(sm, "depth", (t, k))

    return one_request(build)


def test_state_round_trip_gives_the_same_events(encoding):
    a = dec(encoding, max_series=1000)
    a.decode(encode(_mixed(T0, 0), encoding))
    a.decode(encode(_mixed(T0 + 60 * S, 1), encoding))
    state = orjson.loads(orjson.dumps(a.to_state()))  # it must survive JSON
    b = OtlpDecoder.from_state(state, now=lambda: NOW)
    assert b.series_count == a.series_count == 5
    nxt = encode(_mixed(T0 + 120 * S, 3), encoding)
    got_a, got_b = a.decode(nxt), b.decode(nxt)
    assert got_a == got_b
    (_s, _ts, m), = got_b
    # requests: (90 * 2 + 30 * 2) / 60 = 4.0 summed over routes; every kind gave its features
    assert m["requests"] == pytest.approx(4.0)
    assert {"latency_ms.count", "latency_ms.mean", "latency_ms.p95", "size.count", "size.p95",
            "rpc_ms.count", "rpc_ms.mean", "rpc_ms.p95", "depth"} <= set(m)
    assert b.to_state() == a.to_state()


def test_state_is_the_same_whichever_encoding_fed_it():
    p, j = dec("otlp_proto"), dec("otlp_json")
    for t, k in ((T0, 0), (T0 + 60 * S, 1)):
        p.decode(encode(_mixed(t, k), "otlp_proto"))
        j.decode(encode(_mixed(t, k), "otlp_json"))
    sp, sj = p.to_state(), j.to_state()
    assert sp["series"] == sj["series"]
    switched = OtlpDecoder.from_state(sp, encoding="otlp_json", now=lambda: NOW)
    nxt = _mixed(T0 + 120 * S, 2)
    assert switched.decode(encode(nxt, "otlp_json")) == p.decode(encode(nxt, "otlp_proto"))


def test_a_rejected_payload_leaves_the_memory_alone(encoding):
    d = dec(encoding)
    d.decode(encode(_mixed(T0, 0), encoding))
    before = d.to_state()
    anon = ExportMetricsServiceRequest()
    counter(add_resource(anon, {"host.name": "quay-7"}), "requests", CUMULATIVE, (T0 + 60 * S, 5, T0))
    with pytest.raises(Rejected):
        d.decode(encode(anon, encoding))
    assert d.to_state() == before


def test_broken_state_raises_a_state_error():
    good = dec("otlp_proto")
    good.decode(encode(_mixed(T0, 0), "otlp_proto"))
    state = good.to_state()
    with pytest.raises(OtlpStateError):
        OtlpDecoder.from_state({"format": "something-else"})
    broken = json.loads(json.dumps(state))
    broken["series"][0][0] = "zz"  # not hex
    with pytest.raises(OtlpStateError):
        OtlpDecoder.from_state(broken)
    broken = json.loads(json.dumps(state))
    broken["series"][0][1] = "x"
    with pytest.raises(OtlpStateError):
        OtlpDecoder.from_state(broken)


def test_from_state_with_a_smaller_limit_keeps_the_most_recent():
    d = dec("otlp_proto")
    start = T0 - 3600 * S
    for name in ("a", "b", "c"):
        d.decode(encode(one_request(lambda sm: counter(sm, name, CUMULATIVE, (T0, 100, start))), "otlp_proto"))
    small = OtlpDecoder.from_state(d.to_state(), max_series=2, now=lambda: NOW)
    assert small.series_count == 2 and small.stats.evicted == 1
    req = one_request(lambda sm: [counter(sm, n, CUMULATIVE, (T0 + 60 * S, 160, start)) for n in ("b", "c")])
    assert small.decode(encode(req, "otlp_proto")) == [("ticket-api", T0_S + 60, {"b": 1.0, "c": 1.0})]  # 60 / 60
    # a was the oldest: forgotten, so its next point is a baseline again
    req = one_request(lambda sm: counter(sm, "a", CUMULATIVE, (T0 + 60 * S, 160, start)))
    assert small.decode(encode(req, "otlp_proto")) == []


# ---------------------------------------------------------------------- the quantile estimator alone


def test_histogram_quantile_edges():
    assert histogram_quantile([], 0.5) is None
    assert histogram_quantile([(0.0, 10.0, 0)], 0.5) is None
    # a single point mass: every quantile is it
    assert histogram_quantile([(7.0, 7.0, 3)], 0.01) == 7.0
    # overlapping uniform segments [0, 10] (10) and [5, 15] (10): density 1 on [0,5), 2 on [5,10), 1 on [10,15]
    # rank 0.5 * 20 = 10 -> 5 from [0,5), then 5 more at density 2 -> 5 + 5 / 2 = 7.5
    assert histogram_quantile([(0.0, 10.0, 10), (5.0, 15.0, 10)], 0.5) == pytest.approx(7.5, rel=1e-12)


def test_constructor_refuses_bad_settings():
    with pytest.raises(ValueError):
        OtlpDecoder("otlp_xml")  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        OtlpDecoder("otlp_proto", histogram_quantile=1.0)
    with pytest.raises(ValueError):
        OtlpDecoder("otlp_proto", service_attributes=())
    with pytest.raises(ValueError):
        OtlpDecoder("otlp_proto", max_series=0)
