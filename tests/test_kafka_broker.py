"""Smoke tests for the Kafka test broker and its deployment files.

The ``kafka``-marked tests talk to the real broker from ``tests/kafka_broker.py``
(in CI: the local KRaft node of ``deploy/local-kafka/kafka.sh``). The others
check the plugin's own logic and that ``deploy/compose.yaml`` and ``kafka.sh``
describe the same broker; they need no broker.
"""

from __future__ import annotations

import base64
import re
import socket
import subprocess
import time
import uuid
import xml.etree.ElementTree as ET
from collections.abc import Iterable
from pathlib import Path

import pytest
import yaml
from confluent_kafka import (
    OFFSET_BEGINNING,
    Consumer,
    KafkaError,
    Message,
    Producer,
    TopicPartition,
)
from confluent_kafka.admin import AdminClient, ConfigResource, ResourceType

from tests.kafka_broker import (
    COMPOSE_FILE,
    KAFKA_SCRIPT,
    BrokerHandle,
    BrokerRestartUnavailable,
    TopicFactory,
    broker_answers,
    restart_broker,
)

__all__: list[str] = []

POM_FILE = KAFKA_SCRIPT.parent / "pom.xml"

# Upper bound on waiting for records that were already acknowledged; reaching it
# fails the test with what did arrive. It bounds a hang, it does not time anything.
READ_DEADLINE_S = 60.0


# --- helpers -----------------------------------------------------------------------


def _produce(producer: Producer, topic: str, records: Iterable[tuple[bytes | None, bytes | None]],
             headers: list[tuple[str, bytes]] | None = None) -> list[KafkaError | None]:
    """Produce, flush, and return one delivery error (or None) per record, in order."""
    results: list[KafkaError | None] = []

    def on_delivery(err: KafkaError | None, _msg: Message) -> None:
        results.append(err)

    count = 0
    for key, value in records:
        producer.produce(topic, key=key, value=value, headers=headers, on_delivery=on_delivery)
        count += 1
    remaining = producer.flush(READ_DEADLINE_S)
    if remaining:
        pytest.fail(f"{remaining} of {count} records still undelivered after flush")
    return results


def _read_to_end(consumer: Consumer, partitions: int) -> list[Message]:
    """Poll until every one of ``partitions`` partitions reports end-of-partition.

    With ``isolation.level=read_committed`` the end is the last stable offset, so
    this returns only records of finished, committed transactions.
    """
    seen_end: set[int] = set()
    out: list[Message] = []
    deadline = time.monotonic() + READ_DEADLINE_S
    while len(seen_end) < partitions:
        if time.monotonic() > deadline:
            pytest.fail(
                f"only {len(seen_end)} of {partitions} partitions reached their end; "
                f"read {len(out)} records"
            )
        msg = consumer.poll(0.5)
        if msg is None:
            continue
        err = msg.error()
        if err is not None:
            if err.code() == KafkaError._PARTITION_EOF:
                seen_end.add(msg.partition())
                continue
            pytest.fail(f"consumer error: {err}")
        out.append(msg)
    return out


def _reader(bootstrap: str, isolation: str = "read_uncommitted") -> Consumer:
    return Consumer({
        "bootstrap.servers": bootstrap,
        "group.id": f"tw-smoke-{uuid.uuid4().hex}",
        "auto.offset.reset": "earliest",
        "enable.auto.commit": False,
        "enable.partition.eof": True,
        "isolation.level": isolation,
    })


def _read_topic(bootstrap: str, topic: str, partitions: int = 1,
                isolation: str = "read_uncommitted") -> list[Message]:
    consumer = _reader(bootstrap, isolation)
    try:
        consumer.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in range(partitions)])
        return _read_to_end(consumer, partitions)
    finally:
        consumer.close()


def _script(*args: str, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["bash", str(KAFKA_SCRIPT), *args], capture_output=True, text=True, env=env,
        timeout=60, check=False,
    )


def _script_properties(env: dict[str, str] | None = None) -> dict[str, str]:
    proc = _script("properties", env=env)
    if proc.returncode != 0:
        pytest.fail(f"kafka.sh properties failed: {proc.stderr}")
    props: dict[str, str] = {}
    for line in proc.stdout.splitlines():
        line = line.strip()
        if line and not line.startswith("#"):
            key, _, value = line.partition("=")
            props[key] = value  # later keys win, as in java.util.Properties
    return props


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


# --- against the broker --------------------------------------------------------------


