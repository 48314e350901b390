"""Pytest plugin: a second local Kafka broker with a TLS (SSL) listener, for TLS tests.

Load it from ``tests/conftest.py`` (``pytest_plugins = [..., "tests.kafka_tls"]``).

Nothing runs until a test asks for :func:`kafka_tls_broker`: then a throwaway CA
and a broker certificate for ``127.0.0.1``/``localhost`` are made with the
``openssl`` command line (plus ``keytool`` for the Java truststore), and a
separate broker is started with ``deploy/local-kafka/kafka.sh`` in its own cache
directory, on free loopback ports, with the opt-in listener of
``TIDEWATCH_LOCAL_KAFKA_TLS_PORT``. The session's ordinary broker
(``tests/kafka_broker.py``) is not touched. The TLS broker is stopped, and its
data removed, at the end of the session.

Fixtures: ``kafka_tls_material`` (a :class:`TlsMaterial`), ``kafka_tls_broker``
(a :class:`TlsBroker`) and ``kafka_tls_topic`` (a factory of fresh topics on it,
created over TLS).
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import uuid
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from confluent_kafka import KafkaException
from confluent_kafka.admin import AdminClient, NewTopic

from tests.kafka_broker import KAFKA_SCRIPT, REPO_ROOT, KafkaBrokerError

__all__ = [
    "TlsBroker",
    "TlsMaterial",
    "TlsSetupError",
    "TlsTopicFactory",
    "kafka_tls_broker",
    "kafka_tls_material",
    "kafka_tls_topic",
    "make_tls_material",
]

# Bounds on waiting, not expectations: they only decide when to give up and show the log.
SCRIPT_TIMEOUT_S = 600.0
TLS_READY_TIMEOUT_S = 60.0
TOPIC_READY_TIMEOUT_S = 30.0
# Throwaway stores for a loopback test broker; the value protects nothing.
STORE_PASSWORD = "tidewatch-test-store"
CERT_DAYS = "2"

TlsTopicFactory = Callable[..., str]


class TlsSetupError(KafkaBrokerError):
    """The certificates could not be made or the TLS broker did not come up."""


@dataclass(frozen=True)
class TlsMaterial:
    """Files of the throwaway PKI.

    Parameters
    ----------
    ca_pem
        The CA certificate that signed the broker certificate (for ``ssl.ca.location``).
    wrong_ca_pem
        An unrelated CA certificate: a client trusting only it must refuse the broker.
    keystore
        PKCS12 keystore with the broker key, its certificate and the CA.
    truststore
        PKCS12 truststore holding the CA (made with keytool: Java only trusts
        certificate entries carrying its trusted-certificate attribute).
    password
        Password of both stores.
    """

    ca_pem: Path
    wrong_ca_pem: Path
    keystore: Path
    truststore: Path
    password: str


@dataclass(frozen=True)
class TlsBroker:
    """The TLS test broker.

    Parameters
    ----------
    bootstrap
        ``"127.0.0.1:<tls port>"``; clients must use ``security.protocol=SSL`` there.
    plaintext_bootstrap
        The same broker's PLAINTEXT listener (inter-broker traffic and kafka.sh's probe).
    material
        The certificates and stores it was started with.
    home
        Its ``TIDEWATCH_LOCAL_KAFKA_HOME`` (data, ``server.properties``, ``broker.log``).
    start_seconds
        Wall time from ``kafka.sh start`` (after the certificates) to the SSL listener answering.

    Examples
    --------
    >>> m = TlsMaterial(Path("ca.pem"), Path("x.pem"), Path("k.p12"), Path("t.p12"), "pw")
    >>> b = TlsBroker("127.0.0.1:1", "127.0.0.1:2", m, Path("home"), 0.0)
    >>> b.client_settings()["security.protocol"]
    'SSL'
    >>> b.client_settings(ca=Path("other.pem"))["ssl.ca.location"]
    'other.pem'
    """

    bootstrap: str
    plaintext_bootstrap: str
    material: TlsMaterial
    home: Path
    start_seconds: float

    def client_settings(self, ca: Path | None = None) -> dict[str, Any]:
        """librdkafka settings for a client of the SSL listener trusting ``ca`` (default: the right CA)."""
        return {
            "bootstrap.servers": self.bootstrap,
            "security.protocol": "SSL",
            "ssl.ca.location": str(ca or self.material.ca_pem),
        }

    def log_tail(self, lines: int = 80) -> str:
        """Last ``lines`` lines of the broker log ('' when there is none)."""
        path = self.home / "broker.log"
        if not path.is_file():
            return ""
        with path.open("r", encoding="utf-8", errors="replace") as fh:
            return "".join(fh.readlines()[-lines:])


# --- certificates ---------------------------------------------------------------


def _run(cmd: list[str], cwd: Path) -> None:
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=120, check=False)
    if proc.returncode != 0:
        raise TlsSetupError(f"{' '.join(cmd)} failed (exit {proc.returncode}):\n{proc.stderr.strip()}")


def _self_signed_ca(directory: Path, name: str, common_name: str) -> Path:
    _run([
        "openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes",
        "-keyout", f"{name}.key", "-out", f"{name}.pem", "-days", CERT_DAYS,
        "-subj", f"/CN={common_name}",
        "-addext", "basicConstraints=critical,CA:TRUE",
        "-addext", "keyUsage=critical,keyCertSign,cRLSign",
    ], directory)
    return directory / f"{name}.pem"


def make_tls_material(directory: Path) -> TlsMaterial:
    """Make a CA, a broker certificate for 127.0.0.1/localhost, the broker's stores and a wrong CA.

    Raises
    ------
    TlsSetupError
        When ``openssl`` or ``keytool`` is missing or fails.
    """
    for tool in ("openssl", "keytool"):
        if shutil.which(tool) is None:
            raise TlsSetupError(f"{tool} not found on PATH (needed to make the test certificates)")
    directory.mkdir(parents=True, exist_ok=True)
    ca = _self_signed_ca(directory, "ca", "tidewatch test CA")
    wrong = _self_signed_ca(directory, "wrong-ca", "tidewatch unrelated CA")
    _run([
        "openssl", "req", "-newkey", "rsa:2048", "-nodes",
        "-keyout", "broker.key", "-out", "broker.csr", "-subj", "/CN=localhost",
    ], directory)
    # librdkafka checks the broker's name against the subjectAltName (its default
    # ssl.endpoint.identification.algorithm is https), and clients dial 127.0.0.1.
    (directory / "broker.ext").write_text(
        "basicConstraints=CA:FALSE\n"
        "keyUsage=critical,digitalSignature,keyEncipherment\n"
        "extendedKeyUsage=serverAuth\n"
        "subjectAltName=IP:127.0.0.1,DNS:localhost\n"
    )
    _run([
        "openssl", "x509", "-req", "-in", "broker.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
        "-set_serial", "2", "-days", CERT_DAYS, "-extfile", "broker.ext", "-out", "broker.pem",
    ], directory)
    _run([
        "openssl", "pkcs12", "-export", "-in", "broker.pem", "-inkey", "broker.key",
        "-certfile", "ca.pem", "-name", "broker", "-out", "broker.p12",
        "-passout", f"pass:{STORE_PASSWORD}",
    ], directory)
    _run([
        "keytool", "-importcert", "-noprompt", "-alias", "tidewatch-test-ca", "-file", "ca.pem",
        "-keystore", "truststore.p12", "-storetype", "PKCS12", "-storepass", STORE_PASSWORD,
    ], directory)
    return TlsMaterial(
        ca_pem=ca, wrong_ca_pem=wrong, keystore=directory / "broker.p12",
        truststore=directory / "truststore.p12", password=STORE_PASSWORD,
    )


# --- the broker -------------------------------------------------------------------


def _free_ports(n: int) -> list[int]:
    # All bound at once so the kernel hands out n different ports.
    socks = [socket.socket(socket.AF_INET, socket.SOCK_STREAM) for _ in range(n)]
    try:
        for s in socks:
            s.bind(("127.0.0.1", 0))
        return [int(s.getsockname()[1]) for s in socks]
    finally:
        for s in socks:
            s.close()


def _script(command: str, env: Mapping[str, str]) -> subprocess.CompletedProcess[str]:
    try:
        return subprocess.run(
            ["bash", str(KAFKA_SCRIPT), command], env=dict(env), capture_output=True,
            text=True, timeout=SCRIPT_TIMEOUT_S, check=False,
        )
    except subprocess.TimeoutExpired as exc:
        raise TlsSetupError(f"kafka.sh {command} did not finish within {SCRIPT_TIMEOUT_S:.0f}s") from exc


def _shared_libs() -> Path:
    """The jars of the ordinary broker's cache, fetched once if missing.

    The TLS broker links them instead of fetching its own copy (about 45 MB).
    """
    env = {**os.environ, "TIDEWATCH_PYTHON": sys.executable}
    home = Path(env.get("TIDEWATCH_LOCAL_KAFKA_HOME") or REPO_ROOT / ".cache" / "kafka")
    proc = _script("fetch", env)
    if proc.returncode != 0:
        raise TlsSetupError(f"kafka.sh fetch failed:\n{(proc.stdout + proc.stderr).strip()}")
    return home / "libs"


def _ssl_answers(settings: Mapping[str, Any]) -> bool:
    # log_level 3: no per-attempt connection noise while the broker starts.
    admin = AdminClient({**settings, "log_level": 3})
    try:
        return bool(admin.list_topics(timeout=1).brokers)
    except KafkaException:
        return False


@pytest.fixture(scope="session")
def kafka_tls_material(tmp_path_factory: pytest.TempPathFactory) -> TlsMaterial:
    """The throwaway CA, broker certificate and stores (a wrong CA too)."""
    return make_tls_material(tmp_path_factory.mktemp("tls-pki"))


@pytest.fixture(scope="session")
def kafka_tls_broker(
    kafka_tls_material: TlsMaterial, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[TlsBroker]:
    """A separate local broker with an SSL listener, started for the session when first asked for."""
    material = kafka_tls_material
    t0 = time.monotonic()
    try:
        libs = _shared_libs()
    except TlsSetupError as exc:
        pytest.fail(f"no TLS broker for the tests: {exc}", pytrace=False)
    home = tmp_path_factory.mktemp("kafka-tls-home")
    (home / "libs").symlink_to(libs, target_is_directory=True)
    port, controller, tls = _free_ports(3)
    env = {
        **os.environ,
        "TIDEWATCH_PYTHON": sys.executable,
        "TIDEWATCH_LOCAL_KAFKA_HOME": str(home),
        "TIDEWATCH_LOCAL_KAFKA_PORT": str(port),
        "TIDEWATCH_LOCAL_KAFKA_CONTROLLER_PORT": str(controller),
        "TIDEWATCH_LOCAL_KAFKA_TLS_PORT": str(tls),
        "TIDEWATCH_LOCAL_KAFKA_TLS_KEYSTORE": str(material.keystore),
        "TIDEWATCH_LOCAL_KAFKA_TLS_TRUSTSTORE": str(material.truststore),
        "TIDEWATCH_LOCAL_KAFKA_TLS_PASSWORD": material.password,
    }
    # Settings meant for the ordinary broker must not leak into this one.
    env.pop("TIDEWATCH_LOCAL_KAFKA_EXTRA_PROPERTIES", None)
    broker = TlsBroker(
        bootstrap=f"127.0.0.1:{tls}", plaintext_bootstrap=f"127.0.0.1:{port}",
        material=material, home=home, start_seconds=0.0,
    )
    try:
        proc = _script("start", env)
        if proc.returncode != 0:
            pytest.fail(f"TLS broker did not start:\n{(proc.stdout + proc.stderr).strip()}", pytrace=False)
        # kafka.sh's probe saw the PLAINTEXT listener; poll until the SSL one answers too.
        deadline = time.monotonic() + TLS_READY_TIMEOUT_S
        while not _ssl_answers(broker.client_settings()):
            if time.monotonic() > deadline:
                pytest.fail(
                    f"SSL listener {broker.bootstrap} did not answer within {TLS_READY_TIMEOUT_S:.0f}s\n"
                    + broker.log_tail(), pytrace=False,
                )
            time.sleep(0.1)
        broker = TlsBroker(
            bootstrap=broker.bootstrap, plaintext_bootstrap=broker.plaintext_bootstrap,
            material=material, home=home, start_seconds=time.monotonic() - t0,
        )
        sys.stderr.write(f"\nkafka_tls: TLS broker ready at {broker.bootstrap} in {broker.start_seconds:.1f}s\n")
        yield broker
    finally:
        stopped = _script("stop", env)
        if stopped.returncode != 0:
            # Never turn a green session red over cleanup, but say so.
            sys.stderr.write(f"kafka_tls: stopping the TLS broker failed:\n{stopped.stderr}\n")


@pytest.fixture
def kafka_tls_topic(kafka_tls_broker: TlsBroker) -> Iterator[TlsTopicFactory]:
    """Factory ``(prefix, partitions=1, config=None) -> name`` of fresh topics, created over TLS."""
    admin = AdminClient(kafka_tls_broker.client_settings())

    def create(prefix: str, partitions: int = 1, config: Mapping[str, str] | None = None) -> str:
        # uuid4 only makes names unique; no outcome depends on its value.
        name = f"{prefix}-{uuid.uuid4().hex}"
        future = admin.create_topics(
            [NewTopic(name, num_partitions=partitions, replication_factor=1, config=dict(config or {}))],
            request_timeout=15,
        )[name]
        try:
            future.result(timeout=TOPIC_READY_TIMEOUT_S)
        except (KafkaException, TimeoutError) as exc:
            raise TlsSetupError(f"creating topic {name} over TLS failed: {exc}") from exc
        deadline = time.monotonic() + TOPIC_READY_TIMEOUT_S
        while True:
            topic = admin.list_topics(topic=name, timeout=2).topics.get(name)
            if topic is not None and topic.error is None and sum(
                p.leader >= 0 for p in topic.partitions.values()
            ) == partitions:
                return name
            if time.monotonic() > deadline:
                raise TlsSetupError(f"topic {name} has no leader for every partition after {TOPIC_READY_TIMEOUT_S:.0f}s")
            time.sleep(0.05)

    yield create
    # The topics go with the broker's data dir at session end; nothing to delete here.
    del admin
