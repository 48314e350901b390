"""Detection quality of ``tidewatch replay`` on a NAB-layout corpus, with two reference detectors.

Usage (from the repository root)::

    python tests/benchmarks/bench_nab.py PATH_TO_NAB_DIR [--seeds 0 1 2] [--config FILE] [--out results.json]

``PATH_TO_NAB_DIR`` holds ``windows.json`` and ``data/<family>/<file>.csv``. Each CSV
becomes a native JSON-lines input with one service (the file's stem), replayed with a
tumbling window as long as the file's median sampling step; each row then takes the
score of the window it falls in. Reported per profile, per family and overall:

* tidewatch, ``anomalous`` exactly as emitted;
* tidewatch, the best corpus score over a threshold sweep of ``score``;
* a windowed Gaussian (rolling window of recent values, score = 1 - tail probability
  of the current value), swept;
* uniformly random scores, swept, mean over ``--random-seeds``.

The two reference detectors check the scorer: on the full 58-file corpus the paper's
results table gives windowed Gaussian 39.6 / 20.9 / 47.4 and random 11.0 / 1.2 / 19.5
(standard / reward_low_FP / reward_low_FN, as quoted in the task brief and the shared
corpus notes). A slice of the corpus scores differently; both are printed side by side.

This is not part of the default test run (pytest does not collect tests/benchmarks).
"""

from __future__ import annotations

import argparse
import csv
import importlib.util
import json
import math
import os
import shlex
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
import tomllib
import zlib
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))  # run as a script from anywhere: `service` must import

from service.eval_nab import (  # noqa: E402
    PROFILES,
    RowLabels,
    best_threshold,
    label_rows,
    load_windows,
    score_corpus,
)
from service.timefmt import parse_rfc3339  # noqa: E402

__all__ = [
    "ReplayUnavailable",
    "ReplayFailed",
    "replay_command",
    "check_replay",
    "run_replay",
    "config_text",
    "dump_toml",
    "windowed_gaussian",
    "random_scores",
]

# As quoted in the task brief (full 58-file corpus, paper's results table).
PUBLISHED_FULL_CORPUS = {
    "windowed Gaussian": {"standard": 39.6, "reward_low_FP": 20.9, "reward_low_FN": 47.4},
    "random": {"standard": 11.0, "reward_low_FP": 1.2, "reward_low_FN": 19.5},
}
PROFILE_ORDER = ("standard", "reward_low_FP", "reward_low_FN")


# --------------------------------------------------------------------------- replay


class ReplayUnavailable(SystemExit):
    """``tidewatch replay`` cannot be started; the message says what was looked for."""


class ReplayFailed(RuntimeError):
    """A replay run exited non-zero; carries the tail of its stderr."""


def replay_command(override: str | None = None) -> list[str]:
    """The command that starts tidewatch (``replay ...`` is appended).

    ``override`` (``--tidewatch``) wins; then ``python -m service.cli`` when the module
    exists; then a ``tidewatch`` script on PATH.
    """
    if override:
        return shlex.split(override)
    if importlib.util.find_spec("service.cli") is not None:
        return [sys.executable, "-m", "service.cli"]
    script = shutil.which("tidewatch")
    if script:
        return [script]
    raise ReplayUnavailable(
        "tidewatch replay is not available: the module service.cli does not exist under "
        f"{ROOT} and no `tidewatch` script is on PATH. Install the project "
        "(pip install -e .) or pass --tidewatch 'COMMAND'."
    )


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join(p for p in (str(ROOT), env.get("PYTHONPATH", "")) if p)
    return env


