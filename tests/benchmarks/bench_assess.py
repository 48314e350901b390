"""Per-window model cost: ``ServiceModel.assess`` on warmed default models against a floor.

Builds ``--models`` default models (``--kind``, default ``"combined"``), warms each on ``--warm`` windows of a
synthetic service (seven metrics with a daily cycle, noise, a message count and a counter that
holds at 0), then times ``--windows`` more windows per model, round-robin as a fleet closes them.
Floor, measured in the same run on the same windows: build the feature dict and do one numpy
operation per feature (what any per-window model pays at least). Prints the median µs per
window and the ratio assess / floor (lower is better).

``--baseline-dir DIR`` also times a frozen copy of the ``models`` package (``DIR/models``) on
the same windows, and checks that every assessment and the final model states of both are
identical (scores, flags, contributors; state arrays bit for bit).

    python tests/benchmarks/bench_assess.py [--models 20] [--warm 400] [--windows 300]
                                            [--baseline-dir /tmp/old]
"""

from __future__ import annotations

import argparse
import importlib
import math
import statistics
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

_START = 1772409600.0  # a Monday, 00:00 UTC
_STEP = 300.0


def windows(service: int, n: int, offset: int = 0) -> list[tuple[dict[str, float], float]]:
    """``n`` windows of one synthetic service, deterministic in ``service`` and ``offset``."""
    rng = np.random.default_rng(1000 + service)
    noise = rng.standard_normal((offset + n, 6))[offset:]
    out = []
    for k in range(n):
        j = offset + k
        at = _START + _STEP * j
        day = math.sin(2.0 * math.pi * (at % 86400.0) / 86400.0)
        nz = noise[k]
        feats = {
            "count": float(round(40.0 + 15.0 * day + 3.0 * nz[0])),
            "latency_p95_ms.mean": 200.0 + 40.0 * day + 8.0 * nz[1] + (300.0 if j % 997 == 500 else 0.0),
            "latency_p95_ms.max": 260.0 + 50.0 * day + 12.0 * nz[2],
            "error_rate.mean": max(0.0, 0.01 + 0.002 * nz[3]),
            "cpu.mean": 0.4 + 0.1 * day + 0.02 * nz[4],
            "queue_depth.max": float(max(0, round(5.0 + 2.0 * nz[5]))),
            "restarts.sum": 1.0 if j % 613 == 300 else 0.0,
        }
        out.append((feats, at))
    return out


def load_models(path: Path | None) -> Any:
    """The ``models`` package from ``path`` (a directory holding ``models/``), or the tree's."""
    saved = {k: v for k, v in sys.modules.items() if k == "models" or k.startswith("models.")}
    for k in saved:
        del sys.modules[k]
    if path is not None:
        sys.path.insert(0, str(path))
    try:
        pkg = importlib.import_module("models")
        importlib.import_module("models.service_model")
    finally:
        if path is not None:
            sys.path.remove(str(path))
        loaded = {k: v for k, v in sys.modules.items() if k == "models" or k.startswith("models.")}
        for k in loaded:
            del sys.modules[k]
        sys.modules.update(saved)
    return pkg


def floor_window(feats: dict[str, float], acc: np.ndarray) -> float:
    """The floor's work for one window: a dict of floats and one numpy operation per feature."""
    d = {k: float(v) for k, v in feats.items()}
    total = 0.0
    for i, v in enumerate(d.values()):
        acc[i] = np.multiply(acc[i], 0.5) + v  # one numpy op per feature
        total += v
    return total


def run(pkg: Any, warm: list, timed: list, kind: str) -> tuple[list[float], list[Any], list[Any]]:
    """Warm one model per service, then time every window; returns (µs per window, results, models)."""
    settings = pkg.ModelSettings(kind=kind)
    models = [pkg.build_model(f"svc-{s:03d}", settings) for s in range(len(warm))]
    for model, ws in zip(models, warm):
        for feats, at in ws:
            model.assess(feats, at=at)
    times, results = [], []
    clock = time.perf_counter_ns
    for k in range(len(timed[0])):
        for model, ws in zip(models, timed):
            feats, at = ws[k]
            t0 = clock()
            r = model.assess(feats, at=at)
            times.append((clock() - t0) / 1000.0)
            results.append(r)
    return times, results, models


