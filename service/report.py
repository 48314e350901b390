"""The backtest report: one self-contained HTML file to read before letting scores alert anyone.

``tidewatch replay INPUT --output SCORES --report report.html [--labels FILE]`` ends by
calling :func:`write_report`, which re-reads the score file (and, when the input is a
file, the input, to plot each service's window means) and writes one HTML file with

* a summary table, one row per service, ordered by how much it alerted (alert onsets,
  then flagged windows): windows scored, flagged windows, alert onsets and, when labels
  are given, incidents caught, detection delay and false alert onsets;
* a table of the labelled incidents and whether and how soon each was flagged;
* per service, in the same order: the score over time with the threshold line, flagged
  windows shaded and labelled incidents drawn as bands, and below it one small plot per
  metric (the window means) on the same time axis.

The file needs nothing else: no scripts, fonts, images or style sheets from anywhere,
and its Content-Security-Policy forbids the browser to fetch any. Plots are inline SVG
drawn here; long series are thinned per pixel column to the smallest and largest value
(so a one-window spike stays visible) with at most ``max_points`` points per line.

The numbers come from :mod:`service.backtest`: an *alert onset* is a flagged window
whose previous window was not flagged; an incident is *caught* when a flagged window
starts inside it (or in the window just before its onset); the *detection delay* is
counted in windows from the window holding the onset; an onset that overlaps no
labelled incident (nor the three windows after one) is a *false alert onset*.

Examples
--------
>>> scores = [{"service": "api", "window_start": f"2026-03-02T00:{m:02d}:00Z",
...            "window_end": f"2026-03-02T00:{m + 5:02d}:00Z", "score": s, "anomalous": s >= 0.99,
...            "threshold": 0.99, "warming_up": False}
...           for m, s in zip(range(0, 30, 5), [0.1, 0.2, 0.995, 0.999, 0.3, 0.2])]
>>> [row] = summarize(scores)
>>> row.windows, row.flagged, row.onsets, row.caught
(6, 2, 1, None)
>>> report = render_report(scores, generated_at=0.0)
>>> report.plots, report.html.startswith("<!DOCTYPE html>")
(1, True)
"""

from __future__ import annotations

import dataclasses
import html
import math
import os
import statistics
import time
from collections import defaultdict
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import orjson

from service.backtest import IncidentResult, Onset, alert_onsets, match_incidents
from service.decode import NativeDecoder, Rejected
from service.errors import TidewatchError
from service.labels import read_labels
from service.progress import Progress
from service.timefmt import format_duration, format_rfc3339, parse_rfc3339

__all__ = [
    "PALETTE",
    "Report",
    "ReportError",
    "ServiceSummary",
    "read_score_file",
    "render_report",
    "summarize",
    "window_means",
    "write_report",
]


class ReportError(TidewatchError):
    """The report cannot be built: a score file is unreadable or malformed, or the output refused a write."""


# Okabe & Ito (2008), "Color Universal Design": eight colours chosen to stay distinct for the
# common colour-vision deficiencies (hex values from memory). Marks also differ by more than
# colour (line vs dashed line vs shading vs a labelled bar), so the plots survive greyscale.
PALETTE: Mapping[str, str] = {
    "score": "#0072B2",  # blue
    "threshold": "#D55E00",  # vermillion
    "flagged": "#E69F00",  # orange
    "incident": "#CC79A7",  # reddish purple
    "metric": "#333333",
    "warm_up": "#BBBBBB",
    "grid": "#E4E4E4",
    "axis": "#555555",
}

_READ_HINT = 1 << 20  # bytes per batch when re-reading the input, as the replay reads it
_GAP_FACTOR = 1.5  # consecutive windows further apart than this many lengths break a line
_FALSE_ONSET_GRACE = 3  # windows after an incident's end in which an onset still counts as about it


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True, slots=True)
class _Scored:
    start: float
    end: float
    score: float
    anomalous: bool
    threshold: float
    warming_up: bool
    contributors: tuple[str, ...]  # metrics of the top contributors, most deviating first


def _score_row(msg: object, where: str) -> tuple[str, _Scored]:
    if not isinstance(msg, Mapping):
        raise ReportError(f"{where}: a score message must be a JSON object")
    try:
        service = msg["service"]
        start = parse_rfc3339(msg["window_start"])
        end = parse_rfc3339(msg["window_end"])
        score = float(msg["score"])
        anomalous = bool(msg["anomalous"])
        threshold = float(msg.get("threshold", math.nan))
        warming = bool(msg.get("warming_up", False))
        contributors = tuple(str(c["metric"]) for c in (msg.get("contributors") or ())[:3])
    except KeyError as exc:
        raise ReportError(f"{where}: the score message has no {exc.args[0]!r} field") from None
    except (TypeError, ValueError) as exc:
        raise ReportError(f"{where}: unreadable score message: {exc}") from None
    if not isinstance(service, str) or not service:
        raise ReportError(f"{where}: 'service' must be a non-empty string")
    if not (end > start and math.isfinite(score)):
        raise ReportError(f"{where}: window_end must be after window_start and score finite")
    return service, _Scored(start, end, score, anomalous, threshold, warming, contributors)


def read_score_file(path: str | os.PathLike) -> list[dict]:
    """Read a score file (JSON lines) with errors that name the line.

    >>> import pathlib, tempfile
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "scores.jsonl"
    >>> _ = p.write_text('{"service": "api"}\\nnot json\\n')
    >>> try:
    ...     read_score_file(p)
    ... except ReportError as exc:
    ...     print(str(exc).split(": ")[1])
    line 2
    """
    out = []
    try:
        with open(path, "rb") as fh:
            for number, raw in enumerate(fh, start=1):
                if not raw.strip():
                    continue
                try:
                    out.append(orjson.loads(raw))
                except orjson.JSONDecodeError as exc:
                    raise ReportError(f"{os.fspath(path)}: line {number}: not JSON: {exc}") from None
    except OSError as exc:
        raise ReportError(f"{os.fspath(path)}: cannot read the score file: {exc.strerror or exc}") from None
    return out


def _group_scores(scores: Iterable[Mapping]) -> dict[str, list[_Scored]]:
    by_service: dict[str, dict[float, _Scored]] = defaultdict(dict)
    for i, msg in enumerate(scores, start=1):
        service, row = _score_row(msg, f"score message {i}")
        # a later message for the same window wins (a resumed run may have written it twice)
        by_service[service][row.start] = row
    return {svc: [rows[k] for k in sorted(rows)] for svc, rows in by_service.items()}


