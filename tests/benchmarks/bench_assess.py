"""Per-window model cost: ``ServiceModel.assess`` on warmed default models against a floor.

Builds ``--models`` default models (``--kind``, default ``"combined"``), warms each on ``--warm`` windows of a
synthetic service (seven metrics with a daily cycle, noise, a message count and a counter that
holds at 0), then times ``--windows`` more windows per model, round-robin as a fleet closes them.
Floor, measured in the same run on the same windows: build the feature dict and do one numpy
operation per feature (what any per-window model pays at least). Prints the median µs per
window and the ratio assess / floor (lower is better).

``--baseline-dir DIR`` also times a frozen copy of the ``models`` package (``DIR/models``) on
the same windows, and checks that every assessment and the final model states of both are
identical (scores, flags, contributors; state arrays bit for bit; statistics that only one of the two
has, such as those of a newer model state format, and the format number are listed, not compared).
The two are timed window by window in turn (the same window of the same service, one package after the
other), since these machines drift in speed, in ``--rounds`` rounds; each round's ratio is printed, and the
best median of each.

    python tests/benchmarks/bench_assess.py [--models 20] [--warm 400] [--windows 300]
                                            [--baseline-dir /tmp/old] [--rounds 3]
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
        # Plain floats, as service.windows.window_features gives them (numpy scalars take split_features' slow path).
        out.append(({name: float(v) for name, v in feats.items()}, at))
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


def run(pkgs: list[Any], warm: list, timed: list, kind: str) -> list[tuple[list[float], list[Any], list[Any]]]:
    """Warm one model per service and package, then time every window, the packages in turn on each window (so
    that a machine drifting in speed slows them alike); per package (µs per window, results, models)."""
    fleets = []
    for pkg in pkgs:
        settings = pkg.ModelSettings(kind=kind)
        models = [pkg.build_model(f"svc-{s:03d}", settings) for s in range(len(warm))]
        for model, ws in zip(models, warm):
            for feats, at in ws:
                model.assess(feats, at=at)
        fleets.append(models)
    out: list[tuple[list[float], list[Any], list[Any]]] = [([], [], models) for models in fleets]
    clock = time.perf_counter_ns
    for k in range(len(timed[0])):
        for s, ws in enumerate(timed):
            feats, at = ws[k]
            for (times, results, models) in out:
                model = models[s]
                t0 = clock()
                r = model.assess(feats, at=at)
                times.append((clock() - t0) / 1000.0)
                results.append(r)
    return out


def same_state(a: Any, b: Any, only_one: set[str] | None = None, at: str = "") -> bool:
    """Whether two ``to_state`` outputs are identical (arrays compared byte for byte). With ``only_one``, keys
    that only one side has and the ``format`` number are collected there (as dotted paths) instead of compared."""
    if isinstance(a, dict):
        if not isinstance(b, dict):
            return False
        if only_one is None:
            return a.keys() == b.keys() and all(same_state(a[k], b[k]) for k in a)
        only_one.update(f"{at}{k}" for k in a.keys() ^ b.keys())
        common = [k for k in a if k in b and not (at == "" and k == "format")]
        return all(same_state(a[k], b[k], only_one, f"{at}{k}.") for k in common)
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
    ap.add_argument("--rounds", type=int, default=3, help="alternating rounds of this tree and the baseline")
    args = ap.parse_args()
    if args.models < 1 or args.warm < 1 or args.windows < 1 or args.rounds < 1:
        ap.error("--models, --warm, --windows and --rounds must be >= 1")

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
    print(f"{args.models} {args.kind!r} models x ({args.warm} warm + {args.windows} timed) windows")
    print(f"floor (dict + one numpy op per feature): median {floor_med:8.2f} us/window")
    packages = [("this tree", load_models(None))]
    if args.baseline_dir is not None:
        packages.append((f"baseline {args.baseline_dir}", load_models(args.baseline_dir)))
    best: dict[str, float] = {}
    last: dict[str, tuple[list, list]] = {}
    for k in range(args.rounds):
        t0 = time.perf_counter()
        runs = run([package for _, package in packages], warm, timed, args.kind)
        total = time.perf_counter() - t0
        medians = []
        for (label, _), (times, results, models) in zip(packages, runs):
            med = statistics.median(times)
            medians.append(med)
            best[label] = min(best.get(label, math.inf), med)
            last[label] = (results, models)
            print(f"round {k + 1}: assess ({label}): median {med:8.2f} us/window  ratio {med / floor_med:6.2f}")
        if len(medians) == 2:
            print(f"round {k + 1}: speed-up of the median {medians[1] / medians[0]:.2f}x  (round {total:.2f} s)")
    for label, _ in packages:
        print(f"best of {args.rounds}: assess ({label}): median {best[label]:8.2f} us/window"
              f"  ratio {best[label] / floor_med:6.2f}")
    if args.baseline_dir is not None:
        (cur_results, cur_models), (old_results, old_models) = last["this tree"], last[packages[1][0]]
        print(f"speed-up of the best medians: {best[packages[1][0]] / best['this tree']:.2f}x")
        same_out = [key(a) for a in cur_results] == [key(b) for b in old_results]
        only_one: set[str] = set()
        same_st = all(same_state(a.to_state(), b.to_state(), only_one) for a, b in zip(cur_models, old_models))
        print(f"assessments identical: {same_out}; model states identical: {same_st}"
              + (f" (in one of the two only, not compared: {', '.join(sorted(only_one))})" if only_one else ""))
        if not (same_out and same_st):
            sys.exit(1)


if __name__ == "__main__":
    main()