def same_state(a: Any, b: Any) -> bool:
    """Whether two ``to_state`` outputs are identical (arrays compared byte for byte)."""
    if isinstance(a, dict):
        return isinstance(b, dict) and a.keys() == b.keys() and all(same_state(a[k], b[k]) for k in a)
    if isinstance(a, np.ndarray):
        return (isinstance(b, np.ndarray) and a.dtype == b.dtype and a.shape == b.shape
                and a.tobytes() == b.tobytes())
    if isinstance(a, float):
        return isinstance(b, float) and (a == b or (math.isnan(a) and math.isnan(b)))
    if isinstance(a, (list, tuple)):
        return type(a) is type(b) and len(a) == len(b) and all(same_state(x, y) for x, y in zip(a, b))
    return type(a) is type(b) and a == b


def key(r: Any) -> tuple:
    """Everything an assessment reports, floats as hex (exact)."""
    return (r.score.hex(), r.raw.hex(), r.anomalous, r.warming_up,
            tuple((c.feature, c.observed.hex(), c.expected.hex(), c.deviation.hex())
                  for c in r.contributors))


def main() -> None:
    """Parse the arguments, time the floor and the model(s), print medians and ratios."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", type=int, default=20)
    ap.add_argument("--warm", type=int, default=400, help="windows per model before timing")
    ap.add_argument("--windows", type=int, default=300, help="timed windows per model")
    ap.add_argument("--kind", default="combined", help="model kind (ModelSettings.kind)")
    ap.add_argument("--baseline-dir", type=Path, default=None,
                    help="directory holding a frozen copy of the models package (DIR/models)")
    args = ap.parse_args()
    if args.models < 1 or args.warm < 1 or args.windows < 1:
        ap.error("--models, --warm and --windows must be >= 1")

    warm = [windows(s, args.warm) for s in range(args.models)]
    timed = [windows(s, args.windows, args.warm) for s in range(args.models)]

    acc = np.zeros(8)
    floor_us = []
    clock = time.perf_counter_ns
    for k in range(args.windows):
        for ws in timed:
            t0 = clock()
            floor_window(ws[k][0], acc)
            floor_us.append((clock() - t0) / 1000.0)
    floor_med = statistics.median(floor_us)

    # Warm-up windows include each service's tree build and the first mass-window swaps.
    t0 = time.perf_counter()
    cur_times, cur_results, cur_models = run(load_models(None), warm, timed, args.kind)
    cur_total = time.perf_counter() - t0
    cur_med = statistics.median(cur_times)
    print(f"{args.models} {args.kind!r} models x ({args.warm} warm + {args.windows} timed) windows")
    print(f"floor (dict + one numpy op per feature): median {floor_med:8.2f} us/window")
    print(f"assess (this tree):                      median {cur_med:8.2f} us/window"
          f"  ratio {cur_med / floor_med:6.2f}  (whole run incl. warm-up {cur_total:.2f} s)")
    if args.baseline_dir is not None:
        t0 = time.perf_counter()
        old_times, old_results, old_models = run(load_models(args.baseline_dir), warm, timed, args.kind)
        old_total = time.perf_counter() - t0
        old_med = statistics.median(old_times)
        print(f"assess (baseline {args.baseline_dir}): median {old_med:8.2f} us/window"
              f"  ratio {old_med / floor_med:6.2f}  (whole run incl. warm-up {old_total:.2f} s)")
        print(f"speed-up of the median: {old_med / cur_med:.2f}x")
        same_out = [key(a) for a in cur_results] == [key(b) for b in old_results]
        same_st = all(same_state(a.to_state(), b.to_state()) for a, b in zip(cur_models, old_models))
        print(f"assessments identical: {same_out}; model states identical: {same_st}")
        if not (same_out and same_st):
            sys.exit(1)


if __name__ == "__main__":
    main()