@pytest.mark.kafka
def test_round_trip_through_a_consumer_group(kafka_bootstrap: str, kafka_topic: TopicFactory,
                                             kafka_admin: AdminClient) -> None:
    topic = kafka_topic("tw-smoke-roundtrip", partitions=3)
    keys = [f"svc-{i}".encode() for i in range(5)]
    sent = [(key, f"{key.decode()}:{seq}".encode()) for seq in range(6) for key in keys]
    producer = Producer({"bootstrap.servers": kafka_bootstrap, "enable.idempotence": True})
    errors = _produce(producer, topic, sent, headers=[("source", b"smoke")])
    assert errors == [None] * len(sent)

    consumer = _reader(kafka_bootstrap)
    try:
        consumer.subscribe([topic])
        got = _read_to_end(consumer, partitions=3)
        # Committing goes through the group coordinator, i.e. the offsets topic
        # whose replication factor kafka.sh sets to 1.
        consumer.commit(asynchronous=False)
        committed = consumer.committed(
            [TopicPartition(topic, p) for p in range(3)], timeout=READ_DEADLINE_S
        )
        ends = [consumer.get_watermark_offsets(TopicPartition(topic, p), timeout=10)[1]
                for p in range(3)]
    finally:
        consumer.close()

    assert sorted((m.key(), m.value()) for m in got) == sorted(sent)
    assert all(m.headers() == [("source", b"smoke")] for m in got)
    # Kafka orders records per partition and the default partitioner maps a key
    # to one partition (common practice), so each key's records come back in
    # the order they were sent.
    for key in keys:
        mine = [m for m in got if m.key() == key]
        assert len({m.partition() for m in mine}) == 1
        assert [m.value() for m in mine] == [v for k, v in sent if k == key]
    assert sum(ends) == len(sent)
    # A partition no key hashed to has no consumed record, hence nothing to commit.
    by_partition = {tp.partition: tp.offset for tp in committed}
    assert {p: by_partition[p] for p in range(3) if ends[p] > 0} == {
        p: ends[p] for p in range(3) if ends[p] > 0
    }


@pytest.mark.kafka
def test_transactions_commit_is_visible_abort_is_not(kafka_bootstrap: str,
                                                    kafka_topic: TopicFactory) -> None:
    topic = kafka_topic("tw-smoke-txn")
    producer = Producer({
        "bootstrap.servers": kafka_bootstrap,
        "transactional.id": f"tw-smoke-{uuid.uuid4().hex}",
    })
    # init_transactions needs the transaction-state topic: with its default
    # replication factor 3 / min ISR 2 this fails on one node.
    producer.init_transactions(READ_DEADLINE_S)

    def transaction(values: list[bytes], commit: bool) -> None:
        producer.begin_transaction()
        for value in values:
            producer.produce(topic, key=b"k", value=value)
        # Flush first: librdkafka drops still-queued records on abort instead of
        # sending them, and this test needs the aborted records in the log.
        if producer.flush(READ_DEADLINE_S):
            pytest.fail("transactional records still undelivered after flush")
        if commit:
            producer.commit_transaction(READ_DEADLINE_S)
        else:
            producer.abort_transaction(READ_DEADLINE_S)

    first = [b"committed-1", b"committed-2"]
    aborted = [b"aborted-1", b"aborted-2", b"aborted-3"]
    last = [b"committed-3"]
    transaction(first, commit=True)
    transaction(aborted, commit=False)
    transaction(last, commit=True)

    # read_committed skips records of aborted transactions (Kafka's transactions
    # design, KIP-98); read_uncommitted returns every data record, which shows
    # the aborted ones really were written to the log.
    committed_view = _read_topic(kafka_bootstrap, topic, isolation="read_committed")
    assert [m.value() for m in committed_view] == first + last
    uncommitted_view = _read_topic(kafka_bootstrap, topic, isolation="read_uncommitted")
    assert [m.value() for m in uncommitted_view] == first + aborted + last


@pytest.mark.kafka
def test_compacted_topic(kafka_bootstrap: str, kafka_topic: TopicFactory,
                         kafka_admin: AdminClient) -> None:
    topic = kafka_topic("tw-smoke-compact", config={"cleanup.policy": "compact"})

    resource = ConfigResource(ResourceType.TOPIC, topic)
    config = kafka_admin.describe_configs([resource])[resource].result(timeout=READ_DEADLINE_S)
    assert config["cleanup.policy"].value == "compact"
    assert not config["cleanup.policy"].is_default

    producer = Producer({"bootstrap.servers": kafka_bootstrap})
    keyed = [(b"svc-a", b"1"), (b"svc-b", b"1"), (b"svc-a", b"2"), (b"svc-b", None)]
    assert _produce(producer, topic, keyed) == [None] * len(keyed)
    # The broker rejects records without a key on a compacted topic with
    # INVALID_RECORD ("Compacted topic cannot accept message without key", Kafka's
    # record validation for cleanup.policy=compact, seen in this broker's log):
    # this shows the topic's policy is really in force.
    [keyless_error] = _produce(producer, topic, [(None, b"no key")])
    assert keyless_error is not None
    assert keyless_error.code() == KafkaError.INVALID_RECORD, keyless_error

    got = _read_topic(kafka_bootstrap, topic)
    # The cleaner has not run yet (it waits for closed segments), so all keyed
    # records, including the tombstone (value None), are still there in order.
    assert [(m.key(), m.value()) for m in got] == keyed


