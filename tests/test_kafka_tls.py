"""tidewatch run against a broker's TLS listener: librdkafka settings pass through to every client.

The broker is the second local broker of ``tests/kafka_tls.py`` (a throwaway CA made with
openssl, an SSL listener on a free loopback port). Each run consumes a small native input
over TLS and its scores are read back over TLS with a read_committed consumer and compared
with the embedded ``replay`` of the same data.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
import uuid
from datetime import datetime, timedelta, timezone
from pathlib import Path

import orjson
import pytest
from confluent_kafka import Consumer, KafkaError, Producer, TopicPartition

from service.config import load_config
from service.embedded import replay
from tests.kafka_support import SENTINEL_GAP_S, score_table
from tests.kafka_tls import TlsBroker, TlsTopicFactory

__all__: list[str] = []

pytestmark = pytest.mark.kafka

REPO = Path(__file__).resolve().parent.parent
SERVICES = ("checkout-api", "ledger-worker")
MINUTES = 30
PARTITIONS = 2
BASE = datetime(2026, 3, 2, tzinfo=timezone.utc)
# Bounds on waiting (a hang fails with what did arrive); they time nothing.
READ_DEADLINE_S = 120.0
LOG_DEADLINE_S = 90.0
STOP_TIMEOUT_S = 60.0
# After the expected count, keep reading this long so a late duplicate would be seen.
IDLE_AFTER_S = 3.0
SECRET = "s3cret-pass"


# --- input, config, process -------------------------------------------------------------


def _lines() -> list[bytes]:
    """2 services x 30 one-minute native messages, seeded."""
    rng = random.Random(11)
    out = []
    for minute in range(MINUTES):
        ts = (BASE + timedelta(minutes=minute)).strftime("%Y-%m-%dT%H:%M:%SZ")
        for service in SERVICES:
            metrics = {"latency_p95_ms": round(200.0 + rng.gauss(0.0, 8.0), 3), "errors": rng.randrange(0, 4)}
            out.append(orjson.dumps({"service": service, "ts": ts, "metrics": metrics}))
    return out


def _produce(broker: TlsBroker, topic: str, lines: list[bytes]) -> None:
    """Produce the data keyed by service, then one far-ahead message per partition over TLS.

    The far-ahead messages are their own services (``zz-close-<p>``) so every data window
    closes on every partition without sharing state with the data.
    """
    p = Producer({**broker.client_settings(), "partitioner": "murmur2_random", "linger.ms": 20})
    for line in lines:
        p.produce(topic, value=line, key=orjson.loads(line)["service"].encode())
    far = (BASE + timedelta(minutes=MINUTES, seconds=SENTINEL_GAP_S)).strftime("%Y-%m-%dT%H:%M:%SZ")
    for part in range(PARTITIONS):
        msg = {"service": f"zz-close-{part}", "ts": far, "metrics": {"x": 0}}
        p.produce(topic, value=orjson.dumps(msg), key=f"zz-close-{part}".encode(), partition=part)
    if p.flush(60) != 0:
        pytest.fail("input not fully produced over TLS")


def _topics(kafka_tls_topic: TlsTopicFactory) -> dict[str, str]:
    # Created up front (over TLS) so a run that never reaches the broker still has an
    # output topic to look at.
    return {
        "input": kafka_tls_topic("in", PARTITIONS),
        "output": kafka_tls_topic("scores", PARTITIONS),
        "rejects": kafka_tls_topic("rejects", PARTITIONS),
        "changelog": kafka_tls_topic("state", PARTITIONS, {"cleanup.policy": "compact"}),
        "repartition": kafka_tls_topic("rekey", PARTITIONS),
    }


def _write_config(path: Path, broker: TlsBroker, topics: dict[str, str],
                  properties: dict[str, str] | None) -> Path:
    props = ""
    if properties is not None:
        props = "\n[kafka.properties]\n" + "".join(
            f"{orjson.dumps(k).decode()} = {orjson.dumps(v).decode()}\n" for k, v in properties.items()
        )
    path.write_text(f"""
[defaults]
window = "5m"

[http]
listen = ""

