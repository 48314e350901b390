"""Kafka SASL settings: they pass through from the config file and the environment to every client,
and the password never reaches a log line or an error message. No SASL broker is needed: the
settings are checked where tidewatch hands them to librdkafka, and the logs and errors of real
``tidewatch run`` processes are searched for the password.
"""

from __future__ import annotations

import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import orjson
import pytest
from confluent_kafka import Consumer, Producer

from service.config import parse_config
from service.kafka_bus import _common, consumer_settings, producer_settings

PASSWORD = "Sasl-Pw-7f3c91"
SASL = {"security.protocol": "SASL_SSL", "sasl.mechanism": "SCRAM-SHA-512", "sasl.username": "tidewatch"}
DEADLINE_S = 60.0  # bound on waiting for a subprocess; times nothing


def _toml(bootstrap: str, props: dict[str, str]) -> str:
    lines = [f'[kafka]\nbootstrap_servers = "{bootstrap}"\ninput_topics = ["fleet-metrics"]\n[kafka.properties]']
    lines += [f'"{k}" = "{v}"' for k, v in props.items()]
    return "\n".join(lines) + '\n[http]\nlisten = ""\n'


@pytest.mark.parametrize("source", ["file", "environment", "both"])
def test_sasl_settings_reach_every_client(source):
    env: dict[str, str] = {}
    props: dict[str, str] = {}
    if source in ("file", "both"):
        props.update(SASL)
    if source in ("environment", "both"):
        env.update({f"TIDEWATCH_KAFKA_PROPERTY_{k.upper().replace('.', '_')}": v for k, v in SASL.items()})
    if source == "file":
        props["sasl.password"] = PASSWORD
    else:
        env["TIDEWATCH_KAFKA_PROPERTY_SASL_PASSWORD"] = PASSWORD
    cfg = parse_config(_toml("127.0.0.1:9", props), "tw.toml", env)
    k = cfg.kafka
    wanted = {**SASL, "sasl.password": PASSWORD}
    for name, conf in (("common", _common(k)), ("consumer", consumer_settings(k)), ("producer", producer_settings(k, "i1"))):
        got = {key: conf.get(key) for key in wanted}
        assert got == wanted, f"{name} client: {got}"
    # librdkafka takes them (an unknown name or a bad value would raise here); nothing connects yet.
    Producer({**producer_settings(k, "i1"), "logger": None}).flush(0)
    Consumer({**consumer_settings(k), "logger": None}).close()


def test_the_environment_wins_over_the_file_for_a_sasl_property():
    cfg = parse_config(_toml("127.0.0.1:9", {**SASL, "sasl.password": "from-the-file"}), "tw.toml",
                       {"TIDEWATCH_KAFKA_PROPERTY_SASL_PASSWORD": PASSWORD})
    assert cfg.kafka.properties["sasl.password"] == PASSWORD


@pytest.fixture
def closing_listener() -> Iterator[int]:
    """A loopback port that accepts connections and closes them at once (a broker that goes away)."""
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(16)
    srv.settimeout(0.2)
    done = threading.Event()

    def serve() -> None:
        while not done.is_set():
            try:
                conn, _ = srv.accept()
            except OSError:
                continue
            conn.close()

    t = threading.Thread(target=serve, daemon=True)
    t.start()
    yield srv.getsockname()[1]
    done.set()
    t.join(timeout=5)
    srv.close()


def _cli(args: list[str], env_extra: dict[str, str], tmp: Path) -> subprocess.CompletedProcess:
    import os

    env = {k: v for k, v in os.environ.items() if not k.startswith("TIDEWATCH_")}
    return subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True,
                          timeout=120, env={**env, **env_extra}, cwd=tmp)


