"""Property-based tests (hypothesis) of the decoder, the windows and the engine.

Properties: no exception escapes; accepted plus rejected equals the input; no (service, window) is
emitted twice; the watermark never moves back.
"""

from __future__ import annotations

import math

import orjson
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.config import parse_config
from service.decode import REASONS, NativeDecoder, Rejected
from service.engine import Engine
from service.windows import SourceWindows

T0 = 1772409600.0
NOW = 1_800_000_000.0

json_values = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**63 - 1) | st.floats(allow_nan=False) | st.text(max_size=8),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=6), children, max_size=4),
    max_leaves=12,
)

metric_values = st.one_of(
    st.floats(-1e6, 1e6, allow_nan=False), st.integers(-1000, 1000), st.text(max_size=3), st.booleans(), st.none()
)
messages = st.fixed_dictionaries(
    {
        "service": st.one_of(st.sampled_from(["a", "b", "c"]), st.text(max_size=4), st.integers(-(2**63), 2**63 - 1)),
        "ts": st.one_of(st.floats(T0, T0 + 7200), st.integers(int(T0), int(T0) + 7200), st.just("2026-03-02T00:10:00Z"),
                        st.text(max_size=5), st.none()),
        "metrics": st.one_of(st.dictionaries(st.sampled_from(["lat", "err", "rps"]), metric_values, max_size=3),
                             st.lists(st.integers(-5, 5), max_size=2)),
    },
    optional={"labels": json_values},
)


raw_inputs = st.one_of(
    messages.map(lambda m: orjson.dumps(m)),
    json_values.map(lambda v: orjson.dumps(v)),
    st.binary(max_size=64),
)


@settings(max_examples=400, deadline=None)
@given(raw_inputs)
def test_the_decoder_accepts_or_rejects_with_a_known_reason_and_never_raises_anything_else(raw):
    d = NativeDecoder(now=lambda: NOW)
    try:
        service, ts, metrics = d.decode(raw)
    except Rejected as r:
        assert r.code in REASONS
        return
    assert isinstance(service, str) and service and math.isfinite(ts)
    assert metrics and all(type(v) in (int, float) and math.isfinite(v) for v in metrics.values())


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(raw_inputs, max_size=60), st.integers(1, 7))
def test_engine_accounts_for_every_message_and_never_emits_a_window_twice(raws, batch):
    emitted: list[tuple[str, float]] = []
    rejected: list[str] = []
    e = Engine(parse_config('[defaults]\nwindow = "5m"\nlateness = "30s"\nwarm_up = 2\n'),
               on_score=lambda s, p, w: emitted.append((s, w.start)),
               on_reject=lambda code, detail, raw, origin: rejected.append(code), now=lambda: NOW)
    src = e.source("p0")
    marks = []
    for i in range(0, len(raws), batch):
        e.feed(src, raws[i:i + batch], lambda j: j)
        marks.append(src.high_mark)
    e.flush(src)
    marks.append(src.high_mark)
    assert e.stats.accepted + len(rejected) == len(raws)
    assert len(emitted) == len(set(emitted))
    assert marks == sorted(marks)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.sampled_from(["a", "b"]), st.floats(0, 3600), st.floats(-10, 10)), max_size=80),
       st.sampled_from([10.0, 60.0, 300.0]), st.sampled_from([0.0, 5.0, 120.0]))
def test_windows_hold_each_accepted_event_once_and_the_watermark_never_moves_back(events, length, lateness):
    sw = SourceWindows()
    accepted = 0
    seen: set[tuple[str, float]] = set()
    total = 0
    last_mark = -math.inf
    for service, ts, v in events:
        if sw.add(service, T0 + ts, {"x": v}, length, lateness):
            accepted += 1
        assert sw.high_mark >= last_mark
        last_mark = sw.high_mark
        for s, w in sw.pop_closed():
            assert (s, w.start) not in seen
            assert w.start <= sw.high_mark
            seen.add((s, w.start))
            total += w.count
    for s, w in sw.pop_closed(flush=True):
        assert (s, w.start) not in seen
        seen.add((s, w.start))
        total += w.count
    assert total == accepted
