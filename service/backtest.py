"""Reading score messages back: alert onsets, and which labelled incidents they caught.

An *alert onset* is a window flagged anomalous whose previous window of the same
service was not. An incident counts as caught when an onset or a flagged window of
its service starts inside ``[onset, end)`` of the incident; the delay is counted in
windows from the incident's onset. A flagged onset that overlaps no incident (with
``grace`` windows after its end) is a false alert onset.

>>> s = [{"service": "a", "window_start": "2026-03-02T00:00:00Z", "anomalous": False},
...      {"service": "a", "window_start": "2026-03-02T00:05:00Z", "anomalous": True},
...      {"service": "a", "window_start": "2026-03-02T00:10:00Z", "anomalous": True}]
>>> [ (o.service, o.start) for o in alert_onsets(s) ]
[('a', 1772409900.0)]
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import orjson

from service.timefmt import parse_rfc3339

__all__ = ["Onset", "IncidentResult", "alert_onsets", "match_incidents", "read_scores"]


@dataclass(frozen=True, slots=True)
class Onset:
    service: str
    start: float
    top_metric: str | None


@dataclass(frozen=True, slots=True)
class IncidentResult:
    incident: object  # anything with service, metric, kind, start, end
    caught: bool
    first_flag: float | None  # window start of the first flagged window inside the incident
    delay_windows: int | None
    metric_named: bool  # the incident's metric was among the top contributors of the first flagged window


def read_scores(path: str) -> list[dict]:
    with open(path, "rb") as f:
        return [orjson.loads(line) for line in f if line.strip()]


def _start(msg: dict) -> float:
    return parse_rfc3339(msg["window_start"])


def alert_onsets(scores: Iterable[dict]) -> list[Onset]:
    """Rising edges of ``anomalous`` per service, in input order."""
    last: dict[str, bool] = {}
    out = []
    for m in scores:
        svc = m["service"]
        flag = bool(m.get("anomalous"))
        if flag and not last.get(svc, False):
            contrib = m.get("contributors") or []
            out.append(Onset(svc, _start(m), contrib[0]["metric"] if contrib else None))
        last[svc] = flag
    return out


def match_incidents(
    scores: Sequence[dict], incidents: Sequence, window: float, *, grace: int = 3, top: int = 3
) -> tuple[list[IncidentResult], list[Onset]]:
    """Match flagged windows to incidents; return per-incident results and the false onsets."""
    flagged: dict[str, list[dict]] = defaultdict(list)
    for m in scores:
        if m.get("anomalous"):
            flagged[m["service"]].append(m)
    results = []
    for inc in incidents:
        first = None
        named = False
        for m in flagged.get(inc.service, ()):
            st = _start(m)
            if inc.start - window < st < inc.end:
                first = st
                names = [c["metric"] for c in (m.get("contributors") or [])[:top]]
                named = inc.metric in names
                break
        if first is None:
            results.append(IncidentResult(inc, False, None, None, False))
        else:
            delay = max(0, int((first - (inc.start - inc.start % window)) // window))
            results.append(IncidentResult(inc, True, first, delay, named))
    false_onsets = []
    for onset in alert_onsets(scores):
        hit = any(
            inc.service == onset.service and inc.start - window < onset.start < inc.end + grace * window
            for inc in incidents
        )
        if not hit:
            false_onsets.append(onset)
    return results, false_onsets
