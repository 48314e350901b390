"""Pytest plugin: a real Kafka broker for tidewatch's tests.

Load it from ``tests/conftest.py`` with ``pytest_plugins = ["tests.kafka_broker"]``.

Where the broker comes from, first match wins:

1. ``TIDEWATCH_TEST_BOOTSTRAP=host:port`` -- a broker someone already runs.
2. A Docker engine that answers ``docker info`` -- ``deploy/compose.yaml``'s
   ``kafka`` service, through pytest-docker.
3. Otherwise the local single-node broker of ``deploy/local-kafka/kafka.sh``,
   fetched if needed, started for the session and stopped at its end when a
   test session started it and no other session on the same cache still uses
   it; a broker started by hand with ``kafka.sh start`` is used and left running.

``TIDEWATCH_TEST_BROKER=local`` or ``=docker`` forces path 3 or 2. Kafka tests
never skip: when no broker can be had the fixture fails, with the broker log
tail when there is one.

Fixtures: ``kafka_broker`` (a :class:`BrokerHandle`), ``kafka_bootstrap``
(``"host:port"``), ``kafka_admin`` (an ``AdminClient``) and ``kafka_topic`` (a
factory for uniquely named topics). :func:`restart_broker` restarts the local
broker, keeping its data, for tests of a broker restart during a run.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import re
import shutil
import subprocess
import sys
import time
import uuid
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import pytest
from confluent_kafka import KafkaException
from confluent_kafka.admin import AdminClient, NewTopic

__all__ = [
    "BrokerHandle",
    "BrokerOrigin",
    "BrokerRestartUnavailable",
    "BrokerStartError",
    "KafkaBrokerError",
    "TopicFactory",
    "TopicSetupError",
    "broker_answers",
    "docker_compose_file",
    "docker_setup",
    "kafka_admin",
    "kafka_bootstrap",
    "kafka_broker",
    "kafka_topic",
    "restart_broker",
]

REPO_ROOT = Path(__file__).resolve().parents[1]
KAFKA_SCRIPT = REPO_ROOT / "deploy" / "local-kafka" / "kafka.sh"
COMPOSE_FILE = REPO_ROOT / "deploy" / "compose.yaml"
DEFAULT_PORT = 19092

# Bounds, not expectations: a cold first run fetches ~45 MB of jars with Maven
# before the broker starts; on a busy 2-core machine start-to-ready has been seen
# to take 15 s. The bounds only decide when to give up and show the log.
SCRIPT_TIMEOUT_S = 600.0
READY_TIMEOUT_S = 120.0
TOPIC_READY_TIMEOUT_S = 30.0
LOG_TAIL_LINES = 80

BrokerOrigin = Literal["env", "docker", "local"]
TopicFactory = Callable[..., str]

# Topic names Kafka accepts: ASCII letters, digits, '.', '_', '-'; at most 249.
_TOPIC_PREFIX = re.compile(r"[A-Za-z0-9._-]{1,200}")


class KafkaBrokerError(RuntimeError):
    """Base class for errors of this plugin."""


class BrokerStartError(KafkaBrokerError):
    """The broker could not be started, or did not answer in time."""


class BrokerRestartUnavailable(KafkaBrokerError):
    """A restart was asked for, but this session's broker is not the local one."""


class TopicSetupError(KafkaBrokerError):
    """A test topic could not be created, or did not become usable."""


