"""Encode and decode cost of model state records (``models.persistence``), against a floor.

Builds ``--services`` warmed models of the default kind and settings (``models.build_model``,
``ModelSettings()``), each fed ``--windows`` five-minute windows of the default features of five
metrics (``<metric>.mean`` and ``count``, as ``tidewatch`` builds them), so that the trees are
built, a reference mass window is complete and the calibration history holds scores. Then, for
unsigned and for signed (HMAC) records, times ``encode_state`` and ``decode_state`` over every
model in ``--repeat`` rounds and prints the median microseconds per record and the record size.

The floor is one BLAKE2b-128 pass over the record plus one copy of its bytes into a fresh numpy
array -- the least any self-checking decoder of this many bytes does. Each round times the floor,
encode and decode one after the other, so all three see the same load of a shared host; the
printed ratios (``encode/floor``, ``decode/floor``) are medians of the per-round ratios and are
what to compare between runs and machines (absolute microseconds move with the host).

``--baseline-codec FILE`` loads another version of ``models/persistence.py`` (for instance
``git show HEAD:models/persistence.py > /tmp/old_persistence.py``) and times it in the same rounds
on the same models, with its own records and floor: a before/after from one run. The rest of the
model code (``ServiceModel.from_state`` and below) is the current one for both.

Each decoded model is re-encoded once and must give the same bytes (the round trip is exact).
``--profile decode|encode`` prints a cProfile of one signed pass (sorted by own time).

    python tests/benchmarks/bench_state_codec.py [--services 2000] [--windows 60] [--repeat 5]
        [--baseline-codec FILE] [--profile decode|encode]
"""

from __future__ import annotations

import argparse
import cProfile
import hashlib
import importlib.util
import io
import pstats
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from models import ModelSettings, ServiceModel, build_model, decode_state, encode_state  # noqa: E402
from models.persistence import FORMAT_VERSION  # noqa: E402

KEY = b"bench-state-codec-key"
METRICS = ("latency_p95_ms", "errors", "requests", "cpu_util", "memory_mb")


def warmed_models(services: int, windows: int, seed: int = 0) -> list[ServiceModel]:
    """Default-kind models, each fed ``windows`` windows of plausible traffic."""
    rng = np.random.default_rng(seed)
    settings = ModelSettings()
    t0 = 1772409600.0
    out = []
    for i in range(services):
        model = build_model(f"ferry-svc-{i:05d}", settings)
        base = float(rng.uniform(50, 500))
        for w in range(windows):
            x = {"latency_p95_ms.mean": base * (1 + 0.05 * rng.standard_normal()),
                 "errors.mean": float(rng.poisson(2)), "requests.mean": base * 3.0 + rng.normal(0, 5),
                 "cpu_util.mean": float(rng.uniform(0.1, 0.9)), "memory_mb.mean": base * 4.0,
                 "count": float(rng.poisson(30))}
            model.assess(x, at=t0 + 300.0 * w)
        out.append(model)
    return out


def pass_us(fn, items: list) -> float:
    """Mean microseconds of ``fn`` per item over one pass."""
    started = time.perf_counter()
    for item in items:
        fn(item)
    return (time.perf_counter() - started) / len(items) * 1e6


def interleaved(passes: dict[str, tuple], repeat: int) -> dict[str, list[float]]:
    """``repeat`` rounds of one pass of every entry of ``passes`` (``name: (fn, items)``), in turn.

    Interleaving puts every measurement, the floor included, under the same load of a shared host,
    so the per-round ratios are steadier than any absolute time.
    """
    out: dict[str, list[float]] = {name: [] for name in passes}
    for _ in range(repeat):
        for name, (fn, items) in passes.items():
            out[name].append(pass_us(fn, items))
    return out


