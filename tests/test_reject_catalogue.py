"""The whole bad-input catalogue through a real replay: each case counted by its reason, routed with its
original bytes and line, and every good line around it still scored."""

from __future__ import annotations

import base64
import json
from collections import Counter

import orjson

from service.config import parse_config
from service.embedded import replay
from tests.test_decode import CASES

T0 = 1772409600  # 2026-03-02T00:00:00Z


def test_every_catalogue_case_is_counted_routed_and_its_neighbours_scored(tmp_path):
    # One case per line: the cases that are themselves line breaks are the "empty" kind, covered by b"".
    cases = [(raw, code) for raw, code in CASES if b"\n" not in raw]
    src = tmp_path / "in.jsonl"
    lines: list[bytes] = []
    expected_bad: dict[int, tuple[bytes, str]] = {}
    for i in range(600):
        lines.append(orjson.dumps({"service": f"svc-{i % 3}", "ts": T0 + (i // 3) * 30,
                                   "metrics": {"lat": 100.0 + i % 7, "errors": i % 2}}))
        if i % 5 == 0 and i // 5 < len(cases):
            raw, code = cases[i // 5]
            lines.append(raw)
            expected_bad[len(lines)] = (raw, code)  # 1-based line number of the case
    src.write_bytes(b"\n".join(lines) + b"\n")
    out, rej = tmp_path / "scores.jsonl", tmp_path / "rejects.jsonl"
    summary = replay(parse_config('[defaults]\nwindow = "5m"\n'), str(src), str(out), str(rej))

    want = Counter(code for _, code in expected_bad.values())
    assert summary.rejected == dict(want)
    assert summary.accepted == 600
    assert summary.accepted + sum(summary.rejected.values()) == summary.lines == len(lines)
    routed = [json.loads(x) for x in rej.read_text().splitlines()]
    assert len(routed) == len(expected_bad)
    for r in routed:
        raw, code = expected_bad[r["origin"]["line"]]
        assert r["reason"] == code and r["detail"]
        got = base64.b64decode(r["raw_b64"]) if "raw_b64" in r else r["raw"].encode()
        assert got == raw
    # the good lines were all windowed and scored: 3 services x 200 events of 30 s in 5-minute windows
    scored = Counter(json.loads(x)["service"] for x in out.read_text().splitlines())
    assert scored == {"svc-0": 20, "svc-1": 20, "svc-2": 20}
