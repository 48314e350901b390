"""A model that raises while scoring one service's window stops neither the run nor the other services."""

from __future__ import annotations

import logging

import orjson

from models.service_model import ServiceModel
from service.config import parse_config
from service.embedded import replay
from service.engine import Engine
from service.metrics import build_registry

T0 = 1_772_409_600  # 2026-03-02T00:00:00Z
CONFIG = parse_config('[defaults]\nwindow = "1m"\nwarm_up = 3\n')


def _lines(minutes: int) -> list[bytes]:
    return [orjson.dumps({"service": s, "ts": T0 + 60 * m + 5 * k, "metrics": {"lat": 100.0 + k + m % 3}})
            for m in range(minutes) for k in range(3) for s in ("berth-planner", "crew-roster")]


def test_one_failing_model_leaves_the_other_services_scored_and_starts_afresh(monkeypatch, caplog):
    original = ServiceModel.assess
    broken = {"on": True}

    def assess(self, features, at=None, steady=None):
        # A stand-in for a model bug: the berth-planner's model raises from its 5th window on, while on.
        if self.service == "berth-planner" and self.windows_seen >= 4 and broken["on"]:
            raise ZeroDivisionError("a bug in the model")
        return original(self, features, at, steady)

    monkeypatch.setattr(ServiceModel, "assess", assess)
    scores: list[dict] = []
    eng = Engine(CONFIG, on_score=lambda s, payload, w: scores.append(orjson.loads(payload)),
                 on_reject=lambda *a: None, now=lambda: T0 + 10_000.0)
    src = eng.source("file")
    with caplog.at_level(logging.ERROR, logger="tidewatch.engine"):
        eng.feed(src, _lines(12), lambda i: i)
    by = {s: [m for m in scores if m["service"] == s] for s in ("berth-planner", "crew-roster")}
    # The healthy service is scored in every closed window.
    assert len(by["crew-roster"]) == 11
    # The broken one: 4 windows, then every window fails (a fresh model fails too once it reaches 4 windows).
    assert eng.stats.model_failures >= 1
    assert len(by["berth-planner"]) + eng.stats.model_failures == 11
    # One log line for the service, not one per window, naming it and the error.
    failures = [r for r in caplog.records if getattr(r, "event", None) == "model_failed"]
    assert len(failures) == 1 and failures[0].service == "berth-planner" and "ZeroDivisionError" in failures[0].error
    # After the failure the service started afresh: it is warming up again.
    first_after = by["berth-planner"][4]
    assert first_after["warming_up"] is True
    # Fixed (the bug gone), the service is scored again from its fresh model, and the failures are exported.
    broken["on"] = False
    eng.feed(src, [orjson.dumps({"service": s, "ts": T0 + 60 * m + 5, "metrics": {"lat": 100.0}})
                   for m in range(12, 20) for s in ("berth-planner", "crew-roster")], lambda i: i)
    assert len([m for m in scores if m["service"] == "berth-planner"]) > len(by["berth-planner"])
    text = build_registry(eng.stats, lambda: len(eng.registry.models), 100)
    from prometheus_client import generate_latest

    exposition = generate_latest(text).decode()
    assert f"tidewatch_model_failures_total {float(eng.stats.model_failures)}" in exposition


def test_a_replay_with_a_failing_model_finishes_and_writes_the_other_scores(monkeypatch, tmp_path):
    original = ServiceModel.assess

    def assess(self, features, at=None, steady=None):
        if self.service == "berth-planner":
            raise ValueError("always")
        return original(self, features, at, steady)

    monkeypatch.setattr(ServiceModel, "assess", assess)
    src = tmp_path / "in.jsonl"
    src.write_bytes(b"\n".join(_lines(10)) + b"\n")
    out = tmp_path / "scores.jsonl"
    summary = replay(CONFIG, str(src), str(out))
    services = {orjson.loads(x)["service"] for x in out.read_bytes().splitlines()}
    assert services == {"crew-roster"} and summary.windows == 10


def test_the_saved_state_of_a_failing_model_is_replaced_at_the_next_checkpoint(monkeypatch, tmp_path):
    # Without the replacement, a restart between the failure and the service's next scored window
    # restored the failing model from the last checkpoint (it was only dropped from memory).
    from service.checkpoint import CheckpointStore
    from service.stats import RuntimeStats

    original = ServiceModel.assess
    broken = {"on": False}

    def assess(self, features, at=None, steady=None):
        if self.service == "berth-planner" and broken["on"]:
            raise ZeroDivisionError("a bug in the model")
        return original(self, features, at, steady)

    monkeypatch.setattr(ServiceModel, "assess", assess)
    eng = Engine(CONFIG, on_score=lambda *a: None, on_reject=lambda *a: None, now=lambda: T0 + 10_000.0)
    src = eng.source("file")
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    lines = _lines(12)
    eng.feed(src, lines[:2 * 3 * 8], lambda i: i)  # 8 minutes: 7 windows closed for each service
    store.save(eng.registry.models, eng.registry.dirty, {})
    eng.registry.dirty.clear()
    assert store.load().models["berth-planner"].windows_seen == 7
    broken["on"] = True
    eng.feed(src, lines[2 * 3 * 8:], lambda i: i)
    assert eng.stats.model_failures == 4
    store.save(eng.registry.models, eng.registry.dirty, {})  # a delta: only what changed
    restored = store.load().models
    assert restored["berth-planner"].windows_seen == 0  # the fresh model, not the failing one
    assert restored["crew-roster"].windows_seen == 11
