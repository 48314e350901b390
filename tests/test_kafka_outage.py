"""The output becomes unavailable mid-run (the broker stops while scores are being produced): nothing is
acknowledged that was not written. Scores, state and input offsets share one transaction, so a commit that
cannot reach the broker moves no offset; when the broker is back the work since the last commit is redone,
and a read_committed reader sees every window exactly once, scored as an uninterrupted replay scores it."""

from __future__ import annotations

import time

import orjson
import pytest

from tests.kafka_broker import broker_outage
from tests.kafka_support import produce_lines, produce_sentinels, read_scores, start_instance, stop_instance, write_config
from tests.test_kafka_run import _check, _reference, _topics, busy_lines  # noqa: F401  (fixture)

pytestmark = pytest.mark.kafka

OUTAGE_S = 12.0  # 24 commit intervals of the test config (500 ms)


def _events(path) -> list[dict]:
    out = []
    for line in path.read_text(errors="replace").splitlines():
        if line.startswith("{"):
            try:
                out.append(orjson.loads(line))
            except orjson.JSONDecodeError:
                pass
    return out


def test_a_broker_outage_while_scoring_commits_nothing_unwritten_and_loses_nothing(
        kafka_bootstrap, kafka_topic, busy_lines, tmp_path):  # noqa: F811
    lines, end, data = busy_lines
    t = _topics(kafka_topic, 2)
    # A small batch keeps the instance busy through many commits, so the outage lands mid-work.
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t, batch_size=200)
    reference = _reference(cfg, data, tmp_path)
    produce_lines(kafka_bootstrap, t.input, lines)
    produce_sentinels(kafka_bootstrap, t.input, 2, end)
    log = tmp_path / "outage.log"
    p = start_instance(cfg, "outage", log)
    try:
        seen = read_scores(kafka_bootstrap, t.output, 50, timeout=120, idle=0.0)
        assert 50 <= len(seen) < len(reference), "the outage must start while windows are still being scored"
        with broker_outage():
            went_down = time.time()
            time.sleep(OUTAGE_S)
            came_back = time.time()
        received = read_scores(kafka_bootstrap, t.output, len(reference), timeout=300)
        assert p.poll() is None, "the service exited instead of riding out the outage: " + log.read_text()[-3000:]
    finally:
        stop_instance(p)
    _check(received, reference)
    # The outage did hit transactional work: the log shows a failed, retried or aborted commit in that time.
    hit = [e for e in _events(log) if e.get("event") in {"kafka_retry", "txn_abort", "txn_abort_retry", "txn_call_stuck",
                                                         "producer_replaced", "consumer_error"}]
    assert hit, "no transactional call failed during the outage; the test did not test anything"
    assert went_down < came_back
