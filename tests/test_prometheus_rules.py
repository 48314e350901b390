"""The Prometheus alert rules (deploy/prometheus/) and the exposition they are written against.

promtool comes from Debian's ``prometheus`` package (CI installs it). These tests fail,
never skip, when it is missing: the rules must not land untested.
"""

from __future__ import annotations

import re
import shutil
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import numpy as np
import orjson
import pytest
import yaml

REPO = Path(__file__).resolve().parent.parent
RULES_DIR = REPO / "deploy" / "prometheus"
RULES = RULES_DIR / "tidewatch-rules.yaml"
RULE_TESTS = RULES_DIR / "tidewatch-rules.test.yaml"


@pytest.fixture(scope="module")
def promtool() -> str:
    path = shutil.which("promtool")
    if path is None:
        pytest.fail("promtool not found: apt-get install -y prometheus (Debian's package ships it)", pytrace=False)
    return path


def _run(cmd: list[str], *, stdin: bytes | None = None, cwd: Path | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, input=stdin, capture_output=True, cwd=cwd, timeout=120, check=False)


def _rules() -> list[dict]:
    doc = yaml.safe_load(RULES.read_text())
    return [rule for group in doc["groups"] for rule in group["rules"]]


def _alert_names() -> list[str]:
    return [r["alert"] for r in _rules() if "alert" in r]


def test_rules_pass_promtool_check(promtool):
    proc = _run([promtool, "check", "rules", str(RULES)])
    assert proc.returncode == 0, proc.stdout.decode() + proc.stderr.decode()


def test_prometheus_config_loads_the_rules(promtool):
    # deploy/prometheus/prometheus.yml is what deploy/compose.yaml's Prometheus runs with
    proc = _run([promtool, "check", "config", str(RULES_DIR / "prometheus.yml")])
    out = proc.stdout.decode() + proc.stderr.decode()
    assert proc.returncode == 0, out
    assert RULES.name in out
    doc = yaml.safe_load((RULES_DIR / "prometheus.yml").read_text())
    assert [j["job_name"] for j in doc["scrape_configs"]] == ["tidewatch"]


def test_rule_unit_tests_pass(promtool):
    proc = _run([promtool, "test", "rules", str(RULE_TESTS)])
    assert proc.returncode == 0, proc.stdout.decode() + proc.stderr.decode()


def test_every_alert_is_tested_firing_and_not_firing():
    doc = yaml.safe_load(RULE_TESTS.read_text())
    assert doc["rule_files"] == [RULES.name]
    fires: set[str] = set()
    silent: set[str] = set()
    for case in doc["tests"]:
        for check in case.get("alert_rule_test", []):
            (fires if check.get("exp_alerts") else silent).add(check["alertname"])
    alerts = set(_alert_names())
    assert len(alerts) == len(_alert_names()), "alert names must be unique"
    assert alerts - fires == set(), "alerts never shown firing"
    assert alerts - silent == set(), "alerts never shown staying silent"
    assert (fires | silent) - alerts == set(), "tests for alerts that do not exist"
    recorded = {r["record"] for r in _rules() if "record" in r}
    exprs = {e["expr"] for case in doc["tests"] for e in case.get("promql_expr_test", [])}
    assert recorded <= exprs, "every recording rule has an expression test"


def test_every_alert_tells_on_call_what_it_means_and_what_to_check():
    for rule in _rules():
        if "alert" not in rule:
            continue
        name = rule["alert"]
        assert re.fullmatch(r"Tidewatch[A-Z][A-Za-z]+", name), name
        assert rule["labels"]["severity"] in ("warning", "critical"), name
        assert rule["labels"]["kind"] in ("service-unusual", "fleet-unusual", "tidewatch-health"), name
        ann = rule["annotations"]
        assert set(ann) == {"summary", "description"}, name
        assert "Check" in ann["description"], f"{name}: the description must say what to check"
        if rule["labels"]["kind"] == "service-unusual":
            assert "$labels.service" in ann["summary"] and "$labels.service" in ann["description"], name