def window_means(path: str | os.PathLike, windows: Mapping[str, float], decoder: NativeDecoder | None = None,
                 progress: Progress | None = None) -> Iterator[tuple[str, float, dict[str, float]]]:
    """Per-window means of each metric, recomputed from a native JSON-lines input file.

    Only services in ``windows`` (service -> window length in seconds) are read; windows are
    aligned to multiples of their length since the epoch, as the runtime aligns them. Lines
    the decoder rejects are skipped; unlike the runtime, late events are counted in (the
    plot shows what the service reported, not what arrived in time). Yields
    ``(service, window_start, {metric: mean})`` in service, then time order. ``progress`` is
    advanced by the bytes read, once per batch of lines.

    >>> import pathlib, tempfile
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "in.jsonl"
    >>> _ = p.write_text('{"service": "a", "ts": 1772409600, "metrics": {"x": 1}}\\n'
    ...                  '{"service": "a", "ts": 1772409660, "metrics": {"x": 3}}\\n'
    ...                  '{"service": "a", "ts": 1772409900, "metrics": {"x": 7}}\\nbroken\\n')
    >>> list(window_means(p, {"a": 300.0}))
    [('a', 1772409600.0, {'x': 2.0}), ('a', 1772409900.0, {'x': 7.0})]
    """
    dec = decoder or NativeDecoder(max_future_skew=float("inf"))
    sums: dict[tuple[str, float], dict[str, list[float]]] = {}
    try:
        with open(path, "rb") as fh:
            while batch := fh.readlines(_READ_HINT):
                if progress is not None:
                    progress.advance(sum(map(len, batch)))
                for raw in batch:
                    try:
                        service, ts, metrics = dec.decode(raw.rstrip(b"\r\n"))
                    except Rejected:
                        continue
                    length = windows.get(service)
                    if length is None:
                        continue
                    key = (service, ts - ts % length)
                    acc = sums.get(key)
                    if acc is None:
                        acc = sums[key] = {}
                    for name, value in metrics.items():
                        slot = acc.get(name)
                        if slot is None:
                            acc[name] = [float(value), 1.0]
                        else:
                            slot[0] += value
                            slot[1] += 1.0
    except OSError as exc:
        raise ReportError(f"{os.fspath(path)}: cannot read the input file: {exc.strerror or exc}") from None
    for key in sorted(sums):
        yield key[0], key[1], {name: s / n for name, (s, n) in sums[key].items()}


# --------------------------------------------------------------------------- summary numbers


@dataclass(frozen=True, slots=True)
class ServiceSummary:
    """The summary-table row of one service.

    ``incidents``, ``caught`` and ``false_onsets`` are None when no labels were given;
    ``delays`` holds the detection delay, in windows, of each caught incident.
    """

    service: str
    window: float
    windows: int
    warming_up: int
    flagged: int
    onsets: int
    incidents: int | None = None
    caught: int | None = None
    delays: tuple[int, ...] = ()
    false_onsets: int | None = None

    @property
    def sort_key(self) -> tuple:
        """Most alerting first: alert onsets, then flagged windows, then the name."""
        return (-self.onsets, -self.flagged, self.service)


def _as_backtest_rows(svc: str, rows: Sequence[_Scored]) -> list[dict]:
    # service.backtest reads score messages; only the fields it uses are rebuilt
    return [{"service": svc, "window_start": format_rfc3339(r.start), "anomalous": r.anomalous,
             "contributors": [{"metric": m} for m in r.contributors]} for r in rows]


def _window_length(rows: Sequence[_Scored]) -> float:
    return statistics.median_low([r.end - r.start for r in rows])


@dataclass(frozen=True, slots=True)
class _Analysis:
    """Everything the page is drawn from, computed once."""

    grouped: Mapping[str, list[_Scored]]
    labels: Sequence[object] | None
    summaries: list[ServiceSummary]
    results: list[IncidentResult]
    onsets: Mapping[str, list[Onset]]


def _analyse(grouped: Mapping[str, list[_Scored]], labels: Sequence[object] | None) -> _Analysis:
    out: list[ServiceSummary] = []
    results: list[IncidentResult] = []
    onsets_by: dict[str, list[Onset]] = {}
    by_service: dict[str, list[object]] = defaultdict(list)
    for lab in labels or ():
        by_service[lab.service].append(lab)  # type: ignore[attr-defined]
    for svc, rows in grouped.items():
        msgs = _as_backtest_rows(svc, rows)
        window = _window_length(rows)
        onsets = onsets_by[svc] = alert_onsets(msgs)
        row = ServiceSummary(
            service=svc, window=window, windows=len(rows), warming_up=sum(r.warming_up for r in rows),
            flagged=sum(r.anomalous for r in rows), onsets=len(onsets),
        )
        if labels is not None:
            res, false = match_incidents(msgs, by_service.get(svc, []), window, grace=_FALSE_ONSET_GRACE)
            results.extend(res)
            row = dataclasses.replace(
                row, incidents=len(res), caught=sum(r.caught for r in res),
                delays=tuple(r.delay_windows for r in res if r.delay_windows is not None),
                false_onsets=len(false),
            )
        out.append(row)
    out.sort(key=lambda s: s.sort_key)
    results.sort(key=lambda r: (r.incident.start, r.incident.service))  # type: ignore[attr-defined]
    return _Analysis(grouped, labels, out, results, onsets_by)


def summarize(scores: Iterable[Mapping], labels: Sequence[object] | None = None) -> list[ServiceSummary]:
    """The summary-table rows, most alerting service first.

    ``labels`` are :class:`~service.labels.Label` (or anything with ``service``, ``start``,
    ``end``, ``metric``); None means "no labels" (the incident columns stay empty), while an
    empty list means "no incidents happened", so every alert onset is a false one.

    >>> w = lambda m, a: {"service": "db", "window_start": f"2026-03-02T01:{m:02d}:00Z",
    ...                   "window_end": f"2026-03-02T01:{m + 1:02d}:00Z", "score": 0.5, "anomalous": a}
    >>> summarize([w(0, True), w(1, False), w(2, True)], labels=[])[0].false_onsets
    2
    """
    return _analyse(_group_scores(scores), labels).summaries


# --------------------------------------------------------------------------- formatting


def _utc(ts: float) -> datetime:
    return datetime.fromtimestamp(ts, tz=timezone.utc)


def _when(ts: float) -> str:
    return _utc(ts).strftime("%a %d %b %Y %H:%M UTC")


def _span(seconds: float) -> str:
    if 0 < seconds < 60:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 2 * 86400:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} d"


def _delay_one(windows: float, window: float) -> str:
    return "at onset" if windows == 0 else _span(windows * window)


def _delay_text(delays: Sequence[int], window: float) -> str:
    """``at onset`` / ``25 min (5 w)`` for one incident; median and worst for several."""
    if not delays:
        return "–"
    if len(delays) == 1:
        return _delay_one(delays[0], window) + (f" ({delays[0]} w)" if delays[0] else "")
    return f"median {_delay_one(statistics.median(delays), window)}, worst {_delay_one(max(delays), window)}"


