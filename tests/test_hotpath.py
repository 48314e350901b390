"""The C hot path of Engine.feed (service/_hotpath.c) against the Python loop it accelerates.

The scanner may only take lines the Python loop would accept and must leave every trace the loop would
leave: the same window values (type and bits: an int stays an int), the same scores, rejects, counts and
runtime state. Each test feeds one input to an engine with the scanner and to one without it and compares
everything. Numbers are also checked against orjson, the decoder of the Python path (an outside
reference), and float literals against CPython's own ``float()``.
"""

from __future__ import annotations

import os
import random

import orjson
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service import engine as engine_module
from service.config import parse_config
from service.engine import Engine

NOW = 1_800_000_000.0
T0 = 1_772_409_600  # 2026-03-02T00:00:00Z
CONFIG = parse_config('[defaults]\nwindow = "1m"\nlateness = "10s"\nwarm_up = 3\n'
                      '[limits]\nmax_metrics = 8\nmax_service_name = 12\n')

pytestmark = pytest.mark.skipif(not engine_module.HOT_PATH, reason="built without the C hot path")


def _engine(hot: bool) -> tuple[Engine, list, list]:
    scores: list = []
    rejects: list = []
    eng = Engine(CONFIG, on_score=lambda s, payload, w: scores.append(payload),
                 on_reject=lambda code, detail, raw, origin: rejects.append((code, detail, raw, origin)),
                 now=lambda: NOW)
    if not hot:
        eng._scanner = None
    return eng, scores, rejects


def _run(lines: list[bytes], cuts: list[int], hot: bool, flush: bool = True):
    eng, scores, rejects = _engine(hot)
    src = eng.source("p0")
    edges = sorted({0, len(lines), *(c % (len(lines) + 1) for c in cuts)})
    for lo, hi in zip(edges, edges[1:]):
        eng.feed(src, lines[lo:hi], lambda i, lo=lo: {"line": lo + i})
    state = orjson.dumps(src.to_state())  # type-exact: 1 and 1.0 serialise differently
    if flush:
        eng.flush(src)
    return scores, rejects, eng.stats.accepted, dict(eng.stats.rejected), state


def _same(lines: list[bytes], cuts: list[int] = ()) -> None:
    assert _run(lines, list(cuts), hot=True) == _run(lines, list(cuts), hot=False)


def test_the_test_environment_has_the_hot_path():
    # The extension is optional at install time; where it fails to build the suite would otherwise
    # test only the Python loop without anyone noticing. TIDEWATCH_PURE_PYTHON=1 turns it off on purpose.
    if os.environ.get("TIDEWATCH_PURE_PYTHON", "") in ("", "0"):
        assert engine_module.HOT_PATH


def _fleet(services: int, steps: int, seed: int) -> list[bytes]:
    rng = random.Random(seed)
    out = []
    for k in range(steps):
        for s in range(services):
            metrics = {"lat": round(rng.uniform(50, 500), rng.choice((0, 1, 2, 3))), "err": rng.randint(0, 3),
                       "cpu": rng.random(), "big": rng.choice((1e300, 2.5e-300, -0.0, 123456789012345678))}
            out.append(orjson.dumps({"service": f"s{s}", "ts": T0 + 10 * k + rng.random(), "metrics": metrics}))
    return out


@pytest.fixture
def handed_back(monkeypatch) -> list[int]:
    """How many lines each call of the Python loop took (the lines the scanner handed back)."""
    calls: list[int] = []
    original = Engine._feed_range

    def spy(self, src, raws, lo, hi, origin_of):
        calls.append(hi - lo)
        return original(self, src, raws, lo, hi, origin_of)

    monkeypatch.setattr(Engine, "_feed_range", spy)
    return calls


def test_a_plain_fleet_is_scored_identically_and_the_scanner_takes_most_lines(handed_back):
    lines = _fleet(20, 60, seed=3)
    _same(lines, cuts=[7, 300, 301, 999])
    # The scanner must be doing the work, not handing every line back.
    handed_back.clear()
    eng, _, _ = _engine(hot=True)
    eng.feed(eng.source("p0"), lines, lambda i: i)
    # Only each service's first line goes to the Python loop (a new service is admitted there); the scanner
    # takes every other line, the first of each later window included (it opens the window itself).
    assert sum(handed_back) == len({orjson.loads(x)["service"] for x in lines}) == 20
    assert eng.stats.accepted == len(lines)


