"""Event-time tumbling windows per service, closed by a per-source watermark.

A window of length ``L`` covers ``[k*L, (k+1)*L)`` seconds since the Unix epoch:
the start is included, the end excluded. Each source (a file, stdin, or one input
partition) keeps its own *high mark*, the largest event time seen on it; a window
of a service with allowed lateness ``D`` closes once ``high mark - D >= end``
(that difference is the service's watermark, and it never moves back). An event
whose window has already closed is late: it is refused and the caller routes it.

Timeline for L = 60 s, D = 10 s::

    events   t=05  t=50   t=65        t=71          t=58
    window   [0,60) [0,60) [60,120)    [60,120)      [0,60) -> late
    closes                             [0,60) (71-10 >= 60)

>>> sw = SourceWindows()
>>> sw.add("api", 5.0, {"x": 1.0}, 60.0, 10.0), sw.add("api", 50.0, {"x": 3.0}, 60.0, 10.0)
(True, True)
>>> sw.add("api", 71.0, {"x": 5.0}, 60.0, 10.0)
True
>>> [(s, w.start, w.count, w.aggregate("x")["mean"]) for s, w in sw.pop_closed()]
[('api', 0.0, 2, 2.0)]
>>> sw.add("api", 58.0, {"x": 1.0}, 60.0, 10.0)
False
"""

from __future__ import annotations

import heapq
import math
from collections.abc import Iterable
from dataclasses import dataclass
from fnmatch import fnmatchcase

__all__ = ["FeatureSpec", "Window", "SourceWindows", "window_features", "feature_names"]

_heappush = heapq.heappush


@dataclass(frozen=True, slots=True)
class FeatureSpec:
    """A compiled feature: ``metric_glob`` (None for the message count) and aggregate."""

    metric_glob: str | None
    aggregate: str

    @property
    def is_exact(self) -> bool:
        return self.metric_glob is not None and not any(c in self.metric_glob for c in "*?[")



class Window:
    """One open (service, window): its message count and, per metric, the values seen in arrival order.

    ``aggregate(metric)`` gives count, sum, mean, min, max and last of a metric.
    """

    __slots__ = ("start", "end", "count", "values")

    def __init__(self, start: float, end: float) -> None:
        self.start = start
        self.end = end
        self.count = 0
        self.values: dict[str, list] = {}

    def aggregate(self, metric: str) -> dict[str, float] | None:
        """The aggregates of one metric, or None when no message carried it.

        >>> w = Window(0.0, 60.0); w.values = {"x": [1, 3.0, 2]}
        >>> w.aggregate("x")
        {'count': 3.0, 'sum': 6.0, 'mean': 2.0, 'min': 1.0, 'max': 3.0, 'last': 2.0}
        """
        v = self.values.get(metric)
        if not v:
            return None
        total = float(sum(v))
        return {"count": float(len(v)), "sum": total, "mean": total / len(v), "min": float(min(v)),
                "max": float(max(v)), "last": float(v[-1])}

    def to_state(self) -> list:
        return [self.start, self.end, self.count, self.values]

    @classmethod
    def from_state(cls, state: list) -> "Window":
        w = cls(float(state[0]), float(state[1]))
        w.count = int(state[2])
        w.values = {str(k): [float(x) for x in v] for k, v in state[3].items()}
        return w


