"""Scoring rules of the NAB anomaly benchmark, implemented from the published rules.

Source: Lavin & Ahmad 2015, arXiv:1510.03336 (section "Scoring"), cross-checked
against the benchmark's reference scorer (``nab/sweeper.py`` of NAB v1.1); every
place where this module follows the reference code rather than the paper text
is marked "reference scorer" below.

The pieces, in the order a benchmark uses them:

* :func:`label_rows` turns one file's row timestamps and labelled windows
  ``[start, end]`` into :class:`RowLabels`: for every row the window it lies in
  (or none), whether it is scored (rows of the probationary period are not), and
  its unit reward (inside a window) or unit penalty (outside one).
* :func:`score_file` scores a boolean detection per row under a :class:`Profile`.
* :func:`score_corpus` adds files up and normalises:
  ``100 * (S - S_null) / (S_perfect - S_null)``.
* :func:`best_threshold` finds the threshold on per-row scores that maximises the
  corpus score (an exact sweep over every distinct score, as the reference
  scorer's optimiser does).

Positions and the scaled sigmoid (reference scorer)
---------------------------------------------------
A window holding rows ``left..right`` (``width = right - left + 1``) gives row
``i`` the relative position ``y = -(right - i + 1) / width``: ``-1`` at the
window's first row, rising to ``-1/width`` at its last (never exactly 0).
A row after a window gets ``y = (i - right_prev) / (width_prev - 1)``, so ``y``
grows by one for every window-width travelled past the last window; a row
before any window gets ``y = 3``. The reward is ``sigma(y) = 2/(1+exp(5y)) - 1``,
clamped to ``-1`` for ``y >= 3``. Inside a window the true-positive weight is
``A_TP * sigma(y) / sigma(-1)`` (so the earliest detection earns exactly
``A_TP``); outside, a false positive costs ``A_FP * sigma(y)`` (negative: about
``-A_FP`` far from any window, close to 0 just after one). Only the highest
reward in a window counts, i.e. the earliest detection; a window without a
detection costs ``-A_FN``. True negatives carry ``A_TN`` in the published
profiles but do not enter the score.

>>> labels = label_rows(range(40), [(20.0, 29.0)])   # rows 20..29 form the window
>>> labels.probationary_rows                         # floor(0.15 * 40)
6
>>> detect = [False] * 40
>>> detect[20] = True                                # earliest row of the window
>>> round(score_file(labels, detect, PROFILES["standard"]).raw, 6)
1.0
>>> detect[35] = True                                # 6 rows after it, y = 6/9
>>> round(score_file(labels, detect, PROFILES["standard"]).raw, 6)
0.897578
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.errors import TidewatchError
from service.timefmt import parse_rfc3339

__all__ = [
    "NabInputError",
    "Profile",
    "PROFILES",
    "PROBATION_FRACTION",
    "scaled_sigmoid",
    "probationary_length",
    "RowLabels",
    "label_rows",
    "FileScore",
    "CorpusScore",
    "ThresholdChoice",
    "score_file",
    "score_corpus",
    "perfect_detections",
    "normalise",
    "best_threshold",
    "load_windows",
]

# Fraction of each file that is unscored while a detector learns (the paper's 15%).
PROBATION_FRACTION = 0.15

# Past this relative position a false positive costs the full A_FP (reference scorer).
_FAR = 3.0


class NabInputError(TidewatchError, ValueError):
    """Labels, detections or scores cannot be scored as given (lengths, order, NaN)."""


@dataclass(frozen=True, slots=True)
class Profile:
    """An application profile: the weights of the score.

    ``tp`` rewards the earliest detection in a window, ``fp`` scales the cost of a
    detection outside windows, ``fn`` is the cost of a missed window. ``tn`` is
    part of the published profiles but does not enter the score.
    """

    name: str
    tp: float
    fp: float
    fn: float
    tn: float = 1.0


# Lavin & Ahmad 2015, table "application profiles" (A_TP, A_FP, A_FN, A_TN).
PROFILES: Mapping[str, Profile] = {
    "standard": Profile("standard", tp=1.0, fp=0.11, fn=1.0, tn=1.0),
    "reward_low_FP": Profile("reward_low_FP", tp=1.0, fp=0.22, fn=1.0, tn=1.0),
    "reward_low_FN": Profile("reward_low_FN", tp=1.0, fp=0.11, fn=2.0, tn=1.0),
}


def scaled_sigmoid(y: float) -> float:
    """The paper's scaled sigmoid ``2 / (1 + exp(5 y)) - 1``, clamped to -1 from ``y >= 3``.

    >>> [round(scaled_sigmoid(y), 5) for y in (-1.0, -0.5, 0.0, 1.0, 3.0)]
    [0.98661, 0.84828, 0.0, -0.98661, -1.0]
    """
    if y >= _FAR:
        return -1.0
    return 2.0 / (1.0 + math.exp(5.0 * y)) - 1.0


def _scaled_sigmoid_array(y: np.ndarray) -> np.ndarray:
    # Clamp before exp so far positions cannot overflow; they map to -1 anyway.
    return np.where(y >= _FAR, -1.0, 2.0 / (1.0 + np.exp(5.0 * np.minimum(y, _FAR))) - 1.0)


def probationary_length(n_rows: int, fraction: float = PROBATION_FRACTION) -> int:
    """Rows at the start of a file that are not scored.

    The paper says "the first 15%"; the reference scorer caps it at
    ``fraction * 5000`` rows (750), i.e. ``min(floor(0.15 n), 750)``.

    >>> probationary_length(4032), probationary_length(22695)
    (604, 750)
    """
    if n_rows < 0:
        raise NabInputError(f"a file cannot have {n_rows} rows")
    return int(min(math.floor(fraction * n_rows), fraction * 5000))


@dataclass(frozen=True, slots=True, eq=False)
class RowLabels:
    """What the scorer knows about each row of one file, independent of any detector.

    Attributes
    ----------
    name
        The file's name (e.g. ``realKnownCause/nyc_taxi.csv``).
    window
        Per row, the index of the window it lies in, or -1 outside windows.
    unit
        Per row, ``sigma(y) / sigma(-1)`` inside a window (multiplied by ``A_TP``)
        and ``sigma(y)`` outside (multiplied by ``A_FP``).
    scored
        Per row, False inside the probationary period.
    bounds
        Per window, its first and last row index.
    """

    name: str
    window: np.ndarray
    unit: np.ndarray
    scored: np.ndarray
    bounds: tuple[tuple[int, int], ...]
    probationary_rows: int

    @property
    def n_rows(self) -> int:
        return int(self.window.shape[0])

    @property
    def scored_windows(self) -> np.ndarray:
        """Indices of the windows that have at least one scored row.

        A window lying wholly inside the probationary period is neither a
        detection nor a miss (reference scorer).
        """
        return np.unique(self.window[self.scored & (self.window >= 0)])


def _window_rows(ts: np.ndarray, start: float, end: float, search_from: int) -> tuple[int, int] | None:
    """First and last row of ``[start, end]`` at or after ``search_from``; None if no row falls in it.

    Labels normally name row timestamps exactly; then the window opens at the first
    row equal to ``start`` and closes at the first row equal to ``end`` (reference
    scorer; this is what matters for files whose clock repeats or steps back).
    Otherwise it opens at the first row at or after ``start`` and closes at the last
    row before the first one past ``end``.
    """
    tail = ts[search_from:]
    exact = np.flatnonzero(tail == start)
    if exact.size:
        left = search_from + int(exact[0])
    else:
        after = np.flatnonzero(tail >= start)
        if not after.size:
            return None
        left = search_from + int(after[0])
    rest = ts[left:]
    exact_end = np.flatnonzero(rest == end)
    if exact_end.size:
        right = left + int(exact_end[0])
    else:
        past = np.flatnonzero(rest > end)
        right = left + int(past[0]) - 1 if past.size else ts.shape[0] - 1
    if right < left:
        return None
    return left, right


def label_rows(
    timestamps: Sequence[float] | np.ndarray,
    windows: Sequence[tuple[float, float]],
    *,
    name: str = "",
    probation_fraction: float = PROBATION_FRACTION,
) -> RowLabels:
    """Label one file's rows from its timestamps and anomaly windows.

    Parameters
    ----------
    timestamps
        Row timestamps (epoch seconds), in file order.
    windows
        ``(start, end)`` pairs, both ends included, in any order; they must not overlap.
    name
        The file's name, carried into scores.
    probation_fraction
        Fraction of rows left unscored at the start (see :func:`probationary_length`).

    >>> labels = label_rows([0, 1, 2, 3, 4, 5, 6, 7], [(2, 4)], probation_fraction=0.0)
    >>> labels.window.tolist()
    [-1, -1, 0, 0, 0, -1, -1, -1]
    >>> [round(u, 4) for u in labels.unit.tolist()]
    [-1.0, -1.0, 1.0, 0.9437, 0.6915, -0.8483, -0.9866, -0.9989]
    """
    ts = np.asarray(timestamps, dtype=np.float64)
    if ts.ndim != 1:
        raise NabInputError(f"{name or 'file'}: timestamps must be one-dimensional")
    if not np.all(np.isfinite(ts)):
        raise NabInputError(f"{name or 'file'}: timestamps must be finite numbers")
    n = ts.shape[0]
    ordered = sorted((float(s), float(e)) for s, e in windows)
    for s, e in ordered:
        if e < s:
            raise NabInputError(f"{name or 'file'}: window [{s}, {e}] ends before it starts")
    for (s0, e0), (s1, _) in zip(ordered, ordered[1:]):
        if s1 <= e0:
            raise NabInputError(f"{name or 'file'}: windows starting at {s0} and {s1} overlap")

    bounds: list[tuple[int, int]] = []
    search_from = 0
    for s, e in ordered:
        rows = _window_rows(ts, s, e, search_from)
        if rows is None:
            continue  # no row falls in this window: nothing to detect or miss
        bounds.append(rows)
        search_from = rows[1] + 1

    window = np.full(n, -1, dtype=np.int64)
    y = np.full(n, _FAR, dtype=np.float64)  # before any window: the full FP cost
    idx = np.arange(n, dtype=np.float64)
    for w, (left, right) in enumerate(bounds):
        width = right - left + 1
        window[left : right + 1] = w
        y[left : right + 1] = -(right - idx[left : right + 1] + 1.0) / width
        stop = bounds[w + 1][0] if w + 1 < len(bounds) else n
        # A one-row window would divide by zero in the reference formula; treat
        # its width-minus-one as one row.
        y[right + 1 : stop] = (idx[right + 1 : stop] - right) / max(width - 1, 1)
    sig = _scaled_sigmoid_array(y)
    unit = np.where(window >= 0, sig / scaled_sigmoid(-1.0), sig)
    probation = probationary_length(n, probation_fraction)
    scored = np.arange(n) >= probation
    return RowLabels(name, window, unit, scored, tuple(bounds), probation)


@dataclass(frozen=True, slots=True)
class FileScore:
    """One file's raw score and its parts under one profile."""

    name: str
    raw: float
    detected_windows: int
    missed_windows: int
    false_positives: int
    false_positive_cost: float  # negative or zero; already included in ``raw``