@pytest.mark.kafka
def test_topic_factory_names_and_partitions(kafka_topic: TopicFactory,
                                            kafka_admin: AdminClient) -> None:
    one = kafka_topic("tw-smoke-factory", partitions=2)
    two = kafka_topic("tw-smoke-factory", partitions=4)
    assert one != two
    assert re.fullmatch(r"tw-smoke-factory-[0-9a-f]{32}", one)
    topics = kafka_admin.list_topics(timeout=10).topics
    assert len(topics[one].partitions) == 2
    assert len(topics[two].partitions) == 4
    with pytest.raises(ValueError, match="prefix"):
        kafka_topic("not a topic name!")
    with pytest.raises(ValueError, match="partitions"):
        kafka_topic("tw-smoke-factory", partitions=0)


@pytest.mark.kafka
def test_restart_keeps_records_and_a_live_producer_carries_on(kafka_bootstrap: str,
                                                             kafka_topic: TopicFactory) -> None:
    topic = kafka_topic("tw-smoke-restart", partitions=2)
    producer = Producer({"bootstrap.servers": kafka_bootstrap, "enable.idempotence": True})
    before = [(b"k%d" % (i % 2), b"before-%d" % i) for i in range(10)]
    assert _produce(producer, topic, before) == [None] * len(before)

    restart_broker()

    # The same producer keeps working once the broker is back: librdkafka
    # reconnects by itself, which is what tidewatch relies on during a restart.
    after = [(b"k%d" % (i % 2), b"after-%d" % i) for i in range(10)]
    assert _produce(producer, topic, after) == [None] * len(after)

    got = _read_topic(kafka_bootstrap, topic, partitions=2)
    assert sorted(m.value() for m in got) == sorted(v for _, v in before + after)
    for key in (b"k0", b"k1"):
        assert [m.value() for m in got if m.key() == key] == [
            v for k, v in before + after if k == key
        ]


# --- plugin logic and deployment files (no broker needed) -------------------------------


@pytest.mark.parametrize("origin", ["env", "docker"])
def test_restart_is_refused_off_the_local_broker(origin: str) -> None:
    handle = BrokerHandle(bootstrap="127.0.0.1:19092", origin=origin)  # type: ignore[arg-type]
    assert not handle.restartable
    hint = "unset TIDEWATCH_TEST_BOOTSTRAP" if origin == "env" else "TIDEWATCH_TEST_BROKER=local"
    with pytest.raises(BrokerRestartUnavailable, match="only available for the local broker") as err:
        handle.restart()
    assert hint in str(err.value)


def test_script_variables_stay_out_of_the_config_override_prefix() -> None:
    """``TIDEWATCH_KAFKA_<KEY>`` overrides ``[kafka]`` settings and an unknown key is a config error, so a
    broker variable with that prefix, set for the local broker, would stop every ``tidewatch run`` started
    from the same shell (or by a test) with "unknown key"."""
    from service.config import load_config

    names = set(re.findall(r"\b(TIDEWATCH_[A-Z_]*[A-Z])\b", KAFKA_SCRIPT.read_text()))
    assert "TIDEWATCH_LOCAL_KAFKA_PORT" in names  # the pattern finds the script's variables
    assert not {n for n in names if n.startswith("TIDEWATCH_KAFKA_")}, names
    # And the config loader indeed ignores them.
    cfg_env = {n: "1" for n in names}
    load_config(None, environ=cfg_env)


def test_broker_answers_is_false_when_nothing_listens() -> None:
    assert broker_answers(f"127.0.0.1:{_free_port()}", timeout=0.5) is False


