"""Config reload: new rules from the next window, changed models rebuilt, others kept."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time

from service.config import parse_config
from service.engine import Engine
from tests.test_embedded import write_stream


def _engine(text: str) -> Engine:
    return Engine(parse_config(text), on_score=lambda *a: None, on_reject=lambda *a: None)


def test_only_models_whose_settings_changed_are_rebuilt():
    e = _engine('[[rules]]\nmatch = "a*"\nthreshold = 0.99\n')
    for s in ("api", "batch"):
        e.registry.model(s).assess({"x.mean": 1.0, "count": 1.0})
    kept_model = e.registry.models["batch"]
    kept, rebuilt = e.reconfigure(parse_config('[[rules]]\nmatch = "a*"\nthreshold = 0.995\n'))
    assert (kept, rebuilt) == (1, 1)
    assert e.registry.models["batch"] is kept_model
    assert e.registry.models["api"].settings.threshold == 0.995 and e.registry.models["api"].windows_seen == 0
    assert "api" in e.registry.dirty
    # window settings come from the new rules for the next window
    assert e.registry.settings("api").model.threshold == 0.995


def test_sighup_reloads_a_running_service(tmp_path):
    src = tmp_path / "in.jsonl"
    write_stream(src, n=1600)
    lines = src.read_bytes().splitlines(keepends=True)
    live = tmp_path / "live.jsonl"
    live.write_bytes(b"".join(lines[:800]))
    cfg = tmp_path / "c.toml"
    cfg.write_text('[defaults]\nwarm_up = 5\n[http]\nlisten = ""\n')
    out = tmp_path / "o.jsonl"
    p = subprocess.Popen([sys.executable, "-m", "service.cli", "run", "--config", str(cfg), "--input", str(live),
                          "--output", str(out), "--state-dir", str(tmp_path / "st"), "--follow"],
                         stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline and (not out.exists() or out.read_text().count("\n") < 100):
            time.sleep(0.1)
        before = out.read_text().count("\n")  # a lower bound: the output is flushed at checkpoints
        cfg.write_text('[defaults]\nwarm_up = 5\n[[rules]]\nmatch = "svc-1"\nthreshold = 0.999\n[http]\nlisten = ""\n')
        p.send_signal(signal.SIGHUP)
        time.sleep(1.0)
        with open(live, "ab") as f:
            f.write(b"".join(lines[800:]))
        while time.monotonic() < deadline and out.read_text().count("\n") < before + 150:
            time.sleep(0.1)
    finally:
        p.send_signal(signal.SIGTERM)
        _, err = p.communicate(timeout=30)
    assert p.returncode == 0, err
    assert '"event":"reloaded"' in err and '"models_rebuilt":1' in err
    from service.timefmt import parse_rfc3339
    from tests.test_embedded import T0

    # Part two starts at message 800: event time T0 + (800 // 4) * 20 s. Its windows all closed after the reload.
    later = [m for m in (json.loads(x) for x in out.read_text().splitlines())
             if parse_rfc3339(m["window_start"]) >= T0 + 4020]
    svc1 = [m for m in later if m["service"] == "svc-1"]
    others = [m for m in later if m["service"] != "svc-1"]
    assert svc1 and all(m["threshold"] == 0.999 for m in svc1)
    assert svc1[0]["warming_up"]  # rebuilt: it learns again
    assert others and all(m["threshold"] == 0.99 and not m["warming_up"] for m in others)


def test_an_invalid_reload_keeps_the_running_config(tmp_path):
    from service.reload import ConfigReloader

    cfg = tmp_path / "c.toml"
    cfg.write_text('[defaults]\nthreshold = 0.99\n')
    e = _engine(cfg.read_text())
    r = ConfigReloader(str(cfg))
    cfg.write_text('[defaults]\nthreshold = 7\n')
    r.requested.set()
    assert r.poll(e) is None and r.failures == 1
    assert e.config.defaults.threshold == 0.99
