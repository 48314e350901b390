"""On the demo scenario (service.scenario.generate, replayed through service.embedded.replay),
the first flagged window of each caught incident names the metric at fault."""

from __future__ import annotations

from service.backtest import match_incidents, read_scores
from service.config import parse_config
from service.demo import DEMO_CONFIG
from service.embedded import replay
from service.scenario import generate


def test_caught_incidents_name_the_metric_at_fault(tmp_path) -> None:
    scenario = generate(seed=7, days=4.0, services=4)
    metrics, scores = tmp_path / "metrics.jsonl", tmp_path / "scores.jsonl"
    scenario.write_jsonl(metrics)
    config = parse_config(DEMO_CONFIG + '\n[http]\nlisten = ""\n', "<demo>")
    replay(config, str(metrics), str(scores))
    results, _ = match_incidents(read_scores(str(scores)), scenario.incidents, config.defaults.window)
    caught = [r for r in results if r.caught]
    assert len(caught) >= len(results) // 2, [(r.incident.kind, r.caught) for r in results]
    for r in caught:
        assert r.metric_named, (r.incident.kind, r.incident.metric)
