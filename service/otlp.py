"""OpenTelemetry (OTLP) metrics input: export requests in, tidewatch events out.

Each payload is one ``ExportMetricsServiceRequest``, as a collector's Kafka exporter
writes one per message: binary protobuf (``otlp_proto``) or the OTLP/JSON mapping
(``otlp_json``: camelCase keys, 64-bit integers as strings, enums as integers, trace
and span ids as hex). :meth:`OtlpDecoder.decode` turns one payload into a list of
``(service, ts_seconds, metrics)`` events, the same triple the native decoder gives,
so the windows and models downstream do not know where a number came from.

How OTLP data becomes features (the choices, and why):

- **Service.** The first of ``service_attributes`` that the resource carries as a
  non-empty printable string within ``max_service_name``. A resource without one is
  dropped and counted (``stats.resources_without_service``); a payload in which no
  resource has one is rejected with ``otlp_no_service``: rejecting a whole batch for
  one anonymous resource would throw the named ones away with it.
- **Events.** All points of one resource with the same ``time_unix_nano`` make one
  event, at that time in seconds. Two replicas of a service are two resources, so
  they give separate events that the window then averages; this keeps a feature's
  meaning the same whether or not replicas happen to export at the same instant.
- **Point attributes are aggregated away.** A feature per attribute set
  (``requests{route=/a}``) would make the feature space as wide as the label
  cardinality, and models would see features appear and vanish. Within one event,
  rates of the same name are summed (the resource's total rate), gauges averaged,
  histogram counts summed and buckets merged before the quantile is taken.
- **Gauge** -> ``name``: the value.
- **Monotonic sum** -> ``name``: a rate per second. Delta: value / (time - start).
  Cumulative: the increase since the series' previous point over the time between
  them. The first point of a cumulative series only sets the baseline (one point
  has no increase). A counter reset (value below the previous one, or a new start
  time) emits value / (time - start) when the start is known, never a negative rate.
- **Non-monotonic sum** -> ``name``: the value as is, like a gauge. Such a sum is a
  level that moves both ways (queue depth, connections open); a drop is real data,
  not a reset, so neither the rate nor the reset rule applies.
- **Histogram** -> ``name.count`` (observations since the previous point: the count
  of a delta point, the count increase of a cumulative one), ``name.mean`` (sum over
  count of that same increase) and ``name.p95`` (``histogram_quantile``, named by
  :func:`quantile_suffix`), estimated from the bucket counts by linear interpolation
  inside the bucket that holds the rank. The first bucket starts at 0 when every
  bound is positive, else it is a point at the first bound; the open-ended last
  bucket is a point at the last bound.
- **Exponential histogram** -> the same three features; bucket ``i`` at scale ``s``
  covers ``(base**i, base**(i+1)]`` with ``base = 2**(2**-s)`` (negative buckets
  mirrored), the zero bucket is a point at 0. Cumulative points at different
  scales are compared after merging the finer one down to the coarser scale.
- **Summary** -> ``name.count`` and ``name.mean`` from its (always cumulative) count
  and sum, and ``name.p95`` from the quantile value reported for exactly the
  configured quantile, when there is one; summary quantiles cannot be merged, so
  several attribute sets are averaged.
- Points that cannot give a value are skipped and counted by reason
  (:data:`OTLP_SKIPS`, ``stats.skipped``); they never reject the payload.

Cumulative series are remembered in a bounded LRU of ``max_series``; an evicted
series starts over at its next point, like a new one. A series is the full resource
(every attribute, not only the service: replicas keep separate counters), the scope,
the metric name and the point attributes, hashed; this is the time-series identity
of the OpenTelemetry data model. :meth:`~OtlpDecoder.to_state` and
:meth:`~OtlpDecoder.from_state` carry that memory across a restart; a rejected
payload never changes it, and a point not newer than its series' last one is
skipped, so a redelivered message cannot count an increase twice.

Parsing: ``otlp_proto`` goes to protobuf. For ``otlp_json`` exemplars (the only
place hex ids occur) are dropped, then a fast reader builds the request from the
shapes senders write; whatever it does not know (an enum written as its name,
``"NaN"`` as text, a snake_case key, a field newer than this code) goes to
protobuf's general ``json_format`` parser, which also has the last word on what is
invalid.

>>> from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest
>>> req = ExportMetricsServiceRequest()
>>> rm = req.resource_metrics.add()
>>> kv = rm.resource.attributes.add(); kv.key = "service.name"; kv.value.string_value = "ticket-api"
>>> m = rm.scope_metrics.add().metrics.add(); m.name = "queue_depth"
>>> p = m.gauge.data_points.add(); p.time_unix_nano = 1_772_409_600_000_000_000; p.as_int = 7
>>> OtlpDecoder("otlp_proto", now=lambda: 1.8e9).decode(req.SerializeToString())
[('ticket-api', 1772409600.0, {'queue_depth': 7.0})]
>>> try:
...     OtlpDecoder("otlp_json").decode(b"not json")
... except Rejected as r:
...     print(r.code)
otlp_invalid
"""

from __future__ import annotations

import hashlib
import math
import time
from collections import Counter, OrderedDict
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

import orjson
from google.protobuf import json_format
from google.protobuf.message import DecodeError
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest

from service.decode import MIN_EVENT_TS, Rejected
from service.errors import StateStoreError

__all__ = [
    "OtlpDecoder",
    "OtlpStats",
    "OtlpStateError",
    "OTLP_REASONS",
    "OTLP_SKIPS",
    "ENCODINGS",
    "quantile_suffix",
    "histogram_quantile",
]

Encoding = Literal["otlp_proto", "otlp_json"]
ENCODINGS: tuple[str, ...] = ("otlp_proto", "otlp_json")

# Reject codes this module adds (an oversized payload reuses the native ``too_large``).
OTLP_REASONS: dict[str, str] = {
    "otlp_invalid": "the payload is not an OTLP metrics export request in the topic's encoding (protobuf or OTLP/JSON), or holds no resource metrics",
    "otlp_no_service": "no resource in the payload carries a usable service attribute (service.name unless configured otherwise)",
}