def test_script_properties_follow_the_port_and_extra_file(tmp_path: Path) -> None:
    extra = tmp_path / "extra.properties"
    extra.write_text("group.initial.rebalance.delay.ms=250\nlog.cleaner.backoff.ms=500\n")
    env = {
        "PATH": "/usr/bin:/bin",
        "TIDEWATCH_LOCAL_KAFKA_HOME": str(tmp_path / "home"),
        "TIDEWATCH_LOCAL_KAFKA_PORT": "29092",
        "TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES": str(extra),
    }
    props = _script_properties(env)
    assert props["listeners"] == "PLAINTEXT://127.0.0.1:29092,CONTROLLER://127.0.0.1:29093"
    assert props["advertised.listeners"] == "PLAINTEXT://127.0.0.1:29092"
    assert props["controller.quorum.bootstrap.servers"] == "127.0.0.1:29093"
    assert props["log.dirs"] == str(tmp_path / "home" / "data")
    assert props["group.initial.rebalance.delay.ms"] == "250"
    assert props["log.cleaner.backoff.ms"] == "500"
    # 'properties' only prints: nothing may be created in the cache.
    assert not (tmp_path / "home").exists()


@pytest.mark.parametrize("port", ["abc", "0", "70000", "65535"])
def test_script_refuses_bad_ports(port: str, tmp_path: Path) -> None:
    # 65535 itself is valid, but its default controller port (65536) is not.
    env = {"PATH": "/usr/bin:/bin", "TIDEWATCH_LOCAL_KAFKA_HOME": str(tmp_path),
           "TIDEWATCH_LOCAL_KAFKA_PORT": port}
    proc = _script("properties", env=env)
    assert proc.returncode != 0
    assert "port" in proc.stderr


def test_script_status_when_not_running(tmp_path: Path) -> None:
    env = {"PATH": "/usr/bin:/bin", "TIDEWATCH_LOCAL_KAFKA_HOME": str(tmp_path)}
    proc = _script("status", env=env)
    assert proc.returncode == 3
    assert "not running" in proc.stdout


def _compose() -> dict:
    # yaml (PyYAML) must be installed: a skipped parse would hide a broken file.
    with COMPOSE_FILE.open(encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def _pom_kafka_version() -> str:
    ns = {"m": "http://maven.apache.org/POM/4.0.0"}
    version = ET.parse(POM_FILE).getroot().find("m:properties/m:kafka.version", ns)
    if version is None or not version.text:
        pytest.fail(f"no kafka.version property in {POM_FILE}")
    return version.text.strip()


def test_compose_file_shape() -> None:
    compose = _compose()
    kafka = compose["services"]["kafka"]
    image, _, tag = kafka["image"].partition(":")
    assert image == "apache/kafka"
    assert tag == _pom_kafka_version()
    assert tag.split(".")[0] == "4"
    assert kafka["ports"] == ["127.0.0.1:19092:19092"]
    assert "healthcheck" in kafka
    # KRaft cluster ids are 16 bytes in URL-safe base64 without padding (Kafka's
    # Uuid string form; from memory).
    assert len(base64.urlsafe_b64decode(kafka["environment"]["CLUSTER_ID"] + "==")) == 16

    app = compose["services"]["tidewatch"]
    assert app["build"]["context"] == ".."
    # The image's ENTRYPOINT is `tidewatch`: the command starts at the subcommand.
    assert app["command"][:3] == ["run", "--config", "/etc/tidewatch/tidewatch.toml"]
    assert app["build"]["dockerfile"] == "deploy/Dockerfile"
    assert app["environment"]["TIDEWATCH_KAFKA_BOOTSTRAP_SERVERS"] == "kafka:9092"
    assert app["depends_on"]["kafka"]["condition"] == "service_healthy"
    assert "healthcheck" in app


# Keys that differ by design: listener layout (the container also needs a listener
# for the compose network), quorum form (static voters, see compose.yaml) and the
# storage path.
_LAYOUT_KEYS = {
    "controller.quorum.bootstrap.servers",
    "listeners",
    "advertised.listeners",
    "listener.security.protocol.map",
    "inter.broker.listener.name",
    "log.dirs",
}


def test_compose_broker_settings_match_the_local_broker(tmp_path: Path) -> None:
    env = {"PATH": "/usr/bin:/bin", "TIDEWATCH_LOCAL_KAFKA_HOME": str(tmp_path)}
    local = {k: v for k, v in _script_properties(env).items() if k not in _LAYOUT_KEYS}
    assert "transaction.state.log.min.isr" in local  # the filter kept the tuning keys
    environment = _compose()["services"]["kafka"]["environment"]
    # The apache/kafka image turns KAFKA_FOO_BAR into foo.bar in server.properties
    # (the image's documented env convention; from memory).
    from_compose = {
        name[len("KAFKA_"):].lower().replace("_", "."): str(value)
        for name, value in environment.items()
        if name.startswith("KAFKA_") and name != "KAFKA_HEAP_OPTS"
    }
    assert {k: from_compose.get(k) for k in local} == local
