"""End to end on the embedded bus: replay, run, restart, rejects."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import orjson
import pytest

from service.config import parse_config
from service.embedded import replay

T0 = 1772409600  # 2026-03-02T00:00:00Z, a Monday


def write_stream(path: Path, n: int = 3000, services: int = 4, step: int = 20, bad_every: int = 0) -> None:
    import numpy as np

    rng = np.random.default_rng(5)
    with open(path, "wb") as f:
        for i in range(n):
            svc = f"svc-{i % services}"
            ts = T0 + (i // services) * step
            lat = 100 + 10 * np.sin(i / 200) + rng.normal(0, 3)
            if 2200 < i < 2260 and svc == "svc-1":
                lat += 400  # an incident
            f.write(orjson.dumps({"service": svc, "ts": ts, "metrics": {"lat": float(lat), "errors": int(rng.poisson(1))}}))
            f.write(b"\n")
            if bad_every and i % bad_every == 0:
                f.write(b'{"service": "svc-0", "ts": "later", "metrics": {"lat": 1}}\n')


def read_lines(path: Path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def test_replay_scores_every_service_window_once(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src)
    out = tmp_path / "scores.jsonl"
    summary = replay(parse_config('[defaults]\nwindow = "1m"\n'), str(src), str(out))
    scores = read_lines(out)
    keys = [(s["service"], s["window_start"]) for s in scores]
    assert len(keys) == len(set(keys)) == summary.windows
    # 3000 messages, 4 services, one message per service every 20 s -> 3 per minute
    assert summary.accepted == 3000 and {s["count"] for s in scores} <= {1, 2, 3}
    assert all(0.0 <= s["score"] <= 1.0 for s in scores)
    assert sum(s["count"] for s in scores) == 3000


def test_the_incident_is_flagged_and_its_metric_named(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src)
    out = tmp_path / "scores.jsonl"
    replay(parse_config('[defaults]\nwindow = "1m"\nwarm_up = 20\n'), str(src), str(out))
    from service.timefmt import parse_rfc3339

    # messages 2201..2259 of svc-1 carry the incident: event times T0+11000 .. T0+11300
    flagged = [s for s in read_lines(out) if s["anomalous"] and s["service"] == "svc-1"]
    hits = [s for s in flagged if T0 + 10980 <= parse_rfc3339(s["window_start"]) < T0 + 11300]
    assert hits, "the latency incident on svc-1 was not flagged"
    assert hits[0]["contributors"][0]["metric"] == "lat"
    assert hits[0]["contributors"][0]["observed"] > hits[0]["contributors"][0]["expected"]


def test_bad_lines_are_counted_and_routed_with_their_reason(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=400, bad_every=100)
    with open(src, "ab") as f:
        f.write(b"\xff\xfe not utf-8\n")
    out, rej = tmp_path / "scores.jsonl", tmp_path / "rejects.jsonl"
    summary = replay(parse_config(""), str(src), str(out), str(rej))
    rejects = read_lines(rej)
    assert summary.rejected == {"bad_ts": 4, "not_utf8": 1}
    assert summary.accepted + sum(summary.rejected.values()) == summary.lines == 405
    assert {r["reason"] for r in rejects} == {"bad_ts", "not_utf8"}
    bad = [r for r in rejects if r["reason"] == "bad_ts"][0]
    assert bad["raw"] == '{"service": "svc-0", "ts": "later", "metrics": {"lat": 1}}'
    assert bad["origin"]["line"] == 2  # the first bad line follows the first good one
    assert "raw_b64" in [r for r in rejects if r["reason"] == "not_utf8"][0]


def test_late_events_are_rejected_as_late(tmp_path):
    src = tmp_path / "in.jsonl"
    lines = [
        {"service": "a", "ts": T0 + 5, "metrics": {"x": 1}},
        {"service": "a", "ts": T0 + 200, "metrics": {"x": 1}},
        {"service": "a", "ts": T0 + 10, "metrics": {"x": 1}},  # its window [T0, T0+60) closed at 200
    ]
    src.write_bytes(b"\n".join(orjson.dumps(x) for x in lines) + b"\n")
    out, rej = tmp_path / "scores.jsonl", tmp_path / "rejects.jsonl"
    summary = replay(parse_config(""), str(src), str(out), str(rej))
    assert summary.rejected == {"late": 1}
    assert read_lines(rej)[0]["origin"]["line"] == 3
    assert [s["count"] for s in read_lines(out)] == [1, 1]


def _cli(*args: str, **kw) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, timeout=300, **kw)


def test_replay_window_override_and_summary(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=1200)
    out = tmp_path / "scores.jsonl"
    r = _cli("replay", str(src), "--output", str(out), "--window", "5m")
    assert r.returncode == 0, r.stderr
    assert "1200 accepted" in r.stderr
    from service.timefmt import parse_rfc3339

    scores = read_lines(out)
    assert scores and all(parse_rfc3339(s["window_start"]) % 300 == 0 for s in scores)
    assert all(parse_rfc3339(s["window_end"]) - parse_rfc3339(s["window_start"]) == 300 for s in scores)


def test_a_restarted_run_writes_exactly_what_an_uninterrupted_run_writes(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=6000, services=6, bad_every=500)
    cfg = tmp_path / "c.toml"
    cfg.write_text('[defaults]\nwindow = "1m"\n[state]\ncheckpoint_interval = "1s"\n[http]\nlisten = ""\n')

    once_out, once_rej = tmp_path / "once.jsonl", tmp_path / "once-rej.jsonl"
    r = _cli("run", "--config", str(cfg), "--input", str(src), "--output", str(once_out),
             "--rejects", str(once_rej), "--state-dir", str(tmp_path / "s1"))
    assert r.returncode == 0, r.stderr

    # The same input arriving in three parts to a run that follows the file, stopped once cleanly
    # (SIGTERM) and once killed (SIGKILL) while it waits; the last start reads to the end.
    lines = src.read_bytes().splitlines(keepends=True)
    live = tmp_path / "live.jsonl"
    live.write_bytes(b"")
    out, rej, state = tmp_path / "twice.jsonl", tmp_path / "twice-rej.jsonl", tmp_path / "s2"
    args = ["run", "--config", str(cfg), "--input", str(live), "--output", str(out), "--rejects", str(rej),
            "--state-dir", str(state)]
    thirds = [lines[: len(lines) // 3], lines[len(lines) // 3 : 2 * len(lines) // 3], lines[2 * len(lines) // 3 :]]
    for part, sig in zip(thirds[:2], (signal.SIGTERM, signal.SIGKILL)):
        with open(live, "ab") as f:
            f.write(b"".join(part))
        seen = len(out.read_bytes()) if out.exists() else 0
        p = subprocess.Popen([sys.executable, "-m", "service.cli", *args, "--follow"],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        deadline = time.monotonic() + 60
        # wait until this process has scored the new part, then past one checkpoint interval
        while time.monotonic() < deadline and (not out.exists() or len(out.read_bytes()) <= seen):
            time.sleep(0.05)
        time.sleep(1.5)
        p.send_signal(sig)
        p.wait(timeout=60)
        if sig == signal.SIGTERM:
            assert p.returncode == 0, p.stderr.read()
    with open(live, "ab") as f:
        f.write(b"".join(thirds[2]))
    r = _cli(*args)
    assert r.returncode == 0, r.stderr
    assert out.read_bytes() == once_out.read_bytes()

    def rejects(path: Path) -> list[dict]:
        out = read_lines(path)
        for r in out:
            r["origin"].pop("source")  # the two runs read differently named files
        return out

    assert rejects(rej) == rejects(once_rej) and len(rejects(rej)) == 12


def test_state_survives_a_restart_and_keeps_learning(tmp_path):
    # Feed half, stop at the end of input; feed the rest appended; the models carry on.
    src = tmp_path / "in.jsonl"
    write_stream(src, n=2000)
    cfg = tmp_path / "c.toml"
    cfg.write_text('[defaults]\nwindow = "1m"\nwarm_up = 10\n[http]\nlisten = ""\n')
    out = tmp_path / "out.jsonl"
    lines = src.read_bytes().splitlines(keepends=True)
    part = tmp_path / "part.jsonl"
    part.write_bytes(b"".join(lines[:1000]))
    args = ["run", "--config", str(cfg), "--input", str(part), "--output", str(out), "--state-dir", str(tmp_path / "st")]
    assert _cli(*args).returncode == 0
    first = read_lines(out)
    with open(part, "ab") as f:
        f.write(b"".join(lines[1000:]))
    r = _cli(*args)
    assert r.returncode == 0, r.stderr
    rest = read_lines(out)[len(first):]
    assert rest and not any(s["warming_up"] for s in rest)
    keys = [(s["service"], s["window_start"]) for s in read_lines(out)]
    assert len(keys) == len(set(keys))


def test_a_corrupt_checkpoint_is_reported_set_aside_and_replaced(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=800)
    cfg = tmp_path / "c.toml"
    cfg.write_text('[http]\nlisten = ""\n')
    state = tmp_path / "st"
    args = ["run", "--config", str(cfg), "--input", str(src), "--output", str(tmp_path / "o.jsonl"), "--state-dir", str(state)]
    assert _cli(*args).returncode == 0
    (seg,) = state.glob("ckpt-*.twc")
    data = bytearray(seg.read_bytes())
    data[len(data) // 2] ^= 0xFF
    seg.write_bytes(bytes(data))
    r = _cli(*args)
    assert r.returncode == 0, r.stderr
    assert "state_refused" in r.stderr
    assert list(state.glob("ckpt-*.twc.corrupt-*"))
    assert list(state.glob("ckpt-*.twc"))  # a fresh, intact checkpoint replaced it


def test_replay_writes_a_report_with_labels(tmp_path):
    from service.labels import write_labels
    from service.scenario import generate

    sc = generate(seed=5, days=3.0, services=3)
    src, labels = tmp_path / "in.jsonl", tmp_path / "labels.csv"
    sc.write_jsonl(src)
    write_labels(labels, sc.incidents)
    r = _cli("replay", str(src), "--output", str(tmp_path / "s.jsonl"), "--window", "5m",
             "--report", str(tmp_path / "r.html"), "--labels", str(labels))
    assert r.returncode == 0, r.stderr
    html = (tmp_path / "r.html").read_text()
    assert html.count("<svg") >= 3 and all(s in html for s in sc.services)


def test_replay_refuses_a_report_without_an_output_file_and_a_bad_labels_file(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=50)
    assert _cli("replay", str(src), "--output", "-", "--report", str(tmp_path / "r.html")).returncode == 2
    bad = tmp_path / "labels.csv"
    bad.write_text("service,start,end\napi,yesterday,today\n")
    r = _cli("replay", str(src), "--output", str(tmp_path / "s.jsonl"), "--labels", str(bad))
    assert r.returncode == 2 and "line 2" in r.stderr


def test_a_flood_of_new_service_names_is_bounded_and_every_message_accounted_for(tmp_path):
    # 3,000 distinct names against a limit of 100: the rest are rejected with reason service_limit
    src = tmp_path / "in.jsonl"
    src.write_bytes(b"".join(orjson.dumps({"service": f"flood-{i}", "ts": T0 + i, "metrics": {"x": 1}}) + b"\n"
                             for i in range(3000)))
    out, rej = tmp_path / "s.jsonl", tmp_path / "r.jsonl"
    summary = replay(parse_config("[limits]\nmax_services = 100\n"), str(src), str(out), str(rej))
    assert summary.accepted == 100 and summary.rejected == {"service_limit": 2900}
    assert summary.services == 100
    assert read_lines(rej)[0]["reason"] == "service_limit"


def test_a_frozen_exporter_is_flagged_in_its_first_whole_windows(tmp_path):
    # One service scraped every 60 s into 5-minute windows for three days; from 16:02 on day 3 its
    # CPU reading repeats its last value (a frozen exporter), everything else stays normal. The
    # engine hands the model each window's "held still all window" reading, so the first whole
    # frozen window (16:05) already counts as a repeat, and the alert opens by its second (16:10).
    import numpy as np

    from service.timefmt import parse_rfc3339

    rng = np.random.default_rng(11)
    src, out = tmp_path / "in.jsonl", tmp_path / "scores.jsonl"
    freeze = T0 + 2 * 86400 + 16 * 3600 + 120
    cpu = None
    with open(src, "wb") as f:
        for k in range(3 * 1440):
            ts = T0 + 60 * k
            if ts < freeze or cpu is None:
                cpu = round(0.3 + 0.02 * float(rng.normal()), 4)
            f.write(orjson.dumps({"service": "ledger", "ts": ts, "metrics": {
                "cpu": cpu, "lat": round(120 + 5 * float(rng.normal()), 1), "requests": int(rng.poisson(40))}}))
            f.write(b"\n")
    replay(parse_config('[defaults]\nwindow = "5m"\n'), str(src), str(out))
    scores = read_lines(out)
    flagged = [parse_rfc3339(s["window_start"]) for s in scores if s["anomalous"]]
    first_whole = freeze - 120 + 300
    assert flagged and first_whole <= flagged[0] <= first_whole + 300, (flagged[:3], first_whole)
    hit = next(s for s in scores if parse_rfc3339(s["window_start"]) == flagged[0])
    assert hit["contributors"][0]["metric"] == "cpu"