# Why single data points (not payloads) were left out; the keys of ``OtlpStats.skipped``.
OTLP_SKIPS: dict[str, str] = {
    "no_value": "the point has no value: flagged 'no recorded value', or no value field set",
    "not_finite": "the value or sum is NaN or infinite",
    "bad_time": "time_unix_nano is missing, before 2000-01-01 or further in the future than the allowed skew",
    "no_interval": "a delta sum point whose start time is missing or not before its time, so no rate exists",
    "negative_delta": "a monotonic delta sum point with a negative value",
    "first_point": "the first point of a cumulative series (new, evicted, or reset with no start time) only sets the baseline",
    "not_newer": "a cumulative point not newer than its series' last point (a redelivery or an out-of-order export)",
    "unspecified_temporality": "a sum or histogram whose aggregation temporality is unspecified",
    "bad_histogram": "bucket counts do not fit the bounds, the bounds are not increasing and finite, or the scale is out of range",
    "buckets_changed": "a cumulative histogram's bucket layout changed between points: count and mean kept, quantile left out",
    "unknown_type": "a metric with no data, or of a type this version does not know",
    "bad_name": "the metric name is empty or not printable",
    "kind_conflict": "a feature name already came from a metric of another kind in the same event",
    "too_many_metrics": "the event already had max_metrics features",
}

_FORMAT = "tidewatch.otlp-series/1"
_NO_RECORDED_VALUE = 1  # DataPointFlags.DATA_POINT_FLAGS_NO_RECORDED_VALUE_MASK
_DELTA, _CUMULATIVE = 1, 2  # AggregationTemporality values
_NS_PER_S = 1e9  # divided by, not multiplied by 1e-9: whole seconds stay exact
# The proto leaves scale unrestricted; the SDK specification keeps it in [-10, 20] (from
# memory), and far outside that the bucket bounds overflow or stop being distinct doubles.
_MIN_SCALE, _MAX_SCALE = -10, 20


class OtlpStateError(StateStoreError):
    """A saved OTLP series memory cannot be read back."""


@dataclass(slots=True)
class OtlpStats:
    """Counters of one decoder, for the metrics endpoint; not part of the saved state."""

    payloads: int = 0
    points: int = 0
    events: int = 0
    resets: int = 0
    evicted: int = 0
    resources_without_service: int = 0
    skipped: Counter = field(default_factory=Counter)


def quantile_suffix(q: float) -> str:
    """The feature suffix for a quantile: its percentage without the dot.

    >>> quantile_suffix(0.5), quantile_suffix(0.95), quantile_suffix(0.99), quantile_suffix(0.999)
    ('p50', 'p95', 'p99', 'p999')
    """
    text = f"{q * 100:.4f}".rstrip("0").rstrip(".")
    return "p" + text.replace(".", "")


def histogram_quantile(segments: Iterable[tuple[float, float, float]], q: float) -> float | None:
    """Quantile of a mixture of buckets, linear inside each bucket.

    Each segment ``(lower, upper, count)`` spreads ``count`` evenly over
    ``[lower, upper]``, or puts it all at ``lower`` when ``upper == lower``. Segments
    may overlap (buckets of several points with different bounds); the result is the
    smallest ``x`` at which the mixture's cumulative count reaches ``q`` times the total.
    None when there is no count.

    >>> histogram_quantile([(0.0, 10.0, 2), (10.0, 20.0, 2)], 0.75)   # rank 3: 10 + 10 * (3 - 2) / 2
    15.0
    >>> histogram_quantile([(0.0, 10.0, 1), (50.0, 50.0, 1)], 0.9)    # rank 1.8 lands on the point at 50
    50.0
    """
    marks: dict[float, list[float]] = {}  # x -> [point mass at x, change of density at x]
    total = 0.0
    for lo, hi, n in segments:
        if n <= 0:
            continue
        total += n
        if hi > lo:
            d = n / (hi - lo)
            marks.setdefault(lo, [0.0, 0.0])[1] += d
            marks.setdefault(hi, [0.0, 0.0])[1] -= d
        else:
            marks.setdefault(lo, [0.0, 0.0])[0] += n
    if total <= 0:
        return None
    rank = q * total
    xs = sorted(marks)
    cum = 0.0
    density = 0.0
    prev = xs[0]
    for x in xs:
        if density > 0.0:
            reached = cum + density * (x - prev)
            if reached >= rank:
                # min(): a density left at a rounding residue must not carry x past the mark
                return min(x, prev + (rank - cum) / density)
            cum = reached
        point, change = marks[x]
        if point:
            cum += point
            if cum >= rank:
                return x
        density += change
        prev = x
    return xs[-1]


def _explicit_segments(bounds: Sequence[float], counts: Sequence[int]) -> list[tuple[float, float, float]]:
    # Bucket k covers (bounds[k-1], bounds[k]]; the ends are closed off as the module docstring says.
    last = len(bounds)
    first_lower = 0.0 if bounds[0] > 0 else bounds[0]
    out = []
    for k, n in enumerate(counts):
        if not n:
            continue
        if k == 0:
            out.append((first_lower, bounds[0], n))
        elif k == last:
            out.append((bounds[-1], bounds[-1], n))
        else:
            out.append((bounds[k - 1], bounds[k], n))
    return out


def _valid_bounds(bounds: tuple) -> bool:
    return all(math.isfinite(b) for b in bounds) and all(b < c for b, c in zip(bounds, bounds[1:]))


def _explicit_quantile(bounds: Sequence[float], counts: Sequence[int], q: float) -> float | None:
    """The single-layout case of :func:`histogram_quantile`, walked with exact integer counts.

    >>> _explicit_quantile([10.0, 50.0], [2, 6, 2], 0.5)   # rank 5 in (10, 50] after 2: 10 + 40 * 3 / 6
    30.0
    """
    total = sum(counts)
    if total <= 0:
        return None
    rank = q * total
    last = len(bounds)
    cum = 0
    for k, n in enumerate(counts):
        if n and cum + n >= rank:
            if k == last:
                return bounds[-1]
            hi = bounds[k]
            lo = (0.0 if bounds[0] > 0 else hi) if k == 0 else bounds[k - 1]
            return lo + (hi - lo) * (rank - cum) / n
        cum += n
    return bounds[-1]


