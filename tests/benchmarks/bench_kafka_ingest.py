"""Ingest on Kafka: `tidewatch run` (exactly-once, default config) against a bare consumer, one broker, one run.

A private broker (deploy/local-kafka/kafka.sh on --port, its own data dir) is started and stopped here. The
input topic is preloaded with a recorded fleet (tests/benchmarks/fleet.py), keyed by service. Then:

1. bare: a plain confluent-kafka consumer with a fresh group drains the topic with batch
   ``consume(num_messages=--batch)``; timed from its construction to the last message. A drain takes only
   a second or two, so one is at the mercy of whatever else the machine does in that second: it is done
   --bare-repeat times (a fresh group each) and the median counts;
2. tidewatch: the real CLI (`python -m service.cli run`, supervisor and worker) with the default config
   except bootstrap, topics, group and state dir; timed from process start until the group's committed
   offsets (committed inside tidewatch's transactions) reach the end of every input partition.

Prints both rates and tidewatch ÷ bare (target >= 0.5). tidewatch and the broker share the machine's cores.

    python tests/benchmarks/bench_kafka_ingest.py [--messages 500000] [--services 1000] [--partitions 4]
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
import uuid
from datetime import datetime
from pathlib import Path

import orjson
from confluent_kafka import Consumer, Producer

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from tests.benchmarks.fleet import write_fleet  # noqa: E402
from tests.benchmarks.kafka_bench import (  # noqa: E402
    CommittedProbe,
    Names,
    create_topics,
    end_offsets,
    metric_value,
    private_broker,
    scrape,
    start_tidewatch,
    write_config,
)


def preload(bootstrap: str, topic: str, path: str) -> int:
    """Produce every line of ``path`` keyed by its service, placed as tidewatch's own producer places keys."""
    p = Producer({"bootstrap.servers": bootstrap, "partitioner": "murmur2_random", "linger.ms": 50,
                  "batch.size": 1_000_000, "queue.buffering.max.messages": 500_000})
    n = 0
    with open(path, "rb") as f:
        for line in f:
            line = line.rstrip(b"\n")
            key = orjson.loads(line)["service"].encode()
            while True:
                try:
                    p.produce(topic, value=line, key=key)
                    break
                except BufferError:
                    p.poll(0.05)
            n += 1
            if n % 20000 == 0:
                p.poll(0)
    if p.flush(120) != 0:
        raise RuntimeError("preload not fully delivered")
    return n


def bare_drain(bootstrap: str, topic: str, expected: int, batch: int, timeout: float) -> float:
    """Seconds for a plain consumer (fresh group, from the start) to receive ``expected`` messages."""
    t0 = time.perf_counter()
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": f"bench-bare-{uuid.uuid4().hex}",
                  "auto.offset.reset": "earliest", "enable.auto.commit": False})
    c.subscribe([topic])
    n = 0
    nbytes = 0
    deadline = time.monotonic() + timeout
    try:
        while n < expected:
            if time.monotonic() > deadline:
                raise TimeoutError(f"bare consumer got {n} of {expected} in {timeout:.0f} s")
            for m in c.consume(num_messages=batch, timeout=1.0):
                if m.error() is None:
                    n += 1
                    nbytes += len(m.value())  # touch the payload, as any real reader would
        return time.perf_counter() - t0
    finally:
        c.close()


def warm_transactions(bootstrap: str, topic: str) -> float:
    """One empty transaction by a throwaway producer, before tidewatch starts; returns its seconds.

    The private broker is fresh: the first transactional producer on it waits while the broker creates and
    loads its transaction state topic (fifty partitions), a one-time cost of a new cluster. The bare consumer
    gets the same treatment from its first drain (which creates the consumer offsets topic and is then
    outvoted by the median), so without this tidewatch alone would pay a set-up cost no running cluster has.
    """
    t0 = time.perf_counter()
    p = Producer({"bootstrap.servers": bootstrap, "transactional.id": f"bench-warm-{uuid.uuid4().hex}"})
    p.init_transactions(60)
    p.begin_transaction()
    p.commit_transaction(60)
    return time.perf_counter() - t0


