"""Resident memory with N live per-service models of the default kind after warm-up.

Every model sees `--windows` windows of five features (past the default warm-up of 36), the way the engine
feeds them. Prints RSS before and after, per-service cost, and the encoded state size per service.

    python tests/benchmarks/bench_memory.py [--services 10000] [--windows 40]
"""

from __future__ import annotations

import argparse
import gc
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from models import ModelSettings, build_model, encode_state  # noqa: E402


def rss_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--services", type=int, default=10_000)
    ap.add_argument("--windows", type=int, default=40)
    a = ap.parse_args()
    rng = np.random.default_rng(0)
    settings = ModelSettings()
    gc.collect()
    before = rss_bytes()
    models = {}
    started = time.perf_counter()
    t0 = 1772409600.0
    for i in range(a.services):
        name = f"svc-{i:05d}"
        m = build_model(name, settings)
        base = rng.uniform(50, 500)
        for w in range(a.windows):
            x = {"latency_p95_ms.mean": base * (1 + 0.1 * rng.standard_normal()), "errors.mean": float(rng.poisson(2)),
                 "requests.mean": base * 3.0, "cpu_util.mean": float(rng.uniform(0.1, 0.9)), "count": 30.0}
            try:
                m.assess(x, at=t0 + 300.0 * w)
            except TypeError:  # a model API without the window time
                m.assess(x)
        models[name] = m
    elapsed = time.perf_counter() - started
    gc.collect()
    after = rss_bytes()
    state = sum(len(encode_state(s, m)) for s, m in list(models.items())[:500]) / min(500, len(models))
    per = (after - before) / a.services
    print(f"services {a.services}, windows each {a.windows}, build+warm-up {elapsed:.1f} s "
          f"({elapsed / (a.services * a.windows) * 1e6:.0f} us per window)")
    print(f"RSS before {before / 2**20:.0f} MiB, after {after / 2**20:.0f} MiB, total {after / 2**30:.3f} GiB")
    print(f"per service {per / 1024:.1f} KiB in memory (target < 100 KiB), state record {state / 1024:.1f} KiB")


if __name__ == "__main__":
    main()