def load_codec(path: str):
    """Another version of ``models/persistence.py`` (e.g. ``git show HEAD:models/persistence.py``),
    loaded beside the current one to be timed on the same models in the same run."""
    spec = importlib.util.spec_from_file_location("baseline_codec", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules["baseline_codec"] = module
    spec.loader.exec_module(module)
    return module


def floor_one(record: bytes) -> None:
    hashlib.blake2b(record, digest_size=16).digest()
    np.frombuffer(record, dtype=np.uint8).copy()


def profile(fn, items: list, top: int = 25) -> str:
    prof = cProfile.Profile()
    prof.enable()
    for item in items:
        fn(item)
    prof.disable()
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("tottime").print_stats(top)
    return out.getvalue()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--services", type=int, default=2000)
    ap.add_argument("--windows", type=int, default=60)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--profile", choices=("decode", "encode"), help="print a cProfile of one signed pass")
    ap.add_argument("--baseline-codec", metavar="FILE",
                    help="another models/persistence.py to time beside this one (same models, same run)")
    a = ap.parse_args()
    if a.services < 1 or a.windows < 1 or a.repeat < 1:
        ap.error("--services, --windows and --repeat must be >= 1")

    started = time.perf_counter()
    models = warmed_models(a.services, a.windows)
    print(f"# built {a.services} models x {a.windows} windows in {time.perf_counter() - started:.1f} s; "
          f"record format {FORMAT_VERSION}", file=sys.stderr)

    other = load_codec(a.baseline_codec) if a.baseline_codec else None
    for label, key in (("unsigned", None), ("signed", KEY)):
        records = [encode_state(m.service, m, key=key) for m in models]
        for record in records:  # exact round trip, checked once outside the timing
            service, restored = decode_state(record, key=key)
            if encode_state(service, restored, key=key) != record:
                raise SystemExit(f"round trip of {service} changed the record")
        passes = {
            "floor": (floor_one, records),
            "encode": (lambda m: encode_state(m.service, m, key=key), models),
            "decode": (lambda r: decode_state(r, key=key), records),
        }
        if other is not None:
            old_records = [other.encode_state(m.service, m, key=key) for m in models]
            passes["base encode"] = (lambda m: other.encode_state(m.service, m, key=key), models)
            passes["base decode"] = (lambda r: other.decode_state(r, key=key), old_records)
            passes["base floor"] = (floor_one, old_records)
        runs = interleaved(passes, a.repeat)
        med = {name: statistics.median(v) for name, v in runs.items()}
        ratio = {name: statistics.median(x / f for x, f in zip(runs[name], runs["floor"]))
                 for name in ("encode", "decode")}
        size = statistics.mean(len(r) for r in records)
        print(f"{label:8s} record {size:8.0f} B ({size / 1024:.1f} KiB)  encode {med['encode']:7.1f} us  "
              f"decode {med['decode']:7.1f} us  floor {med['floor']:5.1f} us  "
              f"encode/floor {ratio['encode']:5.2f}  decode/floor {ratio['decode']:5.2f}")
        if other is not None:
            old_size = statistics.mean(len(r) for r in old_records)
            base = {name: statistics.median(x / f for x, f in zip(runs["base " + name], runs["base floor"]))
                    for name in ("encode", "decode")}
            speed = {name: statistics.median(b / x for b, x in zip(runs["base " + name], runs[name]))
                     for name in ("encode", "decode")}
            print(f"{'  base':8s} record {old_size:8.0f} B ({old_size / 1024:.1f} KiB)  "
                  f"encode {med['base encode']:7.1f} us  decode {med['base decode']:7.1f} us  "
                  f"floor {med['base floor']:5.1f} us  encode/floor {base['encode']:5.2f}  "
                  f"decode/floor {base['decode']:5.2f}   speed-up: encode x{speed['encode']:.2f}, "
                  f"decode x{speed['decode']:.2f}")
        if a.profile and key is not None:
            if a.profile == "decode":
                print(profile(lambda r: decode_state(r, key=key), records))
            else:
                print(profile(lambda m: encode_state(m.service, m, key=key), models))


if __name__ == "__main__":
    main()