# Each mutation breaks one rule (alert or recording rule) in a way that one of its "does not fire" (or "fires") cases
# must notice; promtool test must then fail. This shows the unit tests can fail.
MUTATIONS = [
    # a flapping service (flagged half the time) would count as sustained
    ("TidewatchServiceUnusualSustained", ">= 0.6", ">= 0.5"),
    # a warming-up service with a high score would fire
    ("TidewatchServiceExtremelyUnusual", " and tidewatch_service_anomalous == 1", ""),
    # a service quiet for eight hours (retired) would fire
    ("TidewatchServiceQuiet", "< 21600", "< 1e12"),
    # a service exported by two instances while it moves would be judged by the stale copy
    ("TidewatchServiceQuiet", "- max by (service) (tidewatch_service_window_end_seconds)) > 900",
     "- min by (service) (tidewatch_service_window_end_seconds)) > 900"),
    # a service exported by two instances would count twice: four distinct services become five
    ("fleet:tidewatch_services_flagged:count", "max by (service) (tidewatch_service_anomalous)", "tidewatch_service_anomalous"),
    # five flagged of fifty-one (9.8%) would count as fleet-wide
    ("TidewatchFleetWideUnusual", ">= 0.1", ">= 0.09"),
    # a large but shrinking lag would fire
    ("TidewatchConsumerLagGrowing", "deriv(tidewatch_consumer_lag_messages[15m]) > 0", "deriv(tidewatch_consumer_lag_messages[15m]) > -1e9"),
    # an instance with nothing waiting would fire
    ("TidewatchConsumerNotProgressing", "tidewatch_consumer_lag_messages > 0", "tidewatch_consumer_lag_messages >= 0"),
    # 1% late rejects would fire
    ("TidewatchRejectsRising", "> 0.05", "> 0.005"),
    # one old failure would keep warning long after saves recovered
    ("TidewatchStateSavesFailing", "[15m]", "[45m]"),
    # one old model failure would keep warning for hours
    ("TidewatchModelFailures", "[30m]", "[2h]"),
    # intermittent failures with successful saves in between would be critical
    ("TidewatchStateNotSaved", "unless increase(tidewatch_state_saves_total[30m]) > 0", ""),
    # an idle instance would fire
    ("TidewatchNoWindowsClosing", 'increase(tidewatch_messages_total{outcome="accepted"}[15m])) > 0',
     'increase(tidewatch_messages_total{outcome="accepted"}[15m])) >= 0'),
    # another job's target would fire
    ("TidewatchTargetDown", 'up{job="tidewatch"} == 0', "up == 0"),
    # present targets would be reported absent
    ("TidewatchTargetsAbsent", 'absent(up{job="tidewatch"})', 'absent(up{job="tidewatch", instance="nowhere"})'),
]


def _mutated(tmp_path: Path, name: str, transform) -> Path:
    """A copy of the rules with one rule's expression transformed, beside a copy of the unit tests."""
    doc = yaml.safe_load(RULES.read_text())
    hits = 0
    for group in doc["groups"]:
        for rule in group["rules"]:
            if name in (rule.get("alert"), rule.get("record")):
                rule["expr"] = transform(rule["expr"])
                hits += 1
    assert hits == 1, name
    (tmp_path / RULES.name).write_text(yaml.safe_dump(doc, sort_keys=False))
    # Only the cases about this rule (and the alerts built on it): each promtool run takes a
    # while, and the other cases cannot notice the mutation anyway.
    about = {name} | {r["alert"] for r in _rules() if "alert" in r and name in r["expr"]}
    tests = yaml.safe_load(RULE_TESTS.read_text())
    tests["tests"] = [
        case for case in tests["tests"]
        if any(c["alertname"] in about for c in case.get("alert_rule_test", []))
        or any(name in e["expr"] for e in case.get("promql_expr_test", []))
    ]
    assert tests["tests"], name
    (tmp_path / RULE_TESTS.name).write_text(yaml.safe_dump(tests, sort_keys=False))
    return tmp_path / RULE_TESTS.name


def test_mutations_cover_every_alert():
    assert set(_alert_names()) <= {m[0] for m in MUTATIONS}