def _exp_bound(index: int, scale: int) -> float:
    try:
        return 2.0 ** (index * 2.0**-scale)
    except OverflowError:
        return math.inf


def _exp_segments(scale: int, zero: int, pos: tuple[int, tuple[int, ...]], neg: tuple[int, tuple[int, ...]]) -> list | None:
    out: list[tuple[float, float, float]] = []
    if zero > 0:
        out.append((0.0, 0.0, zero))
    for sign, (offset, counts) in ((1.0, pos), (-1.0, neg)):
        for k, n in enumerate(counts):
            if not n:
                continue
            lo = _exp_bound(offset + k, scale)
            hi = _exp_bound(offset + k + 1, scale)
            if math.isinf(hi):
                return None
            out.append((lo, hi, n) if sign > 0 else (-hi, -lo, n))
    return out


def _downscale(offset: int, counts: tuple[int, ...], shift: int) -> tuple[int, tuple[int, ...]]:
    """Re-index exponential buckets ``shift`` scales coarser (index >> shift merges 2**shift buckets)."""
    if shift == 0 or not counts:
        return offset, counts
    new_offset = offset >> shift
    out = [0] * (((offset + len(counts) - 1) >> shift) - new_offset + 1)
    for k, n in enumerate(counts):
        out[((offset + k) >> shift) - new_offset] += n
    return new_offset, tuple(out)


def _bucket_diff(a: tuple[int, tuple[int, ...]], b: tuple[int, tuple[int, ...]]) -> tuple[int, tuple[int, ...]] | None:
    """a - b per index (same scale); None if any bucket went down."""
    (ao, ac), (bo, bc) = a, b
    if not bc:
        return a
    if not ac:
        return None if any(bc) else a
    lo = min(ao, bo)
    hi = max(ao + len(ac), bo + len(bc))
    out = [0] * (hi - lo)
    for k, n in enumerate(ac):
        out[ao - lo + k] += n
    for k, n in enumerate(bc):
        out[bo - lo + k] -= n
    if any(n < 0 for n in out):
        return None
    return lo, tuple(out)


def _canon(attrs: Any) -> bytes:
    # Serialised key-values are self-delimiting, so the sorted concatenation is a
    # canonical form of the set whatever order the sender used.
    if not attrs:
        return b""
    if len(attrs) == 1:
        return attrs[0].SerializeToString(deterministic=True)
    return b"".join(sorted(kv.SerializeToString(deterministic=True) for kv in attrs))


def _series_key(prefix: bytes, kind: bytes, name: bytes, attrs: Any) -> bytes:
    # prefix and kind have fixed lengths and a printable name holds no NUL, so this
    # concatenation is unambiguous; one hash call per point keeps the hot path short.
    return hashlib.blake2b(prefix + kind + name + b"\0" + _canon(attrs), digest_size=16).digest()


def _digest(*parts: bytes) -> bytes:
    h = hashlib.blake2b(digest_size=16)
    for part in parts:
        h.update(len(part).to_bytes(4, "little"))
        h.update(part)
    return h.digest()


def _strip_exemplars(obj: dict) -> None:
    # Exemplars are the only place metrics carry trace and span ids, which OTLP/JSON
    # writes as hex where the protobuf JSON mapping expects base64; they are unused
    # here, so they are dropped before parsing rather than translated.
    for rm in _dicts(obj, "resourceMetrics"):
        for sm in _dicts(rm, "scopeMetrics"):
            for m in _dicts(sm, "metrics"):
                for kind in ("gauge", "sum", "histogram", "exponentialHistogram"):
                    data = m.get(kind)
                    if type(data) is dict:
                        for p in _dicts(data, "dataPoints"):
                            p.pop("exemplars", None)


class _Slow(Exception):
    """The fast OTLP/JSON reader met something it leaves to the general parser."""


# Keys the fast reader knows per message; any other key (a newer field, a snake_case
# name, which the general parser also accepts) sends the payload to the general parser.
_K_REQ = frozenset({"resourceMetrics"})
_K_RM = frozenset({"resource", "scopeMetrics", "schemaUrl"})
_K_RES = frozenset({"attributes", "droppedAttributesCount"})
_K_SM = frozenset({"scope", "metrics", "schemaUrl"})
_K_SCOPE = frozenset({"name", "version", "attributes", "droppedAttributesCount"})
_K_KV = frozenset({"key", "value"})
_K_METRIC = frozenset({"name", "description", "unit", "gauge", "sum", "histogram", "exponentialHistogram", "summary"})
_K_DATA = frozenset({"dataPoints", "aggregationTemporality", "isMonotonic"})
_K_POINT = frozenset({"attributes", "startTimeUnixNano", "timeUnixNano", "flags"})
_K_NUM = _K_POINT | {"asDouble", "asInt"}
_K_HIST = _K_POINT | {"count", "sum", "bucketCounts", "explicitBounds", "min", "max"}
_K_EXP = _K_POINT | {"count", "sum", "scale", "zeroCount", "positive", "negative", "min", "max", "zeroThreshold"}
_K_BUCKETS = frozenset({"offset", "bucketCounts"})
_K_SUMMARY = _K_POINT | {"count", "sum", "quantileValues"}
_K_QV = frozenset({"quantile", "value"})
_DATA_KEYS = ("gauge", "sum", "histogram", "exponentialHistogram", "summary")


def _obj(v: Any, keys: frozenset) -> dict:
    if type(v) is not dict or not v.keys() <= keys:
        raise _Slow
    return v


def _arr(d: dict, key: str) -> list:
    v = d.get(key, ())
    if type(v) is list or v == ():
        return v
    raise _Slow


def _int(v: Any) -> int:
    # 64-bit integers are strings in OTLP/JSON; plain numbers are accepted as well.
    if type(v) is int:
        return v
    if type(v) is str and v.isascii() and (v.isdigit() or (v[:1] == "-" and v[1:].isdigit())):
        return int(v)
    raise _Slow


