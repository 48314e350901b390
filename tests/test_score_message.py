"""The score message against its committed JSON Schema (jsonschema as the reference validator)."""

from __future__ import annotations

import json

import jsonschema
import pytest

from service.config import parse_config
from service.embedded import replay
from tests.test_embedded import write_stream


@pytest.fixture(scope="module")
def schema(repo_root):
    doc = json.loads((repo_root / "config" / "score-message.schema.json").read_text())
    jsonschema.Draft202012Validator.check_schema(doc)
    return doc


def test_every_emitted_score_message_matches_the_schema(schema, tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=3000)
    out = tmp_path / "scores.jsonl"
    replay(parse_config('[defaults]\nwarm_up = 10\n'), str(src), str(out))
    validator = jsonschema.Draft202012Validator(schema, format_checker=jsonschema.FormatChecker())
    messages = [json.loads(line) for line in out.read_text().splitlines()]
    assert messages
    for m in messages:
        validator.validate(m)
    assert any(m["anomalous"] for m in messages) and any(m["warming_up"] for m in messages)
    # `anomalous` is the service's alert state: never during warm-up, and an alert starts only on a
    # window whose score reaches the threshold (it may then hold on for a while: hysteresis).
    last: dict[str, bool] = {}
    for m in messages:
        if m["warming_up"]:
            assert not m["anomalous"]
        if m["anomalous"] and not last.get(m["service"], False):
            assert m["score"] >= m["threshold"]
        last[m["service"]] = m["anomalous"]


def test_the_schema_rejects_a_message_missing_a_field(schema):
    bad = {"schema_version": 1, "service": "a"}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(bad, schema)


# --- the C encoder (service/_scoremsg.c) against the Python form (orjson of the dict), byte for byte

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from models.service_model import Assessment, Contribution  # noqa: E402
from service import scoremsg  # noqa: E402

_c = pytest.importorskip("service._scoremsg")

_numbers = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True),
    st.floats(min_value=-1e-3, max_value=1e-3),  # where round(x, 6) and the exponent layouts meet
    st.floats(min_value=0.0, max_value=1.0),
    st.sampled_from([0.0, -0.0, 1e-6, 5e-7, 2.5e-5, 1e16, -1e15, 0.1234565, 1.0000005, 123456.7890125]),
    # round(x, 6) halfway cases and their neighbours, where the C short cut must hand over to dtoa: (k + 1/2) / 10^6
    # and the doubles a few steps either side of it, for k up to where the short cut stops (10^15)
    st.builds(lambda k, steps, sign: sign * _step((k + 0.5) / 1e6, steps),
              st.one_of(st.integers(0, 10**6), st.integers(0, 10**15)), st.integers(-6, 6), st.sampled_from([1.0, -1.0])),
    st.floats(min_value=9.99e8, max_value=1.001e9),  # |x| * 10^6 near 10^15, where the short cut stops
)


def _step(x: float, steps: int) -> float:
    import math

    for _ in range(abs(steps)):
        x = math.nextafter(x, math.inf if steps > 0 else -math.inf)
    return x
_names = st.one_of(st.text(max_size=12), st.sampled_from(["ticket-api", "latency_p95_ms.mean", ".mean", "count", "a.b.c"]))


def _python_form(*args) -> bytes:
    saved = scoremsg._c_encode
    scoremsg._c_encode = None
    try:
        return scoremsg.encode_score(*args)
    finally:
        scoremsg._c_encode = saved


@settings(max_examples=400, deadline=None)
@given(service=_names, kind=_names, count=st.one_of(st.integers(0, 10**6), st.integers(-2**63, 2**64 - 1)),  # orjson's int range
       threshold=_numbers, score=_numbers, raw=_numbers, flags=st.tuples(st.booleans(), st.booleans()),
       contributors=st.lists(st.tuples(_names, _numbers, _numbers, _numbers), max_size=6),
       start=st.sampled_from([1772409600.0, 1772409600.5, 0.0]))
def test_the_c_encoder_writes_the_bytes_orjson_writes(service, kind, count, threshold, score, raw, flags,
                                                     contributors, start) -> None:
    assessment = Assessment(score, raw, flags[0], flags[1], [Contribution(*c) for c in contributors])
    args = (service, start, start + 300.0, count, kind, threshold, assessment)
    expected = _python_form(*args)
    got = _c.encode(scoremsg.SCORE_SCHEMA_VERSION, service, scoremsg.format_rfc3339(start),
                    scoremsg.format_rfc3339(start + 300.0), count, kind, threshold, assessment)
    assert got is None or got == expected  # None: the Python form writes it
    assert scoremsg.encode_score(*args) == expected


@settings(max_examples=2000, deadline=None)
@given(x=_numbers)
def test_the_c_rounding_and_number_layout_are_python_s_and_orjson_s(x) -> None:
    import math

    import orjson

    if math.isfinite(x):
        assert _c.rounded(x) == round(x, 6) and math.copysign(1.0, _c.rounded(x)) == math.copysign(1.0, round(x, 6))
        assert _c.number(x) == orjson.dumps(x)
        assert _c.rounded_number(x) == orjson.dumps(round(x, 6))  # the scores' and contributors' numbers
    else:
        assert _c.number(x) is None and _c.rounded_number(x) is None


def test_the_c_encoder_takes_the_common_messages_and_hands_back_the_rest() -> None:
    plain = Assessment(0.995, 3.2, True, False, [Contribution("latency_p95_ms.mean", 431.5, 212.25, 9.81)])
    args = (scoremsg.SCORE_SCHEMA_VERSION, "ticket-api", "2026-03-02T00:00:00Z", "2026-03-02T00:05:00Z", 30,
            "combined", 0.99)
    assert _c.encode(*args, plain) == _python_form("ticket-api", 1772409600.0, 1772409900.0, 30, "combined", 0.99, plain)
    assert scoremsg.C_ENCODER  # the installed orjson writes the probe numbers as the C layout does
    for odd in (Assessment(float("nan"), 0.0, False, True, []),  # orjson writes NaN as null
                Assessment(0.5, 0.0, False, False, [Contribution("lätenz.mean", 1.0, 1.0, 0.0)]),  # not ASCII
                Assessment(0.5, 0.0, False, False, [Contribution('quote".mean', 1.0, 1.0, 0.0)])):  # an escape
        assert _c.encode(*args, odd) is None
    assert _c.encode(*args[:4], 2**63, "combined", 0.99, plain) is None  # a count beyond a signed 64 bits
    assert _c.encode(*args[:6], 1, plain) is None  # an int threshold: orjson writes 1, not 1.0