class SourceWindows:
    """Open windows and the high mark of one source.

    ``add`` returns False for a late event (nothing is changed then). Closed
    windows are handed out by ``pop_closed`` in (close time, service, start)
    order, so the output order depends only on this source's input order.
    """

    __slots__ = ("high_mark", "open", "_heap", "touched", "tag")

    def __init__(self, tag: object = None) -> None:
        # What the bus layer knows this source by (the partition number on Kafka).
        self.tag = tag
        self.high_mark = -math.inf
        # services whose open windows changed since the caller last cleared this (changelog writes)
        self.touched: set[str] = set()
        self.open: dict[str, dict[float, Window]] = {}
        # (close_at, service, start): ordering ties by name keeps restored runs identical.
        self._heap: list[tuple[float, str, float]] = []

    def add(self, service: str, ts: float, metrics: dict, length: float, lateness: float) -> bool:
        start = ts - (ts % length)
        close_at = start + length + lateness
        high_mark = self.high_mark
        if close_at <= high_mark:
            return False
        per_service = self.open.get(service)
        if per_service is None:
            per_service = self.open[service] = {}
        window = per_service.get(start)
        self.touched.add(service)
        # Appending is the cheapest per-message work; count, sum, mean, min, max and last are
        # computed once, when the window closes (C-level len/sum/min/max over the list).
        if window is None:
            window = per_service[start] = Window(start, start + length)
            _heappush(self._heap, (close_at, service, start))
            window.count = 1
            # The first message of a window: the loop below on an empty mapping, in one expression.
            window.values = {name: [value] for name, value in metrics.items()}
        else:
            window.count += 1
            values = window.values
            try:
                # Every metric seen before in this window (the usual case): a plain subscript each.
                for name, value in metrics.items():
                    values[name].append(value)
            except KeyError:
                # A metric new to this window: the names before it are appended already; it and
                # the rest are added one by one, new ones in arrival order.
                started = False
                for name, value in metrics.items():
                    if not started:
                        if name in values:
                            continue
                        started = True
                    seen = values.get(name)
                    if seen is None:
                        values[name] = [value]
                    else:
                        seen.append(value)
        if ts > high_mark:
            self.high_mark = ts
        return True

    def has_due(self) -> bool:
        return bool(self._heap) and self._heap[0][0] <= self.high_mark

    def pop_closed(self, *, flush: bool = False) -> list[tuple[str, Window]]:
        """Remove and return the windows the watermark has passed (all of them with ``flush``)."""
        heap = self._heap
        out: list[tuple[str, Window]] = []
        mark = math.inf if flush else self.high_mark
        while heap and heap[0][0] <= mark:
            close_at, service, start = heapq.heappop(heap)
            if close_at > self.high_mark:
                # Flushing a finite input: the watermark moves past what was closed, so a
                # later event for a flushed window counts as late instead of reopening it.
                self.high_mark = close_at
            per_service = self.open[service]
            out.append((service, per_service.pop(start)))
            self.touched.add(service)
            if not per_service:
                del self.open[service]
        return out

    def services(self) -> Iterable[str]:
        return self.open.keys()

    # --- snapshots -----------------------------------------------------------------
    def service_state(self, service: str) -> list:
        """The open windows of one service, as plain data (for its changelog record)."""
        return [w.to_state() for w in self.open.get(service, {}).values()]

    def drop_service(self, service: str) -> None:
        if self.open.pop(service, None) is not None:
            # In place: the engine holds on to this list for a whole batch (its per-message due check).
            self._heap[:] = [e for e in self._heap if e[1] != service]
            heapq.heapify(self._heap)

    def restore_service(self, service: str, state: list, lateness: float) -> None:
        """Put back one service's open windows (from :meth:`service_state`)."""
        self.drop_service(service)
        if not state:
            return
        per_service = self.open[service] = {}
        for item in state:
            w = Window.from_state(item)
            per_service[w.start] = w
            heapq.heappush(self._heap, (w.end + lateness, service, w.start))

    def to_state(self) -> dict:
        return {
            "high_mark": self.high_mark if math.isfinite(self.high_mark) else None,
            "open": {s: self.service_state(s) for s in self.open},
            "heap": [list(e) for e in self._heap],
        }

    @classmethod
    def from_state(cls, state: dict) -> "SourceWindows":
        sw = cls()
        hm = state.get("high_mark")
        sw.high_mark = -math.inf if hm is None else float(hm)
        for service, items in state.get("open", {}).items():
            per_service = sw.open[service] = {}
            for item in items:
                w = Window.from_state(item)
                per_service[w.start] = w
        sw._heap = [(float(c), str(s), float(st)) for c, s, st in state.get("heap", [])]
        heapq.heapify(sw._heap)
        return sw


_NAME_CACHE: dict[tuple[str, str], str] = {}