def check_replay(cmd: Sequence[str]) -> None:
    """Fail with a clear message unless ``CMD replay --help`` runs."""
    try:
        proc = subprocess.run(
            [*cmd, "replay", "--help"], capture_output=True, text=True, timeout=60, cwd=ROOT, env=_env()
        )
    except (OSError, subprocess.TimeoutExpired) as exc:
        raise ReplayUnavailable(f"tidewatch replay is not available: {shlex.join(cmd)} could not start ({exc})") from exc
    if proc.returncode != 0:
        tail = (proc.stderr or proc.stdout).strip().splitlines()[-5:]
        raise ReplayUnavailable(
            f"tidewatch replay is not available: `{shlex.join([*cmd, 'replay', '--help'])}` exited "
            f"{proc.returncode}:\n  " + "\n  ".join(tail)
        )


def _toml_key(key: str) -> str:
    return key if key and all(c.isalnum() or c in "-_" for c in key) else json.dumps(key)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)  # JSON string escapes are valid TOML basic-string escapes
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"cannot write {type(value).__name__} values to TOML")


def dump_toml(data: dict[str, Any], _prefix: str = "") -> str:
    """Write the subset of TOML a tidewatch config uses (tables, arrays of tables, scalars, lists).

    >>> print(dump_toml({"defaults": {"seed": 3, "params": {"trees": 5}}, "rules": [{"match": "a*"}]}), end="")
    [defaults]
    seed = 3
    <BLANKLINE>
    [defaults.params]
    trees = 5
    <BLANKLINE>
    [[rules]]
    match = "a*"
    """
    lines: list[str] = []
    tables: list[tuple[str, Any]] = []
    for key, value in data.items():
        if isinstance(value, dict) or (isinstance(value, list) and value and all(isinstance(v, dict) for v in value)):
            tables.append((key, value))
        else:
            lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
    out = "\n".join(lines) + ("\n" if lines else "")
    for key, value in tables:
        name = f"{_prefix}{_toml_key(key)}"
        items = value if isinstance(value, list) else [value]
        for item in items:
            header = f"[[{name}]]" if isinstance(value, list) else f"[{name}]"
            body = dump_toml(item, f"{name}.")
            out += ("\n" if out else "") + header + "\n" + body
    return out


def config_text(base: dict[str, Any] | None, *, seed: int, window: str, state_dir: str) -> str:
    """The config a run uses: ``base`` (the user's ``--config``) with the seed and window set.

    State goes to a fresh directory so no run resumes another's learned models, and the
    HTTP endpoint is turned off so parallel runs cannot collide on a port.
    """
    data: dict[str, Any] = json.loads(json.dumps(base or {}))  # deep copy of plain TOML data
    defaults = data.setdefault("defaults", {})
    defaults["seed"] = int(seed)
    defaults["window"] = window
    data.setdefault("state", {})["dir"] = state_dir
    data.setdefault("http", {})["listen"] = ""
    return dump_toml(data)


def run_replay(
    cmd: Sequence[str], input_path: Path, output_path: Path, window: str, config_path: Path, timeout: float
) -> list[dict[str, Any]]:
    """Run ``replay`` on one input and return its score messages."""
    args = [*cmd, "replay", str(input_path), "--output", str(output_path), "--window", window, "--config", str(config_path)]
    try:
        proc = subprocess.run(args, capture_output=True, text=True, timeout=timeout, cwd=ROOT, env=_env())
    except subprocess.TimeoutExpired as exc:
        raise ReplayFailed(f"{shlex.join(args)} did not finish in {timeout:.0f} s") from exc
    if proc.returncode != 0:
        tail = "\n  ".join(proc.stderr.strip().splitlines()[-10:])
        raise ReplayFailed(f"{shlex.join(args)} exited {proc.returncode}:\n  {tail}")
    messages = []
    with open(output_path, encoding="utf-8") as fh:
        for line in fh:
            if line.strip():
                messages.append(json.loads(line))
    return messages