[kafka]
bootstrap_servers = "{broker.bootstrap}"
input_topics = ["{topics['input']}"]
output_topic = "{topics['output']}"
rejects_topic = "{topics['rejects']}"
changelog_topic = "{topics['changelog']}"
repartition_topic = "{topics['repartition']}"
input_keyed = true
group_id = "tw-tls-{uuid.uuid4().hex}"
commit_interval = "500ms"
# a run stopped mid-transaction holds read_committed readers back at most this long
producer_properties = {{ "transaction.timeout.ms" = 10000 }}
{props}""")
    return path


def _start(config: Path, log: Path, extra_env: dict[str, str] | None = None,
           level: str = "info") -> subprocess.Popen[bytes]:
    env = {**os.environ, "TIDEWATCH_KAFKA_INSTANCE_ID": "tls-0", "TIDEWATCH_LOG_LEVEL": level,
           **(extra_env or {})}
    # [kafka] overrides from the outer environment (a CI job's, a developer's shell) would
    # change what these tests check; only the ones a test passes itself go through.
    for name in [k for k in env if k.startswith("TIDEWATCH_KAFKA_")]:
        if name != "TIDEWATCH_KAFKA_INSTANCE_ID" and name not in (extra_env or {}):
            del env[name]
    with log.open("ab") as err:
        return subprocess.Popen(
            [sys.executable, "-m", "service.cli", "run", "--config", str(config)],
            cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=err,
        )


def _stop(proc: subprocess.Popen[bytes]) -> int:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
    try:
        return proc.wait(timeout=STOP_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        pytest.fail(f"tidewatch did not stop within {STOP_TIMEOUT_S:.0f}s of SIGTERM")


def _read_scores(broker: TlsBroker, topic: str, expected: int) -> list[tuple[bytes, dict]]:
    """Read ``topic`` over TLS, read_committed, until ``expected`` messages and IDLE_AFTER_S more."""
    c = Consumer({
        **broker.client_settings(),
        "group.id": f"tls-reader-{uuid.uuid4().hex}",
        "auto.offset.reset": "earliest",
        "enable.auto.commit": False,
        "isolation.level": "read_committed",
    })
    c.subscribe([topic])
    out: list[tuple[bytes, dict]] = []
    deadline = time.monotonic() + READ_DEADLINE_S
    reached_at: float | None = None
    try:
        while time.monotonic() < deadline:
            for m in c.consume(num_messages=500, timeout=0.5):
                if m.error() is not None:
                    if m.error().code() in (KafkaError._PARTITION_EOF, KafkaError.UNKNOWN_TOPIC_OR_PART):
                        continue
                    pytest.fail(f"reading scores over TLS: {m.error().str()}")
                out.append((m.key(), orjson.loads(m.value())))
            if reached_at is None and len(out) >= expected:
                reached_at = time.monotonic()
            if reached_at is not None and time.monotonic() - reached_at > IDLE_AFTER_S:
                break
    finally:
        c.close()
    return out


def _reference(config: Path, lines: list[bytes], tmp_path: Path) -> dict:
    """The embedded replay of the data alone (end of file closes every window)."""
    data = tmp_path / "input.jsonl"
    data.write_bytes(b"\n".join(lines) + b"\n")
    cfg = load_config(config, environ={})
    out = tmp_path / "reference.jsonl"
    replay(cfg.model_copy(update={"kafka": None}), str(data), str(out))
    return score_table(orjson.loads(line) for line in out.read_bytes().splitlines())


def _log_records(log: Path) -> list[dict]:
    records = []
    for line in log.read_bytes().splitlines():
        try:
            doc = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue  # a traceback or other non-JSON line; the JSON ones are what we check
        if isinstance(doc, dict):
            records.append(doc)
    return records


def _round_trip(broker: TlsBroker, topics: dict[str, str], config: Path, log: Path, tmp_path: Path,
                extra_env: dict[str, str] | None = None, level: str = "info") -> None:
    lines = _lines()
    reference = _reference(config, lines, tmp_path)
    # 30 one-minute messages per service in 5-minute windows starting on the hour: 6 each.
    assert len(reference) == len(SERVICES) * MINUTES // 5
    _produce(broker, topics["input"], lines)
    proc = _start(config, log, extra_env, level)
    try:
        received = _read_scores(broker, topics["output"], len(reference))
    finally:
        rc = _stop(proc)
    assert rc == 0, f"tidewatch exited {rc}; log tail:\n{log.read_text()[-3000:]}"
    keys = [(m["service"], m["window_start"]) for _, m in received]
    assert len(keys) == len(set(keys)), "a (service, window) was scored more than once"
    for key, m in received:
        assert key == m["service"].encode(), "score messages are keyed by service"
    got = score_table(m for _, m in received)
    assert got == reference, (
        f"missing {sorted(set(reference) - set(got))[:3]}, extra {sorted(set(got) - set(reference))[:3]}; "
        f"log tail:\n{log.read_text()[-3000:]}"
    )


# --- tests ------------------------------------------------------------------------------------


def test_tls_settings_from_the_config_file(kafka_tls_broker: TlsBroker, kafka_tls_topic: TlsTopicFactory,
                                           tmp_path: Path) -> None:
    topics = _topics(kafka_tls_topic)
    config = _write_config(tmp_path / "tidewatch.toml", kafka_tls_broker, topics, {
        "security.protocol": "SSL",
        "ssl.ca.location": str(kafka_tls_broker.material.ca_pem),
    })
    _round_trip(kafka_tls_broker, topics, config, tmp_path / "run.log", tmp_path)


def test_tls_settings_from_the_environment(kafka_tls_broker: TlsBroker, kafka_tls_topic: TlsTopicFactory,
                                           tmp_path: Path) -> None:
    topics = _topics(kafka_tls_topic)
    # No [kafka.properties]: without the two variables the clients would speak plaintext to
    # the SSL listener and nothing would come back.
    config = _write_config(tmp_path / "tidewatch.toml", kafka_tls_broker, topics, None)
    env = {
        "TIDEWATCH_KAFKA_PROPERTY_SECURITY_PROTOCOL": "SSL",
        "TIDEWATCH_KAFKA_PROPERTY_SSL_CA_LOCATION": str(kafka_tls_broker.material.ca_pem),
    }
    _round_trip(kafka_tls_broker, topics, config, tmp_path / "run.log", tmp_path, extra_env=env)


# A wrong CA must not fail silently: the metadata requests are asked in short tries with the
# client's log served between them (KafkaRunner._metadata), so the handshake errors reach the log.
def test_wrong_ca_logs_handshake_errors_and_produces_nothing(
    kafka_tls_broker: TlsBroker, kafka_tls_topic: TlsTopicFactory, tmp_path: Path
) -> None:
    topics = _topics(kafka_tls_topic)
    _produce(kafka_tls_broker, topics["input"], _lines())
    config = _write_config(tmp_path / "tidewatch.toml", kafka_tls_broker, topics, {
        "security.protocol": "SSL",
        "ssl.ca.location": str(kafka_tls_broker.material.wrong_ca_pem),
    })
    log = tmp_path / "run.log"
    proc = _start(config, log)
    failures: list[dict] = []
    try:
        deadline = time.monotonic() + LOG_DEADLINE_S
        while not failures and time.monotonic() < deadline:
            failures = [
                r for r in _log_records(log)
                if r.get("logger") == "tidewatch.librdkafka"
                # librdkafka's wording for a refused broker certificate, as observed with
                # librdkafka 2.16.0 (this venv): "... SSL handshake failed: error:0A000086:SSL
                # routines::certificate verify failed: broker certificate could not be verified ...".
                and "ssl handshake failed" in str(r.get("msg", "")).lower()
            ]
            if not failures and proc.poll() is not None:
                break  # exited: the log is complete, look once more below
            time.sleep(0.2)
        if not failures:
            failures = [r for r in _log_records(log) if r.get("logger") == "tidewatch.librdkafka"
                        and "ssl handshake failed" in str(r.get("msg", "")).lower()]
        running_or_rc = proc.poll()
    finally:
        rc = _stop(proc)
    assert failures, f"no SSL handshake error from librdkafka in the log:\n{log.read_text()[-3000:]}"
    assert any("certificate verify failed" in str(r["msg"]).lower() for r in failures), failures[:3]
    # Either still retrying when we looked, or exited with an error: never a clean success.
    assert running_or_rc is None or running_or_rc != 0, "tidewatch exited 0 with a CA that cannot verify the broker"
    # Nothing reached the output topic (read over TLS with the right CA).
    c = Consumer({**kafka_tls_broker.client_settings(), "group.id": f"tls-check-{uuid.uuid4().hex}"})
    try:
        highs = [c.get_watermark_offsets(TopicPartition(topics["output"], p), timeout=10)[1]
                 for p in range(PARTITIONS)]
    finally:
        c.close()
    assert highs == [0] * PARTITIONS, f"score topic high watermarks {highs}"


def test_no_secret_in_the_logs(kafka_tls_broker: TlsBroker, kafka_tls_topic: TlsTopicFactory,
                               tmp_path: Path) -> None:
    topics = _topics(kafka_tls_topic)
    config = _write_config(tmp_path / "tidewatch.toml", kafka_tls_broker, topics, {
        "security.protocol": "SSL",
        "ssl.ca.location": str(kafka_tls_broker.material.ca_pem),
        # Unused without ssl.key.location, but librdkafka takes it and must never echo it.
        "ssl.key.password": SECRET,
        # librdkafka's own debug output for configuration and TLS, at tidewatch's debug level:
        # the most talkative the logs get.
        "debug": "conf,security,broker",
    })
    log = tmp_path / "run.log"
    _round_trip(kafka_tls_broker, topics, config, log, tmp_path, level="debug")
    text = log.read_bytes()
    # The debug output did arrive, so the check below looked at a talkative log.
    assert any(r.get("logger") == "tidewatch.librdkafka" for r in _log_records(log))
    assert SECRET.encode() not in text