@dataclass(frozen=True)
class BrokerHandle:
    """The broker a test session talks to.

    Parameters
    ----------
    bootstrap
        ``"host:port"`` for ``bootstrap.servers``.
    origin
        ``"env"`` (``TIDEWATCH_TEST_BOOTSTRAP``), ``"docker"`` (compose) or
        ``"local"`` (``deploy/local-kafka/kafka.sh``).
    started_here
        True when this session started the broker. It is stopped when the last
        test session using it ends (never when a developer started it by hand).
    env
        Environment passed to ``kafka.sh`` (local origin only).

    Examples
    --------
    >>> handle = BrokerHandle(bootstrap="127.0.0.1:9092", origin="env")
    >>> handle.restartable
    False
    >>> handle.restart()  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    BrokerRestartUnavailable: restart is only available for the local broker
    """

    bootstrap: str
    origin: BrokerOrigin
    started_here: bool = False
    env: Mapping[str, str] = field(default_factory=dict, repr=False)

    @property
    def restartable(self) -> bool:
        """True when :meth:`restart` can work (the local broker)."""
        return self.origin == "local"

    @property
    def log_file(self) -> Path | None:
        """The local broker's log file, or None for other origins."""
        if self.origin != "local":
            return None
        return _kafka_home(self.env) / "broker.log"

    def restart(self) -> None:
        """Stop the local broker keeping its data, start it, wait until it answers.

        Raises
        ------
        BrokerRestartUnavailable
            When the broker is not the local one (env or docker origin).
        BrokerStartError
            When the broker does not come back.
        """
        if not self.restartable:
            how = (
                "unset TIDEWATCH_TEST_BOOTSTRAP"
                if self.origin == "env"
                else "set TIDEWATCH_TEST_BROKER=local"
            )
            raise BrokerRestartUnavailable(
                "restart is only available for the local broker "
                f"(deploy/local-kafka/kafka.sh); this session uses the {self.origin} "
                f"broker at {self.bootstrap}: {how} to run restart tests."
            )
        _run_script("restart", self.env)

    def stop_keeping_data(self) -> None:
        """Stop the local broker, keeping its data, for an outage test; :meth:`start_again` ends it."""
        self._need_local("an outage")
        _run_script("stop", self.env, "--keep-data")

    def start_again(self) -> None:
        """Start the local broker stopped by :meth:`stop_keeping_data`; wait until it answers."""
        self._need_local("an outage")
        _run_script("start", self.env)

    def _need_local(self, what: str) -> None:
        if not self.restartable:
            raise BrokerRestartUnavailable(
                f"{what} needs the local broker (deploy/local-kafka/kafka.sh); this session uses the "
                f"{self.origin} broker at {self.bootstrap}")

    def log_tail(self, lines: int = LOG_TAIL_LINES) -> str:
        """Last ``lines`` lines of the local broker's log ('' when there is none)."""
        path = self.log_file
        if path is None or not path.is_file():
            return ""
        with path.open("r", encoding="utf-8", errors="replace") as fh:
            return "".join(fh.readlines()[-lines:])


_active: BrokerHandle | None = None


def restart_broker() -> None:
    """Restart this session's broker, keeping topics and records.

    Only the local broker (origin ``"local"``) can be restarted; with a broker
    from ``TIDEWATCH_TEST_BOOTSTRAP`` or compose this raises
    :class:`BrokerRestartUnavailable`. A test must request ``kafka_bootstrap``
    (or ``kafka_broker``) first, so that there is a broker.

    Raises
    ------
    KafkaBrokerError
        When no broker fixture has run yet in this session.
    BrokerRestartUnavailable
        When the broker is not the local one.
    BrokerStartError
        When the broker does not come back.
    """
    if _active is None:
        raise KafkaBrokerError("restart_broker() needs the kafka_bootstrap fixture first")
    _active.restart()


@contextlib.contextmanager
def broker_outage() -> Iterator[None]:
    """Stop this session's local broker for the body of the ``with``, then start it again (always)."""
    if _active is None:
        raise KafkaBrokerError("broker_outage() needs the kafka_bootstrap fixture first")
    _active.stop_keeping_data()
    try:
        yield
    finally:
        _active.start_again()


def broker_answers(bootstrap: str, timeout: float = 1.0) -> bool:
    """True when a broker at ``bootstrap`` answers a metadata request.

    Examples
    --------
    Nothing listens on port 9 (discard) on loopback here:

    >>> broker_answers("127.0.0.1:9", timeout=0.2)
    False
    """
    # log_level 2: librdkafka would print a connection failure per attempt while
    # a broker is still starting; the caller reports failure itself.
    admin = AdminClient({"bootstrap.servers": bootstrap, "log_level": 2})
    try:
        metadata = admin.list_topics(timeout=timeout)
    except KafkaException:
        return False
    return bool(metadata.brokers)


def _wait_until_answers(bootstrap: str, deadline_s: float) -> bool:
    deadline = time.monotonic() + deadline_s
    while time.monotonic() < deadline:
        if broker_answers(bootstrap):
            return True
        time.sleep(0.2)
    return False


