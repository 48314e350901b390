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