@dataclass(frozen=True, slots=True)
class CorpusScore:
    """A corpus' summed raw score, its null and perfect references, and the normalised score."""

    profile: str
    raw: float
    null: float
    perfect: float
    normalised: float | None  # None when the corpus has no scored window (perfect == null)
    files: tuple[FileScore, ...] = field(default=())


@dataclass(frozen=True, slots=True)
class ThresholdChoice:
    """The threshold that maximises a corpus score; rows with ``score >= threshold`` detect.

    ``threshold`` is ``inf`` when detecting nothing is best.
    """

    profile: str
    threshold: float
    raw: float
    normalised: float | None


def _as_mask(labels: RowLabels, detected: Sequence[bool] | np.ndarray) -> np.ndarray:
    mask = np.asarray(detected, dtype=bool)
    if mask.shape != (labels.n_rows,):
        raise NabInputError(f"{labels.name or 'file'}: {mask.shape[0] if mask.ndim else 0} detections for {labels.n_rows} rows")
    return mask


def score_file(labels: RowLabels, detected: Sequence[bool] | np.ndarray, profile: Profile) -> FileScore:
    """Score one file's per-row detections.

    >>> labels = label_rows(range(10), [(4, 7)], probation_fraction=0.0)
    >>> missed = score_file(labels, [False] * 10, PROFILES["reward_low_FN"])
    >>> missed.raw, missed.missed_windows
    (-2.0, 1)
    """
    det = _as_mask(labels, detected) & labels.scored
    outside = det & (labels.window < 0)
    fp_cost = profile.fp * float(labels.unit[outside].sum())
    windows = labels.scored_windows
    best = np.full(len(labels.bounds), -np.inf)
    inside = det & (labels.window >= 0)
    np.maximum.at(best, labels.window[inside], labels.unit[inside])
    hit = np.isfinite(best[windows])
    window_part = profile.tp * float(best[windows][hit].sum()) - profile.fn * int((~hit).sum())
    return FileScore(
        name=labels.name,
        raw=window_part + fp_cost,
        detected_windows=int(hit.sum()),
        missed_windows=int((~hit).sum()),
        false_positives=int(outside.sum()),
        false_positive_cost=fp_cost,
    )


