"""Scaling curve on the embedded bus: cost per service at 100, 1,000, 10,000 and 50,000 services.

Each point runs in a fresh child process (so RSS is its own): a recorded fleet (tests/benchmarks/fleet.py,
five metrics, one message per service every 10 s of event time, --rounds rounds) is scored by the embedded
``tidewatch run`` (``service.embedded.run_embedded``, with a state directory; default config except
``state.checkpoint_interval``, shortened to --checkpoint-interval so a run of seconds still checkpoints in
steady state). The default one-minute window closes a window per service every 6 messages. Per point:

* ingest: messages / wall seconds of the whole run (decode, windows, models, checkpoints, output);
* RSS per service: resident memory with every model live (read as the final checkpoint starts, after the
  end-of-input flush) minus the child's RSS before the run, divided by the services; the peak (VmHWM) too;
* persisted state per service: bytes of the state directory after the run, divided by the services;
* state written per checkpoint interval in steady state: the median bytes of the delta checkpoints (all but
  the first and the last), and bytes per changed service (what flat means for the writes).

The flatness figure is max/min of each per-service cost over the points (1.0 is perfectly flat; the ingest
figure uses messages/s, which is per service when every service sends at the same rate).

    python tests/benchmarks/bench_scaling.py [--points 100 1000 10000 50000] [--rounds 26]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))


def _status(field: str) -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {field}")


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
            # Measurement only: the runtime's own store, with the bytes and RSS of every save recorded.
            def save(self, models, dirty, runtime):  # type: ignore[override]
                rss = _status("VmRSS")
                changed = len(models) if self._force_base or self.generation == 0 else len(dirty)
                written = super().save(models, dirty, runtime)
                saves.append({"at": time.monotonic(), "bytes": written, "changed": changed, "rss": rss,
                              "models": len(models)})
                return written

        embedded.CheckpointStore = MeasuredStore  # type: ignore[misc]
        cfg = parse_config(f'[state]\ncheckpoint_interval = "{interval}"\n[http]\nlisten = ""\n')
        opts = embedded.RunOptions(input=fleet, output=str(work / "scores.jsonl"), state_dir=str(work / "state"))
        before = _status("VmRSS")
        t0 = time.perf_counter()
        summary = embedded.run_embedded(cfg, opts, threading.Event())
        elapsed = time.perf_counter() - t0
        state_bytes = sum(f.stat().st_size for f in (work / "state").iterdir() if f.is_file())
        steady = saves[1:-1]
        return {
            "services": services, "messages": n, "seconds": elapsed, "windows": summary.windows,
            "rss_before": before, "rss_live": saves[-1]["rss"], "rss_peak": _status("VmHWM"),
            "state_bytes": state_bytes,
            "checkpoints": len(saves),
            "steady_bytes": statistics.median(s["bytes"] for s in steady) if steady else None,
            "steady_per_changed": (sum(s["bytes"] for s in steady) / max(1, sum(s["changed"] for s in steady))
                                   if steady else None),
            "total_written": sum(s["bytes"] for s in saves),
        }
    finally:
        shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--points", type=int, nargs="+", default=[100, 1000, 10_000, 50_000])
    ap.add_argument("--rounds", type=int, default=26, help="messages per service (4 closed windows, then the flush)")
    ap.add_argument("--checkpoint-interval", default="2s")
    ap.add_argument("--timeout", type=float, default=900.0, help="bound per point, seconds")
    ap.add_argument("--point", type=int, help=argparse.SUPPRESS)  # child mode
    a = ap.parse_args()
    if a.point is not None:
        print(json.dumps(point(a.point, a.rounds, a.checkpoint_interval)))
        return
    rows = []
    for n in a.points:
        proc = subprocess.run([sys.executable, __file__, "--point", str(n), "--rounds", str(a.rounds),
                               "--checkpoint-interval", a.checkpoint_interval],
                              capture_output=True, text=True, timeout=a.timeout, env={**os.environ})
        if proc.returncode != 0:
            raise SystemExit(f"point {n} failed:\n{proc.stderr[-3000:]}")
        r = json.loads(proc.stdout.strip().splitlines()[-1])
        rows.append(r)
        print(f"# {n} services: {r['seconds']:.1f} s", file=sys.stderr)
    print(f"embedded run, {a.rounds} messages per service (five metrics, 1-minute windows: 6 messages a window), "
          f"checkpoint interval {a.checkpoint_interval}")
    head = ("services", "msg/s", "RSS/service KiB", "peak RSS MiB", "state/service KiB", "ckpts",
            "steady ckpt MiB", "written/changed svc KiB")
    print(" | ".join(head))
    for r in rows:
        n = r["services"]
        rss = (r["rss_live"] - r["rss_before"]) / n / 1024
        steady = "-" if r["steady_bytes"] is None else f"{r['steady_bytes'] / 2**20:.1f}"
        per_changed = "-" if r["steady_per_changed"] is None else f"{r['steady_per_changed'] / 1024:.1f}"
        print(f"{n} | {r['messages'] / r['seconds']:,.0f} | {rss:.1f} | {r['rss_peak'] / 2**20:,.0f} | "
              f"{r['state_bytes'] / n / 1024:.1f} | {r['checkpoints']} | {steady} | {per_changed}")

    def flat(values: list[float]) -> str:
        values = [v for v in values if v]
        return f"{max(values) / min(values):.2f}" if values else "-"

    print("flatness (max/min over the points; 1.00 = flat):")
    print(f"  ingest msg/s               {flat([r['messages'] / r['seconds'] for r in rows])}")
    print(f"  RSS per service            {flat([(r['rss_live'] - r['rss_before']) / r['services'] for r in rows])}"
          f"   (over points >= 1,000: {flat([(r['rss_live'] - r['rss_before']) / r['services'] for r in rows if r['services'] >= 1000])})")
    print(f"  state per service          {flat([r['state_bytes'] / r['services'] for r in rows])}")
    print(f"  written per changed service {flat([r['steady_per_changed'] for r in rows if r['steady_per_changed']])}")


if __name__ == "__main__":
    main()