def worker_pid(supervisor: int) -> int | None:
    try:
        kids = Path(f"/proc/{supervisor}/task/{supervisor}/children").read_text().split()
    except OSError:
        return None
    return int(kids[0]) if kids else None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--messages", type=int, default=500_000)
    ap.add_argument("--services", type=int, default=1000)
    ap.add_argument("--partitions", type=int, default=4)
    ap.add_argument("--step", type=float, default=10.0, help="seconds of event time between scrapes of a service")
    ap.add_argument("--batch", type=int, default=2000, help="bare consumer's num_messages (tidewatch's default batch_size)")
    ap.add_argument("--bare-repeat", type=int, default=5, help="bare drains; the median time counts")
    ap.add_argument("--port", type=int, default=29092)
    ap.add_argument("--timeout", type=float, default=900.0, help="give up on either side after this many seconds")
    ap.add_argument("--profile", metavar="SVG", help="py-spy flame graph of the tidewatch worker during the run "
                    "(a name ending in .txt: collapsed stacks, one line per stack, for grep and sums)")
    ap.add_argument("--keep-log", metavar="FILE", help="copy tidewatch's JSON log here before the work dir is removed")
    a = ap.parse_args()
    work = Path(tempfile.mkdtemp(prefix="tw-bench-ingest-"))
    fleet = str(work / "fleet.jsonl")
    n = write_fleet(fleet, services=a.services, messages=a.messages, step=a.step)
    with private_broker(a.port) as broker:
        names = Names.fresh("ingest")
        create_topics(broker.bootstrap, [names.input], a.partitions)
        t0 = time.perf_counter()
        preload(broker.bootstrap, names.input, fleet)
        print(f"# preloaded {n} messages in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
        ends = end_offsets(broker.bootstrap, names.input, a.partitions)
        drains = sorted(bare_drain(broker.bootstrap, names.input, n, a.batch, a.timeout)
                        for _ in range(max(1, a.bare_repeat)))
        bare_s = drains[len(drains) // 2]
        print(f"# bare consumer drained in {', '.join(f'{d:.2f}' for d in drains)} s", file=sys.stderr)

        warm_s = warm_transactions(broker.bootstrap, names.input)
        print(f"# transaction coordinator warmed in {warm_s:.2f} s", file=sys.stderr)
        cfg = write_config(work / "tidewatch.toml", broker.bootstrap, names, work / "state")
        probe = CommittedProbe(broker.bootstrap, names.group, names.input, a.partitions)
        inst = start_tidewatch(cfg, work / "tidewatch.log")
        spy = None
        try:
            inst.wait_event("started", 120)
            if a.profile:
                pid = worker_pid(inst.proc.pid)
                fmt = ["--format", "raw"] if a.profile.endswith(".txt") else []
                spy = subprocess.Popen([str(Path(sys.executable).with_name("py-spy")), "record", "-p", str(pid),
                                        "-o", a.profile, "--nonblocking", "-r", "50", *fmt],
                                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            deadline = inst.started + a.timeout
            while True:
                committed = probe.committed()
                if all(committed.get(p, -1) >= ends[p] for p in ends):
                    break
                if time.monotonic() > deadline:
                    raise TimeoutError(f"tidewatch committed {committed} of {ends} within {a.timeout:.0f} s")
                if inst.proc.poll() is not None:
                    raise RuntimeError(f"tidewatch exited with {inst.proc.returncode}; log {inst.log}")
                time.sleep(0.1)
            tw_s = time.monotonic() - inst.started
            assigned = next(e for e in inst.events() if e.get("event") == "assigned")
            text = scrape(inst.metrics_port)
        finally:
            if spy is not None:
                spy.send_signal(2)
                spy.wait(60)
            inst.stop()
            probe.close()
        windows = metric_value(text, "tidewatch_windows_closed_total") or 0
        changelog_b = broker.topic_bytes(names.changelog)
        input_b = broker.topic_bytes(names.input)
        rejected = sum(float(line.rsplit(" ", 1)[1]) for line in text.splitlines()
                       if line.startswith("tidewatch_rejects_total{"))
        print(f"messages {n}, services {a.services}, partitions {a.partitions}, windows scored {windows:.0f}, "
              f"rejected {rejected:.0f}")
        print(f"bare consumer   {n / bare_s:12,.0f} msg/s  (median of {len(drains)} drains, {bare_s:.2f} s; "
              f"fastest {n / drains[0]:,.0f}, slowest {n / drains[-1]:,.0f} msg/s; batch {a.batch})")
        ts = assigned.get("ts")
        try:
            at = datetime.strptime(ts, "%Y-%m-%dT%H:%M:%S.%f%z").timestamp() - inst.started_wall
            when = f"{at:.2f} s after process start"
        except (TypeError, ValueError):
            when = f"at {ts}"
        print(f"tidewatch run   {n / tw_s:12,.0f} msg/s  ({tw_s:.2f} s from process start to offsets committed "
              f"at the end; first assignment logged {when})")
        print(f"ratio           {bare_s / tw_s:.3f}   (target >= 0.5)")
        print(f"bytes on the broker: input {input_b / 2**20:,.0f} MiB, changelog written by tidewatch "
              f"{changelog_b / 2**20:,.0f} MiB ({changelog_b / max(windows, 1) / 1024:.1f} KiB per window scored)")
        if a.profile:
            print(f"profile         {a.profile}")
    if a.keep_log:
        shutil.copyfile(inst.log, a.keep_log)
    shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
