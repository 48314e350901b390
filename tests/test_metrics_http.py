"""The /metrics, /healthz and /readyz endpoint, and the metric families it exposes."""

from __future__ import annotations

import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request

from prometheus_client.parser import text_string_to_metric_families

from service.httpserver import MetricsServer
from service.metrics import build_registry
from service.stats import RuntimeStats
from tests.test_embedded import write_stream


def _get(url: str) -> tuple[int, str]:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.status, r.read().decode()
    except urllib.error.HTTPError as e:
        return e.code, e.read().decode()


def _families(text: str) -> dict:
    return {f.name: f for f in text_string_to_metric_families(text)}


def test_collector_exposes_counters_gauges_and_histograms():
    stats = RuntimeStats()
    stats.accepted = 10
    stats.rejected.update({"bad_ts": 2, "late": 1})
    stats.windows_closed = 4
    stats.latest = {"a": (0.2, False, 0.0), "b": (0.999, True, 0.0)}
    stats.save_seconds.observe(0.02)
    server = MetricsServer("127.0.0.1:0", build_registry(stats, lambda: 2, 5000), stats).start()
    try:
        host, port = server.address
        code, text = _get(f"http://{host}:{port}/metrics")
    finally:
        server.stop()
    assert code == 200
    fam = _families(text)
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value for f in fam.values() for s in f.samples}
    assert samples[("tidewatch_messages_total", (("outcome", "accepted"),))] == 10
    assert samples[("tidewatch_messages_total", (("outcome", "rejected"),))] == 3
    assert samples[("tidewatch_rejects_total", (("reason", "bad_ts"),))] == 2
    assert samples[("tidewatch_late_events_total", ())] == 1
    assert samples[("tidewatch_models_live", ())] == 2
    assert samples[("tidewatch_service_anomalous", (("service", "b"),))] == 1
    assert samples[("tidewatch_service_score", (("service", "a"),))] == 0.2
    assert samples[("tidewatch_state_save_duration_seconds_count", ())] == 1
    assert samples[("tidewatch_state_save_duration_seconds_bucket", (("le", "0.05"),))] == 1
    assert samples[("tidewatch_state_save_duration_seconds_bucket", (("le", "0.01"),))] == 0


def test_per_service_series_are_bounded_highest_scores_first():
    stats = RuntimeStats()
    stats.latest = {f"s{i}": (i / 100, False, 0.0) for i in range(100)}
    server = MetricsServer("127.0.0.1:0", build_registry(stats, lambda: 100, 10), stats).start()
    try:
        host, port = server.address
        _, text = _get(f"http://{host}:{port}/metrics")
    finally:
        server.stop()
    fam = _families(text)
    names = sorted(s.labels["service"] for s in fam["tidewatch_service_score"].samples)
    assert names == sorted(f"s{i}" for i in range(90, 100))
    assert fam["tidewatch_service_series_dropped"].samples[0].value == 90


def test_health_and_readiness():
    stats = RuntimeStats()
    server = MetricsServer("127.0.0.1:0", build_registry(stats, lambda: 0, 10), stats, stall_seconds=0.5).start()
    try:
        host, port = server.address
        base = f"http://{host}:{port}"
        assert _get(base + "/readyz")[0] == 503
        stats.ready = True
        assert _get(base + "/readyz")[0] == 200
        assert _get(base + "/healthz")[0] == 200
        stats.heartbeat -= 10  # the loop has not beaten for 10 s
        assert _get(base + "/healthz")[0] == 503
        assert _get(base + "/nope")[0] == 404
    finally:
        server.stop()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_a_running_service_serves_its_metrics(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=2000, bad_every=500)
    port = _free_port()
    p = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "run", "--input", str(src), "--output", str(tmp_path / "o.jsonl"),
         "--state-dir", str(tmp_path / "st"), "--follow", "--listen", f"127.0.0.1:{port}"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 60
        text = ""
        while time.monotonic() < deadline:
            try:
                code, text = _get(f"http://127.0.0.1:{port}/metrics")
                if code == 200 and _families(text)["tidewatch_messages"].samples[0].value >= 2000:
                    break  # the whole file has been read
            except OSError:
                pass
            time.sleep(0.2)
        fam = _families(text)
        assert fam["tidewatch_messages"].samples[0].value == 2000  # accepted
        assert {s.labels["reason"]: s.value for s in fam["tidewatch_rejects"].samples} == {"bad_ts": 4}
        assert fam["tidewatch_models_live"].samples[0].value == 4
        assert _get(f"http://127.0.0.1:{port}/readyz")[0] == 200
        assert _get(f"http://127.0.0.1:{port}/healthz")[0] == 200
    finally:
        p.terminate()
        p.wait(timeout=30)
    assert p.returncode == 0