def _float(v: Any) -> float:
    if type(v) is float or type(v) is int:
        return float(v)
    raise _Slow  # "NaN", "Infinity" and the like: the general parser knows them


def _attrs_into(container: Any, items: list) -> None:
    for item in items:
        kv = container.add(key=_str(_obj(item, _K_KV).get("key", "")))
        v = item.get("value")
        if v is None:
            continue
        if type(v) is not dict:
            raise _Slow
        if len(v) == 1:
            (kind, x), = v.items()
            if kind == "stringValue" and type(x) is str:
                kv.value.string_value = x
                continue
            if kind == "boolValue" and type(x) is bool:
                kv.value.bool_value = x
                continue
            if kind == "intValue":
                kv.value.int_value = _int(x)
                continue
            if kind == "doubleValue":
                kv.value.double_value = _float(x)
                continue
        kv.value.SetInParent()  # an empty value object is still a present value
        json_format.ParseDict(v, kv.value, ignore_unknown_fields=True)  # arrays, key-value lists, bytes


def _str(v: Any) -> str:
    if type(v) is str:
        return v
    raise _Slow


def _point_common(p: Any, d: dict) -> None:
    _attrs_into(p.attributes, _arr(d, "attributes"))
    if "startTimeUnixNano" in d:
        p.start_time_unix_nano = _int(d["startTimeUnixNano"])
    if "timeUnixNano" in d:
        p.time_unix_nano = _int(d["timeUnixNano"])
    if "flags" in d:
        p.flags = _int(d["flags"])


def _fast_json_request(obj: dict) -> ExportMetricsServiceRequest:
    """Build the request from OTLP/JSON, filling only the fields the decoder reads.

    Covers what senders write in practice; anything else raises :class:`_Slow` and the
    caller uses the general ``json_format`` parser, which is the reference (and about
    five times slower).
    """
    req = ExportMetricsServiceRequest()
    for rmd in _arr(_obj(obj, _K_REQ), "resourceMetrics"):
        rm = req.resource_metrics.add()
        _obj(rmd, _K_RM)
        if "resource" in rmd:
            rm.resource.SetInParent()
            _attrs_into(rm.resource.attributes, _arr(_obj(rmd["resource"], _K_RES), "attributes"))
        for smd in _arr(rmd, "scopeMetrics"):
            sm = rm.scope_metrics.add()
            _obj(smd, _K_SM)
            if "scope" in smd:
                sc = _obj(smd["scope"], _K_SCOPE)
                sm.scope.SetInParent()
                sm.scope.name = _str(sc.get("name", ""))
                sm.scope.version = _str(sc.get("version", ""))
                _attrs_into(sm.scope.attributes, _arr(sc, "attributes"))
            for md in _arr(smd, "metrics"):
                _obj(md, _K_METRIC)
                m = sm.metrics.add(name=_str(md.get("name", "")))
                kinds = [k for k in _DATA_KEYS if k in md]
                if len(kinds) != 1:
                    if kinds:
                        raise _Slow  # two kinds in one metric: let the general parser object
                    continue
                kind = kinds[0]
                dd = _obj(md[kind], _K_DATA)
                if kind == "gauge":
                    data = m.gauge
                elif kind == "sum":
                    data = m.sum
                    if "isMonotonic" in dd:
                        if type(dd["isMonotonic"]) is not bool:
                            raise _Slow
                        data.is_monotonic = dd["isMonotonic"]
                elif kind == "histogram":
                    data = m.histogram
                elif kind == "exponentialHistogram":
                    data = m.exponential_histogram
                else:
                    data = m.summary
                if kind != "gauge" and kind != "summary" and "aggregationTemporality" in dd:
                    t = dd["aggregationTemporality"]
                    if type(t) is not int:
                        raise _Slow  # an enum name: the general parser maps it
                    data.aggregation_temporality = t
                if kind == "gauge" or kind == "sum":
                    data.SetInParent()
                    for pd in _arr(dd, "dataPoints"):
                        p = data.data_points.add()
                        _point_common(p, _obj(pd, _K_NUM))
                        if "asDouble" in pd:
                            if "asInt" in pd:
                                raise _Slow
                            p.as_double = _float(pd["asDouble"])
                        elif "asInt" in pd:
                            p.as_int = _int(pd["asInt"])
                elif kind == "histogram":
                    data.SetInParent()
                    for pd in _arr(dd, "dataPoints"):
                        p = data.data_points.add()
                        _point_common(p, _obj(pd, _K_HIST))
                        p.count = _int(pd.get("count", 0))
                        if "sum" in pd:
                            p.sum = _float(pd["sum"])
                        p.bucket_counts.extend([_int(n) for n in _arr(pd, "bucketCounts")])
                        p.explicit_bounds.extend([_float(b) for b in _arr(pd, "explicitBounds")])
                elif kind == "exponentialHistogram":
                    data.SetInParent()
                    for pd in _arr(dd, "dataPoints"):
                        p = data.data_points.add()
                        _point_common(p, _obj(pd, _K_EXP))
                        p.count = _int(pd.get("count", 0))
                        if "sum" in pd:
                            p.sum = _float(pd["sum"])
                        p.scale = _int(pd.get("scale", 0))
                        p.zero_count = _int(pd.get("zeroCount", 0))
                        for side, buckets in (("positive", p.positive), ("negative", p.negative)):
                            if side in pd:
                                bd = _obj(pd[side], _K_BUCKETS)
                                buckets.SetInParent()
                                buckets.offset = _int(bd.get("offset", 0))
                                buckets.bucket_counts.extend([_int(n) for n in _arr(bd, "bucketCounts")])
                else:
                    data.SetInParent()
                    for pd in _arr(dd, "dataPoints"):
                        p = data.data_points.add()
                        _point_common(p, _obj(pd, _K_SUMMARY))
                        p.count = _int(pd.get("count", 0))
                        p.sum = _float(pd.get("sum", 0.0))
                        for qd in _arr(pd, "quantileValues"):
                            _obj(qd, _K_QV)
                            p.quantile_values.add(quantile=_float(qd.get("quantile", 0.0)), value=_float(qd.get("value", 0.0)))
    return req