def test_many_services_beyond_the_interning_tables_first_size():
    # The table starts at 4096 slots and grows; names must still resolve to the right services.
    lines = [orjson.dumps({"service": f"v{s}", "ts": T0 + k, "metrics": {"x": s + k}})
             for k in range(3) for s in range(5000)]
    hot = _run(lines, [], hot=True, flush=False)
    cold = _run(lines, [], hot=False, flush=False)
    assert hot == cold


# Pieces of messages: the common case (most draws) and its near misses, each of which the scanner must
# hand back (or take) exactly as the Python loop would decide.
_GOOD_NUMBERS = ["0", "-0", "7", "-12", "3.25", "-0.0", "1e3", "1E-3", "2.5e+2", "0.1", "0.30000000000000004",
                 "123456789012345678", "9007199254740993.0", "0.000001234", "-987.125", "42"]
_BAD_NUMBERS = ["1234567890123456789", "18446744073709551616", "9007199254740993", "1.7976931348623157e308",
                "4.9e-324", "1e-400", "1e400", "01", "1.", ".5", "-", "1e", "NaN", "12345678901234567890.5",
                "1.00000000000000000000001"]
_SCALARS = ['"a"', "1", "-2.5", "true", "false", "null"]
_BAD_SCALARS = ['"\\u00e9"', '"\xc3\xa9"', "[1]", '{"k":1}', "tru"]
_SERVICES = ['"api"', '"db"', '"cache"']
_BAD_SERVICES = ['""', '"' + "s" * 13 + '"', '"a\\u0062"', '"caf\xc3\xa9"', "7", '"a\\tb"', '"q\x7f"', '"x y"']
# Mostly in the first window (so the lines after its first are the scanner's), some in the next two
# (closing it; anything in the first window after that is late).
_FIRST = [str(T0 + 5), str(T0 + 6), f"{T0 + 7}.5", str((T0 + 8) * 1000), '"2026-03-02T00:00:09.125Z"',
          '"2026-03-02T01:00:09+01:00"', '"2026-03-02T00:00:10"']
_TS = _FIRST * 30 + [str(T0 + 65), f"{T0 + 70}.5", str(T0 + 125), f"{T0 + 126}.25", '"2026-03-02T00:02:05.5Z"']
_BAD_TS = ['"2026-03-02T00:00:10.1234567Z"', '"2026-03-02 00:00:10Z"', "true", str(T0 - 10_000_000_000), "946684799", str(int(NOW + 200_000)), "1e400"]
_NAMES = ["lat", "err", "cpu"]
_BAD_NAMES = ["mem", "q", "a\\u0062", "\xc3\xa9"]


def _message(choose, times: list[str] = _TS) -> bytes:
    """One message line; ``choose(options)`` picks one of a list (hypothesis or a seeded Random)."""
    def pick(good: list, bad: list, odds: int = 30):
        return choose(good * odds + bad)

    ws = choose(["", "", " ", "\t", "\r\n "])
    fields = []
    if choose([True] * 40 + [False]):
        fields.append(f'"service"{ws}:{ws}{pick(_SERVICES, _BAD_SERVICES)}')
    if choose([True] * 40 + [False]):
        fields.append(f'"ts":{pick(times, _BAD_TS)}')
    if choose([True] * 40 + [False]):
        if choose([True] * 5 + [False]):
            names = list(_NAMES)
            names.insert(choose([0, 1, 2]), names.pop())  # mostly every metric, once each, in some order
        else:
            names = [pick(_NAMES, _BAD_NAMES, 6) for _ in range(choose(list(range(10))))]
        body = ",".join(f'"{n}"{ws}:{pick(_GOOD_NUMBERS, _BAD_NUMBERS + _SCALARS, 15)}' for n in names)
        fields.append(f'"metrics":{ws}{{{ws}{body}{ws}}}')
    labels = choose([0] * 5 + [1, 2, 3])
    if labels == 1:
        fields.append('"labels":null')
    elif labels == 2:
        keys = [choose(["az", "host", "az", "v"]) for _ in range(choose([0, 1, 2, 3, 4]))]
        fields.append('"labels":{' + ",".join(f'"{k}":{pick(_SCALARS, _BAD_SCALARS)}' for k in keys) + "}")
    elif labels == 3:
        fields.append('"labels":5')
    extra = choose([0] * 30 + [1, 2, 3])
    if extra == 1:
        fields.append('"unit":"ms"')
    elif extra == 2:
        fields.append('"ts":' + str(T0 + 1))  # a second ts
    elif extra == 3:
        fields.append('"service":"api"')  # a second service
    if len(fields) > 1:
        fields.insert(choose(list(range(len(fields)))), fields.pop(choose(list(range(len(fields))))))
    text = "{" + f",{ws}".join(fields) + "}"
    tail = pick(["", " ", "\r"], ["x", ",", "}"], 20)
    return (ws + text + tail).encode("latin-1")