def perfect_detections(labels: RowLabels) -> np.ndarray:
    """One detection at the first scored row of every scored window (the normalisation's 100)."""
    mask = np.zeros(labels.n_rows, dtype=bool)
    first_scored = labels.probationary_rows
    for w in labels.scored_windows.tolist():
        left, _ = labels.bounds[w]
        mask[max(left, first_scored)] = True
    return mask


def normalise(raw: float, null: float, perfect: float) -> float | None:
    """``100 * (raw - null) / (perfect - null)``; None when perfect equals null (no windows).

    >>> normalise(-3.0, -4.0, 4.0)
    12.5
    """
    span = perfect - null
    if span == 0:
        return None
    return 100.0 * (raw - null) / span


def _null_score(labels: RowLabels, profile: Profile) -> float:
    return -profile.fn * int(labels.scored_windows.size)


def score_corpus(
    labels: Sequence[RowLabels], detections: Sequence[Sequence[bool] | np.ndarray], profile: Profile
) -> CorpusScore:
    """Score per-row detections over many files and normalise the sum.

    >>> a = label_rows(range(20), [(10, 14)])
    >>> b = label_rows(range(20), [])
    >>> never = [[False] * 20, [False] * 20]
    >>> score_corpus([a, b], never, PROFILES["standard"]).normalised
    0.0
    >>> score_corpus([a, b], [perfect_detections(a), perfect_detections(b)], PROFILES["standard"]).normalised
    100.0
    """
    if len(labels) != len(detections):
        raise NabInputError(f"{len(detections)} detection series for {len(labels)} files")
    files = tuple(score_file(lab, det, profile) for lab, det in zip(labels, detections))
    raw = sum(f.raw for f in files)
    null = sum(_null_score(lab, profile) for lab in labels)
    perfect = sum(score_file(lab, perfect_detections(lab), profile).raw for lab in labels)
    return CorpusScore(profile.name, raw, null, perfect, normalise(raw, null, perfect), files)


