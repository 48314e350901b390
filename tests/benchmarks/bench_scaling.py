"""Scaling curve on the embedded bus: cost per service at 100, 1,000, 10,000 and 50,000 services.

Each point runs in a fresh child process (so RSS is its own): a recorded fleet (tests/benchmarks/fleet.py,
five metrics, one message per service every 10 s of event time, --rounds rounds) is scored by the embedded
``tidewatch run`` (``service.embedded.run_embedded``, with a state directory; default config except
``state.checkpoint_interval``, shortened to --checkpoint-interval so a run of seconds still checkpoints in
steady state). The default one-minute window closes a window per service every 6 messages. Per point:

* ingest: messages / wall seconds of the whole run (decode, windows, models, checkpoints, output), and the
  service-normalised cost: wall and CPU (user + system) microseconds per message. Every service sends
  --rounds messages, so cost per message is cost per service divided by a constant;
* RSS per service: resident memory with every model live (read as the final checkpoint starts, after the
  end-of-input flush) minus the child's RSS before the run, divided by the services; the peak (VmHWM) too,
  and the peak above the live RSS (what a checkpoint needs on top of the models);
* persisted state per service: bytes of the state directory after the run, divided by the services;
* state written per commit (checkpoint) interval in steady state (every checkpoint but the run's first,
  written before any input, and its last, after the end-of-input flush): mean and largest bytes of one
  checkpoint, the wall seconds between checkpoints, bytes per changed (dirty) service, and the runtime
  record's bytes per service (positions and open windows, written every interval);
* the run's cost split: wall microseconds per message outside checkpoints, checkpoint microseconds per model
  record written, and records written per service. How often a model is written depends on how many
  checkpoints fall in a window of event time, which in a replay depends on the replay's speed and so on the
  fleet's size (a short run checkpoints less often per window): the split shows the per-unit costs apart
  from that policy effect, and combined at one record per closed window (the live-mode cadence when the
  checkpoint interval is at most the window) they give the cost per message free of it;
* the ratio of each per-service cost to the same cost at 1,000 services (1.00 = flat).

    python tests/benchmarks/bench_scaling.py [--points 100 1000 10000 50000] [--rounds 26] [--json raw.json]
    python tests/benchmarks/bench_scaling.py --load raw.json   # the tables again, from a run's raw points
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from types import SimpleNamespace

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))


def _status(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {field}")


def _cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


def point(services: int, rounds: int, interval: str) -> dict:
    """One point, in this process: write the fleet, run, measure."""
    import service.embedded as embedded
    from service.checkpoint import CheckpointStore
    from service.config import parse_config
    from tests.benchmarks.fleet import write_fleet

    work = Path(tempfile.mkdtemp(prefix="tw-bench-scaling-"))
    try:
        fleet = str(work / "fleet.jsonl")
        n = write_fleet(fleet, services=services, messages=services * rounds)
        saves: list[dict] = []

        class MeasuredStore(CheckpointStore):
            # Measurement only: the runtime's own store, with what every save wrote and the RSS before it.
            def save(self, models, dirty, runtime):  # type: ignore[override]
                rss = _status("VmRSS")
                at = time.monotonic()
                changed = len(dirty)
                # A store without a save report (before streaming saves) is measured from the outside.
                was_base = getattr(self, "_force_base", False) or self.generation == 0
                written = super().save(models, dirty, runtime)
                r = getattr(self, "last_save", None)
                if r is None:
                    r = SimpleNamespace(base=was_base, encoded=len(models) if was_base else changed, copied=0,
                                        runtime_bytes=len(orjson.dumps(runtime)), seconds=time.monotonic() - at)
                saves.append({"at": at, "bytes": written, "changed": changed, "rss": rss, "models": len(models),
                              "base": r.base, "encoded": r.encoded, "copied": r.copied,
                              "runtime_bytes": r.runtime_bytes, "seconds": r.seconds})
                return written

        embedded.CheckpointStore = MeasuredStore  # type: ignore[misc]
        cfg = parse_config(f'[state]\ncheckpoint_interval = "{interval}"\n[http]\nlisten = ""\n')
        opts = embedded.RunOptions(input=fleet, output=str(work / "scores.jsonl"), state_dir=str(work / "state"))
        before = _status("VmRSS")
        cpu0 = _cpu()
        t0 = time.perf_counter()
        summary = embedded.run_embedded(cfg, opts, threading.Event())
        elapsed = time.perf_counter() - t0
        cpu = _cpu() - cpu0
        state_bytes = sum(f.stat().st_size for f in (work / "state").iterdir() if f.is_file())
        return {
            "services": services, "messages": n, "seconds": elapsed, "cpu_seconds": cpu, "windows": summary.windows,
            "rss_before": before, "rss_live": saves[-1]["rss"], "rss_peak": _status("VmHWM"),
            "state_bytes": state_bytes, "saves": saves,
        }
    finally:
        shutil.rmtree(work, ignore_errors=True)


def derive(r: dict) -> dict:
    """Per-service figures of one point."""
    n, m = r["services"], r["messages"]
    saves = r["saves"]
    steady = saves[1:-1]
    out = {
        "msg_s": m / r["seconds"],
        "us_msg": 1e6 * r["seconds"] / m,
        "cpu_us_msg": 1e6 * r["cpu_seconds"] / m,
        "rss_svc": (r["rss_live"] - r["rss_before"]) / n,
        "peak_svc": (r["rss_peak"] - r["rss_before"]) / n,
        "peak_over_live": r["rss_peak"] - r["rss_live"],
        "state_svc": r["state_bytes"] / n,
        "ckpts": len(saves),
        "bases": sum(1 for s in saves if s["base"]),
        "written_msg": sum(s["bytes"] for s in saves) / m,
        # The run's cost split: outside checkpoints (decode, windows, scoring, output) per message, and
        # checkpoints per record written; records per service is how often the policy wrote each model.
        "outside_us_msg": 1e6 * (r["seconds"] - sum(s["seconds"] for s in saves)) / m,
        "save_us_record": 1e6 * sum(s["seconds"] for s in saves) / max(1, sum(s["encoded"] + s["copied"] for s in saves)),
        "records_svc": sum(s["encoded"] + s["copied"] for s in saves) / n,
        "windows_svc": r["windows"] / n,
        "copied": sum(s["copied"] for s in saves),
        "encoded": sum(s["encoded"] for s in saves),
        "runtime_svc": statistics.median(s["runtime_bytes"] for s in saves[1:]) / n if len(saves) > 1 else None,
    }
    # The cost per message had every model been written once per closed window, whatever the replay speed:
    # the two measured per-unit costs, combined at one record per window.
    out["norm_us_msg"] = out["outside_us_msg"] + out["save_us_record"] * r["windows"] / m
    if steady:
        out["interval_mean"] = statistics.fmean(s["bytes"] for s in steady)
        out["interval_max"] = max(s["bytes"] for s in steady)
        out["interval_mean_svc"] = out["interval_mean"] / n
        gaps = [b["at"] - a["at"] for a, b in zip(saves, saves[1:])][1:]
        out["interval_s"] = statistics.median(gaps) if gaps else None
        changed = sum(s["changed"] for s in steady)
        out["per_changed"] = (sum(s["bytes"] - s["runtime_bytes"] for s in steady) / changed) if changed else None
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--points", type=int, nargs="+", default=[100, 1000, 10_000, 50_000])
    ap.add_argument("--rounds", type=int, default=26, help="messages per service (4 closed windows, then the flush)")
    ap.add_argument("--checkpoint-interval", default="2s")
    ap.add_argument("--timeout", type=float, default=900.0, help="bound per point, seconds")
    ap.add_argument("--json", help="also write the raw points here")
    ap.add_argument("--load", help="print the tables from raw points a --json run wrote (no run)")
    ap.add_argument("--point", type=int, help=argparse.SUPPRESS)  # child mode
    a = ap.parse_args()
    if a.point is not None:
        print(json.dumps(point(a.point, a.rounds, a.checkpoint_interval)))
        return
    rows = []
    for n in [] if a.load else a.points:
        proc = subprocess.run([sys.executable, __file__, "--point", str(n), "--rounds", str(a.rounds),
                               "--checkpoint-interval", a.checkpoint_interval],
                              capture_output=True, text=True, timeout=a.timeout, env={**os.environ})
        if proc.returncode != 0:
            raise SystemExit(f"point {n} failed:\n{proc.stderr[-3000:]}")
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        rows.append(r)
        print(f"# {n} services: {r['seconds']:.1f} s", file=sys.stderr)
    if a.load:
        rows = json.loads(Path(a.load).read_text())
    elif a.json:
        Path(a.json).write_text(json.dumps(rows))
    d = [derive(r) for r in rows]
    print(f"embedded run, {a.rounds} messages per service (five metrics, 1-minute windows: 6 messages a window), "
          f"checkpoint interval {a.checkpoint_interval}")

    def f(v: float | None, fmt: str) -> str:
        return "-" if v is None else format(v, fmt)

    head = ("services", "msg/s", "wall µs/msg", "CPU µs/msg", "outside saves µs/msg", "save µs/record",
            "records/service", "µs/msg at 1 record/window", "RSS/service KiB", "peak RSS MiB", "peak over live MiB", "state/service KiB",
            "ckpts (bases)", "written/msg B")
    print(" | ".join(head))
    for r, x in zip(rows, d):
        print(f"{r['services']} | {x['msg_s']:,.0f} | {x['us_msg']:.1f} | {x['cpu_us_msg']:.1f} | "
              f"{x['outside_us_msg']:.1f} | {x['save_us_record']:.0f} | {x['records_svc']:.1f} | "
              f"{x['norm_us_msg']:.1f} | "
              f"{x['rss_svc'] / 1024:.1f} | {r['rss_peak'] / 2**20:,.0f} | {x['peak_over_live'] / 2**20:,.0f} | "
              f"{x['state_svc'] / 1024:.1f} | {x['ckpts']} ({x['bases']}) | {x['written_msg']:,.0f}")
    print("state written per commit interval (steady checkpoints: all but the first and the last):")
    head = ("services", "interval s", "mean MiB", "max MiB", "mean/service KiB", "per changed service KiB",
            "runtime record B/service", "records copied/encoded")
    print(" | ".join(head))
    for r, x in zip(rows, d):
        mean = x.get("interval_mean")
        print(f"{r['services']} | {f(x.get('interval_s'), '.1f')} | {f(mean and mean / 2**20, '.1f')} | "
              f"{f(x.get('interval_max') and x['interval_max'] / 2**20, '.1f')} | "
              f"{f(x.get('interval_mean_svc') and x['interval_mean_svc'] / 1024, '.1f')} | "
              f"{f(x.get('per_changed') and x['per_changed'] / 1024, '.1f')} | {f(x['runtime_svc'], '.0f')} | "
              f"{x['copied']}/{x['encoded']}")

    sizes = [r["services"] for r in rows]
    ref = sizes.index(1000) if 1000 in sizes else 0
    metrics = [("wall µs/msg", "us_msg"), ("CPU µs/msg", "cpu_us_msg"), ("outside saves µs/msg", "outside_us_msg"),
               ("save µs/record", "save_us_record"), ("records/service", "records_svc"),
               ("µs/msg at 1 record/window", "norm_us_msg"), ("RSS/service", "rss_svc"),
               ("peak RSS/service", "peak_svc"), ("state/service", "state_svc"), ("written/msg", "written_msg"),
               ("written per changed service", "per_changed")]
    print(f"per-service cost relative to {sizes[ref]:,} services (1.00 = flat; > 1 costs more per service):")
    print(" | ".join(["metric"] + [f"{n:,}" for n in sizes]))
    for label, k in metrics:
        base = d[ref].get(k)
        cells = [f(x[k] / base, ".2f") if base and x.get(k) else "-" for x in d]
        print(" | ".join([label] + cells))


if __name__ == "__main__":
    main()
