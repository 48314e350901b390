"""Helpers for the Kafka end-to-end tests: produce input, run instances, read scores."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

import orjson
from confluent_kafka import Consumer, KafkaError, Producer

REPO = Path(__file__).resolve().parent.parent
# Far enough past the scenario to close every window, within the decoder's future-skew limit.
SENTINEL_GAP_S = 6 * 3600


def produce_lines(bootstrap: str, topic: str, lines: list[bytes], *, keyed: bool = True, partitions: int = 1) -> None:
    """Produce native messages; keyed by service (murmur2, as Java producers) or spread round-robin."""
    p = Producer({"bootstrap.servers": bootstrap, "partitioner": "murmur2_random", "linger.ms": 20})
    for i, line in enumerate(lines):
        args = ({"key": orjson.loads(line)["service"].encode()} if keyed else {"partition": i % partitions})
        for _ in range(600):
            try:
                p.produce(topic, value=line, **args)
                break
            except BufferError:
                # The local queue (100,000 messages by default) is full: let deliveries drain it
                # (confluent-kafka's documented pattern), for at most about a minute in all.
                p.poll(0.1)
        else:
            raise RuntimeError("the producer's local queue stayed full")
        if i % 10000 == 0:
            p.poll(0)
    if p.flush(60) != 0:
        raise RuntimeError("input not fully produced")


def produce_sentinels(bootstrap: str, topic: str, partitions: int, after_ts: float) -> None:
    """One message per partition far past the data, so every data window closes on every partition.

    Each sentinel is its own service, sent to an explicit partition, so it never shares state with data.
    """
    p = Producer({"bootstrap.servers": bootstrap})
    for part in range(partitions):
        msg = {"service": f"zz-close-{part}", "ts": after_ts + SENTINEL_GAP_S, "metrics": {"x": 0}}
        p.produce(topic, value=orjson.dumps(msg), key=f"zz-close-{part}".encode(), partition=part)
    p.flush(30)


def read_scores(bootstrap: str, topic: str, expected: int, *, timeout: float = 240.0, idle: float = 8.0) -> list[tuple[bytes, dict]]:
    """Read the score topic read_committed from the start until ``expected`` messages, then ``idle`` s more
    (so duplicates arriving late are seen too)."""
    c = Consumer({
        "bootstrap.servers": bootstrap,
        "group.id": f"reader-{uuid.uuid4().hex}",
        "auto.offset.reset": "earliest",
        "enable.auto.commit": False,
        "isolation.level": "read_committed",
    })
    c.subscribe([topic])
    out: list[tuple[bytes, dict]] = []
    deadline = time.monotonic() + timeout
    reached_at = None
    try:
        while time.monotonic() < deadline:
            for m in c.consume(num_messages=5000, timeout=0.5):
                if m.error() is not None:
                    if m.error().code() in (KafkaError._PARTITION_EOF, KafkaError.UNKNOWN_TOPIC_OR_PART):
                        continue
                    raise RuntimeError(m.error().str())
                out.append((m.key(), orjson.loads(m.value())))
            if len(out) >= expected and reached_at is None:
                reached_at = time.monotonic()
            if reached_at is not None and time.monotonic() - reached_at > idle:
                break
    finally:
        c.close()
    return out


@dataclass
class Topics:
    input: str
    output: str
    rejects: str
    changelog: str
    repartition: str
    group: str


def write_config(path: Path, bootstrap: str, t: Topics, *, keyed: bool = True, lateness: str = "30s",
                 extra_consumer: dict | None = None, batch_size: int = 2000) -> Path:
    consumer = {"session.timeout.ms": 6000, "heartbeat.interval.ms": 500, **(extra_consumer or {})}
    cons = ", ".join(f'"{k}" = {orjson.dumps(v).decode()}' for k, v in consumer.items())
    path.write_text(f"""
[defaults]
window = "5m"
lateness = "{lateness}"

[http]
listen = ""

[kafka]
bootstrap_servers = "{bootstrap}"
input_topics = ["{t.input}"]
output_topic = "{t.output}"
rejects_topic = "{t.rejects}"
changelog_topic = "{t.changelog}"
repartition_topic = "{t.repartition}"
input_keyed = {"true" if keyed else "false"}
group_id = "{t.group}"
commit_interval = "500ms"
batch_size = {batch_size}
consumer_properties = {{ {cons} }}
# a killed instance that is not restarted holds read_committed readers back this long
producer_properties = {{ "transaction.timeout.ms" = 10000 }}
""")
    return path


def start_instance(config: Path, instance: str, log: Path) -> subprocess.Popen:
    env = {**os.environ, "TIDEWATCH_KAFKA_INSTANCE_ID": instance, "TIDEWATCH_LOG_LEVEL": "info"}
    return subprocess.Popen(
        [sys.executable, "-m", "service.cli", "run", "--config", str(config)],
        cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=open(log, "ab"),
    )


def stop_instance(p: subprocess.Popen, sig: int = signal.SIGTERM, timeout: float = 60.0) -> int:
    if p.poll() is None:
        p.send_signal(sig)
    return p.wait(timeout=timeout)


def score_table(messages) -> dict[tuple[str, str], tuple]:
    """(service, window_start) -> the fields that must match between runs."""
    out = {}
    for m in messages:
        out[(m["service"], m["window_start"])] = (m["score"], m["anomalous"], m["warming_up"], m["count"], m["raw_score"])
    return out