def write_jsonl(path: Path, service: str, timestamps: np.ndarray, metrics: dict[str, np.ndarray]) -> None:
    """One native message per row: ``{"service", "ts" (epoch seconds), "metrics"}``."""
    names = list(metrics)
    with open(path, "w", encoding="utf-8") as fh:
        for i, ts in enumerate(timestamps.tolist()):
            values = {n: float(metrics[n][i]) for n in names}
            stamp: float | int = int(ts) if float(ts).is_integer() else ts
            fh.write(json.dumps({"service": service, "ts": stamp, "metrics": values}) + "\n")


@dataclass(frozen=True, slots=True)
class RowScores:
    """Per-row view of the score messages: each row takes the values of its window."""

    score: np.ndarray
    anomalous: np.ndarray
    warming_up: np.ndarray
    unscored_rows: int  # rows whose window produced no message


def map_rows(messages: list[dict[str, Any]], service: str, timestamps: np.ndarray, step: float) -> RowScores:
    """Give each row the score of the window ``[k*step, (k+1)*step)`` it falls in."""
    by_start: dict[float, dict[str, Any]] = {}
    for m in messages:
        if m.get("service") == service:
            by_start[parse_rfc3339(m["window_start"])] = m
    n = timestamps.shape[0]
    score = np.zeros(n)
    anomalous = np.zeros(n, dtype=bool)
    warming = np.zeros(n, dtype=bool)
    missing = 0
    starts = np.floor(timestamps / step) * step
    for i, start in enumerate(starts.tolist()):
        m = by_start.get(start)
        if m is None:
            missing += 1  # e.g. a row that arrived too late for its window
            continue
        score[i] = float(m["score"])
        anomalous[i] = bool(m["anomalous"])
        warming[i] = bool(m.get("warming_up", False))
    return RowScores(score, anomalous, warming, missing)


# ----------------------------------------------------------------- reference detectors


def windowed_gaussian(values: np.ndarray, window: int = 6400, step: int = 100) -> np.ndarray:
    """Score each value by how far out in a Gaussian fitted to recent values it lies.

    The Gaussian is fitted to the last ``window`` values; once the window is full it
    is refitted every ``step`` values (the benchmark's reference detector does this;
    window 6400 and step 100 are its settings as remembered, not re-checked). The score
    is ``1 - Q(|z|)``, Q the upper tail probability of the standard normal, so it lies
    in [0.5, 1); the first value, with nothing to compare against, scores 0.

    >>> s = windowed_gaussian(np.array([1.0, 2.0, 1.0, 2.0, 9.0]))
    >>> [round(float(v), 4) for v in s]
    [0.0, 1.0, 0.8413, 0.9214, 1.0]
    """
    n = values.shape[0]
    scores = np.zeros(n)
    mean, std = 0.0, 1.0
    data: list[float] = []
    pending: list[float] = []
    count, m1, m2 = 0, 0.0, 0.0  # Welford while the window fills: no O(window) refit per value
    for i, x in enumerate(values.tolist()):
        if data:
            z = abs(x - mean) / std
            scores[i] = 1.0 - 0.5 * math.erfc(z / math.sqrt(2.0))
        if len(data) < window:
            data.append(x)
            count += 1
            d = x - m1
            m1 += d / count
            m2 += d * (x - m1)
            mean, std = m1, math.sqrt(m2 / count)
        else:
            pending.append(x)
            if len(pending) == step:
                data = data[step:] + pending
                pending = []
                arr = np.asarray(data)
                mean, std = float(arr.mean()), float(arr.std())
        if std == 0.0:
            std = 1e-6  # a flat window: any change is far out, not a division by zero
    return scores


def random_scores(name: str, n: int, seed: int) -> np.ndarray:
    """Uniform scores in [0, 1), seeded by (seed, file name) so file order does not matter."""
    rng = np.random.default_rng([seed, zlib.crc32(name.encode("utf-8"))])
    return rng.random(n)


# ----------------------------------------------------------------------- the corpus


