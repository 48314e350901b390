"""A recorded-fleet generator for the performance benchmarks (not the demo scenario: volume, not story).

Writes native JSON lines for ``services`` services, each scraped every ``step`` seconds with five metrics,
in event-time order. Deterministic from the seed.
"""

from __future__ import annotations

import argparse

import numpy as np
import orjson

T0 = 1772409600  # 2026-03-02T00:00:00Z


def write_fleet(path: str, *, services: int, messages: int, step: float = 10.0, seed: int = 1) -> int:
    rng = np.random.default_rng(seed)
    names = [f"svc-{i:05d}" for i in range(services)]
    base = rng.uniform(50, 500, services)
    rounds = -(-messages // services)
    n = 0
    with open(path, "wb") as f:
        for r in range(rounds):
            ts = T0 + r * step
            lat = base * (1 + 0.1 * rng.standard_normal(services))
            err = rng.poisson(2, services)
            rps = base * 3 * (1 + 0.05 * rng.standard_normal(services))
            cpu = rng.uniform(0.1, 0.9, services)
            mem = base * 4
            lines = []
            for i in range(services):
                if n >= messages:
                    break
                lines.append(orjson.dumps({
                    "service": names[i], "ts": ts,
                    "metrics": {"latency_p95_ms": round(float(lat[i]), 2), "errors": int(err[i]),
                                "requests": round(float(rps[i]), 1), "cpu_util": round(float(cpu[i]), 3),
                                "memory_mb": round(float(mem[i]), 1)},
                }))
                n += 1
            f.write(b"\n".join(lines) + b"\n")
    return n


if __name__ == "__main__":
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("path")
    ap.add_argument("--services", type=int, default=1000)
    ap.add_argument("--messages", type=int, default=500_000)
    ap.add_argument("--step", type=float, default=10.0)
    a = ap.parse_args()
    print(write_fleet(a.path, services=a.services, messages=a.messages, step=a.step))
