"""Close-to-commit latency on Kafka, measured from outside: watermark-advancing message produced -> score visible.

A private broker (deploy/local-kafka/kafka.sh on --port, its own data dir) is started and stopped here.
`tidewatch run` (the real CLI, default config except bootstrap, topics, group and state dir) is started and
left to take its assignment; then, for --duration seconds, a producer sends a fleet of --services services at a
steady --rate messages per second (round-robin over the services, one round every ``services / rate`` seconds,
each round --step seconds of event time later; service i always on partition i mod --partitions). Event time
therefore runs ``step * rate / services`` times faster than the wall clock, so that windows close often enough
to collect a distribution in a bounded run.

A window [start, end) of a service closes when its partition first sees an event time >= end + lateness: the
first message of the round with that event time, produced on that partition. The producer records the wall
time of that produce call, per (round, partition). A read_committed consumer of the score topic (assigned
from the beginning before the first message is produced) records the wall time each score message is
returned to it. Latency = visible - close, per score message; p50, p99 and max are printed against the target
"p99 <= 250 ms + commit interval". The first --skip window ends are left out (start-up of the pipeline).

    python tests/benchmarks/bench_kafka_latency.py [--rate 5000] [--services 1000] [--duration 120]
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import threading
import time
from datetime import datetime
from pathlib import Path

import numpy as np
import orjson
from confluent_kafka import OFFSET_BEGINNING, Consumer, Producer, TopicPartition

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from service.config import Config, KafkaConfig  # noqa: E402
from tests.benchmarks.kafka_bench import (  # noqa: E402
    CommittedProbe,
    Names,
    create_topics,
    end_offsets,
    private_broker,
    scrape,
    start_tidewatch,
    write_config,
)


class Load:
    """The paced producer: one round of every service per ``services / rate`` seconds."""

    def __init__(self, bootstrap: str, topic: str, *, services: int, partitions: int, rate: float, step: float,
                 t0: float, duration: float) -> None:
        self.p = Producer({"bootstrap.servers": bootstrap})
        self.topic, self.services, self.partitions = topic, services, partitions
        self.rate, self.step, self.t0, self.duration = rate, step, t0, duration
        self.first: dict[tuple[int, int], float] = {}  # (round, partition) -> wall time of its first produce call
        self.sent = 0
        self.behind_max = 0.0  # how far the producer fell behind its schedule, seconds
        self.rounds = 0
        self.names = [f"svc-{i:05d}" for i in range(services)]
        self.keys = [n.encode() for n in self.names]

    def run(self) -> None:
        started = time.monotonic()
        total = int(self.rate * self.duration)
        rng = np.random.default_rng(3)
        base = rng.uniform(50, 500, self.services)
        i = 0
        while i < total:
            due = int((time.monotonic() - started) * self.rate) + 1
            self.behind_max = max(self.behind_max, (due - i) / self.rate if due > i + self.rate * 0.02 else 0.0)
            while i < min(due, total):
                r, s = divmod(i, self.services)
                ts = self.t0 + r * self.step
                part = s % self.partitions
                value = orjson.dumps({"service": self.names[s], "ts": ts, "metrics": {
                    "latency_p95_ms": float(base[s]) * (1.0 + 0.01 * (i % 7)), "errors": i % 3,
                    "requests": float(base[s]) * 3.0, "cpu_util": 0.5, "memory_mb": float(base[s]) * 4.0}})
                if (r, part) not in self.first:
                    self.first[(r, part)] = time.time()
                while True:
                    try:
                        self.p.produce(self.topic, value=value, key=self.keys[s], partition=part)
                        break
                    except BufferError:
                        self.p.poll(0.01)
                i += 1
                self.rounds = r + 1
            self.p.poll(0)
            time.sleep(0.002)
        self.sent = i
        self.p.flush(30)
        self.p = None  # its threads end now, before the broker stops


class Visible:
    """read_committed reader of the score topic: wall time each score message became visible."""

    def __init__(self, bootstrap: str, topic: str, partitions: int) -> None:
        self.c = Consumer({"bootstrap.servers": bootstrap, "group.id": "bench-latency-reader",
                           "isolation.level": "read_committed", "enable.auto.commit": False})
        self.c.assign([TopicPartition(topic, p, OFFSET_BEGINNING) for p in range(partitions)])
        self.seen: list[tuple[str, str, float]] = []
        self.stop = threading.Event()

    def run(self) -> None:
        while not self.stop.is_set():
            msgs = self.c.consume(num_messages=5000, timeout=0.05)
            now = time.time()
            for m in msgs:
                if m.error() is None:
                    d = orjson.loads(m.value())
                    self.seen.append((d["service"], d["window_end"], now))
        self.c.close()


def commit_delay_quantiles(text: str) -> str:
    """p50/p99 upper bucket bounds of tidewatch's own close-to-commit histogram (processing to commit)."""
    buckets = []
    for line in text.splitlines():
        if line.startswith("tidewatch_score_commit_delay_seconds_bucket{"):
            le = line.split('le="', 1)[1].split('"', 1)[0]
            buckets.append((float("inf") if le == "+Inf" else float(le), float(line.rsplit(" ", 1)[1])))
    if not buckets or buckets[-1][1] == 0:
        return "n/a"
    total = buckets[-1][1]
    out = []
    for q in (0.5, 0.99):
        le = next(b for b, c in buckets if c >= q * total)
        out.append(f"p{int(q * 100)} <= {le * 1000:.0f} ms")
    return ", ".join(out) + f" ({total:.0f} windows)"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--rate", type=float, default=5000.0, help="messages per second, steady")
    ap.add_argument("--services", type=int, default=1000)
    ap.add_argument("--partitions", type=int, default=4)
    ap.add_argument("--step", type=float, default=10.0, help="seconds of event time between rounds")
    ap.add_argument("--duration", type=float, default=120.0, help="seconds of load (the run's bound)")
    ap.add_argument("--skip", type=int, default=2, help="first window ends left out")
    ap.add_argument("--port", type=int, default=29092)
    a = ap.parse_args()
    defaults = Config()
    window = defaults.defaults.window
    lateness = defaults.defaults.lateness
    commit_interval = KafkaConfig().commit_interval  # the default the run uses
    # Event time ends near the wall clock; aligned to the window so window ends fall on round times.
    span = a.duration * a.rate / a.services * a.step
    t0 = float(int((time.time() - span - 3600) // 3600) * 3600)
    work = Path(tempfile.mkdtemp(prefix="tw-bench-latency-"))
    try:
        with private_broker(a.port) as broker:
            names = Names.fresh("latency")
            create_topics(broker.bootstrap, [names.input], a.partitions)
            cfg = write_config(work / "tidewatch.toml", broker.bootstrap, names, work / "state")
            inst = start_tidewatch(cfg, work / "tidewatch.log")
            try:
                inst.wait_event("assigned", 120)
                reader = Visible(broker.bootstrap, names.output, a.partitions)
                rt = threading.Thread(target=reader.run, daemon=True)
                rt.start()
                time.sleep(1.0)  # the reader's fetches are running before the first message
                load = Load(broker.bootstrap, names.input, services=a.services, partitions=a.partitions, rate=a.rate,
                            step=a.step, t0=t0, duration=a.duration)
                load_started = time.monotonic()
                load.run()
                load_s = time.monotonic() - load_started
                # Let the last closes commit: a few commit intervals, bounded.
                ends = end_offsets(broker.bootstrap, names.input, a.partitions)
                probe = CommittedProbe(broker.bootstrap, names.group, names.input, a.partitions)
                deadline = time.monotonic() + 30 + 5 * commit_interval
                while time.monotonic() < deadline:
                    c = probe.committed()
                    if all(c.get(p, -1) >= ends[p] for p in ends):
                        break
                    time.sleep(0.2)
                drained_after = time.monotonic() - load_started - load_s
                time.sleep(2 * commit_interval + 1)
                internal = commit_delay_quantiles(scrape(inst.metrics_port))
                probe.close()
                reader.stop.set()
                rt.join(10)
            finally:
                inst.stop()
    finally:
        shutil.rmtree(work, ignore_errors=True)

    rounds_closed_by = {}  # window end -> closing round index
    lat: list[float] = []
    expected = 0
    first_end = t0 + window
    skip_before = first_end + a.skip * window
    seen_keys = set()
    for service, end_s, vis in reader.seen:
        end = datetime.fromisoformat(end_s).timestamp()
        seen_keys.add((service, end))
        if end < skip_before:
            continue
        r = rounds_closed_by.setdefault(end, round((end + lateness - t0) / a.step))
        part = int(service.rsplit("-", 1)[1]) % a.partitions
        closed = load.first.get((r, part))
        if closed is not None:
            lat.append(vis - closed)
    # Every service sends in every round, so each window end whose closing round went out on a partition
    # owes one score per service of that partition.
    e = skip_before
    last_ts = t0 + (load.rounds - 1) * a.step
    while e + lateness <= last_ts:
        expected += a.services
        e += window
    arr = np.array(lat) * 1000.0
    speed = a.step * a.rate / a.services
    print(f"load: {load.sent} messages in {load_s:.1f} s ({load.sent / load_s:,.0f} msg/s, asked {a.rate:,.0f}; "
          f"producer at most {load.behind_max * 1000:.0f} ms behind schedule), {a.services} services, "
          f"{a.partitions} partitions, event time x{speed:.0f} the wall clock")
    print(f"tidewatch: window {window:.0f} s, lateness {lateness:.0f} s, commit interval {commit_interval * 1000:.0f} ms; "
          f"input committed to its end {drained_after:.1f} s after the load stopped")
    print(f"tidewatch's own histogram, window scored -> transaction committed: {internal}")
    print(f"scores measured {arr.size} of {expected} expected (window ends after the first {a.skip} left out)")
    if arr.size:
        p50, p99 = np.percentile(arr, [50, 99])
        target = 250.0 + commit_interval * 1000.0
        print(f"close -> committed score: p50 {p50:.0f} ms, p99 {p99:.0f} ms, max {arr.max():.0f} ms, "
              f"min {arr.min():.0f} ms")
        print(f"target p99 <= 250 ms + commit interval = {target:.0f} ms: {'met' if p99 <= target else 'not met'} "
              f"(p99 / target {p99 / target:.2f})")


if __name__ == "__main__":
    main()