@pytest.mark.parametrize(("name", "old", "new"), MUTATIONS, ids=[m[0] for m in MUTATIONS])
def test_unit_tests_catch_a_broken_rule(promtool, tmp_path, name, old, new):
    def transform(expr: str) -> str:
        assert old in expr, f"{name}: {old!r} not in {expr!r}"
        return expr.replace(old, new)

    proc = _run([promtool, "test", "rules", str(_mutated(tmp_path, name, transform))])
    assert proc.returncode != 0, f"{name} mutated ({old!r} -> {new!r}) and the unit tests still pass"
    assert "FAILED" in proc.stdout.decode() + proc.stderr.decode()


@pytest.mark.parametrize("alert", _alert_names())
def test_unit_tests_catch_an_alert_that_never_fires(promtool, tmp_path, alert):
    proc = _run([promtool, "test", "rules", str(_mutated(tmp_path, alert, lambda e: "vector(1) == 0"))])
    assert proc.returncode != 0, f"{alert} made silent and the unit tests still pass"


# --- a real scrape of a running tidewatch --------------------------------------------------


def _write_input(path: Path, n: int = 2400, services: int = 4) -> None:
    """Metric messages for a few services every 20 s, an incident, and a few malformed lines."""
    rng = np.random.default_rng(11)
    t0 = 1_772_323_200  # 2026-03-01T00:00:00Z
    with open(path, "wb") as f:
        for i in range(n):
            service = f"quay-{i % services}"
            ts = t0 + (i // services) * 20
            latency = 120 + rng.normal(0, 4) + (500 if service == "quay-1" and 1800 < i < 1900 else 0)
            f.write(orjson.dumps({"service": service, "ts": ts, "metrics": {"latency_ms": latency, "errors": int(rng.poisson(1))}}))
            f.write(b"\n")
            if i % 600 == 0:
                f.write(b'{"service": "quay-0", "ts": "yesterday", "metrics": {"latency_ms": 1}}\n')


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _scrape(url: str) -> bytes | None:
    try:
        with urllib.request.urlopen(url, timeout=5) as r:
            return r.read()
    except (urllib.error.URLError, OSError):
        return None


@pytest.fixture(scope="module")
def live_scrape(tmp_path_factory) -> bytes:
    """/metrics of ``tidewatch run --follow`` once it has read its whole input."""
    tmp = tmp_path_factory.mktemp("scrape")
    src = tmp / "in.jsonl"
    _write_input(src)
    port = _free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "run", "--input", str(src), "--follow",
         "--listen", f"127.0.0.1:{port}", "--state-dir", str(tmp / "state"), "--output", str(tmp / "scores.jsonl")],
        cwd=REPO, stdout=subprocess.DEVNULL, stderr=open(tmp / "run.log", "wb"),
    )
    body = b""
    try:
        deadline = time.monotonic() + 90  # a bound on waiting, not an assertion on speed
        while time.monotonic() < deadline and proc.poll() is None:
            body = _scrape(f"http://127.0.0.1:{port}/metrics") or b""
            if b'tidewatch_messages_total{outcome="accepted"} 2400.0' in body and b"tidewatch_service_score{" in body:
                break
            time.sleep(0.2)
        else:
            pytest.fail(f"tidewatch never served the whole input; log:\n{(tmp / 'run.log').read_text()[-2000:]}")
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    return body


def test_live_exposition_passes_promtool_check_metrics(promtool, live_scrape):
    proc = _run([promtool, "check", "metrics"], stdin=live_scrape)
    assert proc.returncode == 0, proc.stdout.decode() + proc.stderr.decode()
    # the scrape really held per-service series and labelled counters, not just empty families
    assert b'tidewatch_rejects_total{reason="bad_ts"} 4.0' in live_scrape
    assert b'tidewatch_service_anomalous{service="quay-1"}' in live_scrape


def test_every_metric_the_rules_use_is_exposed(live_scrape):
    exposed = set(re.findall(rb"^# TYPE (\S+)", live_scrape, flags=re.M))
    exposed |= {name for name in re.findall(rb"^(\w+)", live_scrape, flags=re.M)}
    used: set[str] = set()
    for rule in _rules():
        # names standing alone, not inside a recording rule's level:name:operation
        used |= set(re.findall(r"(?<![:\w])tidewatch_\w+(?![:\w])", rule["expr"]))
    assert used, "no tidewatch metric found in the rules"
    missing = sorted(n for n in used if n.encode() not in exposed)
    assert missing == [], f"rules use metrics tidewatch does not expose: {missing}"