def _num(v: float) -> str:
    """Compact axis numbers: 0.25, 12, 1.5k, 2.3M."""
    a = abs(v)
    if a >= 1e9:
        return f"{v / 1e9:.3g}G"
    if a >= 1e6:
        return f"{v / 1e6:.3g}M"
    if a >= 1e4:
        return f"{v / 1e3:.3g}k"
    if a == 0:
        return "0"
    return f"{v:.4g}"


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


# --------------------------------------------------------------------------- plotting

# SVG geometry, in viewBox units (the plots scale with the page; at full width 1 unit = 1 px)
_W = 1000
_ML, _MR = 64, 14  # left room for y labels, right margin
_PW = _W - _ML - _MR
_LANE_ROW = 15  # one row of the incident lane above the score plot
_CHAR_W = 7.6  # rough width of a lane label character, to keep labels from overlapping
_SCORE_H = 150
_METRIC_H = 58
_AXIS_H = 34  # room for two-line UTC tick labels
_TITLE_H = 17

_TIME_STEPS = (60, 300, 600, 900, 1800, 3600, 2 * 3600, 3 * 3600, 6 * 3600, 12 * 3600, 86400, 2 * 86400,
               7 * 86400, 14 * 86400, 28 * 86400)


@dataclass(frozen=True, slots=True)
class _TimeAxis:
    t0: float
    t1: float
    step: float
    ticks: tuple[float, ...]

    def x(self, t):
        return _ML + (np.asarray(t, dtype=float) - self.t0) * (_PW / (self.t1 - self.t0))

    def xs(self, t: float) -> float:
        return _ML + (t - self.t0) * (_PW / (self.t1 - self.t0))


def _time_axis(t0: float, t1: float, max_ticks: int = 9) -> _TimeAxis:
    if not t1 > t0:
        t1 = t0 + 60.0
    span = t1 - t0
    step = next((s for s in _TIME_STEPS if span / s <= max_ticks), _TIME_STEPS[-1])
    first = math.ceil(t0 / step) * step
    ticks = tuple(float(t) for t in np.arange(first, t1 + 1e-9, step))
    return _TimeAxis(t0, t1, float(step), ticks)


def _tick_text(t: float, step: float, first: bool) -> tuple[str, str]:
    """Tick label: the time of day, and under it the date at midnight and at the first tick."""
    d = _utc(t)
    day = d.strftime("%a %d %b")
    if step >= 86400:
        return day, ""
    return d.strftime("%H:%M"), (day if first or (d.hour, d.minute) == (0, 0) else "")


