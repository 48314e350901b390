"""Change-point F1 of ``tidewatch replay`` alert onsets on the TCPD series that river ships.

Usage (from the repository root)::

    python tests/benchmarks/bench_changepoint.py [--seeds 0 1 2] [--config FILE] [--out results.json]

Four series of the TCPD benchmark (van den Burg & Williams 2020, arXiv:2003.06222) ship
with river, annotations included: Occupancy, RunLog, AirlinePassengers (TCPD's
``jfk_passengers``) and UKCoalEmploy (``uk_coal_employ``). Before scoring, this script
checks river's annotations and lengths against the copy of TCPD's ``annotations.json``
kept below. Each series is replayed as one service with synthetic regular timestamps
(one row per minute) and a one-minute window, so window ``i`` is row ``i``; the
predicted change points are the onsets (rising edges) of ``anomalous``. The F1
(margin 5, precision against the union of annotators, recall averaged over them, index
0 counted on both sides) is printed per series and as the mean, beside a "no-change"
prediction scored by the same code, and the paper's default-parameter means over its
37 univariate series: binary segmentation 0.698, zero (no-change) baseline 0.645, as
quoted in the task brief. Occupancy (4 columns) and RunLog (2 columns) are multivariate
in TCPD: every column is sent as a metric of the one service.

This is not part of the default test run (pytest does not collect tests/benchmarks).
"""

from __future__ import annotations

import argparse
import json
import re
import statistics
import sys
import tempfile
import time
import tomllib
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))  # the sibling bench_nab module
from bench_nab import (  # noqa: E402
    ReplayFailed,
    check_replay,
    config_text,
    map_rows,
    replay_command,
    run_replay,
    write_jsonl,
)

from service.eval_changepoint import change_point_score, onsets  # noqa: E402

__all__ = ["TCPD_ANNOTATIONS", "TCPD_LENGTHS", "load_series", "check_annotations"]

# TCPD annotations.json (the dataset's public repository, commit 9c63a64), the four
# series river ships; annotator id -> 0-based change-point indices.
TCPD_ANNOTATIONS: dict[str, dict[str, list[int]]] = {
    "occupancy": {
        "6": [238, 416],
        "8": [53, 143, 238, 417],
        "9": [53, 92, 142, 181, 236, 264, 341, 416, 436, 451, 506],
        "10": [1, 52, 91, 142, 181, 234, 267, 324, 360, 416, 451, 506],
        "12": [234, 415],
    },
    "run_log": {
        "6": [60, 96, 114, 174, 204, 240, 258, 317],
        "7": [60, 96, 114, 177, 204, 240, 258, 317],
        "8": [60, 96, 114, 174, 204, 240, 258, 317],
        "10": [2, 60, 96, 114, 174, 204, 240, 258, 317],
        "12": [],
    },
    "jfk_passengers": {"6": [299], "7": [], "8": [302], "9": [326, 382], "10": [296]},
    "uk_coal_employ": {
        "6": [15, 28, 45, 60, 68, 80],
        "7": [18, 47, 81],
        "8": [],
        "9": [15, 27, 46, 68, 81],
        "13": [19, 28, 45, 68, 80],
    },
}
# Series lengths (n_obs): jfk_passengers 468 as in TCPD's dataset file; the other three
# are from memory of TCPD's dataset files and agree with river's n_samples.
TCPD_LENGTHS = {"occupancy": 509, "run_log": 376, "jfk_passengers": 468, "uk_coal_employ": 105}

# river class name -> TCPD series name.
SERIES = {
    "Occupancy": "occupancy",
    "RunLog": "run_log",
    "AirlinePassengers": "jfk_passengers",
    "UKCoalEmploy": "uk_coal_employ",
}

# Quoted in the task brief from the paper's default-parameter table (mean F1, 37 univariate series).
PAPER_DEFAULT_F1 = {"binary segmentation": 0.698, "zero (no change)": 0.645}

STEP_S = 60  # synthetic sampling step: one row per window
T0 = 1_577_836_800  # 2020-01-01T00:00:00Z: inside the accepted event-time range


def _metric_name(column: str) -> str:
    return re.sub(r"[^a-z0-9]+", "_", column.lower()).strip("_") or "value"


def load_series(class_name: str) -> tuple[Any, dict[str, np.ndarray]]:
    """A river drift dataset and its columns, as ``metric name -> values``."""
    from river.drift import datasets

    ds = getattr(datasets, class_name)()
    columns: dict[str, list[float]] = {}
    for _, y in ds:
        items = y.items() if isinstance(y, dict) else [("value", y)]
        for k, v in items:
            columns.setdefault(_metric_name(str(k)), []).append(float(v))
    return ds, {k: np.asarray(v) for k, v in columns.items()}


