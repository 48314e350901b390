"""tidewatch run on a real Kafka broker: round trip, crashes, scale-out, unkeyed input, broker restart.

Every test compares what a read_committed consumer of the score topic sees with the embedded
``replay`` of the same data: same (service, window) pairs, same scores, no duplicates, no gaps.
"""

from __future__ import annotations

import random
import signal
import time
from collections import Counter
from pathlib import Path

import orjson
import pytest

from service.config import load_config
from service.embedded import replay
from service.scenario import generate
from tests.kafka_broker import restart_broker
from tests.kafka_support import (
    Topics,
    produce_lines,
    produce_sentinels,
    read_scores,
    score_table,
    start_instance,
    stop_instance,
    write_config,
)

pytestmark = pytest.mark.kafka


@pytest.fixture(scope="module")
def scenario_lines(tmp_path_factory) -> tuple[list[bytes], float, Path]:
    """Three days of the demo scenario for six services, one scrape a minute each."""
    d = tmp_path_factory.mktemp("scenario")
    path = d / "metrics.jsonl"
    sc = generate(seed=7, days=3.0, services=6)
    sc.write_jsonl(path)
    return path.read_bytes().splitlines(), sc.end, path


@pytest.fixture(scope="module")
def busy_lines(tmp_path_factory) -> tuple[list[bytes], float, Path]:
    """Three days of the demo scenario for 40 services, one scrape a minute each (173,000 lines).

    For the tests whose fault must land while the instance is still scoring: six services'
    26,000 lines were all scored within a few seconds of start on a fast machine, before a kill
    at 2 to 6 s or an outage started after the first scores were read.
    """
    d = tmp_path_factory.mktemp("busy-scenario")
    path = d / "metrics.jsonl"
    sc = generate(seed=7, days=3.0, services=40)
    sc.write_jsonl(path)
    return path.read_bytes().splitlines(), sc.end, path


def _topics(kafka_topic, partitions: int) -> Topics:
    return Topics(
        input=kafka_topic("in", partitions),
        output=kafka_topic("scores", partitions),
        rejects=kafka_topic("rejects", partitions),
        changelog=kafka_topic("state", partitions, {"cleanup.policy": "compact"}),
        repartition=kafka_topic("rekey", partitions),
        group=f"tw-{time.monotonic_ns()}",
    )


def _reference(config_path: Path, data: Path, tmp_path: Path) -> dict:
    cfg = load_config(config_path, environ={})
    out = tmp_path / "reference.jsonl"
    replay(cfg.model_copy(update={"kafka": None}), str(data), str(out))
    return score_table(orjson.loads(line) for line in out.read_bytes().splitlines())


def _check(received, reference: dict) -> None:
    keys = Counter((m["service"], m["window_start"]) for _, m in received)
    dupes = [k for k, n in keys.items() if n > 1]
    assert not dupes, f"{len(dupes)} (service, window) pairs scored more than once, e.g. {dupes[:3]}"
    for key, m in received:
        assert key == m["service"].encode(), "score messages are keyed by service"
    got = score_table(m for _, m in received)
    missing = sorted(set(reference) - set(got))
    extra = sorted(set(got) - set(reference))
    assert not missing and not extra, f"missing {missing[:3]} ({len(missing)}), extra {extra[:3]} ({len(extra)})"
    diff = [k for k in reference if reference[k] != got[k]]
    assert not diff, f"{len(diff)} windows scored differently, e.g. {diff[0]}: {reference[diff[0]]} vs {got[diff[0]]}"


def test_round_trip_equals_the_embedded_replay(kafka_bootstrap, kafka_topic, scenario_lines, tmp_path):
    lines, end, data = scenario_lines
    t = _topics(kafka_topic, 3)
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t)
    reference = _reference(cfg, data, tmp_path)
    produce_lines(kafka_bootstrap, t.input, lines)
    produce_sentinels(kafka_bootstrap, t.input, 3, end)
    p = start_instance(cfg, "solo", tmp_path / "solo.log")
    try:
        received = read_scores(kafka_bootstrap, t.output, len(reference))
    finally:
        code = stop_instance(p)
    assert code == 0, (tmp_path / "solo.log").read_text()[-3000:]
    _check(received, reference)


