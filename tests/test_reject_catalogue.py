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


def test_a_line_of_many_megabytes_without_a_break_is_refused_and_the_next_line_read(tmp_path):
    """The reader keeps at most max_message_bytes + 1 bytes of a line (service.lines): a 64 MB line with
    no break costs no more memory than that, is rejected as too_large with how it began, and counted once."""
    src = tmp_path / "in.jsonl"
    good = [orjson.dumps({"service": "svc-0", "ts": T0 + i * 30, "metrics": {"lat": 100.0}}) for i in range(40)]
    with open(src, "wb") as f:
        f.write(b"\n".join(good[:20]) + b"\n")
        f.write(b'{"service":"svc-0","pad":"')
        for _ in range(64):
            f.write(b"z" * (1 << 20))
        f.write(b'"}\n')
        f.write(b"\n".join(good[20:]) + b"\n")
    out, rej = tmp_path / "scores.jsonl", tmp_path / "rejects.jsonl"
    summary = replay(parse_config(""), str(src), str(out), str(rej))
    assert summary.rejected == {"too_large": 1}
    assert summary.accepted == 40 and summary.lines == 41
    (r,) = [json.loads(x) for x in rej.read_text().splitlines()]
    assert r["origin"]["line"] == 21 and r["raw"].startswith('{"service":"svc-0","pad":"zzz')
    assert len(r["raw"]) == 65_537  # limits.max_message_bytes + 1: enough to show, never the whole line