def _dicts(obj: Any, key: str) -> list:
    if type(obj) is not dict:
        return []
    value = obj.get(key)
    return [v for v in value if type(v) is dict] if type(value) is list else []


class OtlpDecoder:
    """Decode OTLP metrics export requests into ``(service, ts_seconds, metrics)`` events.

    Parameters
    ----------
    encoding
        ``"otlp_proto"`` (binary protobuf) or ``"otlp_json"`` (OTLP/JSON).
    service_attributes
        Resource attributes tried in order for the service name.
    histogram_quantile
        The quantile reported for histograms and summaries, in (0, 1).
    max_series
        Cumulative series remembered; the least recently seen is forgotten beyond it.
    max_message_bytes, max_service_name, max_metrics, max_future_skew
        Input limits: largest payload, longest service name, most features in one
        event, how far past the wall clock a point's time may lie (seconds).
    now
        Wall clock in epoch seconds, injected so tests can drive it.

    Attributes
    ----------
    stats : OtlpStats
        Running counters (points, events, resets, evictions, skips by reason).
    """

    def __init__(
        self,
        encoding: Encoding,
        *,
        service_attributes: tuple[str, ...] = ("service.name",),
        histogram_quantile: float = 0.95,
        max_series: int = 100_000,
        max_message_bytes: int = 8_388_608,
        max_service_name: int = 200,
        max_metrics: int = 256,
        max_future_skew: float = 86_400.0,
        now: Callable[[], float] = time.time,
    ) -> None:
        if encoding not in ENCODINGS:
            raise ValueError(f"encoding must be one of {ENCODINGS}, not {encoding!r}")
        if not service_attributes or not all(isinstance(a, str) and a for a in service_attributes):
            raise ValueError("service_attributes must be a non-empty tuple of attribute names")
        if not 0.0 < histogram_quantile < 1.0:
            raise ValueError(f"histogram_quantile must lie strictly between 0 and 1, not {histogram_quantile!r}")
        if max_series < 1 or max_metrics < 1 or max_service_name < 1 or max_message_bytes < 1:
            raise ValueError("max_series, max_metrics, max_service_name and max_message_bytes must be positive")
        self.encoding = encoding
        self.service_attributes = tuple(service_attributes)
        self.quantile = float(histogram_quantile)
        self.suffix = quantile_suffix(self.quantile)
        self.max_series = int(max_series)
        self.max_message_bytes = int(max_message_bytes)
        self.max_service_name = int(max_service_name)
        self.max_metrics = int(max_metrics)
        self.max_future_skew = float(max_future_skew)
        self.now = now
        self.stats = OtlpStats()
        # series digest -> (kind, start_ns, time_ns, *payload); kinds: "s" sum (value),
        # "h" histogram (count, sum|None, bounds, counts), "e" exponential histogram
        # (count, sum|None, scale, zero_count, (offset, counts) positive, negative),
        # "q" summary (count, sum|None). Oldest first.
        self._series: OrderedDict[bytes, tuple] = OrderedDict()
        self._bounds: dict[tuple, tuple] = {}  # interned bucket bounds: every series of a metric shares one
        self._ceiling = 0.0
        self._ceiling_at = -1e18

    # ------------------------------------------------------------------ public

    @property
    def series_count(self) -> int:
        """Cumulative series currently remembered."""
        return len(self._series)

    def decode(self, raw: bytes) -> list[tuple[str, float, dict[str, float]]]:
        """One payload -> its events, sorted by time.

        Raises :class:`~service.decode.Rejected` with ``too_large``, ``otlp_invalid``
        or ``otlp_no_service``; a rejected payload leaves the series memory as it was.
        A valid payload can give no event (for instance only first cumulative points).
        """
        if len(raw) > self.max_message_bytes:
            raise Rejected("too_large", f"{len(raw)} bytes is over the limit of {self.max_message_bytes}")
        req = self._parse(raw)
        resources = req.resource_metrics
        if not resources:
            raise Rejected("otlp_invalid", "the payload holds no resource metrics")
        named = []
        for rm in resources:
            service = self._service_of(rm.resource.attributes)
            if service is None:
                self.stats.resources_without_service += 1
            else:
                named.append((service, rm))
        if not named:
            tried = ", ".join(self.service_attributes)
            raise Rejected("otlp_no_service", f"no resource carries a usable string attribute among: {tried}")

        stats = self.stats
        stats.payloads += 1
        self._ceiling_now()
        events: dict[tuple[bytes, int], tuple[str, dict[str, list]]] = {}
        for service, rm in named:
            res = _digest(_canon(rm.resource.attributes))
            for sm in rm.scope_metrics:
                prefix = res + _digest(sm.scope.name.encode(), sm.scope.version.encode(), _canon(sm.scope.attributes))
                for metric in sm.metrics:
                    self._metric(service, res, prefix, metric, events)
        out = []
        for (_res, t_ns), (service, feats) in sorted(events.items(), key=lambda kv: kv[0][1]):
            metrics = {}
            for name, acc in feats.items():
                value = _finish(acc, self.quantile)
                if value is not None and math.isfinite(value):
                    metrics[name] = value
            if metrics:
                out.append((service, t_ns / _NS_PER_S, metrics))
        stats.events += len(out)
        return out

    def to_state(self) -> dict:
        """The settings and the cumulative-series memory, as plain JSON-ready data."""
        series = []
        for key, e in self._series.items():
            kind = e[0]
            row: list[Any] = [key.hex(), kind, e[1], e[2], e[3], e[4]]
            if kind == "h":
                row += [list(e[5]), list(e[6])]
            elif kind == "e":
                row += [e[5], e[6], e[7][0], list(e[7][1]), e[8][0], list(e[8][1])]
            series.append(row)
        return {
            "format": _FORMAT,
            "settings": {
                "encoding": self.encoding,
                "service_attributes": list(self.service_attributes),
                "histogram_quantile": self.quantile,
                "max_series": self.max_series,
                "max_message_bytes": self.max_message_bytes,
                "max_service_name": self.max_service_name,
                "max_metrics": self.max_metrics,
                "max_future_skew": self.max_future_skew,
            },
            "series": series,
        }

    @classmethod
    def from_state(cls, state: dict, **overrides: Any) -> OtlpDecoder:
        """Rebuild a decoder from :meth:`to_state`; keyword arguments override saved settings.

        >>> d = OtlpDecoder("otlp_json", max_series=10)
        >>> OtlpDecoder.from_state(d.to_state(), max_series=5).max_series
        5
        """
        try:
            if state.get("format") != _FORMAT:
                raise OtlpStateError(f"not an OTLP series memory (format {state.get('format')!r})")
            settings = dict(state["settings"])
            settings["service_attributes"] = tuple(settings["service_attributes"])
            settings.update(overrides)
            dec = cls(**settings)
            for row in state["series"]:
                key = bytes.fromhex(row[0])
                kind, start, t, count, total = row[1], int(row[2]), int(row[3]), row[4], row[5]
                if kind == "s":
                    entry: tuple = ("s", start, t, _number(count), None)
                elif kind == "q":
                    entry = ("q", start, t, int(count), _opt_float(total))
                elif kind == "h":
                    bounds = tuple(float(b) for b in row[6])
                    counts = tuple(int(n) for n in row[7])
                    if counts and (len(counts) != len(bounds) + 1 or not _valid_bounds(bounds)):
                        raise OtlpStateError(f"series {row[0]} has unusable bucket bounds")
                    entry = ("h", start, t, int(count), _opt_float(total), dec._intern(bounds), counts)
                elif kind == "e":
                    entry = ("e", start, t, int(count), _opt_float(total), int(row[6]), int(row[7]),
                             (int(row[8]), tuple(int(n) for n in row[9])), (int(row[10]), tuple(int(n) for n in row[11])))
                else:
                    raise OtlpStateError(f"unknown series kind {kind!r}")
                dec._remember(key, entry)
        except OtlpStateError:
            raise
        except (KeyError, IndexError, TypeError, ValueError, AttributeError) as exc:
            raise OtlpStateError(f"the OTLP series memory is malformed: {exc!r}") from exc
        return dec

    # ------------------------------------------------------------------ parsing

    def _parse(self, raw: bytes) -> ExportMetricsServiceRequest:
        req = ExportMetricsServiceRequest()
        if self.encoding == "otlp_proto":
            try:
                req.ParseFromString(raw)
            except (DecodeError, ValueError, RecursionError) as exc:
                hint = "; it looks like JSON: is the topic's encoding otlp_json?" if raw.lstrip()[:1] == b"{" else ""
                raise Rejected("otlp_invalid", f"not an OTLP protobuf export request: {exc}{hint}") from None
            return req
        try:
            obj = orjson.loads(raw)
        except orjson.JSONDecodeError as exc:
            raise Rejected("otlp_invalid", f"not valid JSON: {exc}") from None
        if type(obj) is not dict:
            raise Rejected("otlp_invalid", f"expected a JSON object, got {type(obj).__name__}")
        _strip_exemplars(obj)
        try:
            return _fast_json_request(obj)
        except (_Slow, ValueError, TypeError, OverflowError, json_format.ParseError):
            pass  # the general parser below has the last word, errors included
        try:
            # Unknown keys are ignored, as OTLP/JSON receivers must do for newer senders.
            json_format.ParseDict(obj, req, ignore_unknown_fields=True)
        except (json_format.ParseError, ValueError, TypeError, RecursionError) as exc:
            raise Rejected("otlp_invalid", f"not an OTLP/JSON export request: {str(exc)[:200]}") from None
        return req

    def _service_of(self, attrs: Any) -> str | None:
        wanted = self.service_attributes
        found: dict[str, str] = {}
        for kv in attrs:
            if kv.key in wanted and kv.key not in found and kv.value.WhichOneof("value") == "string_value":
                found[kv.key] = kv.value.string_value
        for name in wanted:
            s = found.get(name)
            if s and len(s) <= self.max_service_name and s.isprintable():
                return s
        return None

    def _ceiling_now(self) -> float:
        # Once a second is plenty for a skew measured in hours (as the native decoder does).
        now = self.now()
        if now - self._ceiling_at > 1.0:
            self._ceiling_at = now
            self._ceiling = now + self.max_future_skew
        return self._ceiling

    # ------------------------------------------------------------------ metrics

    def _metric(self, service: str, res: bytes, prefix: bytes, metric: Any, events: dict) -> None:
        kind = metric.WhichOneof("data")
        skipped = self.stats.skipped
        if kind is None:
            skipped["unknown_type"] += 1
            return
        data = getattr(metric, kind)
        points = data.data_points
        if not points:
            return
        self.stats.points += len(points)
        name = metric.name
        if not name or not name.isprintable():
            skipped["bad_name"] += len(points)
            return
        if kind == "gauge":
            for p in points:
                v, t = self._number_point(p)
                if v is not None:
                    self._add(events, service, res, t, name, "g", v)
        elif kind == "sum":
            if not data.is_monotonic:
                for p in points:
                    v, t = self._number_point(p)
                    if v is not None:
                        self._add(events, service, res, t, name, "g", v)
            elif data.aggregation_temporality == _DELTA:
                self._delta_sum(service, res, name, points, events)
            elif data.aggregation_temporality == _CUMULATIVE:
                self._cumulative_sum(service, res, prefix, name, points, events)
            else:
                skipped["unspecified_temporality"] += len(points)
        elif kind == "histogram" or kind == "exponential_histogram":
            temporality = data.aggregation_temporality
            if temporality not in (_DELTA, _CUMULATIVE):
                skipped["unspecified_temporality"] += len(points)
                return
            explicit = kind == "histogram"
            ordered = points if temporality == _DELTA else _by_time(points)
            for p in ordered:
                self._histogram_point(service, res, prefix, name, p, explicit, temporality == _CUMULATIVE, events)
        elif kind == "summary":
            for p in _by_time(points):
                self._summary_point(service, res, prefix, name, p, events)
        else:  # pragma: no cover - a oneof member added to the proto after this was written
            skipped["unknown_type"] += len(points)

    def _time_ok(self, p: Any) -> int | None:
        t = p.time_unix_nano
        ts = t / _NS_PER_S
        if ts < MIN_EVENT_TS or ts > self._ceiling:
            self.stats.skipped["bad_time"] += 1
            return None
        return t

    def _number_point(self, p: Any) -> tuple[float | int | None, int]:
        which = p.WhichOneof("value")
        if which is None or p.flags & _NO_RECORDED_VALUE:
            self.stats.skipped["no_value"] += 1
            return None, 0
        v = p.as_double if which == "as_double" else p.as_int
        if which == "as_double" and not math.isfinite(v):
            self.stats.skipped["not_finite"] += 1
            return None, 0
        t = self._time_ok(p)
        if t is None:
            return None, 0
        return v, t

    def _delta_sum(self, service: str, res: bytes, name: str, points: Any, events: dict) -> None:
        skipped = self.stats.skipped
        for p in points:
            v, t = self._number_point(p)
            if v is None:
                continue
            start = p.start_time_unix_nano
            if not start or start >= t:
                skipped["no_interval"] += 1
                continue
            if v < 0:
                skipped["negative_delta"] += 1
                continue
            self._add(events, service, res, t, name, "r", v / ((t - start) / _NS_PER_S))

    def _cumulative_sum(self, service: str, res: bytes, prefix: bytes, name: str, points: Any, events: dict) -> None:
        skipped = self.stats.skipped
        series = self._series
        name_b = name.encode()
        for p in _by_time(points):
            v, t = self._number_point(p)
            if v is None:
                continue
            start = p.start_time_unix_nano
            key = _series_key(prefix, b"s", name_b, p.attributes)
            prev = series.get(key)
            if prev is not None and t <= prev[2]:
                skipped["not_newer"] += 1
                continue
            self._remember(key, ("s", start, t, v, None))
            if prev is None:
                skipped["first_point"] += 1
                continue
            if start != prev[1] or v < prev[3]:
                self.stats.resets += 1
                if start and start < t:
                    self._add(events, service, res, t, name, "r", v / ((t - start) / _NS_PER_S))
                else:
                    skipped["first_point"] += 1
                continue
            self._add(events, service, res, t, name, "r", (v - prev[3]) / ((t - prev[2]) / _NS_PER_S))

    def _histogram_point(self, service: str, res: bytes, prefix: bytes, name: str, p: Any, explicit: bool,
                         cumulative: bool, events: dict) -> None:
        skipped = self.stats.skipped
        if p.flags & _NO_RECORDED_VALUE:
            skipped["no_value"] += 1
            return
        t = self._time_ok(p)
        if t is None:
            return
        count = p.count
        total = p.sum if p.HasField("sum") else None
        if total is not None and not math.isfinite(total):
            total = None  # a broken sum costs the mean only; count and quantile still hold
        if explicit:
            layout = self._explicit_layout(p)
        else:
            layout = self._exp_layout(p)
        if layout is False:
            skipped["bad_histogram"] += 1
            return
        start = p.start_time_unix_nano
        if not cumulative:
            self._add_histogram(events, service, res, t, name, count, total, explicit, layout)
            return
        key = _series_key(prefix, b"h" if explicit else b"e", name.encode(), p.attributes)
        if explicit:
            entry: tuple = ("h", start, t, count, total, layout[0], layout[1])
        else:
            entry = ("e", start, t, count, total, *layout)
        prev = self._series.get(key)
        if prev is not None and t <= prev[2]:
            skipped["not_newer"] += 1
            return
        self._remember(key, entry)
        if prev is None:
            skipped["first_point"] += 1
            return
        if start != prev[1] or count < prev[3]:
            self.stats.resets += 1
            if start and start < t:
                self._add_histogram(events, service, res, t, name, count, total, explicit, layout)
            else:
                skipped["first_point"] += 1
            return
        dcount = count - prev[3]
        dtotal = total - prev[4] if total is not None and prev[4] is not None else None
        diff = _explicit_diff(layout, prev) if explicit else _exp_diff(layout, prev)
        if diff is None:
            skipped["buckets_changed"] += 1
        self._add_histogram(events, service, res, t, name, dcount, dtotal, explicit, diff)

    def _explicit_layout(self, p: Any) -> tuple | bool:
        counts = tuple(p.bucket_counts)
        if not counts:
            return ((), ())
        bounds = tuple(p.explicit_bounds)
        if len(counts) != len(bounds) + 1:
            return False
        known = self._bounds.get(bounds)
        if known is not None:
            return known, counts
        if not _valid_bounds(bounds):
            return False
        return self._intern(bounds), counts

    def _exp_layout(self, p: Any) -> tuple | bool:
        scale = p.scale
        if not _MIN_SCALE <= scale <= _MAX_SCALE:
            return False
        pos = (p.positive.offset, tuple(p.positive.bucket_counts))
        neg = (p.negative.offset, tuple(p.negative.bucket_counts))
        return scale, p.zero_count, pos, neg

    def _intern(self, bounds: tuple) -> tuple:
        got = self._bounds.get(bounds)
        if got is None:
            if len(self._bounds) < 4096:  # a flood of distinct layouts must not grow this without end
                self._bounds[bounds] = bounds
            got = bounds
        return got

    def _summary_point(self, service: str, res: bytes, prefix: bytes, name: str, p: Any, events: dict) -> None:
        skipped = self.stats.skipped
        if p.flags & _NO_RECORDED_VALUE:
            skipped["no_value"] += 1
            return
        t = self._time_ok(p)
        if t is None:
            return
        for qv in p.quantile_values:
            if abs(qv.quantile - self.quantile) < 1e-9 and math.isfinite(qv.value):
                self._add(events, service, res, t, f"{name}.{self.suffix}", "g", qv.value)
                break
        count = p.count
        total = p.sum if math.isfinite(p.sum) else None
        start = p.start_time_unix_nano
        key = _series_key(prefix, b"q", name.encode(), p.attributes)
        prev = self._series.get(key)
        if prev is not None and t <= prev[2]:
            skipped["not_newer"] += 1
            return
        self._remember(key, ("q", start, t, count, total))
        if prev is None:
            skipped["first_point"] += 1
            return
        if start != prev[1] or count < prev[3]:
            self.stats.resets += 1
            if not (start and start < t):
                skipped["first_point"] += 1
                return
            dcount, dtotal = count, total
        else:
            dcount = count - prev[3]
            dtotal = total - prev[4] if total is not None and prev[4] is not None else None
        self._add(events, service, res, t, f"{name}.count", "n", dcount)
        if dtotal is not None:
            self._add(events, service, res, t, f"{name}.mean", "m", dtotal, dcount)

    # ------------------------------------------------------------------ accumulation

    def _remember(self, key: bytes, entry: tuple) -> None:
        series = self._series
        if key in series:
            series[key] = entry
            series.move_to_end(key)
            return
        series[key] = entry
        if len(series) > self.max_series:
            series.popitem(last=False)
            self.stats.evicted += 1

    def _add(self, events: dict, service: str, res: bytes, t: int, name: str, kind: str, a: float, b: Any = 0.0) -> None:
        """Fold one value into feature ``name`` of the event (resource, t).

        kinds: "g" gauge [sum, n] -> mean; "r" rate [sum] -> sum; "n" count -> sum;
        "m" mean [sum, count] -> sum / count; "s" buckets -> quantile (see :meth:`_add_buckets`).
        """
        ev = events.get((res, t))
        if ev is None:
            ev = events[(res, t)] = (service, {})
        feats = ev[1]
        acc = feats.get(name)
        if acc is None:
            if len(feats) >= self.max_metrics:
                self.stats.skipped["too_many_metrics"] += 1
                return
            if kind == "g" or kind == "m":
                feats[name] = [kind, a, 1 if kind == "g" else b]
            elif kind == "s":
                feats[name] = [kind, {}, []]
                self._add_buckets(feats[name], a, b)
            else:
                feats[name] = [kind, a]
            return
        if acc[0] != kind:
            self.stats.skipped["kind_conflict"] += 1
            return
        if kind == "g":
            acc[1] += a
            acc[2] += 1
        elif kind == "m":
            acc[1] += a
            acc[2] += b
        elif kind == "s":
            self._add_buckets(acc, a, b)
        else:
            acc[1] += a

    @staticmethod
    def _add_buckets(acc: list, bounds: tuple | None, buckets: Sequence) -> None:
        """acc = ["s", {bounds: summed counts}, [other segments]].

        Explicit buckets with the same bounds (the usual case across attribute sets)
        are summed as integers, so a single layout takes the exact walk in
        :func:`_explicit_quantile`; exponential buckets arrive as segments.
        """
        if bounds is None:
            acc[2].extend(buckets)
            return
        summed = acc[1].get(bounds)
        if summed is None:
            acc[1][bounds] = list(buckets)
        else:
            for k, n in enumerate(buckets):
                summed[k] += n

    def _add_histogram(self, events: dict, service: str, res: bytes, t: int, name: str, count: int,
                       total: float | None, explicit: bool, layout: tuple | None) -> None:
        self._add(events, service, res, t, f"{name}.count", "n", count)
        if total is not None:
            self._add(events, service, res, t, f"{name}.mean", "m", total, count)
        if layout is None:
            return
        if explicit:
            bounds, counts = layout
            if len(counts) > 1 and any(counts):
                self._add(events, service, res, t, f"{name}.{self.suffix}", "s", bounds, counts)
            return
        segments = _exp_segments(*layout)
        if segments is None:
            self.stats.skipped["bad_histogram"] += 1
        elif segments:
            self._add(events, service, res, t, f"{name}.{self.suffix}", "s", None, segments)


