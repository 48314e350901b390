"""OpenTelemetry input through the real runtime: embedded replay of OTLP/JSON lines, and Kafka topics
in both encodings (payloads built with the opentelemetry-proto classes as the reference library)."""

from __future__ import annotations

import json
import subprocess
import sys
import time

import pytest
from confluent_kafka import Producer
from opentelemetry.proto.collector.metrics.v1.metrics_service_pb2 import ExportMetricsServiceRequest

from tests.kafka_support import Topics, read_scores, start_instance, stop_instance
from tests.test_otlp import add_resource, counter, encode, gauge

T0 = 1772409600  # 2026-03-02T00:00:00Z
NS = 1_000_000_000
CUMULATIVE = 2  # AggregationTemporality.AGGREGATION_TEMPORALITY_CUMULATIVE


def payloads(minutes: int, encoding: str) -> list[bytes]:
    """One export a minute, two services in each, a gauge and a cumulative counter per service."""
    out = []
    for i in range(minutes):
        req = ExportMetricsServiceRequest()
        t = (T0 + 60 * i) * NS
        for k, service in enumerate(("ticket-api", "berth-planner")):
            sm = add_resource(req, {"service.name": service})
            gauge(sm, "cpu_util", (t, 0.2 + 0.01 * (i % 5) + 0.1 * k))
            counter(sm, "requests", CUMULATIVE, (t, 100 * i + 7 * k, T0 * NS))
        out.append(encode(req, encoding))
    return out


def test_replay_scores_otlp_json_lines(tmp_path):
    src = tmp_path / "otlp.jsonl"
    src.write_bytes(b"\n".join(payloads(60, "otlp_json")) + b"\nnot a payload\n")
    out, rej = tmp_path / "scores.jsonl", tmp_path / "rejects.jsonl"
    r = subprocess.run([sys.executable, "-m", "service.cli", "replay", str(src), "--output", str(out), "--rejects", str(rej),
                        "--window", "5m", "--input-format", "otlp_json"], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    scores = [json.loads(x) for x in out.read_text().splitlines()]
    assert {s["service"] for s in scores} == {"ticket-api", "berth-planner"}
    assert len(scores) == 2 * 12  # an hour of 5-minute windows per service
    assert [json.loads(x)["reason"] for x in rej.read_text().splitlines()] == ["otlp_invalid"]
    # the first point of a cumulative series only sets its baseline: the counter's rate starts one minute in
    first = [s for s in scores if s["service"] == "ticket-api"][0]
    assert first["count"] == 5


@pytest.mark.kafka
@pytest.mark.parametrize("encoding", ["otlp_proto", "otlp_json"])
def test_kafka_scores_otlp_topics_through_the_repartition_topic(kafka_bootstrap, kafka_topic, tmp_path, encoding):
    t = Topics(input=kafka_topic("otel", 2), output=kafka_topic("scores", 2), rejects=kafka_topic("rejects", 2),
               changelog=kafka_topic("state", 2, {"cleanup.policy": "compact"}), repartition=kafka_topic("rekey", 2),
               group=f"tw-{time.monotonic_ns()}")
    cfg = tmp_path / "tw.toml"
    cfg.write_text(f"""
[defaults]
window = "5m"
lateness = "1h"
[http]
listen = ""
[kafka]
bootstrap_servers = "{kafka_bootstrap}"
input_topics = ["{t.input}"]
input_formats = {{ "{t.input}" = "{encoding}" }}
output_topic = "{t.output}"
rejects_topic = "{t.rejects}"
changelog_topic = "{t.changelog}"
repartition_topic = "{t.repartition}"
input_keyed = false
group_id = "{t.group}"
commit_interval = "500ms"
consumer_properties = {{ "session.timeout.ms" = 6000 }}
""")
    p = Producer({"bootstrap.servers": kafka_bootstrap})
    for i, payload in enumerate(payloads(60, encoding)):
        p.produce(t.input, value=payload, partition=0)  # the Collector's exporter does not key by service
    # one late export far ahead closes every window of both services
    req = ExportMetricsServiceRequest()
    for service in ("ticket-api", "berth-planner"):
        gauge(add_resource(req, {"service.name": service}), "cpu_util", ((T0 + 6 * 3600) * NS, 0.5))
    p.produce(t.input, value=encode(req, encoding), partition=0)
    p.flush(30)
    proc = start_instance(cfg, "otel", tmp_path / "otel.log")
    try:
        received = read_scores(kafka_bootstrap, t.output, 24, timeout=180, idle=4)
    finally:
        stop_instance(proc)
    scores = [m for _, m in received]
    assert len(scores) == 24, (tmp_path / "otel.log").read_text()[-2000:]
    assert {s["service"] for s in scores} == {"ticket-api", "berth-planner"}