def check_annotations(class_name: str, ds: Any, n_rows: int) -> list[str]:
    """Differences between river's copy and TCPD's annotations and length (empty: they match)."""
    tcpd = SERIES[class_name]
    problems = []
    theirs = {str(k): list(v) for k, v in ds.annotations.items()}
    if theirs != TCPD_ANNOTATIONS[tcpd]:
        problems.append(f"{class_name}: annotations differ from TCPD {tcpd}: {theirs} vs {TCPD_ANNOTATIONS[tcpd]}")
    if n_rows != TCPD_LENGTHS[tcpd]:
        problems.append(f"{class_name}: {n_rows} rows, TCPD {tcpd} has {TCPD_LENGTHS[tcpd]}")
    out_of_range = [i for v in theirs.values() for i in v if not 0 <= i < n_rows]
    if out_of_range:
        problems.append(f"{class_name}: annotations outside 0..{n_rows - 1}: {out_of_range}")
    return problems


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[0], help="tidewatch model seeds ([defaults] seed)")
    ap.add_argument("--config", type=Path, help="a tidewatch config to start from (seed, window, state dir are set per run)")
    ap.add_argument("--out", type=Path, help="write all numbers as JSON here")
    ap.add_argument("--tidewatch", help="command that starts tidewatch (default: python -m service.cli, or `tidewatch` on PATH)")
    ap.add_argument("--timeout", type=float, default=600.0, help="seconds allowed for one replay")
    args = ap.parse_args(argv)

    cmd = replay_command(args.tidewatch)
    check_replay(cmd)
    base_config = None
    if args.config is not None:
        try:
            base_config = tomllib.loads(args.config.read_text(encoding="utf-8"))
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise SystemExit(f"{args.config}: cannot read the config: {exc}") from exc

    series = {}
    problems = []
    for class_name in SERIES:
        ds, columns = load_series(class_name)
        n = len(next(iter(columns.values())))
        problems += check_annotations(class_name, ds, n)
        series[class_name] = (ds, columns, n)
    if problems:
        raise SystemExit("river's series do not match TCPD:\n  " + "\n  ".join(problems))
    print("river's annotations and lengths match TCPD for all four series", file=sys.stderr)

    window = f"{STEP_S}s"
    results: dict[str, Any] = {"seeds": args.seeds, "series": {}, "paper_default_f1_37_univariate": PAPER_DEFAULT_F1}
    with tempfile.TemporaryDirectory(prefix="tidewatch-bench-cp-") as tmp:
        for class_name, (ds, columns, n) in series.items():
            annotations = {str(k): list(v) for k, v in ds.annotations.items()}
            service = SERIES[class_name].replace("_", "-")
            timestamps = T0 + STEP_S * np.arange(n, dtype=np.float64)
            none = change_point_score(annotations, [])
            runs = []
            for seed in args.seeds:
                work = Path(tmp) / f"{class_name}-{seed}"
                work.mkdir()
                write_jsonl(work / "input.jsonl", service, timestamps, columns)
                (work / "config.toml").write_text(
                    config_text(base_config, seed=seed, window=window, state_dir=str(work / "state")), encoding="utf-8"
                )
                started = time.perf_counter()
                try:
                    msgs = run_replay(
                        cmd, work / "input.jsonl", work / "scores.jsonl", window, work / "config.toml", args.timeout
                    )
                except ReplayFailed as exc:
                    raise SystemExit(f"tidewatch replay failed on {class_name} (seed {seed}): {exc}") from exc
                wall = time.perf_counter() - started
                rows = map_rows(msgs, service, timestamps, STEP_S)
                predicted = onsets(rows.anomalous.tolist())
                s = change_point_score(annotations, predicted)
                runs.append({
                    "seed": seed, "f1": s.f, "precision": s.precision, "recall": s.recall,
                    "predicted": predicted, "flagged_windows": int(rows.anomalous.sum()),
                    "warming_up_windows": int(rows.warming_up.sum()), "rows_without_score": rows.unscored_rows,
                    "wall_s": wall,
                })
            results["series"][class_name] = {
                "tcpd_name": SERIES[class_name], "rows": n, "metrics": list(columns),
                "tidewatch": runs, "tidewatch_mean_f1": statistics.fmean(r["f1"] for r in runs),
                "no_change": {"f1": none.f, "precision": none.precision, "recall": none.recall},
            }

    per = results["series"]
    results["mean_f1"] = {
        "tidewatch": statistics.fmean(v["tidewatch_mean_f1"] for v in per.values()),
        "no_change": statistics.fmean(v["no_change"]["f1"] for v in per.values()),
    }
    print(f"\nF1 (margin 5), alert onsets of tidewatch replay, window {window}, seeds {args.seeds}")
    head = f"{'series':20s} {'rows':>5s} {'tidewatch':>10s} {'P':>6s} {'R':>6s} {'onsets':>7s} {'warm-up':>8s} {'no-change':>10s}"
    print(head)
    print("-" * len(head))
    for name, v in per.items():
        r0 = v["tidewatch"]
        p = statistics.fmean(r["precision"] for r in r0)
        r = statistics.fmean(r["recall"] for r in r0)
        k = statistics.fmean(len(r["predicted"]) for r in r0)
        warm = r0[0]["warming_up_windows"]
        print(f"{name:20s} {v['rows']:5d} {v['tidewatch_mean_f1']:10.3f} {p:6.3f} {r:6.3f} {k:7.1f} {warm:8d} {v['no_change']['f1']:10.3f}")
    print("-" * len(head))
    print(f"{'mean of 4 series':20s} {'':5s} {results['mean_f1']['tidewatch']:10.3f} {'':6s} {'':6s} {'':7s} {'':8s} "
          f"{results['mean_f1']['no_change']:10.3f}")
    print("paper, default parameters, mean over 37 univariate series: "
          + ", ".join(f"{k} {v:.3f}" for k, v in PAPER_DEFAULT_F1.items()))
    if args.out is not None:
        args.out.write_text(json.dumps(results, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        print(f"\nwrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
