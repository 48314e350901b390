"""A restore waits for a transaction still open on the changelog.

When a member is killed just after sending its commit, or hands over while its last transaction is still
being completed, the new owner's restore can start while that transaction's records are on the changelog
but past the last stable offset. A read_committed reader reports its end there; stopping at it would miss
that state while the group (whose offset fetch waits for stable offsets) hands over the input offsets the
same transaction committed, so the windows it held would never be scored. The restore must read on until
the changelog's end passes the records that were there when it started.

The test holds such a transaction open with a producer of its own, and makes the record in it one the
restore refuses (not a state record), so reading it shows up as one ``state_refused`` line.
"""

from __future__ import annotations

import time

import orjson
import pytest
from confluent_kafka import Producer

from tests.kafka_support import Topics, start_instance, stop_instance, write_config

pytestmark = pytest.mark.kafka

HOLD_S = 3.0  # how long the transaction stays open after the restore has started


def _events(path) -> list[dict]:
    return [orjson.loads(x) for x in path.read_text(errors="replace").splitlines() if x.startswith("{")]


def _wait_for(path, event: str, timeout: float = 60.0) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        for e in _events(path):
            if e.get("event") == event:
                return e
        time.sleep(0.1)
    raise AssertionError(f"no {event!r} in the log:\n{path.read_text()[-3000:]}")


def _open_previous_owner(bootstrap: str, kafka_topic, tmp_path, value: bytes):
    """Topics and a config for one instance, and the previous owner's last transaction on the changelog:
    one record written and flushed, not yet committed or aborted."""
    t = Topics(input=kafka_topic("in", 1), output=kafka_topic("scores", 1), rejects=kafka_topic("rejects", 1),
               changelog=kafka_topic("state", 1, {"cleanup.policy": "compact"}), repartition=kafka_topic("rekey", 1),
               group=f"tw-{time.monotonic_ns()}")
    cfg = write_config(tmp_path / "tw.toml", bootstrap, t)
    prev = Producer({"bootstrap.servers": bootstrap, "transactional.id": f"{t.group}.previous-owner"})
    prev.init_transactions(30)
    prev.begin_transaction()
    prev.produce(t.changelog, key=b"m\x00ferry-ticketing", value=value, partition=0)
    assert prev.flush(30) == 0
    return cfg, prev


def _restore_while_open(cfg, log, end) -> dict:
    """Start an instance, let its restore meet the open transaction for HOLD_S, then ``end(events so far)``
    (commit or abort); the ``state_restored`` event, after a clean stop."""
    p = start_instance(cfg, "restorer", log)
    try:
        _wait_for(log, "state_restoring")
        time.sleep(HOLD_S)
        end(_events(log))
        restored = _wait_for(log, "state_restored")
    finally:
        code = stop_instance(p)
    assert code == 0, log.read_text()[-3000:]
    return restored


def test_restore_reads_a_transaction_that_commits_while_it_runs(kafka_bootstrap, kafka_topic, tmp_path):
    cfg, prev = _open_previous_owner(kafka_bootstrap, kafka_topic, tmp_path, b"written by the previous owner")
    log = tmp_path / "run.log"

    def commit(events: list[dict]) -> None:
        assert not any(e.get("event") == "state_restored" for e in events), (
            "the restore ended at the stable offset, before the open transaction's records")
        prev.commit_transaction(30)

    restored = _restore_while_open(cfg, log, commit)
    assert restored["seconds"] >= HOLD_S * 0.9, restored
    refused = [e for e in _events(log) if e.get("event") == "state_refused"]
    assert [e.get("service") for e in refused] == ["ferry-ticketing"], refused


def test_restore_ends_when_an_open_transaction_aborts(kafka_bootstrap, kafka_topic, tmp_path):
    cfg, prev = _open_previous_owner(kafka_bootstrap, kafka_topic, tmp_path, b"never committed")
    log = tmp_path / "run.log"
    restored = _restore_while_open(cfg, log, lambda _events: prev.abort_transaction(30))
    assert restored["models"] == 0, restored
    assert not [e for e in _events(log) if e.get("event") == "state_refused"]  # aborted records never count
