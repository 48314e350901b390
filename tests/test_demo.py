"""The demo end to end: generated scenario -> replay -> score messages read back against the incidents."""

from __future__ import annotations

import io
import json

from service.demo import run_demo


def test_demo_replays_the_scenario_and_reports_every_incident(tmp_path):
    buf = io.StringIO()
    assert run_demo(seed=7, days=4.0, out_dir=str(tmp_path), out=buf) == 0
    text = buf.getvalue()
    scores = [json.loads(line) for line in (tmp_path / "scores.jsonl").read_text().splitlines()]
    rejects = [json.loads(line) for line in (tmp_path / "rejects.jsonl").read_text().splitlines()]
    assert len(rejects) == 12  # the demo mixes in a dozen bad lines; each is routed with its reason
    assert {r["reason"] for r in rejects} >= {"not_json", "missing_service", "bad_metric_value"}
    keys = [(s["service"], s["window_start"]) for s in scores]
    assert len(keys) == len(set(keys))
    services = {s["service"] for s in scores}
    assert len(services) == 12
    # 4 days of 5-minute windows per service; the generator drops an occasional scrape, so a rare
    # window may be empty (and then has no score), never more than one in a hundred
    from collections import Counter

    per_service = Counter(s["service"] for s in scores)
    assert all(0.99 * 4 * 288 <= n <= 4 * 288 for n in per_service.values()), per_service
    assert "caught" in text and "per service-week" in text
    rows = [line for line in text.splitlines() if line.split() and line.split()[0] in
            {"latency_spike", "error_burst", "traffic_drop", "memory_leak", "level_shift", "stuck_metric"}]
    assert len(rows) >= 6  # one row per injected incident


def test_demo_is_deterministic(tmp_path):
    run_demo(seed=3, days=3.0, out_dir=str(tmp_path / "a"), out=io.StringIO())
    run_demo(seed=3, days=3.0, out_dir=str(tmp_path / "b"), out=io.StringIO())
    assert (tmp_path / "a" / "scores.jsonl").read_bytes() == (tmp_path / "b" / "scores.jsonl").read_bytes()