@st.composite
def message(draw) -> bytes:
    return _message(lambda options: draw(st.sampled_from(options)))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(message(), min_size=1, max_size=60), st.lists(st.integers(0, 60), max_size=3))
def test_any_mix_of_messages_gives_the_same_scores_rejects_and_state(lines, cuts):
    _same(lines, cuts)


def test_the_mixed_messages_are_mostly_taken_by_the_scanner(handed_back):
    # The mix above must exercise the scanner, not only the Python loop: most of the lines it accepts
    # are taken by the scanner, and the rest of the mix reaches many reasons to refuse a line.
    rng = random.Random(11)
    lines = [_message(rng.choice, _FIRST) for _ in range(400)]  # one window: none late
    eng, _, _ = _engine(hot=True)
    eng.feed(eng.source("p0"), lines, lambda i: i)
    taken = len(lines) - sum(handed_back)
    assert taken >= 0.75 * eng.stats.accepted > 100
    assert len(eng.stats.rejected) >= 8


@settings(max_examples=200, deadline=None)
@given(st.lists(st.one_of(
    st.floats(allow_nan=False, allow_infinity=False).map(repr),
    st.integers(-(10 ** 20), 10 ** 20).map(str),
    st.builds(lambda m, f, e: f"{m}.{f}e{e}", st.integers(-10 ** 17, 10 ** 17), st.integers(0, 10 ** 18),
              st.integers(-330, 310)),
    st.builds(lambda m, f: f"{m}.{f}", st.integers(-10 ** 9, 10 ** 9), st.text("0123456789", min_size=1, max_size=25)),
), min_size=1, max_size=20))
def test_metric_values_are_the_objects_orjson_gives(literals):
    # Every value is taken into an open window by the scanner (or handed back), so the window's lists hold
    # exactly orjson's objects: int for an integer literal, the correctly rounded float otherwise.
    first = b'{"service":"api","ts":%d,"metrics":{"v":1}}' % (T0 + 1)
    lines = [first] + [b'{"service":"api","ts":%d,"metrics":{"v":%s}}' % (T0 + 2, x.encode()) for x in literals]
    eng, _, rejects = _engine(hot=True)
    src = eng.source("p0")
    eng.feed(src, lines, lambda i: i)
    got = src.open["api"][float(T0 // 60 * 60)].values["v"][1:]
    expected = []
    for x in literals:
        try:
            expected.append(orjson.loads(x))
        except orjson.JSONDecodeError:
            pass  # refused as not JSON by the Python path: no value
    assert [(type(v), v, repr(v)) for v in got] == [(type(v), v, repr(v)) for v in expected]
    for x, v in zip([x for x in literals if not _refused(x)], got):
        if type(v) is float:
            assert v == float(x) and repr(v) == repr(float(x))  # CPython's correctly rounded conversion


def _refused(x: str) -> bool:
    try:
        orjson.loads(x)
    except orjson.JSONDecodeError:
        return True
    return False


def test_late_new_window_and_new_metric_lines_are_handed_back_in_order():
    lines = [
        b'{"service":"api","ts":%d,"metrics":{"a":1}}' % (T0 + 1),
        b'{"service":"api","ts":%d,"metrics":{"a":2,"b":3}}' % (T0 + 2),  # b is new to the window
        b'{"service":"api","ts":%d,"metrics":{"b":4,"a":5}}' % (T0 + 3),
        b'{"service":"api","ts":%d,"metrics":{"a":6}}' % (T0 + 75),  # closes [T0, T0+60)
        b'{"service":"api","ts":%d,"metrics":{"a":7}}' % (T0 + 4),  # late
        b'{"service":"db","ts":%d,"metrics":{"a":8}}' % (T0 + 76),  # new service
        b'{"service":"db","ts":%d,"metrics":{"a":9},"labels":{"az":"n","up":true,"w":null,"n":2}}' % (T0 + 77),
    ]
    hot = _run(lines, [], hot=True)
    assert hot == _run(lines, [], hot=False)
    scores, rejects, accepted, rejected, _ = hot
    assert accepted == 6 and rejected == {"late": 1} and rejects[0][3] == {"line": 4}


def _python_time(text: str) -> float | None:
    from service.decode import Rejected, _parse_ts_text

    try:
        return _parse_ts_text(text)
    except Rejected:
        return None


@settings(max_examples=500, deadline=None)
@given(st.datetimes(min_value=__import__("datetime").datetime(1990, 1, 1),
                    max_value=__import__("datetime").datetime(2100, 12, 31)),
       st.integers(0, 6), st.sampled_from(["Z", "", "+00:00", "-00:00", "+05:30", "-08:00", "+23:59", "-23:59"]))
def test_rfc3339_times_read_as_fromisoformat_reads_them(moment, digits, zone):
    # The reference: datetime.fromisoformat(...).timestamp() (the Python path, service.decode).
    from service._hotpath import rfc3339

    text = moment.strftime("%Y-%m-%dT%H:%M:%S")
    if digits:
        text += "." + f"{moment.microsecond:06d}"[:digits]
    text += zone
    got = rfc3339(text.encode())
    assert got is not None and repr(got) == repr(_python_time(text))


@pytest.mark.parametrize("text", [
    "2026-02-29T00:00:00Z", "2026-13-01T00:00:00Z", "2026-00-01T00:00:00Z", "2026-04-31T00:00:00Z",
    "2026-03-02T24:00:00Z", "2026-03-02T00:60:00Z", "2026-03-02T00:00:60Z", "2026-03-02T00:00:00+24:00",
    "2026-03-02T00:00:00+01:60", "2026-03-02T00:00:00.Z", "2026-03-02T00:00:00.1234567Z", "2026-03-02t00:00:00Z",
    "2026-03-02 00:00:00Z", "2026-03-02T00:00:00z", "2026-03-02T00:00:00+0100", "2026-03-02T00:00:00,5Z",
    "2026-03-02T00:00:00+01:30:15", "2026-03-02", "2026-03-02T00:00", "20260302T000000Z", "2026-3-02T00:00:00Z",
    "yesterday", "2026-03-02T00:00:00Zx",
])
def test_other_time_forms_are_handed_back(text):
    # Each is either refused by the Python path or a form the scanner leaves to it; the scanner never
    # reads one itself (it would have to agree with fromisoformat on every such form).
    from service._hotpath import rfc3339

    assert rfc3339(text.encode()) is None


def test_leap_days_and_zone_edges_agree_with_fromisoformat():
    from service._hotpath import rfc3339

    for text in ["2024-02-29T23:59:59.999999Z", "2000-02-29T00:00:00Z", "2100-02-28T12:00:00-23:59",
                 "2026-03-02T00:01:00.412Z", "2026-12-31T23:59:59+00:00", "2026-03-02T00:01:00"]:
        assert repr(rfc3339(text.encode())) == repr(_python_time(text))
    assert rfc3339(b"2100-02-29T00:00:00Z") is None and _python_time("2100-02-29T00:00:00Z") is None


_VALID = [
    b'{"service":"api","ts":%d,"metrics":{"lat":12.5,"err":0,"cpu":0.25}}' % (T0 + 5),
    b'{"service":"db","ts":"2026-03-02T00:00:07.250Z","metrics":{"lat":3e2,"err":1,"cpu":-0.5},"labels":{"az":"n"}}',
    b' {"metrics": {"cpu": 1, "lat": 2, "err": 3}, "labels": null, "ts": %d, "service": "cache"}\r' % (T0 + 6),
]


@st.composite
def mutated(draw) -> bytes:
    # A valid line with bytes flipped, inserted, deleted or cut off: the scanner reads untrusted input in
    # C, so whatever it meets it must neither read past the line nor decide otherwise than the Python path.
    line = bytearray(draw(st.sampled_from(_VALID)))
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.integers(0, 3))
        at = draw(st.integers(0, max(0, len(line) - 1)))
        if op == 0 and line:
            line[at] = draw(st.integers(0, 255))
        elif op == 1:
            line[at:at] = draw(st.binary(min_size=1, max_size=4))
        elif op == 2 and line:
            del line[at]
        else:
            del line[at:]
    return bytes(line)


@settings(max_examples=400, deadline=None)
@given(st.lists(st.one_of(mutated(), st.sampled_from(_VALID), st.binary(max_size=64)), min_size=1, max_size=30))
def test_damaged_lines_are_decided_as_the_python_path_decides(lines):
    _same(lines)