@dataclass(frozen=True, slots=True)
class NabFile:
    name: str  # "<family>/<file>.csv", as in windows.json
    family: str
    stem: str
    timestamps: np.ndarray
    values: np.ndarray
    step: float  # median sampling step in seconds
    labels: RowLabels


def read_csv(path: Path) -> tuple[np.ndarray, np.ndarray]:
    """Columns ``timestamp`` (naive, taken as UTC) and ``value``."""
    ts, vals = [], []
    with open(path, newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            ts.append(parse_rfc3339(row["timestamp"]))
            vals.append(float(row["value"]))
    return np.asarray(ts), np.asarray(vals)


def load_corpus(nab_dir: Path) -> list[NabFile]:
    windows_path = nab_dir / "windows.json"
    if not windows_path.is_file():
        raise SystemExit(f"{nab_dir}: no windows.json here; pass the directory that holds windows.json and data/")
    windows = load_windows(windows_path)
    files = []
    for name in sorted(windows):
        path = nab_dir / "data" / name
        if not path.is_file():
            raise SystemExit(f"{path}: listed in windows.json but missing")
        ts, vals = read_csv(path)
        diffs = np.diff(ts)
        step = float(max(1.0, round(float(np.median(diffs))))) if diffs.size else 60.0
        labels = label_rows(ts, windows[name], name=name)
        files.append(NabFile(name, name.split("/")[0], Path(name).stem, ts, vals, step, labels))
    return files


# ------------------------------------------------------------------------- scoring


def _families(files: list[NabFile]) -> list[str]:
    return sorted({f.family for f in files})


def _by_family(files: list[NabFile], detections: list[np.ndarray], profile_name: str) -> dict[str, Any]:
    """Each family scored alone, normalised with its own null and perfect scores."""
    out: dict[str, Any] = {}
    for family in _families(files):
        idx = [i for i, f in enumerate(files) if f.family == family]
        part = score_corpus([files[i].labels for i in idx], [detections[i] for i in idx], PROFILES[profile_name])
        out[family] = {"score": part.normalised, "raw": part.raw}
    return out


def evaluate_swept(files: list[NabFile], scores: list[np.ndarray]) -> dict[str, Any]:
    """Best threshold per profile over the corpus, and the families' scores at it."""
    labels = [f.labels for f in files]
    out: dict[str, Any] = {}
    for pname in PROFILE_ORDER:
        choice = best_threshold(labels, scores, PROFILES[pname])
        families = _by_family(files, [s >= choice.threshold for s in scores], pname)
        threshold = choice.threshold if math.isfinite(choice.threshold) else None  # None: detect nothing
        out[pname] = {"score": choice.normalised, "threshold": threshold, "raw": choice.raw, "families": families}
    return out


def evaluate_flags(files: list[NabFile], flags: list[np.ndarray]) -> dict[str, Any]:
    """Corpus and family scores of fixed per-row detections."""
    labels = [f.labels for f in files]
    out: dict[str, Any] = {}
    for pname in PROFILE_ORDER:
        total = score_corpus(labels, flags, PROFILES[pname])
        out[pname] = {"score": total.normalised, "raw": total.raw, "families": _by_family(files, flags, pname)}
    return out


def mean_of(runs: list[dict[str, Any]]) -> dict[str, Any]:
    """Average per-profile and per-family scores over seeds (None stays None)."""

    def avg(xs: list[float | None]) -> float | None:
        vals = [x for x in xs if x is not None]
        return statistics.fmean(vals) if vals else None

    out: dict[str, Any] = {}
    for pname in PROFILE_ORDER:
        fams = runs[0][pname]["families"].keys()
        out[pname] = {
            "score": avg([r[pname]["score"] for r in runs]),
            "spread": (
                statistics.pstdev([r[pname]["score"] for r in runs]) if len(runs) > 1 else 0.0
            ),
            "families": {
                f: {k: avg([r[pname]["families"][f][k] for r in runs]) for k in ("score", "raw")} for f in fams
            },
        }
    return out


def run_tidewatch(
    files: list[NabFile], cmd: list[str], base_config: dict[str, Any] | None, seed: int, jobs: int, timeout: float
) -> tuple[list[RowScores], float]:
    """Replay every file (in parallel, one process each); returns per-row scores and wall seconds."""
    with tempfile.TemporaryDirectory(prefix="tidewatch-bench-nab-") as tmp:
        tmpdir = Path(tmp)

        def one(i: int) -> RowScores:
            f = files[i]
            work = tmpdir / f"{i:03d}"
            work.mkdir()
            window = f"{int(f.step)}s"
            write_jsonl(work / "input.jsonl", f.stem, f.timestamps, {"value": f.values})
            (work / "config.toml").write_text(
                config_text(base_config, seed=seed, window=window, state_dir=str(work / "state")), encoding="utf-8"
            )
            try:
                msgs = run_replay(cmd, work / "input.jsonl", work / "scores.jsonl", window, work / "config.toml", timeout)
            except ReplayFailed as exc:
                raise ReplayFailed(f"{f.name} (seed {seed}): {exc}") from exc
            return map_rows(msgs, f.stem, f.timestamps, f.step)

        started = time.perf_counter()
        pool = ThreadPoolExecutor(max_workers=jobs)
        try:
            rows = list(pool.map(one, range(len(files))))
        finally:
            # On a failure, do not start the files still queued: the corpus score needs them all.
            pool.shutdown(wait=True, cancel_futures=True)
        return rows, time.perf_counter() - started


# ------------------------------------------------------------------------ printing


def _fmt(x: float | None) -> str:
    return "-" if x is None else f"{x:.1f}"


def _family_cell(cell: dict[str, float | None]) -> str:
    # A family without windows has no normalised score; show its raw score (FP cost) instead.
    return _fmt(cell["score"]) if cell["score"] is not None else f"({_fmt(cell['raw'])})"


def print_tables(results: dict[str, Any], files: list[NabFile]) -> None:
    dets: dict[str, Any] = results["detectors"]
    n_windows = sum(len(f.labels.bounds) for f in files)
    print(f"\nCorpus: {len(files)} files, {n_windows} windows, {sum(f.labels.n_rows for f in files)} rows")
    print("\nNormalised score (null detector 0, perfect 100), whole corpus")
    head = f"{'detector':46s} {'standard':>8s} {'low-FP':>8s} {'low-FN':>8s}   published, full 58-file corpus"
    print(head)
    print("-" * len(head))
    for name, res in dets.items():
        summary = res.get("mean", res)
        pub = PUBLISHED_FULL_CORPUS.get(res.get("reference", ""))
        pub_txt = " / ".join(f"{pub[p]:.1f}" for p in PROFILE_ORDER) if pub else ""
        cells = " ".join(f"{_fmt(summary[p]['score']):>8s}" for p in PROFILE_ORDER)
        print(f"{name:46s} {cells}   {pub_txt}")
    shorts = [res["short"] for res in dets.values()]
    for pname in PROFILE_ORDER:
        print(f"\nPer family, profile {pname} (family's own null 0 / perfect 100; in brackets: raw score of a family without windows)")
        print(f"{'family':24s} " + " ".join(f"{s:>12s}" for s in shorts))
        for family in _families(files):
            cells = [f"{_family_cell(res.get('mean', res)[pname]['families'][family]):>12s}" for res in dets.values()]
            print(f"{family:24s} " + " ".join(cells))


# ---------------------------------------------------------------------------- main


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("nab_dir", type=Path, help="directory holding windows.json and data/<family>/<file>.csv")
    ap.add_argument("--seeds", type=int, nargs="+", default=[0], help="tidewatch model seeds ([defaults] seed)")
    ap.add_argument("--random-seeds", type=int, nargs="+", default=list(range(10)), help="seeds of the random detector")
    ap.add_argument("--config", type=Path, help="a tidewatch config to start from (seed, window, state dir are set per run)")
    ap.add_argument("--out", type=Path, help="write all numbers as JSON here")
    ap.add_argument("--tidewatch", help="command that starts tidewatch (default: python -m service.cli, or `tidewatch` on PATH)")
    ap.add_argument("--jobs", type=int, default=os.cpu_count() or 2, help="replays run at once")
    ap.add_argument("--timeout", type=float, default=1800.0, help="seconds allowed for one file's replay")
    ap.add_argument("--reference-only", action="store_true", help="score only the two reference detectors")
    args = ap.parse_args(argv)

    cmd: list[str] = []
    base_config = None
    if not args.reference_only:
        cmd = replay_command(args.tidewatch)
        check_replay(cmd)
        if args.config is not None:
            try:
                base_config = tomllib.loads(args.config.read_text(encoding="utf-8"))
            except (OSError, tomllib.TOMLDecodeError) as exc:
                raise SystemExit(f"{args.config}: cannot read the config: {exc}") from exc

    files = load_corpus(args.nab_dir)
    results: dict[str, Any] = {"nab_dir": str(args.nab_dir), "files": len(files), "detectors": {}}
    dets = results["detectors"]

    t0 = time.perf_counter()
    gauss = [windowed_gaussian(f.values) for f in files]
    dets["windowed Gaussian (swept)"] = {"short": "wGauss", "reference": "windowed Gaussian", **evaluate_swept(files, gauss)}
    runs = [evaluate_swept(files, [random_scores(f.name, f.labels.n_rows, s) for f in files]) for s in args.random_seeds]
    dets[f"random (swept, mean of {len(runs)} seeds)"] = {
        "short": "random",
        "reference": "random",
        "seeds": args.random_seeds,
        "per_seed": runs,
        "mean": mean_of(runs),
    }
    print(f"reference detectors scored in {time.perf_counter() - t0:.1f} s", file=sys.stderr)

    if not args.reference_only:
        flag_runs, swept_runs, timing = [], [], []
        n_rows = sum(f.labels.n_rows for f in files)
        for seed in args.seeds:
            try:
                rows, wall = run_tidewatch(files, cmd, base_config, seed, max(1, args.jobs), args.timeout)
            except ReplayFailed as exc:
                raise SystemExit(f"tidewatch replay failed on {exc}") from exc
            missing = sum(r.unscored_rows for r in rows)
            warm = sum(int(r.warming_up.sum()) for r in rows)
            timing.append({"seed": seed, "wall_s": wall, "rows_per_s": n_rows / wall, "rows_without_score": missing,
                           "rows_warming_up": warm})
            print(f"seed {seed}: replayed {n_rows} rows in {wall:.1f} s ({n_rows / wall:,.0f} rows/s over "
                  f"{args.jobs} jobs); {missing} rows had no score message, {warm} were warming up", file=sys.stderr)
            flag_runs.append(evaluate_flags(files, [r.anomalous for r in rows]))
            swept_runs.append(evaluate_swept(files, [r.score for r in rows]))
        label = f"mean of {len(args.seeds)} seed{'s' if len(args.seeds) > 1 else ''}"
        dets[f"tidewatch, flag as emitted ({label})"] = {
            "short": "tw-flag", "seeds": args.seeds, "per_seed": flag_runs, "mean": mean_of(flag_runs), "replay": timing,
        }
        dets[f"tidewatch, swept score ({label})"] = {
            "short": "tw-swept", "seeds": args.seeds, "per_seed": swept_runs, "mean": mean_of(swept_runs),
        }

    results["published_full_corpus"] = PUBLISHED_FULL_CORPUS
    print_tables(results, files)
    if args.out is not None:
        args.out.write_text(json.dumps(results, indent=2, allow_nan=False) + "\n", encoding="utf-8")
        print(f"\nwrote {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