def test_no_password_in_the_logs_of_a_run_at_debug_level(closing_listener, tmp_path):
    import os

    # SASL_PLAINTEXT: the client gets as far as connecting (no TLS in the way) and logs every step.
    props = {**SASL, "security.protocol": "SASL_PLAINTEXT", "debug": "conf,security,broker,protocol"}
    cfg = tmp_path / "tw.toml"
    cfg.write_text(_toml(f"127.0.0.1:{closing_listener}", props))
    env = {k: v for k, v in os.environ.items() if not k.startswith("TIDEWATCH_")}
    env["TIDEWATCH_KAFKA_PROPERTY_SASL_PASSWORD"] = PASSWORD
    log = tmp_path / "run.log"
    with open(log, "wb") as err:
        p = subprocess.Popen([sys.executable, "-m", "service.cli", "--log-level", "debug", "run", "--config", str(cfg),
                              "--no-supervise", "--state-dir", str(tmp_path / "st")],
                             stdout=subprocess.DEVNULL, stderr=err, env=env)
    try:
        deadline = time.monotonic() + DEADLINE_S
        # Wait for librdkafka's own lines about connecting with SASL, so the log searched is a talkative one.
        while b"sasl_plaintext://" not in log.read_bytes() or b"SASL" not in log.read_bytes():
            assert p.poll() is None, log.read_text()[-3000:]
            assert time.monotonic() < deadline, "no librdkafka SASL lines: " + log.read_text()[-3000:]
            time.sleep(0.1)
        time.sleep(1.0)  # a few more reconnect attempts' worth of lines
    finally:
        p.send_signal(signal.SIGTERM)
        p.wait(timeout=60)
    text = log.read_bytes()
    records = [orjson.loads(line) for line in text.splitlines() if line.startswith(b"{")]
    assert sum(r.get("logger") == "tidewatch.librdkafka" for r in records) >= 10
    assert PASSWORD.encode() not in text


@pytest.mark.parametrize("case", ["env_key_misspelt", "file_value_of_the_wrong_type", "bad_mechanism"])
def test_no_password_in_config_error_output(case, tmp_path):
    cfg = tmp_path / "tw.toml"
    env: dict[str, str] = {}
    if case == "env_key_misspelt":
        # PROPERTY_ forgotten: an unknown [kafka] key, and the error would name its value.
        cfg.write_text(_toml("127.0.0.1:9", SASL))
        env["TIDEWATCH_KAFKA_SASL_PASSWORD"] = PASSWORD
        args = ["run", "--config", str(cfg), "--no-supervise"]
    elif case == "file_value_of_the_wrong_type":
        cfg.write_text(_toml("127.0.0.1:9", SASL).replace("[kafka.properties]",
                                                          f'[kafka.properties]\n"sasl.password" = ["{PASSWORD}"]'))
        args = ["check-config", str(cfg)]
    else:
        # librdkafka refuses the mechanism when the clients are made; the password is set beside it.
        cfg.write_text(_toml("127.0.0.1:9", {**SASL, "sasl.mechanism": "NO-SUCH-MECHANISM"}))
        env["TIDEWATCH_KAFKA_PROPERTY_SASL_PASSWORD"] = PASSWORD
        args = ["run", "--config", str(cfg), "--no-supervise", "--state-dir", str(tmp_path / "st")]
    r = _cli(args, env, tmp_path)
    assert r.returncode == 2, (r.returncode, r.stderr[-2000:])
    expect = {"env_key_misspelt": "sasl_password", "file_value_of_the_wrong_type": "sasl.password",
              "bad_mechanism": "NO-SUCH-MECHANISM"}[case]
    assert expect in r.stderr  # the error still says what is wrong
    assert PASSWORD not in r.stderr and PASSWORD not in r.stdout


def test_config_problems_never_echo_a_secret_value():
    """Validation errors name the key and mask the value of anything secret-named (service.redact)."""
    from service.config import parse_config
    from service.errors import ConfigError

    for text in ('[kafka]\nbootstrap_servers = "127.0.0.1:1"\ninput_topics = ["a"]\nsasl_password = "hunter22secret"\n',
                 '[kafka]\nbootstrap_servers = "127.0.0.1:1"\ninput_topics = ["a"]\n[kafka.properties]\n"sasl.password" = 12345678\n'):
        try:
            parse_config(text)
        except ConfigError as exc:
            shown = str(exc) + " ".join(map(str, exc.args))
            assert "hunter22secret" not in shown and "12345678" not in shown
        else:
            if "12345678" in text:
                continue  # a number for a property is coerced, not refused: nothing printed to check
            raise AssertionError("the misspelt key was accepted")
