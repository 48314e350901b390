"""Restore on Kafka: time for a new `tidewatch run` to restore --services services from the changelog.

A private broker (deploy/local-kafka/kafka.sh on --port, its own data dir) is started and stopped here.

1. seed: --services services (keyed by service, as tidewatch's producer places keys) send 13 rounds, 10 s of
   event time apart; the 7th closes every service's first one-minute window, so every service has a model
   that has learned one window and one open window. The first instance (the real CLI, default config except
   bootstrap, topics, group and state dir) runs until its committed offsets reach the end, then is stopped
   with SIGTERM (a clean commit). The changelog then holds one model record per service (a model is written
   when it changes; each changed once) plus open-window and watermark records;
2. one more round is produced, whose event time closes every service's second window;
3. a new instance (same group and instance id, as after a restart) starts. Measured from its process start:
   the ``state_restored`` log line (``service/kafka_bus.py`` logs it when the assigned partitions' changelog
   has been read to its end and installed; its ``seconds`` field is the restore alone), the ``assigned`` line
   (restore done, processing starts), and the first score message visible to a read_committed consumer.

Target: restore <= 10 s for 10,000 services.

    python tests/benchmarks/bench_kafka_restore.py [--services 10000] [--partitions 4]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

import numpy as np
import orjson
from confluent_kafka import Consumer, Producer, TopicPartition

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.benchmarks.kafka_bench import (  # noqa: E402
    CommittedProbe,
    Names,
    create_topics,
    end_offsets,
    private_broker,
    start_tidewatch,
    write_config,
)


def produce_rounds(bootstrap: str, topic: str, services: int, rounds: range, t0: float, step: float) -> int:
    p = Producer({"bootstrap.servers": bootstrap, "partitioner": "murmur2_random", "linger.ms": 50})
    rng = np.random.default_rng(5)
    base = rng.uniform(50, 500, services)
    names = [f"svc-{i:05d}" for i in range(services)]
    n = 0
    for r in rounds:
        for s in range(services):
            value = orjson.dumps({"service": names[s], "ts": t0 + r * step, "metrics": {
                "latency_p95_ms": float(base[s]) * (1 + 0.05 * rng.standard_normal()), "errors": int(rng.poisson(2)),
                "requests": float(base[s]) * 3.0, "cpu_util": float(rng.uniform(0.1, 0.9)),
                "memory_mb": float(base[s]) * 4.0}})
            while True:
                try:
                    p.produce(topic, value=value, key=names[s].encode())
                    break
                except BufferError:
                    p.poll(0.05)
            n += 1
        p.poll(0)
    if p.flush(120) != 0:
        raise RuntimeError("not all delivered")
    return n


def wait_committed(bootstrap: str, n: Names, partitions: int, timeout: float, inst) -> float:
    ends = end_offsets(bootstrap, n.input, partitions)
    probe = CommittedProbe(bootstrap, n.group, n.input, partitions)
    deadline = time.monotonic() + timeout
    try:
        while True:
            c = probe.committed()
            if all(c.get(p, -1) >= ends[p] for p in ends):
                return time.monotonic()
            if inst.proc.poll() is not None:
                raise RuntimeError(f"tidewatch exited with {inst.proc.returncode}; log {inst.log}")
            if time.monotonic() > deadline:
                raise TimeoutError(f"committed {c} of {ends} within {timeout:.0f} s")
            time.sleep(0.2)
    finally:
        probe.close()


def log_time(event: dict) -> float:
    return datetime.fromisoformat(event["ts"]).timestamp()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--services", type=int, default=10_000)
    ap.add_argument("--partitions", type=int, default=4)
    ap.add_argument("--port", type=int, default=29092)
    ap.add_argument("--timeout", type=float, default=600.0, help="bound on each phase, seconds")
    a = ap.parse_args()
    step = 10.0
    t0 = float(int((time.time() - 86400) // 3600) * 3600)
    work = Path(tempfile.mkdtemp(prefix="tw-bench-restore-"))
    try:
        with private_broker(a.port) as broker:
            names = Names.fresh("restore")
            create_topics(broker.bootstrap, [names.input], a.partitions)
            cfg = write_config(work / "tidewatch.toml", broker.bootstrap, names, work / "state")
            seeded = produce_rounds(broker.bootstrap, names.input, a.services, range(13), t0, step)
            first = start_tidewatch(cfg, work / "first.log")
            try:
                seed_done = wait_committed(broker.bootstrap, names, a.partitions, a.timeout, first)
                print(f"# seeded {seeded} messages, first instance committed them {seed_done - first.started:.1f} s "
                      "after its start", file=sys.stderr)
            finally:
                code = first.stop()
            if code != 0:
                raise RuntimeError(f"first instance exited {code}; log {first.log}")
            changelog_records = sum(end_offsets(broker.bootstrap, names.changelog, a.partitions).values())
            changelog_bytes = broker.topic_bytes(names.changelog)
            produce_rounds(broker.bootstrap, names.input, a.services, range(13, 14), t0, step)
            scores_end = end_offsets(broker.bootstrap, names.output, a.partitions)
            reader = Consumer({"bootstrap.servers": broker.bootstrap, "group.id": "bench-restore-reader",
                               "isolation.level": "read_committed", "enable.auto.commit": False})
            reader.assign([TopicPartition(names.output, p, o) for p, o in scores_end.items()])
            reader.consume(num_messages=1, timeout=1.0)  # connected and fetching before the new instance starts

            second = start_tidewatch(cfg, work / "second.log")
            try:
                restored = second.wait_event("state_restored", a.timeout)
                assigned = second.wait_event("assigned", a.timeout)
                first_score = None
                deadline = time.monotonic() + a.timeout
                while first_score is None and time.monotonic() < deadline:
                    for m in reader.consume(num_messages=100, timeout=0.1):
                        if m.error() is None:
                            first_score = time.time()
                            break
                if first_score is None:
                    raise TimeoutError("no score from the new instance")
                reader.close()
            finally:
                second.stop()
            started = next(e for e in second.events() if e.get("event") == "started")
    finally:
        shutil.rmtree(work, ignore_errors=True)
    wall0 = second.started_wall
    restore_s = float(restored["seconds"])
    print(f"services {a.services}, partitions {a.partitions}; changelog {changelog_records:,} records, "
          f"{changelog_bytes / 2**20:,.0f} MiB on disk ({changelog_bytes / a.services / 1024:.1f} KiB per service)")
    print(f"models restored: {restored.get('models')}")
    print(f"start -> consuming (clients up, group joined next): {log_time(started) - wall0:6.2f} s")
    print(f"restore itself (state_restored 'seconds'):          {restore_s:6.2f} s   (target <= 10 s)")
    print(f"start -> restore done (state_restored log line):    {log_time(restored) - wall0:6.2f} s")
    print(f"start -> assigned (processing may start):           {log_time(assigned) - wall0:6.2f} s")
    print(f"start -> first score visible (read_committed):      {first_score - wall0:6.2f} s")


if __name__ == "__main__":
    main()