def test_killed_five_times_and_restarted_scores_exactly_once(kafka_bootstrap, kafka_topic, busy_lines, tmp_path):
    lines, end, data = busy_lines
    t = _topics(kafka_topic, 2)
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t)
    reference = _reference(cfg, data, tmp_path)
    produce_lines(kafka_bootstrap, t.input, lines)
    produce_sentinels(kafka_bootstrap, t.input, 2, end)
    rng = random.Random(20261202)  # seeded: the kill points are the same on every run
    log = tmp_path / "crashy.log"
    for _ in range(5):
        p = start_instance(cfg, "crashy", log)
        time.sleep(rng.uniform(2.0, 6.0))
        p.send_signal(signal.SIGKILL)
        p.wait(timeout=30)
    # Every kill landed while work was left: the windows visible so far are fewer than all of them.
    # (No instance runs now: what a reader sees in 15 s is everything committed so far.)
    midway = read_scores(kafka_bootstrap, t.output, len(reference), timeout=15, idle=0.0)
    assert len(midway) < len(reference), "the instance finished before the last kill; the kills tested nothing"
    p = start_instance(cfg, "crashy", log)
    try:
        received = read_scores(kafka_bootstrap, t.output, len(reference), timeout=300)
    finally:
        stop_instance(p)
    _check(received, reference)


def test_three_instances_one_killed_halfway_score_every_window_once(kafka_bootstrap, kafka_topic, scenario_lines, tmp_path):
    lines, end, data = scenario_lines
    t = _topics(kafka_topic, 6)
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t)
    reference = _reference(cfg, data, tmp_path)
    procs = [start_instance(cfg, f"member-{i}", tmp_path / f"m{i}.log") for i in range(3)]
    try:
        time.sleep(4.0)  # let the group form before data arrives
        half = len(lines) // 2
        produce_lines(kafka_bootstrap, t.input, lines[:half])
        time.sleep(3.0)
        procs[1].send_signal(signal.SIGKILL)  # killed, never restarted
        procs[1].wait(timeout=30)
        produce_lines(kafka_bootstrap, t.input, lines[half:])
        produce_sentinels(kafka_bootstrap, t.input, 6, end)
        received = read_scores(kafka_bootstrap, t.output, len(reference), timeout=300)
    finally:
        for p in procs:
            if p.poll() is None:
                stop_instance(p)
    _check(received, reference)


def test_unkeyed_input_through_the_repartition_topic_scores_like_keyed_input(kafka_bootstrap, kafka_topic, scenario_lines, tmp_path):
    lines, end, data = scenario_lines
    t = _topics(kafka_topic, 3)
    # A backlog of unkeyed input is read partition by partition; tidewatch forwards it in event-time
    # step across input partitions (repartition_alignment), so the default lateness is enough.
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t, keyed=False)
    reference = _reference(cfg, data, tmp_path)
    produce_lines(kafka_bootstrap, t.input, lines, keyed=False, partitions=3)
    # Sentinels go through the repartition topic too; each closes the windows of the partition it lands on.
    produce_lines(kafka_bootstrap, t.input, [
        orjson.dumps({"service": f"zz-close-{i}", "ts": end + 4 * 3600, "metrics": {"x": 0}}) for i in range(24)
    ], keyed=False, partitions=3)
    p = start_instance(cfg, "rekey", tmp_path / "rekey.log")
    try:
        received = read_scores(kafka_bootstrap, t.output, len(reference), timeout=300)
    finally:
        stop_instance(p)
    received = [(k, m) for k, m in received if not m["service"].startswith("zz-close-")]
    _check(received, reference)


def test_a_broker_restart_during_a_run_loses_nothing(kafka_bootstrap, kafka_topic, scenario_lines, tmp_path):
    lines, end, data = scenario_lines
    t = _topics(kafka_topic, 2)
    cfg = write_config(tmp_path / "tw.toml", kafka_bootstrap, t)
    reference = _reference(cfg, data, tmp_path)
    log = tmp_path / "restart.log"
    p = start_instance(cfg, "steady", log)
    try:
        third = len(lines) // 3
        produce_lines(kafka_bootstrap, t.input, lines[:third])
        time.sleep(3.0)
        restart_broker()
        produce_lines(kafka_bootstrap, t.input, lines[third:])
        produce_sentinels(kafka_bootstrap, t.input, 2, end)
        received = read_scores(kafka_bootstrap, t.output, len(reference), timeout=300)
        assert p.poll() is None, "the service exited instead of recovering: " + log.read_text()[-3000:]
    finally:
        stop_instance(p)
    _check(received, reference)