# --- local broker via kafka.sh -------------------------------------------------


def _kafka_home(env: Mapping[str, str]) -> Path:
    return Path(env.get("TIDEWATCH_LOCAL_KAFKA_HOME") or REPO_ROOT / ".cache" / "kafka")


def _local_port(env: Mapping[str, str]) -> int:
    raw = env.get("TIDEWATCH_LOCAL_KAFKA_PORT") or str(DEFAULT_PORT)
    if not raw.isdigit():
        raise BrokerStartError(f"TIDEWATCH_LOCAL_KAFKA_PORT={raw!r} is not a port number")
    return int(raw)


def _script_env() -> dict[str, str]:
    env = dict(os.environ)
    # The readiness probe inside kafka.sh needs confluent_kafka: the interpreter
    # running pytest has it.
    env.setdefault("TIDEWATCH_PYTHON", sys.executable)
    return env


def _run_script(command: str, env: Mapping[str, str], *args: str) -> subprocess.CompletedProcess[str]:
    """Run ``kafka.sh COMMAND``; raise BrokerStartError with the log tail on failure."""
    try:
        proc = subprocess.run(
            ["bash", str(KAFKA_SCRIPT), command, *args],
            env=dict(env),
            capture_output=True,
            text=True,
            timeout=SCRIPT_TIMEOUT_S,
            check=False,
        )
    except subprocess.TimeoutExpired as exc:
        raise BrokerStartError(
            f"kafka.sh {command} did not finish within {SCRIPT_TIMEOUT_S:.0f}s\n"
            + _local_log_tail(env)
        ) from exc
    if proc.returncode != 0 and command in ("start", "restart", "fetch"):
        output = (proc.stdout + proc.stderr).strip()
        # kafka.sh prints the log tail itself when the broker fails; add it here
        # only when the failure came earlier (Maven, Java missing, bad port).
        tail = "" if "--- last" in output else _local_log_tail(env)
        raise BrokerStartError(
            f"kafka.sh {command} failed (exit {proc.returncode}):\n{output}\n{tail}".rstrip()
        )
    return proc


def _local_log_tail(env: Mapping[str, str]) -> str:
    path = _kafka_home(env) / "broker.log"
    if not path.is_file():
        return f"(no broker log at {path})"
    with path.open("r", encoding="utf-8", errors="replace") as fh:
        lines = fh.readlines()[-LOG_TAIL_LINES:]
    return f"--- last {len(lines)} lines of {path} ---\n" + "".join(lines)


def _process_start_time(pid: int) -> str | None:
    """Start time of ``pid`` in clock ticks since boot (None if it is gone).

    Paired with the pid it names one process for good: a pid reused later by
    another process has a different start time.
    """
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
    except (OSError, IndexError):
        return None
    # Fields after the command name start at field 3 (state); starttime is field 22.
    return fields[19] if len(fields) > 19 and fields[0] != "Z" else None


@contextlib.contextmanager
def _locked(path: Path) -> Iterator[None]:
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("a") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


@dataclass
class _LocalBroker:
    """The local broker, shared by the test sessions that use one cache at once.

    Each session holds a lease file (``<cache>/leases/<pid>-<start time>``) while
    it uses the broker. A broker that a test session started is stopped by the
    last session to leave, so two concurrent pytest runs do not pull the broker
    from under each other; a broker a developer started by hand (no
    ``started-by-tests`` marker) is left running.
    """

    env: dict[str, str]
    handle: BrokerHandle | None = None
    lease: Path | None = None

    @property
    def home(self) -> Path:
        return _kafka_home(self.env)

    def _live_leases(self) -> list[Path]:
        live = []
        for path in (self.home / "leases").glob("*-*"):
            pid, _, started = path.name.partition("-")
            if pid.isdigit() and _process_start_time(int(pid)) == started:
                live.append(path)
            else:
                path.unlink(missing_ok=True)  # left by a session that died
        return live

    def __enter__(self) -> BrokerHandle:
        bootstrap = f"127.0.0.1:{_local_port(self.env)}"
        leases = self.home / "leases"
        leases.mkdir(parents=True, exist_ok=True)
        marker = self.home / "started-by-tests"
        with _locked(self.home / ".lease-lock"):
            self._live_leases()
            self.lease = leases / f"{os.getpid()}-{_process_start_time(os.getpid())}"
            self.lease.touch()
            try:
                already = _run_script("status", self.env).returncode == 0
                if not already:
                    _run_script("start", self.env)
                    marker.touch()
            except BaseException:
                self.lease.unlink(missing_ok=True)
                raise
        self.handle = BrokerHandle(
            bootstrap=bootstrap, origin="local", started_here=not already, env=self.env
        )
        return self.handle

    def __exit__(self, *exc: object) -> None:
        if self.lease is None:
            return
        marker = self.home / "started-by-tests"
        with _locked(self.home / ".lease-lock"):
            self.lease.unlink(missing_ok=True)
            if self._live_leases() or not marker.exists():
                return
            proc = _run_script("stop", self.env)
            marker.unlink(missing_ok=True)
        if proc.returncode != 0:
            # Never turn a green session red over cleanup, but say so.
            sys.stderr.write(f"kafka_broker: stopping the local broker failed:\n{proc.stderr}\n")