def best_threshold(
    labels: Sequence[RowLabels], scores: Sequence[Sequence[float] | np.ndarray], profile: Profile
) -> ThresholdChoice:
    """The threshold on per-row scores that maximises the corpus score.

    Exact, as the reference scorer's optimiser: every distinct score over the whole
    corpus is a candidate (rows with ``score >= threshold`` detect), plus "detect
    nothing" (``inf``). Rows are visited once in descending score order while the
    corpus total is updated incrementally, so the cost is one sort. On equal totals
    the higher threshold wins.

    >>> labels = [label_rows(range(20), [(10, 14)])]
    >>> scores = [[0.1] * 20]
    >>> scores[0][10] = 0.9                      # the window's first row stands out
    >>> choice = best_threshold(labels, scores, PROFILES["standard"])
    >>> choice.threshold, choice.normalised
    (0.9, 100.0)
    """
    if len(labels) != len(scores):
        raise NabInputError(f"{len(scores)} score series for {len(labels)} files")
    parts_s, parts_w, parts_u = [], [], []
    offset = 0
    for lab, sc in zip(labels, scores):
        arr = np.asarray(sc, dtype=np.float64)
        if arr.shape != (lab.n_rows,):
            raise NabInputError(f"{lab.name or 'file'}: {arr.size} scores for {lab.n_rows} rows")
        if np.isnan(arr).any():
            raise NabInputError(f"{lab.name or 'file'}: scores contain NaN")
        keep = lab.scored
        parts_s.append(arr[keep])
        # Give every window a corpus-wide id so windows of different files stay apart.
        parts_w.append(np.where(lab.window[keep] >= 0, lab.window[keep] + offset, -1))
        parts_u.append(lab.unit[keep])
        offset += len(lab.bounds)
    s = np.concatenate(parts_s) if parts_s else np.empty(0)
    w = np.concatenate(parts_w) if parts_w else np.empty(0, dtype=np.int64)
    u = np.concatenate(parts_u) if parts_u else np.empty(0)

    null = sum(_null_score(lab, profile) for lab in labels)
    perfect = sum(score_file(lab, perfect_detections(lab), profile).raw for lab in labels)
    if s.size == 0:
        return ThresholdChoice(profile.name, math.inf, null, normalise(null, null, perfect))

    order = np.argsort(-s, kind="stable")
    s, w, u = s[order], w[order], u[order]
    outside = w < 0
    # Each row's change of the corpus total when it starts to detect: an outside row
    # adds its FP cost; an inside row matters only if it beats its window's best so
    # far (the first one also cancels the window's FN cost).
    delta = np.where(outside, profile.fp * u, 0.0)
    best: dict[int, float] = {}
    for pos in np.flatnonzero(~outside).tolist():
        win, val = int(w[pos]), float(u[pos])
        prev = best.get(win)
        if prev is None:
            best[win] = val
            delta[pos] = profile.tp * val + profile.fn
        elif val > prev:
            best[win] = val
            delta[pos] = profile.tp * (val - prev)
    totals = null + np.cumsum(delta)
    # Only the last row of a run of equal scores is a reachable threshold.
    ends = np.flatnonzero(np.append(s[1:] != s[:-1], True))
    k = int(np.argmax(totals[ends]))  # first maximum: the highest threshold
    raw, threshold = float(totals[ends[k]]), float(s[ends[k]])
    if raw <= null:
        raw, threshold = null, math.inf
    return ThresholdChoice(profile.name, threshold, raw, normalise(raw, null, perfect))


def load_windows(path: str | os.PathLike[str]) -> dict[str, list[tuple[float, float]]]:
    """Read a ``windows.json``: file name -> list of ``[start, end]`` timestamps.

    Timestamps carry no zone and are taken as UTC (the benchmark's convention);
    they are returned as epoch seconds.
    """
    try:
        with open(path, encoding="utf-8") as fh:
            data: Any = json.load(fh)
    except (OSError, ValueError) as exc:
        raise NabInputError(f"{path}: cannot read the windows file: {exc}") from exc
    if not isinstance(data, dict):
        raise NabInputError(f"{path}: expected an object of file name -> windows")
    out: dict[str, list[tuple[float, float]]] = {}
    for name, pairs in data.items():
        try:
            out[name] = [(parse_rfc3339(str(a)), parse_rfc3339(str(b))) for a, b in pairs]
        except (TypeError, ValueError) as exc:
            raise NabInputError(f"{path}: {name}: windows must be [start, end] timestamp pairs ({exc})") from exc
    return out