def feature_names(metric: str, aggregate: str) -> str:
    """The feature name of one metric aggregate, e.g. ``latency_p95_ms.mean``."""
    key = (metric, aggregate)
    name = _NAME_CACHE.get(key)
    if name is None:
        name = f"{metric}.{aggregate}"
        if len(_NAME_CACHE) < 1_000_000:
            _NAME_CACHE[key] = name
    return name


def _value(values: list, aggregate: str) -> float:
    if aggregate == "mean":
        return float(sum(values)) / len(values)
    if aggregate == "sum":
        return float(sum(values))
    if aggregate == "min":
        return float(min(values))
    if aggregate == "max":
        return float(max(values))
    if aggregate == "last":
        return float(values[-1])
    return float(len(values))  # "count": how many messages carried this metric


def _names_of(aggregate: str) -> dict[str, str]:
    """The metric -> feature name cache of one aggregate (the names of :func:`feature_names`)."""
    names = _NAMES_BY_AGGREGATE.get(aggregate)
    if names is None:
        names = _NAMES_BY_AGGREGATE[aggregate] = {}
    return names


# aggregate -> {metric: feature name}: one lookup per feature of a closed window, no key tuple.
_NAMES_BY_AGGREGATE: dict[str, dict[str, str]] = {}


def _held_still(values: list) -> bool:
    """Whether every value of a metric in a window (at least two) is the same.

    >>> _held_still([3, 3.0, 3]), _held_still([1.0, 2.0, 1.0])
    (True, False)
    """
    # A moving metric's first and last values nearly always differ: one comparison, no scan.
    return values[-1] == values[0] and values.count(values[0]) == len(values)


def window_features(window: Window, specs: tuple, steady: dict[str, bool] | None = None) -> dict[str, float]:
    """The feature mapping of a closed window under a rule's feature specs.

    ``steady``, when given, is filled with each feature whose metric the window saw at least
    twice, mapped to whether all those values were equal (the metric held still all window:
    the model's stuck-value evidence, :func:`models.seasonal.repeats`). The message count and
    the ``count`` aggregate have no such reading.

    >>> w = Window(0.0, 60.0); w.count = 3; w.values = {"x": [1.0, 3.0, 2.0], "y": [4, 4.0, 4]}
    >>> steady = {}
    >>> window_features(w, (FeatureSpec("*", "mean"), FeatureSpec("x", "max"), FeatureSpec(None, "count")), steady)
    {'x.mean': 2.0, 'y.mean': 4.0, 'x.max': 3.0, 'count': 3.0}
    >>> steady
    {'x.mean': False, 'y.mean': True, 'x.max': False}
    """
    out: dict[str, float] = {}
    aggs = window.values
    for spec in specs:
        glob = spec.metric_glob
        if glob is None:
            out["count"] = float(window.count)
        elif glob == "*":
            aggregate = spec.aggregate
            names = _names_of(aggregate)
            if aggregate == "mean":
                # The most common spec, written out: _value's "mean", without a call per metric.
                for metric, agg in aggs.items():
                    name = names.get(metric)
                    if name is None:
                        name = feature_names(metric, aggregate)
                        if len(names) < 100_000:
                            names[metric] = name
                    n = len(agg)
                    out[name] = float(sum(agg)) / n
                    if steady is not None and n > 1:
                        steady[name] = agg[-1] == agg[0] and agg.count(agg[0]) == n  # _held_still, inline
            else:
                for metric, agg in aggs.items():
                    name = feature_names(metric, aggregate)
                    out[name] = _value(agg, aggregate)
                    if steady is not None and len(agg) > 1 and aggregate != "count":
                        steady[name] = _held_still(agg)
        elif spec.is_exact:
            agg = aggs.get(glob)
            if agg is not None:
                name = feature_names(glob, spec.aggregate)
                out[name] = _value(agg, spec.aggregate)
                if steady is not None and len(agg) > 1 and spec.aggregate != "count":
                    steady[name] = _held_still(agg)
        else:
            for metric, agg in aggs.items():
                if fnmatchcase(metric, glob):
                    name = feature_names(metric, spec.aggregate)
                    out[name] = _value(agg, spec.aggregate)
                    if steady is not None and len(agg) > 1 and spec.aggregate != "count":
                        steady[name] = _held_still(agg)
    return out