# --- docker path -----------------------------------------------------------------


def _docker_answers() -> bool:
    if shutil.which("docker") is None:
        return False
    try:
        proc = subprocess.run(
            ["docker", "info"], capture_output=True, timeout=5, check=False
        )
    except (subprocess.TimeoutExpired, OSError):
        return False
    return proc.returncode == 0


@pytest.fixture(scope="session")
def docker_compose_file() -> str:
    """pytest-docker override: tidewatch's compose file (``deploy/compose.yaml``)."""
    return str(COMPOSE_FILE)


@pytest.fixture(scope="session")
def docker_setup() -> list[str]:
    """pytest-docker override: bring up only the broker, waiting for its healthcheck.

    The ``tidewatch`` service builds the repo's image; tests run tidewatch from
    the source tree instead, so only ``kafka`` is started.
    """
    return ["up --wait kafka"]


# --- fixtures --------------------------------------------------------------------


def _choose_origin() -> BrokerOrigin:
    if os.environ.get("TIDEWATCH_TEST_BOOTSTRAP"):
        return "env"
    forced = os.environ.get("TIDEWATCH_TEST_BROKER", "").strip().lower()
    if forced in ("local", "docker"):
        return forced  # type: ignore[return-value]
    if forced:
        raise BrokerStartError(
            f"TIDEWATCH_TEST_BROKER={forced!r}: expected 'local' or 'docker'"
        )
    return "docker" if _docker_answers() else "local"


@pytest.fixture(scope="session")
def kafka_broker(request: pytest.FixtureRequest) -> Iterator[BrokerHandle]:
    """The session's broker (see the module docstring for where it comes from)."""
    global _active
    local: _LocalBroker | None = None
    handle: BrokerHandle | None = None
    problem = ""
    try:
        origin = _choose_origin()
        if origin == "env":
            handle = _env_broker(os.environ["TIDEWATCH_TEST_BOOTSTRAP"])
        elif origin == "docker":
            handle = _docker_broker(request)
        else:
            local = _LocalBroker(env=_script_env())
            handle = local.__enter__()
    except KafkaBrokerError as exc:
        problem = str(exc)
    if handle is None:
        # Fail, never skip: CI must not go green without its Kafka tests. Raised
        # outside the except block so the report shows the log tail only once.
        pytest.fail(f"no Kafka broker for the tests: {problem}", pytrace=False)
    _active = handle
    try:
        yield handle
    finally:
        _active = None
        if local is not None:
            local.__exit__()


def _env_broker(bootstrap: str) -> BrokerHandle:
    if not _wait_until_answers(bootstrap, READY_TIMEOUT_S):
        raise BrokerStartError(
            f"TIDEWATCH_TEST_BOOTSTRAP={bootstrap} did not answer a metadata "
            f"request within {READY_TIMEOUT_S:.0f}s"
        )
    return BrokerHandle(bootstrap=bootstrap, origin="env")


