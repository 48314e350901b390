"""Shared pieces of the Kafka benchmarks: a private broker, fresh topics, tidewatch processes, offsets.

The broker is ``deploy/local-kafka/kafka.sh`` with its own home directory (so its own data dir, pid file and
log) on a non-default port, so it never meets the test suite's broker on 19092. The jars are not fetched
again: the home's ``libs`` is a link to the repository's cache when that holds them.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from confluent_kafka import Consumer, TopicPartition
from confluent_kafka.admin import AdminClient, NewTopic

from tests.kafka_support import Topics

REPO = Path(__file__).resolve().parents[2]
KAFKA_SH = REPO / "deploy" / "local-kafka" / "kafka.sh"
SHARED_LIBS = REPO / ".cache" / "kafka" / "libs"
DEFAULT_BENCH_PORT = 29092


def _port_free(port: int) -> bool:
    with socket.socket() as s:
        return s.connect_ex(("127.0.0.1", port)) != 0


@dataclass
class Broker:
    """A running private broker: ``bootstrap`` for clients, ``home`` for its data and log."""

    bootstrap: str
    home: Path
    env: dict[str, str] = field(repr=False)

    def topic_bytes(self, topic: str) -> int:
        """Bytes of the log segments of every partition of ``topic`` on disk (indexes not counted)."""
        total = 0
        for d in (self.home / "data").glob(f"{topic}-*"):
            if d.name.rpartition("-")[0] != topic:
                continue
            total += sum(f.stat().st_size for f in d.iterdir() if f.suffix == ".log")
        return total


@contextlib.contextmanager
def private_broker(port: int = DEFAULT_BENCH_PORT) -> Iterator[Broker]:
    """Start ``kafka.sh`` on ``port`` (controller ``port + 1``) with a fresh home; stop and remove it after."""
    for p in (port, port + 1):
        if not _port_free(p):
            raise SystemExit(f"127.0.0.1:{p} is in use; pick another --port")
    home = Path(tempfile.mkdtemp(prefix="tw-bench-kafka-"))
    if (SHARED_LIBS / ".pom-sha256").is_file():
        # kafka.sh skips the Maven fetch when libs/.pom-sha256 matches pom.xml.
        (home / "libs").symlink_to(SHARED_LIBS)
    env = {**os.environ, "TIDEWATCH_LOCAL_KAFKA_HOME": str(home), "TIDEWATCH_LOCAL_KAFKA_PORT": str(port),
           "TIDEWATCH_PYTHON": sys.executable}
    # The benchmark loads the broker harder than the tests do; more heap than the test default.
    env.setdefault("TIDEWATCH_LOCAL_KAFKA_HEAP", "-Xms512m -Xmx1g")
    started = time.monotonic()
    proc = subprocess.run(["bash", str(KAFKA_SH), "start"], env=env, capture_output=True, text=True, timeout=600)
    if proc.returncode != 0:
        shutil.rmtree(home, ignore_errors=True)
        raise SystemExit(f"broker did not start:\n{proc.stdout}{proc.stderr}")
    print(f"# broker up at 127.0.0.1:{port} in {time.monotonic() - started:.1f} s (home {home})", file=sys.stderr)
    try:
        yield Broker(f"127.0.0.1:{port}", home, env)
    finally:
        subprocess.run(["bash", str(KAFKA_SH), "stop"], env=env, capture_output=True, text=True, timeout=120)
        shutil.rmtree(home, ignore_errors=True)
        print("# broker stopped, home removed", file=sys.stderr)


def create_topics(bootstrap: str, names: list[str], partitions: int) -> None:
    admin = AdminClient({"bootstrap.servers": bootstrap})
    futures = admin.create_topics([NewTopic(n, num_partitions=partitions, replication_factor=1) for n in names])
    for f in futures.values():
        f.result(30)
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline:
        md = admin.list_topics(timeout=5)
        if all(n in md.topics and len(md.topics[n].partitions) == partitions
               and all(p.leader >= 0 for p in md.topics[n].partitions.values()) for n in names):
            return
        time.sleep(0.1)
    raise RuntimeError(f"topics {names} not ready")


class Names(Topics):
    """Fresh topic and group names for one tidewatch deployment (the test suite's :class:`Topics`)."""

    @classmethod
    def fresh(cls, prefix: str) -> Names:
        tag = uuid.uuid4().hex[:8]  # uniqueness only; no result depends on it
        return cls(*(f"{prefix}-{kind}-{tag}" for kind in ("metrics", "scores", "rejects", "state", "repart", "group")))


def write_config(path: Path, bootstrap: str, n: Names, state_dir: Path) -> Path:
    """tidewatch's defaults, except where the bus is (bootstrap, topics, group) and the state dir."""
    path.write_text(f"""
[state]
dir = "{state_dir}"

[kafka]
bootstrap_servers = "{bootstrap}"
input_topics = ["{n.input}"]
output_topic = "{n.output}"
rejects_topic = "{n.rejects}"
changelog_topic = "{n.changelog}"
repartition_topic = "{n.repartition}"
group_id = "{n.group}"
""")
    return path


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class Instance:
    """One ``tidewatch run`` process (the real CLI, its supervisor and worker) and its JSON log."""

    proc: subprocess.Popen
    log: Path
    started_wall: float
    started: float  # monotonic
    metrics_port: int

    def events(self) -> list[dict]:
        out = []
        with contextlib.suppress(FileNotFoundError), self.log.open("rb") as f:
            for line in f:
                with contextlib.suppress(ValueError):
                    out.append(json.loads(line))
        return out

    def wait_event(self, name: str, timeout: float) -> dict:
        """Wait for the first log line whose ``event`` is ``name``; the caller reads its own time."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            for e in self.events():
                if e.get("event") == name:
                    return e
            if self.proc.poll() is not None:
                raise RuntimeError(f"tidewatch exited with {self.proc.returncode}; log {self.log}")
            time.sleep(0.05)
        raise TimeoutError(f"no {name!r} log line within {timeout:.0f} s; log {self.log}")

    def stop(self, timeout: float = 60.0) -> int:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            return self.proc.wait(timeout=10)


def start_tidewatch(config: Path, log: Path, instance: str = "bench") -> Instance:
    port = free_port()
    env = {**os.environ, "TIDEWATCH_KAFKA_INSTANCE_ID": instance, "TIDEWATCH_LOG_LEVEL": "info"}
    wall, mono = time.time(), time.monotonic()
    # The CLI entry point itself (`tidewatch run`: supervisor plus worker), from the source tree.
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "run", "--config", str(config),
                             "--listen", f"127.0.0.1:{port}"],
                            cwd=REPO, env=env, stdout=subprocess.DEVNULL, stderr=open(log, "ab"))
    return Instance(proc, log, wall, mono, port)


def end_offsets(bootstrap: str, topic: str, partitions: int) -> dict[int, int]:
    c = Consumer({"bootstrap.servers": bootstrap, "group.id": "bench-probe"})
    try:
        return {p: c.get_watermark_offsets(TopicPartition(topic, p), timeout=10)[1] for p in range(partitions)}
    finally:
        c.close()


class CommittedProbe:
    """Reads a group's committed offsets without joining the group."""

    def __init__(self, bootstrap: str, group: str, topic: str, partitions: int) -> None:
        self.c = Consumer({"bootstrap.servers": bootstrap, "group.id": group, "enable.auto.commit": False})
        self.tps = [TopicPartition(topic, p) for p in range(partitions)]

    def committed(self) -> dict[int, int]:
        return {tp.partition: tp.offset for tp in self.c.committed(self.tps, timeout=10)}

    def close(self) -> None:
        self.c.close()


def scrape(port: int) -> str:
    import urllib.request

    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
        return r.read().decode()


def metric_value(text: str, name: str) -> float | None:
    for line in text.splitlines():
        if line.startswith(name + " ") or line.startswith(name + "{"):
            return float(line.rsplit(" ", 1)[1])
    return None