def _nice_ticks(lo: float, hi: float, n: int = 3) -> tuple[float, float, list[float]]:
    """A padded y range and 'nice' (1, 2, 5 x 10^k) ticks inside it."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = 0.0, 1.0
    if hi - lo < 1e-12 * max(1.0, abs(hi)):
        pad = abs(hi) * 0.05 or 1.0  # a flat line (a stuck metric) sits mid-panel
        lo, hi = lo - pad, hi + pad
    raw = (hi - lo) / n
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    lo2, hi2 = math.floor(lo / step) * step, math.ceil(hi / step) * step
    ticks = [lo2 + i * step for i in range(int(round((hi2 - lo2) / step)) + 1)]
    return lo2, hi2, [0.0 if abs(t) < step * 1e-9 else t for t in ticks]


def _thin(t: np.ndarray, y: np.ndarray, max_points: int, t0: float, t1: float) -> np.ndarray:
    """Indices to draw: per time bucket the smallest and largest value, in time order."""
    n = t.size
    if n <= max_points:
        return np.arange(n)
    buckets = max(1, (max_points - 2) // 2)  # two points per bucket, plus the first and the last
    b = np.minimum(((t - t0) / (t1 - t0) * buckets).astype(np.int64), buckets - 1)
    # sort by (bucket, value): the first and last of each bucket are its min and max
    order = np.lexsort((y, b))
    bs = b[order]
    starts = np.flatnonzero(np.r_[True, bs[1:] != bs[:-1]])
    ends = np.r_[starts[1:], bs.size] - 1
    keep = np.unique(np.r_[order[starts], order[ends], 0, n - 1])
    return keep


def _path(xs: np.ndarray, ys: np.ndarray, breaks: np.ndarray) -> str:
    """An SVG path through the points, lifting the pen where ``breaks`` is True."""
    parts = []
    n = xs.size
    for i, (x, y) in enumerate(zip(xs.tolist(), ys.tolist())):
        if i == 0 or breaks[i]:
            # a window alone between gaps is a zero-length stroke, drawn as a dot by the round cap
            parts.append(f"M{x:.1f} {y:.1f}" + ("h0" if i + 1 == n or breaks[i + 1] else ""))
        else:
            parts.append(f"L{x:.1f} {y:.1f}")
    return "".join(parts)


def _line(ax: _TimeAxis, t: np.ndarray, y: np.ndarray, ymap, window: float, max_points: int,
          colour: str, width: float = 1.3) -> str:
    if t.size == 0:
        return ""
    seg = np.cumsum(np.r_[False, np.diff(t) > _GAP_FACTOR * window])
    keep = _thin(t, y, max_points, ax.t0, ax.t1)
    tk, yk, sk = t[keep], y[keep], seg[keep]
    breaks = np.r_[True, sk[1:] != sk[:-1]]
    d = _path(ax.x(tk), ymap(yk), breaks)
    return (f'<path d="{d}" fill="none" stroke="{colour}" stroke-width="{width}" '
            f'stroke-linejoin="round" stroke-linecap="round"/>')


def _runs(starts: np.ndarray, ends: np.ndarray, flags: np.ndarray) -> list[tuple[int, int]]:
    """Index ranges [i, j] of consecutive flagged windows (adjacent in time)."""
    out: list[tuple[int, int]] = []
    i = None
    for k in range(flags.size):
        if flags[k] and i is not None and starts[k] <= ends[k - 1] + 1e-6:
            continue
        if i is not None:
            out.append((i, k - 1))
            i = None
        if flags[k]:
            i = k
    if i is not None:
        out.append((i, flags.size - 1))
    return out


def _vgrid(ax: _TimeAxis, top: float, bottom: float) -> str:
    g = PALETTE["grid"]
    return "".join(f'<line x1="{ax.xs(t):.1f}" x2="{ax.xs(t):.1f}" y1="{top}" y2="{bottom}" stroke="{g}"/>'
                   for t in ax.ticks)


def _xlabels(ax: _TimeAxis, y: float) -> str:
    out = []
    for i, t in enumerate(ax.ticks):
        x = ax.xs(t)
        a, b = _tick_text(t, ax.step, i == 0)
        # labels at the very edges are anchored inwards so they stay inside the plot's width
        anchor = "start" if x - _ML < 30 else "end" if _ML + _PW - x < 30 else "middle"
        out.append(f'<text x="{x:.1f}" y="{y + 13}" text-anchor="{anchor}">{_e(a)}</text>')
        if b and ax.step < 86400:
            out.append(f'<text x="{x:.1f}" y="{y + 27}" text-anchor="{anchor}" class="day">{_e(b)}</text>')
    out.append(f'<text x="{_ML - 8}" y="{y + 13}" text-anchor="end" class="unit">UTC</text>')
    return "".join(out)


def _bands(ax: _TimeAxis, spans: Iterable[tuple[float, float, str]], top: float, bottom: float,
           colour: str, opacity: float, min_w: float = 2.0) -> str:
    out = []
    for a, b, tip in spans:
        a, b = max(a, ax.t0), min(b, ax.t1)
        if b <= a:
            continue
        x0 = ax.xs(a)
        w = max(min_w, ax.xs(b) - x0)
        out.append(f'<rect x="{x0:.1f}" y="{top:.1f}" width="{w:.1f}" height="{bottom - top:.1f}" fill="{colour}" '
                   f'fill-opacity="{opacity}"><title>{_e(tip)}</title></rect>')
    return "".join(out)


def _score_y(score: np.ndarray | float, top_level: float, y_top: float, y_bottom: float):
    """Score axis stretched near 1: height grows with -log10(1 - score), so 0.9, 0.99 and
    0.999 are evenly spaced and a threshold of 0.99 sits well inside the plot."""
    s = np.clip(np.asarray(score, dtype=float), 0.0, 1.0)
    level = -np.log10(np.maximum(1.0 - s, 10.0 ** -top_level))
    return y_bottom - level / top_level * (y_bottom - y_top)


@dataclass
class _ServiceData:
    name: str
    rows: list[_Scored]
    summary: ServiceSummary
    incidents: list[object] = field(default_factory=list)
    metrics: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    onset_metrics: dict[str, int] = field(default_factory=dict)


def _incident_tip(inc: object) -> str:
    kind = getattr(inc, "kind", None) or "labelled incident"
    metric = getattr(inc, "metric", None)
    note = getattr(inc, "note", None) or getattr(inc, "description", None)
    tip = f"{kind}{' on ' + metric if metric else ''}: {_when(inc.start)} – {_when(inc.end)}"  # type: ignore[attr-defined]
    return tip + (f". {note}" if note else "")


def _flag_spans(d: _ServiceData) -> list[tuple[float, float, str]]:
    starts = np.array([r.start for r in d.rows])
    ends = np.array([r.end for r in d.rows])
    flags = np.array([r.anomalous for r in d.rows], dtype=bool)
    spans = []
    for i, j in _runs(starts, ends, flags):
        n = j - i + 1
        peak = max(d.rows[k].score for k in range(i, j + 1))
        spans.append((float(starts[i]), float(ends[j]),
                      f"flagged: {n} window{'s' if n != 1 else ''} from {_when(starts[i])}, highest score {peak:.4f}"))
    return spans


def _lane_layout(ax: _TimeAxis, incidents: Sequence[object]) -> list[tuple[object, float, float, int, float, str]]:
    """Place each incident's bar and label in the first lane row where it overlaps nothing.

    Returns ``(incident, x0, x1, row, label_x, label_anchor)``; the label goes right of the
    bar, or left of it when there is no room before the plot's right edge.
    """
    placed: list[list[tuple[float, float]]] = []
    out = []
    for inc in sorted(incidents, key=lambda i: (i.start, i.end)):  # type: ignore[attr-defined]
        a, b = max(inc.start, ax.t0), min(inc.end, ax.t1)  # type: ignore[attr-defined]
        if b <= a:
            continue
        x0 = ax.xs(a)
        x1 = max(ax.xs(b), x0 + 3.0)
        width = _CHAR_W * len(getattr(inc, "kind", None) or "incident")
        if x1 + 4 + width <= _ML + _PW:
            extent, label_x, anchor = (x0, x1 + 4 + width), x1 + 4, "start"
        else:
            extent, label_x, anchor = (x0 - 4 - width, x1), x0 - 4, "end"
        for row, items in enumerate(placed):
            if all(extent[0] > hi + 6 or extent[1] < lo - 6 for lo, hi in items):
                items.append(extent)
                break
        else:
            row = len(placed)
            placed.append([extent])
        out.append((inc, x0, x1, row, label_x, anchor))
    return out


def _score_svg(d: _ServiceData, ax: _TimeAxis, max_points: int) -> str:
    rows = d.rows
    window = d.summary.window
    lane = _lane_layout(ax, d.incidents)
    lane_rows = max((item[3] for item in lane), default=-1) + 1
    y_top = 8 + lane_rows * _LANE_ROW
    y_bot = y_top + _SCORE_H
    height = y_bot + _AXIS_H
    thresholds = [r.threshold for r in rows if math.isfinite(r.threshold)]
    top_level = 3.0
    if thresholds:
        top_level = min(4.0, max(3.0, math.ceil(-math.log10(max(1.0 - max(thresholds), 1e-4)) + 1.0)))
    ymap = lambda s: _score_y(s, top_level, y_top, y_bot)  # noqa: E731
    parts = [
        f'<svg class="plot plot-score" data-service="{_e(d.name)}" data-plot="score" viewBox="0 0 {_W} {height}" '
        f'role="img" aria-label="{_e(f"score over time for {d.name}, with threshold, flagged windows and labelled incidents")}">',
        f'<rect x="{_ML}" y="{y_top}" width="{_PW}" height="{_SCORE_H}" fill="#fff" stroke="{PALETTE["axis"]}" stroke-width="0.6"/>',
    ]
    # warm-up: the model only learns, so it never flags there
    warm = [r for r in rows if r.warming_up]
    if warm:
        parts.append(_bands(ax, [(warm[0].start, warm[-1].end, f"warm-up: {len(warm)} windows in which the model only learned")],
                            y_top, y_bot, PALETTE["warm_up"], 0.28))
        xw0, xw1 = ax.xs(max(warm[0].start, ax.t0)), ax.xs(min(warm[-1].end, ax.t1))
        if xw1 - xw0 > 90:
            parts.append(f'<text x="{(xw0 + xw1) / 2:.1f}" y="{y_top + 16}" text-anchor="middle" class="note">'
                         f'warm-up: learning only, never flags</text>')
    # horizontal grid at 0, 0.9, 0.99, ...
    for k in range(int(top_level) + 1):
        value = 1.0 - 10.0 ** -k if k else 0.0
        y = float(ymap(value))
        parts.append(f'<line x1="{_ML}" x2="{_ML + _PW}" y1="{y:.1f}" y2="{y:.1f}" stroke="{PALETTE["grid"]}"/>')
        label = "0" if k == 0 else "0." + "9" * k
        parts.append(f'<text x="{_ML - 6}" y="{y + 4:.1f}" text-anchor="end">{label}</text>')
    parts.append(_vgrid(ax, y_top, y_bot))
    # labelled incidents: a light band over the plot and a solid bar, with its kind, in the lane above
    inc_spans = [(inc.start, inc.end, _incident_tip(inc)) for inc in d.incidents]  # type: ignore[attr-defined]
    parts.append(_bands(ax, inc_spans, y_top, y_bot, PALETTE["incident"], 0.16))
    for inc, x0, x1, row, label_x, anchor in lane:
        y = 5 + row * _LANE_ROW
        parts.append(f'<rect x="{x0:.1f}" y="{y}" width="{x1 - x0:.1f}" height="{_LANE_ROW - 5}" '
                     f'fill="{PALETTE["incident"]}"><title>{_e(_incident_tip(inc))}</title></rect>')
        parts.append(f'<text x="{label_x:.1f}" y="{y + _LANE_ROW - 6}" text-anchor="{anchor}" class="lane">'
                     f'{_e(getattr(inc, "kind", None) or "incident")}</text>')
    # flagged windows
    parts.append(_bands(ax, _flag_spans(d), y_top, y_bot, PALETTE["flagged"], 0.45))
    # threshold: a step line, since a config change may move it
    th_t = np.array([r.start for r in rows if math.isfinite(r.threshold)])
    th_v = np.array(thresholds)
    if th_t.size:
        change = np.flatnonzero(np.r_[True, th_v[1:] != th_v[:-1]])
        for n, i in enumerate(change.tolist()):
            a = max(float(th_t[i]), ax.t0) if n else ax.t0
            b = float(th_t[change[n + 1]]) if n + 1 < change.size else ax.t1
            y = float(ymap(th_v[i]))
            parts.append(f'<line x1="{ax.xs(a):.1f}" x2="{ax.xs(b):.1f}" y1="{y:.1f}" y2="{y:.1f}" '
                         f'stroke="{PALETTE["threshold"]}" stroke-width="1.6" stroke-dasharray="7 4"/>')
        parts.append(f'<text x="{_ML + _PW - 4}" y="{float(ymap(th_v[-1])) - 5:.1f}" text-anchor="end" '
                     f'class="thr">threshold {th_v[-1]:g}</text>')
    # the score, without the warm-up windows (they are all 0 and say nothing)
    live = [r for r in rows if not r.warming_up]
    t = np.array([r.start + (r.end - r.start) / 2 for r in live])
    s = np.array([r.score for r in live])
    parts.append(_line(ax, t, s, ymap, window, max_points, PALETTE["score"], 1.2))
    parts.append(f'<text x="14" y="{(y_top + y_bot) / 2:.1f}" transform="rotate(-90 14 {(y_top + y_bot) / 2:.1f})" '
                 f'text-anchor="middle" class="unit">score</text>')
    parts.append(_xlabels(ax, y_bot))
    parts.append("</svg>")
    return "".join(parts)


def _metric_svg(d: _ServiceData, metric: str, ax: _TimeAxis, max_points: int, last: bool,
                flag_spans: list, inc_spans: list) -> str:
    t, v = d.metrics[metric]
    y_top = _TITLE_H + 2
    y_bot = y_top + _METRIC_H
    height = y_bot + (_AXIS_H if last else 6)
    lo, hi, ticks = _nice_ticks(float(np.min(v)), float(np.max(v)), 2)

    def ymap(vals):
        return y_bot - (np.asarray(vals, dtype=float) - lo) / (hi - lo) * (y_bot - y_top)

    named = d.onset_metrics.get(metric, 0)
    extra = f" · top contributor at {named} alert onset{'s' if named != 1 else ''}" if named else ""
    parts = [
        f'<svg class="plot plot-metric" data-service="{_e(d.name)}" data-plot="metric" data-metric="{_e(metric)}" '
        f'viewBox="0 0 {_W} {height}" role="img" aria-label="{_e(f"window mean of {metric} for {d.name}")}">',
        # tspans flow after each other, so the subtitle never overlaps a long metric name
        f'<text x="{_ML}" y="{_TITLE_H - 4}"><tspan class="title">{_e(metric)}</tspan>'
        f'<tspan class="sub" dx="8">window mean{_e(extra)}</tspan></text>',
        f'<rect x="{_ML}" y="{y_top}" width="{_PW}" height="{_METRIC_H}" fill="#fff" stroke="{PALETTE["axis"]}" stroke-width="0.6"/>',
        _bands(ax, inc_spans, y_top, y_bot, PALETTE["incident"], 0.16),
        _bands(ax, flag_spans, y_top, y_bot, PALETTE["flagged"], 0.30),
        _vgrid(ax, y_top, y_bot),
    ]
    for tick in ticks:
        y = float(ymap(tick))
        parts.append(f'<line x1="{_ML}" x2="{_ML + _PW}" y1="{y:.1f}" y2="{y:.1f}" stroke="{PALETTE["grid"]}"/>'
                     f'<text x="{_ML - 6}" y="{y + 4:.1f}" text-anchor="end">{_num(tick)}</text>')
    parts.append(_line(ax, t, v, ymap, d.summary.window, max_points, PALETTE["metric"], 1.1))
    if last:
        parts.append(_xlabels(ax, y_bot))
    parts.append("</svg>")
    return "".join(parts)


# --------------------------------------------------------------------------- page

_CSS = """
:root { color-scheme: light; }
* { box-sizing: border-box; }
body { margin: 0; background: #f6f6f4; color: #1d1d1d;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", "DejaVu Sans", sans-serif; }
main { max-width: 1080px; margin: 0 auto; padding: 24px 20px 60px; }
h1 { font-size: 26px; margin: 0 0 4px; }
h2 { font-size: 20px; margin: 34px 0 8px; border-bottom: 2px solid #d8d8d4; padding-bottom: 4px; }
h3 { font-size: 18px; margin: 0; }
p.meta { color: #555; margin: 0 0 16px; }
.box { background: #fff; border: 1px solid #dcdcd8; border-radius: 6px; padding: 12px 16px; margin: 12px 0; }
.caution { border-left: 5px solid #D55E00; }
.caution strong { color: #9a3a00; }
table { border-collapse: collapse; width: 100%; background: #fff; font-size: 14px; }
th, td { padding: 5px 8px; border-bottom: 1px solid #e4e4e0; text-align: right; vertical-align: top; }
td { white-space: nowrap; }
td.note { white-space: normal; min-width: 16em; }
th { background: #ecece8; font-weight: 600; }
th:first-child, td:first-child, td.text, th.text { text-align: left; }
tbody tr:nth-child(even) { background: #fafaf8; }
tfoot td { font-weight: 600; border-top: 2px solid #ccc; }
td.miss { color: #9a3a00; font-weight: 600; }
a { color: #005a8c; }
section.service { background: #fff; border: 1px solid #dcdcd8; border-radius: 6px; padding: 12px 14px 8px; margin: 18px 0; }
section.service p { margin: 2px 0 8px; color: #444; }
.key { display: flex; flex-wrap: wrap; gap: 6px 18px; font-size: 13px; color: #333; margin: 6px 0 2px; }
.sw { display: inline-block; width: 22px; height: 11px; vertical-align: -1px; margin-right: 5px; border-radius: 2px; }
.sw.line { height: 3px; vertical-align: 3px; }
.sw.dash { height: 0; border-top: 3px dashed #D55E00; border-radius: 0; vertical-align: 3px; }
/* below ~760 px the plots scroll sideways rather than shrink their text past legibility */
.plots { overflow-x: auto; }
svg.plot { display: block; width: 100%; min-width: 760px; height: auto; font-size: 13px; fill: #333; }
svg.plot .title { font-size: 14px; font-weight: 600; fill: #1d1d1d; }
svg.plot .sub, svg.plot .unit, svg.plot .day { fill: #666; }
svg.plot text.lane { fill: #7a2d5e; font-size: 12.5px; font-weight: 600; }
svg.plot text.note { fill: #555; font-style: italic; }
svg.plot text.thr { fill: #a84300; font-weight: 600; }
ul { margin: 6px 0; padding-left: 22px; }
code { font-size: 13px; background: #efefeb; padding: 0 3px; border-radius: 3px; }
"""


def _key_html() -> str:
    p = PALETTE
    items = [
        f'<span><span class="sw line" style="background:{p["score"]}"></span>score</span>',
        '<span><span class="sw dash"></span>threshold</span>',
        f'<span><span class="sw" style="background:{p["flagged"]};opacity:.6"></span>flagged windows</span>',
        f'<span><span class="sw" style="background:{p["incident"]}"></span>labelled incident</span>',
        f'<span><span class="sw" style="background:{p["warm_up"]};opacity:.6"></span>warm-up</span>',
        f'<span><span class="sw line" style="background:{p["metric"]}"></span>metric, mean per window</span>',
    ]
    return f'<div class="key" aria-label="key">{"".join(items)}</div>'


def _summary_table(rows: Sequence[ServiceSummary], labelled: bool, plotted: set[str]) -> str:
    head = ("<tr><th>Service</th><th>Window</th><th>Windows scored</th><th>Flagged windows</th><th>Alert onsets</th>"
            + ("<th>Incidents caught</th><th>Detection delay</th><th>False alert onsets</th>" if labelled else "")
            + "</tr>")
    body = []
    for r in rows:
        name = f'<a href="#svc-{_e(_slug(r.service))}">{_e(r.service)}</a>' if r.service in plotted else _e(r.service)
        if labelled:
            caught = f"{r.caught} of {r.incidents}" if r.incidents else "none labelled"
            miss = ' class="miss"' if r.incidents and r.caught < r.incidents else ""  # type: ignore[operator]
            cells = (f"<td{miss}>{caught}</td><td>{_delay_text(r.delays, r.window)}</td><td>{r.false_onsets}</td>")
        else:
            cells = ""
        body.append(f"<tr><td>{name}</td><td>{format_duration(r.window)}</td><td>{r.windows:,}</td>"
                    f"<td>{r.flagged:,}</td><td>{r.onsets:,}</td>{cells}</tr>")
    tot_w = sum(r.windows for r in rows)
    tot_f = sum(r.flagged for r in rows)
    tot_o = sum(r.onsets for r in rows)
    if labelled:
        inc = sum(r.incidents or 0 for r in rows)
        caught = sum(r.caught or 0 for r in rows)
        delays = [d for r in rows for d in r.delays]
        windows = {r.window for r in rows}
        delay = _delay_text(delays, windows.pop()) if len(windows) == 1 else "–"
        foot_inc = f"<td>{caught} of {inc}</td><td>{delay}</td><td>{sum(r.false_onsets or 0 for r in rows)}</td>"
    else:
        foot_inc = ""
    foot = (f"<tr><td>all {len(rows)} services</td><td></td><td>{tot_w:,}</td><td>{tot_f:,}</td><td>{tot_o:,}</td>"
            f"{foot_inc}</tr>")
    return f'<table class="summary"><thead>{head}</thead><tbody>{"".join(body)}</tbody><tfoot>{foot}</tfoot></table>'


def _incident_table(results: Sequence[IncidentResult], unscored: Sequence[object],
                    windows: Mapping[str, float]) -> str:
    head = ("<tr><th>Service</th><th class=\"text\">Kind</th><th class=\"text\">Metric</th><th class=\"text\">Start (UTC)</th>"
            "<th>Length</th><th>Caught</th><th>Delay</th><th><abbr title=\"the incident's metric was among the top 3 contributors of its first flagged window\">Metric in top 3</abbr></th><th class=\"text\">Note</th></tr>")
    body = []
    for r in results:
        inc = r.incident
        w = windows.get(inc.service, 0.0)  # type: ignore[attr-defined]
        caught = "yes" if r.caught else "NO"
        delay = _delay_text([r.delay_windows], w) if r.delay_windows is not None else "–"
        named = "–" if not r.caught or not getattr(inc, "metric", None) else ("yes" if r.metric_named else "no")
        body.append(_incident_row(inc, caught, delay, named, miss=not r.caught))
    for inc in unscored:
        body.append(_incident_row(inc, "not scored", "–", "–", miss=True))
    return f'<table class="incidents"><thead>{head}</thead><tbody>{"".join(body)}</tbody></table>'


def _incident_row(inc: object, caught: str, delay: str, named: str, *, miss: bool) -> str:
    note = getattr(inc, "note", None) or getattr(inc, "description", None) or ""
    cls = ' class="miss"' if miss else ""
    return (f"<tr><td>{_e(inc.service)}</td><td class=\"text\">{_e(getattr(inc, 'kind', None) or '–')}</td>"  # type: ignore[attr-defined]
            f"<td class=\"text\">{_e(getattr(inc, 'metric', None) or '–')}</td>"
            f"<td class=\"text\">{_e(_utc(inc.start).strftime('%a %d %b %H:%M'))}</td>"  # type: ignore[attr-defined]
            f"<td>{_span(inc.end - inc.start)}</td>"  # type: ignore[attr-defined]
            f"<td{cls}>{caught}</td><td>{delay}</td><td>{named}</td>"
            f"<td class=\"text note\">{_e(note)}</td></tr>")


def _slug(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_" else f"_{ord(c):x}" for c in name)


_HOW_TO_READ = """
<ul>
<li><strong>Score.</strong> For every window of every service the model gives a calibrated score between 0 and 1:
the fraction of that service's own recent windows that were less unusual. 0.99 means "more unusual than 99 in 100 of
its recent windows". The score axis is stretched near 1 (0.9, 0.99 and 0.999 are evenly spaced) so the region around the
threshold is readable.</li>
<li><strong>Flagged windows</strong> (orange shading) scored at or above the threshold after warm-up. An <strong>alert
onset</strong> is a flagged window whose previous window was not flagged: roughly, how often someone would have been told.</li>
<li><strong>Labelled incidents</strong> (purple bars and bands) come from the labels file. An incident is caught when a
flagged window starts inside it (or in the window just before its onset); the detection delay counts windows from the
window holding its onset. A <strong>false alert onset</strong> overlaps no labelled incident, nor the {grace} windows
after one: either a false alarm or something nobody labelled — look before you decide which.</li>
<li>Below each score plot, the <strong>metrics</strong> are drawn as the mean of each window on the same time axis, so a
flag can be traced to the metric that moved. Long series are thinned to the lowest and highest value per pixel column,
so short spikes stay visible. Hover over a band for its times.</li>
<li><strong>Warm-up</strong> (grey): a new model only learns and never flags; nothing there is judged.</li>
</ul>
"""

_CAUTION = """
<p><strong>These scores support judgment; they do not replace it.</strong> A high score says a window was unusual for
that service's recent past, not that anything was broken: launches, maintenance and migrations score high, and a slow
degradation the baseline has absorbed scores low. Keep your symptom-based alerts. Send scores to a low-urgency channel
first, and tune the threshold and warm-up from what this report shows on your own data before anything pages a person.</p>
"""


@dataclass(frozen=True, slots=True)
class Report:
    """A rendered report: the HTML text and the numbers in it.

    ``plots`` counts the SVG plots (one score plot per plotted service plus one per metric
    plotted); ``plotted`` lists the services that got plots, in page order.
    """

    html: str
    summaries: tuple[ServiceSummary, ...]
    incidents: tuple[IncidentResult, ...]
    plotted: tuple[str, ...]
    plots: int


def render_report(
    scores: Iterable[Mapping],
    *,
    metrics: Iterable[tuple[str, float, Mapping[str, float]]] | None = None,
    labels: Sequence[object] | None = None,
    title: str = "tidewatch backtest report",
    sources: Mapping[str, str] | None = None,
    notes: Sequence[str] = (),
    generated_at: float | None = None,
    max_points: int = 1500,
    max_services: int = 50,
    max_metrics: int = 12,
) -> Report:
    """Render the report from score messages, optional window means and optional labels.

    Parameters
    ----------
    scores
        Score messages (dicts as in ``config/score-message.schema.json``); only ``service``,
        ``window_start``, ``window_end``, ``score``, ``anomalous``, ``threshold`` and
        ``warming_up`` are read.
    metrics
        ``(service, window_start, {feature: value})`` per window, e.g. from :func:`window_means`;
        None leaves the metric plots out.
    labels
        Labelled incidents (:class:`~service.labels.Label` or anything with ``service``, ``start``,
        ``end``, ``metric``, ``kind``); None when there are none to compare with.
    sources
        Shown in the header, e.g. ``{"input": "metrics.jsonl", "scores": "scores.jsonl"}``.
    notes
        Extra sentences shown under the header (e.g. why metric plots are missing).
    generated_at
        Epoch seconds shown as the generation time (default: now); fix it for byte-identical output.
    max_points
        Points per drawn line at most (the plot is about 900 pixels wide).
    max_services, max_metrics
        Plots are drawn for the ``max_services`` most alerting services and at most
        ``max_metrics`` metrics each; the summary table always lists every service.

    Examples
    --------
    >>> msgs = [{"service": "api", "window_start": "2026-03-02T00:00:00Z", "window_end": "2026-03-02T00:01:00Z",
    ...          "score": 0.2, "anomalous": False, "threshold": 0.99, "warming_up": False}]
    >>> r = render_report(msgs, metrics=[("api", 1772409600.0, {"x": 1.0}, )], generated_at=0.0)
    >>> r.plots, r.plotted, r.html.count('class="plot ')
    (2, ('api',), 2)
    """
    return _render(_analyse(_group_scores(scores), labels), metrics=metrics, title=title, sources=sources,
                   notes=notes, generated_at=generated_at, max_points=max_points, max_services=max_services,
                   max_metrics=max_metrics)


def _render(an: _Analysis, *, metrics: Iterable[tuple[str, float, Mapping[str, float]]] | None, title: str,
            sources: Mapping[str, str] | None, notes: Sequence[str], generated_at: float | None,
            max_points: int, max_services: int, max_metrics: int) -> Report:
    if max_points < 4 or max_services < 0 or max_metrics < 0:
        raise ReportError("max_points must be at least 4 and max_services, max_metrics non-negative")
    grouped, summaries, results, labels = an.grouped, an.summaries, an.results, an.labels
    plotted = [s.service for s in summaries[:max_services]]
    data = {s.service: _ServiceData(s.service, grouped[s.service], s) for s in summaries[:max_services]}
    unscored = [lab for lab in labels or () if lab.service not in grouped]  # type: ignore[attr-defined]
    for lab in labels or ():
        if lab.service in data:  # type: ignore[attr-defined]
            data[lab.service].incidents.append(lab)  # type: ignore[attr-defined]
    for name, d in data.items():
        for onset in an.onsets[name]:
            if onset.top_metric is not None:
                d.onset_metrics[onset.top_metric] = d.onset_metrics.get(onset.top_metric, 0) + 1
    omitted_metrics: dict[str, list[str]] = {}
    if metrics is not None:
        acc: dict[str, dict[str, tuple[list[float], list[float]]]] = defaultdict(dict)
        for service, start, values in metrics:
            if service not in data:
                continue
            per = acc[service]
            for name, value in values.items():
                slot = per.get(name)
                if slot is None:
                    slot = per[name] = ([], [])
                slot[0].append(float(start))
                slot[1].append(float(value))
        for service, per in acc.items():
            names = list(per)
            # the metrics that drove alert onsets first, then input order
            names.sort(key=lambda m: -data[service].onset_metrics.get(m, 0))
            for name in names[:max_metrics]:
                t = np.asarray(per[name][0])
                v = np.asarray(per[name][1])
                order = np.argsort(t, kind="stable")
                w = data[service].summary.window
                data[service].metrics[name] = (t[order] + w / 2, v[order])
            if len(names) > max_metrics:
                omitted_metrics[service] = names[max_metrics:]

    all_rows = [r for rows in grouped.values() for r in rows]
    t0 = min((r.start for r in all_rows), default=0.0)
    t1 = max((r.end for r in all_rows), default=60.0)
    ax = _time_axis(t0, t1)
    labelled = labels is not None
    windows = {s.service: s.window for s in summaries}
    now = time.time() if generated_at is None else generated_at

    out: list[str] = []
    w = out.append
    w("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">")
    # the file must work offline and alone: the browser is told to fetch nothing and run nothing
    w("<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'\">")
    w('<meta name="viewport" content="width=device-width, initial-scale=1">')
    w(f"<title>{_e(title)}</title><style>{_CSS}</style></head><body><main>")
    w(f"<h1>{_e(title)}</h1>")
    src = " · ".join(f"{_e(k)}: <code>{_e(v)}</code>" for k, v in (sources or {}).items())
    w(f'<p class="meta">{_when(t0)} to {_when(t1)} ({_span(t1 - t0)}) · {len(summaries)} services · '
      f"generated {_e(format_rfc3339(float(int(now))))}{' · ' + src if src else ''}</p>")
    w(f'<div class="box caution">{_CAUTION}</div>')
    for note in notes:
        w(f'<p class="meta">{_e(note)}</p>')
    w("<h2>Summary</h2>")
    w('<p class="meta">Services that alerted most come first (alert onsets, then flagged windows).'
      + ("" if labelled else " No labels were given, so nothing here says which alerts were right: give a labels "
         "file (<code>--labels</code>) to see which incidents were caught.") + "</p>")
    if summaries:
        w(_summary_table(summaries, labelled, set(plotted)))
    else:
        w('<p class="box">The score file holds no score messages: nothing to report.</p>')
    if labelled:
        w("<h2>Labelled incidents</h2>")
        if results or unscored:
            w(_incident_table(results, unscored, windows))
        else:
            w('<p class="meta">The labels file lists no incidents.</p>')
    w('<h2>How to read this</h2><div class="box">')
    w(_HOW_TO_READ.format(grace=_FALSE_ONSET_GRACE))
    w("</div>")
    if plotted:
        w("<h2>Services</h2>")
    if len(summaries) > len(plotted):
        w(f'<p class="meta">Plots are drawn for the {len(plotted)} services that alerted most; '
          f"the other {len(summaries) - len(plotted)} are in the summary table only.</p>")
    plots = 0
    for name in plotted:
        d = data[name]
        s = d.summary
        w(f'<section class="service" id="svc-{_e(_slug(name))}"><h3>{_e(name)}</h3>')
        facts = [f"{s.windows:,} windows of {format_duration(s.window)}", f"{s.flagged:,} flagged",
                 f"{s.onsets:,} alert onset{'s' if s.onsets != 1 else ''}"]
        if labelled:
            facts.append(f"{s.caught} of {s.incidents} labelled incidents caught" if s.incidents else "no labelled incidents")
            facts.append(f"{s.false_onsets} false alert onset{'s' if s.false_onsets != 1 else ''}")
        if s.warming_up:
            facts.append(f"warm-up {s.warming_up} windows")
        w(f"<p>{_e(' · '.join(facts))}</p>")
        w(_key_html())
        w('<div class="plots">')
        w(_score_svg(d, ax, max_points))
        plots += 1
        flag_spans = _flag_spans(d)
        inc_spans = [(inc.start, inc.end, _incident_tip(inc)) for inc in d.incidents]  # type: ignore[attr-defined]
        names = list(d.metrics)
        for i, metric in enumerate(names):
            w(_metric_svg(d, metric, ax, max_points, i == len(names) - 1, flag_spans, inc_spans))
            plots += 1
        w("</div>")
        if name in omitted_metrics:
            w(f"<p>Not plotted (more than {max_metrics} metrics): {_e(', '.join(omitted_metrics[name]))}</p>")
        if metrics is not None and not names:
            w("<p>No metric values found for this service in the input.</p>")
        w("</section>")
    w("</main></body></html>\n")
    return Report("".join(out), tuple(summaries), tuple(results), tuple(plotted), plots)


def write_report(
    path: str | os.PathLike,
    scores_path: str | os.PathLike,
    *,
    input_path: str | os.PathLike | None = None,
    labels_path: str | os.PathLike | None = None,
    labels: Sequence[object] | None = None,
    title: str = "tidewatch backtest report",
    generated_at: float | None = None,
    progress: Progress | None = None,
    **options: int,
) -> Report:
    """Build the report from files and write it to ``path`` (atomically: temp file, then rename).

    ``input_path`` is the replay's input (native JSON lines) for the metric plots; None or
    ``"-"`` leaves them out. Labels come from ``labels_path`` (see :mod:`service.labels`) or
    ``labels``. ``options`` are ``max_points``, ``max_services`` and ``max_metrics`` of
    :func:`render_report`. ``progress`` (e.g. ``Progress.for_input(input_path, label="report")``)
    is advanced while the input is read again, and finished at the end.

    >>> import pathlib, tempfile
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> _ = (d / "s.jsonl").write_text('{"service": "api", "window_start": "2026-03-02T00:00:00Z", '
    ...     '"window_end": "2026-03-02T00:05:00Z", "score": 0.3, "anomalous": false}\\n')
    >>> write_report(d / "r.html", d / "s.jsonl").plots
    1
    """
    if labels_path is not None:
        labels = read_labels(labels_path)
    opts = {"max_points": 1500, "max_services": 50, "max_metrics": 12}
    unknown = set(options) - set(opts)
    if unknown:
        raise TypeError(f"write_report() got unexpected option(s): {', '.join(sorted(unknown))}")
    opts.update(options)
    an = _analyse(_group_scores(read_score_file(scores_path)), labels)
    sources = {"scores": os.fspath(scores_path)}
    notes: list[str] = []
    metrics = None
    if input_path is not None and os.fspath(input_path) != "-":
        sources = {"input": os.fspath(input_path), **sources}
        shown = an.summaries[: opts["max_services"]]
        metrics = window_means(input_path, {s.service: s.window for s in shown}, progress=progress)
    else:
        notes.append("Metric plots are left out: the input was not a file that could be read again.")
    if labels_path is not None:
        sources["labels"] = os.fspath(labels_path)
    report = _render(an, metrics=metrics, title=title, sources=sources, notes=notes, generated_at=generated_at,
                     **opts)
    if progress is not None and metrics is not None:
        progress.finish()
    target = Path(path)
    tmp = target.with_name(f".{target.name}.tmp-{os.getpid()}")
    try:
        tmp.write_text(report.html, encoding="utf-8")
        os.replace(tmp, target)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise ReportError(f"{os.fspath(path)}: cannot write the report: {exc.strerror or exc}") from None
    return report
