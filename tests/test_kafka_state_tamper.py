"""Tampered changelog records on a real broker: each is refused with one log line and a counter, that
service alone starts fresh, every other service keeps its learned state, and scoring goes on.

The tampering covers the state-integrity catalogue: a flipped byte, a truncated record, a record from a
newer format, one signed with the wrong key, a pickle stream, and a damaged open-windows record.
"""

from __future__ import annotations

import pickle
import socket
import struct
import time
import urllib.request
import uuid
from collections import Counter

import orjson
import pytest
from confluent_kafka import Consumer, KafkaError, Producer

from models import decode_state, encode_state
from models.persistence import FORMAT_VERSION
from service.scenario import generate
from tests.kafka_support import Topics, produce_lines, produce_sentinels, read_scores, start_instance, stop_instance, write_config
from tests.models.test_models_persistence import _reseal

pytestmark = pytest.mark.kafka

KEY = b"ferry-ops-state-key"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _read_changelog(bootstrap: str, topic: str) -> dict[bytes, tuple[int, bytes]]:
    """The latest value and partition of every key on the changelog (read_committed, to the end)."""
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": f"peek-{uuid.uuid4().hex}",
                  "auto.offset.reset": "earliest", "enable.auto.commit": False,
                  "isolation.level": "read_committed", "enable.partition.eof": True})
    c.subscribe([topic])
    latest: dict[bytes, tuple[int, bytes]] = {}
    eof: set[int] = set()
    deadline = time.monotonic() + 60
    try:
        while time.monotonic() < deadline:
            for m in c.consume(num_messages=1000, timeout=0.5):
                if m.error() is not None:
                    if m.error().code() == KafkaError._PARTITION_EOF:
                        eof.add(m.partition())
                        continue
                    raise RuntimeError(m.error().str())
                latest[m.key()] = (m.partition(), m.value())
            assignment = c.assignment()
            if assignment and eof >= {tp.partition for tp in assignment}:
                break
    finally:
        c.close()
    return latest


def _wait_for_models(bootstrap: str, topic: str, services: set[str], timeout: float = 180.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        have = {k[2:].decode() for k in _read_changelog(bootstrap, topic) if k.startswith(b"m\x00")}
        if services <= have:
            return
        time.sleep(2)
    raise AssertionError(f"the changelog never held models for all of {sorted(services)}")


def _scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return r.read().decode()


def test_tampered_changelog_records_are_refused_one_by_one_and_scoring_goes_on(
        kafka_bootstrap, kafka_topic, tmp_path, monkeypatch):
    sc = generate(seed=11, days=3.0, services=6)
    data = tmp_path / "metrics.jsonl"
    sc.write_jsonl(data)
    lines = data.read_bytes().splitlines()
    services = sorted({orjson.loads(line)["service"] for line in lines})
    assert len(services) == 6
    cut = int(len(lines) * 0.6)

    t = Topics(input=kafka_topic("in", 2), output=kafka_topic("scores", 2), rejects=kafka_topic("rejects", 2),
               changelog=kafka_topic("state", 2, {"cleanup.policy": "compact"}), repartition=kafka_topic("rekey", 2),
               group=f"tw-{time.monotonic_ns()}")
    port = _free_port()
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t)
    cfg.write_text(cfg.read_text().replace('listen = ""', f'listen = "127.0.0.1:{port}"'))
    monkeypatch.setenv("TIDEWATCH_STATE_KEY", KEY.decode())

    # Phase 1: learn on the first 60% and stop cleanly, so every model is on the changelog.
    produce_lines(kafka_bootstrap, t.input, lines[:cut])
    log1 = tmp_path / "phase1.log"
    p = start_instance(cfg, "tamper-1", log1)
    try:
        _wait_for_models(kafka_bootstrap, t.changelog, set(services))
    finally:
        assert stop_instance(p) == 0, log1.read_text()[-3000:]
    first = read_scores(kafka_bootstrap, t.output, 1, idle=3.0)
    assert first, "phase 1 scored nothing"

    # Tamper: append a bad latest record for five services' models and one service's open windows.
    state = _read_changelog(kafka_bootstrap, t.changelog)
    victims = services[:5]
    kept = services[5]
    blobs = {s: state[b"m\x00" + s.encode()] for s in services}
    tampered: dict[str, tuple[bytes, str]] = {}
    part, good = blobs[victims[0]]
    flipped = bytearray(good)
    flipped[len(flipped) // 2] ^= 0x01
    tampered[victims[0]] = (bytes(flipped), "CorruptState")
    part, good = blobs[victims[1]]
    tampered[victims[1]] = (good[: len(good) // 2], "CorruptState")
    part, good = blobs[victims[2]]
    newer = bytearray(good)
    struct.pack_into("<H", newer, 4, FORMAT_VERSION + 1)
    tampered[victims[2]] = (_reseal(bytes(newer)), "UnsupportedStateVersion")
    _, model = decode_state(blobs[victims[3]][1], key=KEY)
    tampered[victims[3]] = (encode_state(victims[3], model, key=b"someone-elses-key"), "StateSignatureMismatch")
    tampered[victims[4]] = (pickle.dumps({"service": victims[4], "trees": [1, 2, 3]}), "CorruptState")
    prod = Producer({"bootstrap.servers": kafka_bootstrap})
    for service, (value, _) in tampered.items():
        prod.produce(t.changelog, key=b"m\x00" + service.encode(), value=value, partition=blobs[service][0])
    wkey = b"w\x00" + kept.encode()
    assert wkey in state, "a clean stop mid-stream leaves the open windows on the changelog"
    prod.produce(t.changelog, key=wkey, value=b'{"v": 1, "source": ', partition=state[wkey][0])
    assert prod.flush(30) == 0

    # Phase 2: the rest of the data; a new instance restores, refuses exactly the tampered records.
    produce_lines(kafka_bootstrap, t.input, lines[cut:])
    produce_sentinels(kafka_bootstrap, t.input, 2, sc.end)
    log2 = tmp_path / "phase2.log"
    p = start_instance(cfg, "tamper-2", log2)
    try:
        received = read_scores(kafka_bootstrap, t.output, len(first) + 1, timeout=300, idle=10.0)
        metrics = _scrape(port)
    finally:
        code = stop_instance(p)
    text = log2.read_text()
    assert code == 0, text[-3000:]

    events = [orjson.loads(x) for x in text.splitlines() if x.startswith("{")]
    refused = [e for e in events if e.get("event") == "state_refused"]
    by_service = Counter(e.get("service") for e in refused if e.get("service"))
    assert by_service == Counter(victims), refused  # one line per refused model record, no more
    assert any(e.get("service") is None and e.get("detail") for e in refused), "the windows record was not refused"
    assert KEY.decode() not in text and "someone-elses-key" not in text  # no key in the logs

    kinds = Counter(kind for _, kind in tampered.values())
    kinds["CorruptState"] += 1  # the damaged open-windows record
    for kind, n in kinds.items():
        assert f'tidewatch_state_records_refused_total{{kind="{kind}"}} {float(n)}' in metrics, metrics
    restored = next(e for e in events if e.get("event") == "state_restored")
    assert restored["models"] == 1  # only the untampered model came back

    # Every service, tampered or not, is scored again after the restore; nothing twice.
    keys = Counter((m["service"], m["window_start"]) for _, m in received)
    assert not [k for k, n in keys.items() if n > 1]
    before = Counter(m["service"] for _, m in first)
    total = Counter(m["service"] for _, m in received)
    assert all(total[s] > before[s] for s in services), (before, total)
