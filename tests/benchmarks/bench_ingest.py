"""Ingest on the embedded bus: `replay` against a raw floor measured in the same run.

Floor: read the same file, orjson-decode each line, look up the service and add the metric values into a dict of
running sums, nothing else. Ratio = replay messages/s ÷ floor messages/s (target >= 0.7).

    python tests/benchmarks/bench_ingest.py [--messages 500000] [--services 1000] [--window 5m] [--repeat 3]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from service.config import parse_config  # noqa: E402
from service.embedded import replay  # noqa: E402
from tests.benchmarks.fleet import write_fleet  # noqa: E402


def floor(path: str) -> tuple[int, float]:
    started = time.perf_counter()
    sums: dict[str, dict[str, float]] = {}
    n = 0
    loads = orjson.loads
    with open(path, "rb") as f:
        for line in f:
            msg = loads(line)
            acc = sums.get(msg["service"])
            if acc is None:
                acc = sums[msg["service"]] = {}
            for k, v in msg["metrics"].items():
                acc[k] = acc.get(k, 0.0) + v
            n += 1
    return n, time.perf_counter() - started


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--messages", type=int, default=500_000)
    ap.add_argument("--services", type=int, default=1000)
    ap.add_argument("--step", type=float, default=10.0, help="seconds between scrapes of one service")
    ap.add_argument("--window", default="5m")
    ap.add_argument("--repeat", type=int, default=3, help="alternate floor and replay this many times; best of each")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        path = os.path.join(d, "fleet.jsonl")
        n = write_fleet(path, services=a.services, messages=a.messages, step=a.step)
        cfg = parse_config(f'[defaults]\nwindow = "{a.window}"\n')
        best_floor = best_replay = float("inf")
        windows = 0
        for _ in range(a.repeat):
            _, t = floor(path)
            best_floor = min(best_floor, t)
            t0 = time.perf_counter()
            s = replay(cfg, path, os.path.join(d, "scores.jsonl"))
            best_replay = min(best_replay, time.perf_counter() - t0)
            windows = s.windows
        print(f"messages {n}, services {a.services}, windows scored {windows} ({n / max(windows, 1):.1f} messages per window)")
        print(f"floor   {n / best_floor:12,.0f} msg/s")
        print(f"replay  {n / best_replay:12,.0f} msg/s")
        print(f"ratio   {best_floor / best_replay:.3f}   (target >= 0.7)")


if __name__ == "__main__":
    main()