def _finish(acc: list, q: float) -> float | None:
    kind = acc[0]
    if kind == "g":
        return acc[1] / acc[2]
    if kind == "m":
        return acc[1] / acc[2] if acc[2] > 0 else None
    if kind == "s":
        layouts, segments = acc[1], acc[2]
        if len(layouts) == 1 and not segments:
            (bounds, counts), = layouts.items()
            return _explicit_quantile(bounds, counts, q)
        for bounds, counts in layouts.items():
            segments.extend(_explicit_segments(bounds, counts))
        return histogram_quantile(segments, q)
    return float(acc[1])


def _explicit_diff(layout: tuple, prev: tuple) -> tuple | None:
    bounds, counts = layout
    pbounds, pcounts = prev[5], prev[6]
    if not counts and not pcounts:
        return (), ()
    if bounds != pbounds or len(counts) != len(pcounts):
        return None
    diff = tuple(a - b for a, b in zip(counts, pcounts))
    if any(d < 0 for d in diff):
        return None
    return bounds, diff


def _exp_diff(layout: tuple, prev: tuple) -> tuple | None:
    scale, zero, pos, neg = layout
    pscale, pzero, ppos, pneg = prev[5], prev[6], prev[7], prev[8]
    if zero < pzero:
        return None
    common = min(scale, pscale)
    pos, neg = _downscale(*pos, scale - common), _downscale(*neg, scale - common)
    ppos, pneg = _downscale(*ppos, pscale - common), _downscale(*pneg, pscale - common)
    dpos, dneg = _bucket_diff(pos, ppos), _bucket_diff(neg, pneg)
    if dpos is None or dneg is None:
        return None
    return common, zero - pzero, dpos, dneg


def _by_time(points: Any) -> Any:
    # A batch may hold several points of one series; the increase needs them in time order.
    if len(points) < 2:
        return points
    return sorted(points, key=lambda p: p.time_unix_nano)


def _number(v: Any) -> int | float:
    if type(v) is int:
        return v
    f = float(v)
    if not math.isfinite(f):
        raise ValueError(f"non-finite value {v!r}")
    return f


def _opt_float(v: Any) -> float | None:
    return None if v is None else _number(float(v))