def _docker_broker(request: pytest.FixtureRequest) -> BrokerHandle:
    # Only touched on this path, so sessions without Docker never call into
    # pytest-docker. Its own errors are plain Exceptions: wrap them.
    bootstrap = f"127.0.0.1:{DEFAULT_PORT}"
    try:
        services = request.getfixturevalue("docker_services")
        services.wait_until_responsive(
            check=lambda: broker_answers(bootstrap), timeout=READY_TIMEOUT_S, pause=0.5
        )
    except Exception as exc:  # noqa: BLE001 - pytest-docker raises bare Exception
        raise BrokerStartError(f"compose broker from {COMPOSE_FILE}: {exc}") from exc
    return BrokerHandle(bootstrap=bootstrap, origin="docker")


@pytest.fixture(scope="session")
def kafka_bootstrap(kafka_broker: BrokerHandle) -> str:
    """``"host:port"`` of the session's broker, for ``bootstrap.servers``."""
    return kafka_broker.bootstrap


@pytest.fixture(scope="session")
def kafka_admin(kafka_bootstrap: str) -> Iterator[AdminClient]:
    """An ``AdminClient`` on the session's broker (it reconnects after a restart)."""
    admin = AdminClient({"bootstrap.servers": kafka_bootstrap})
    yield admin
    # Drop the last reference before the broker stops, so the client's threads
    # end now instead of logging refused reconnects until the interpreter exits.
    del admin


def _wait_topic_ready(admin: AdminClient, name: str, partitions: int) -> None:
    """Wait until metadata lists ``name`` with every partition led by a broker."""
    deadline = time.monotonic() + TOPIC_READY_TIMEOUT_S
    last = "no metadata yet"
    while time.monotonic() < deadline:
        try:
            topic = admin.list_topics(topic=name, timeout=2).topics.get(name)
        except KafkaException as exc:
            last = str(exc)
            time.sleep(0.05)
            continue
        if topic is not None and topic.error is None:
            led = [p for p in topic.partitions.values() if p.leader >= 0 and p.error is None]
            if len(led) == partitions:
                return
            last = f"{len(led)} of {partitions} partitions have a leader"
        elif topic is not None:
            last = str(topic.error)
        time.sleep(0.05)
    raise TopicSetupError(
        f"topic {name} not usable after {TOPIC_READY_TIMEOUT_S:.0f}s: {last}"
    )


@pytest.fixture
def kafka_topic(kafka_admin: AdminClient) -> Iterator[TopicFactory]:
    """Factory ``(prefix, partitions=1, config=None) -> name`` for fresh topics.

    Each call creates ``<prefix>-<32 hex>`` and returns once every partition has
    a leader, so a producer can use it at once. The topics are deleted after the
    test (best effort).
    """
    created: list[str] = []

    def create(
        prefix: str, partitions: int = 1, config: Mapping[str, str] | None = None
    ) -> str:
        if not _TOPIC_PREFIX.fullmatch(prefix):
            raise ValueError(
                f"topic prefix {prefix!r}: use 1-200 of A-Z a-z 0-9 . _ -"
            )
        if partitions < 1:
            raise ValueError(f"partitions must be >= 1, got {partitions}")
        # uuid4 for uniqueness across sessions sharing a broker, not for data:
        # no test outcome depends on its value.
        name = f"{prefix}-{uuid.uuid4().hex}"
        new = NewTopic(
            name,
            num_partitions=partitions,
            # -1: the broker's default.replication.factor, so the same tests run on
            # the one-node broker and on a bigger TIDEWATCH_TEST_BOOTSTRAP cluster.
            replication_factor=-1,
            config=dict(config or {}),
        )
        future = kafka_admin.create_topics([new], request_timeout=15)[name]
        try:
            future.result(timeout=TOPIC_READY_TIMEOUT_S)
        except (KafkaException, TimeoutError) as exc:
            raise TopicSetupError(f"creating topic {name} failed: {exc}") from exc
        created.append(name)
        _wait_topic_ready(kafka_admin, name, partitions)
        return name

    yield create

    if created:
        futures = kafka_admin.delete_topics(created, operation_timeout=10, request_timeout=15)
        for name, future in futures.items():
            try:
                future.result(timeout=20)
            except (KafkaException, TimeoutError) as exc:
                # Best effort: the data dir is removed with the broker anyway.
                sys.stderr.write(f"kafka_topic: deleting {name} failed: {exc}\n")
