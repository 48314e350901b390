"""The bus-agnostic scoring path: decode, window, score.

The embedded file/stdin loop and the Kafka loop both feed raw message bytes into
an :class:`Engine` per source and receive score messages and rejects through two
callbacks. Nothing here touches pydantic or knows about the bus, and nothing logs but a model that fails
(once per service: :meth:`Engine._model_failed`). The common-case lines of a batch go through the C scanner
of ``service/_hotpath.c`` where it is built; the Python loop takes the rest and gives the same results.
"""

from __future__ import annotations

import heapq
import logging
import time
from collections.abc import Callable, Sequence
from typing import Any

from models.base import PURE_PYTHON
from service.config import Config
from service.decode import MIN_EVENT_TS, NativeDecoder, Rejected
from service.registry import ModelRegistry
from service.scoremsg import encode_score
from service.stats import RuntimeStats
from service.timefmt import MS_THRESHOLD
from service.windows import SourceWindows, Window, window_features

try:
    # The C hot path (service/_hotpath.c): takes the common-case lines of a batch and hands the rest
    # back to the loop below. Built at install where a C compiler is at hand; without it, or with
    # TIDEWATCH_PURE_PYTHON=1, the Python loop does the same work alone.
    from service._hotpath import Scanner as _Scanner
except ImportError:  # pragma: no cover - depends on the install
    _Scanner = None
if PURE_PYTHON:
    _Scanner = None

#: Whether this process feeds batches through the C hot path.
HOT_PATH = _Scanner is not None

log = logging.getLogger("tidewatch.engine")

__all__ = ["Engine", "ScoreSink", "RejectSink", "HOT_PATH"]

# on_score(service, payload, window): payload is the encoded score message.
ScoreSink = Callable[[str, bytes, Window], None]
# on_reject(code, detail, raw, origin): origin says where the message came from.
RejectSink = Callable[[str, str, bytes, Any], None]


class Engine:
    """Scores the windows of every source it is fed.

    Parameters
    ----------
    config
        The loaded config.
    on_score, on_reject
        Where score messages and rejects go.
    stats, registry
        Shared with the metrics endpoint and the checkpointer; created when omitted.
    now
        Wall clock, injected for tests.
    """

    def __init__(
        self,
        config: Config,
        *,
        on_score: ScoreSink,
        on_reject: RejectSink,
        stats: RuntimeStats | None = None,
        registry: ModelRegistry | None = None,
        now: Callable[[], float] = time.time,
    ) -> None:
        self.config = config
        self.stats = stats if stats is not None else RuntimeStats()
        self.registry = registry if registry is not None else ModelRegistry(config, self.stats)
        lim = config.limits
        self.decoder = NativeDecoder(
            max_message_bytes=lim.max_message_bytes,
            max_service_name=lim.max_service_name,
            max_metrics=lim.max_metrics,
            max_future_skew=lim.max_future_skew,
            now=now,
        )
        self.on_score = on_score
        self.on_reject = on_reject
        self.now = now
        self.sources: dict[str, SourceWindows] = {}
        # service -> the source its messages arrive on (its state is kept with that source)
        self.owner: dict[str, SourceWindows] = {}
        self._scanner = (_Scanner(min_event_ts=MIN_EVENT_TS, ms_threshold=MS_THRESHOLD,
                                  window_type=Window, heappush=heapq.heappush)
                         if _Scanner is not None else None)
        self._failures_logged: set[str] = set()  # services whose model failure was logged (once each)

    def source(self, source_id: str) -> SourceWindows:
        src = self.sources.get(source_id)
        if src is None:
            src = self.sources[source_id] = SourceWindows()
        return src

    def reconfigure(self, config: Config) -> tuple[int, int]:
        """Apply a reloaded config from the next window on; see :meth:`ModelRegistry.reconfigure`."""
        self.config = config
        return self.registry.reconfigure(config)

    def drop_source(self, source_id: str) -> list[str]:
        """Forget a source and every service it owns (partition revoked or lost); return those services."""
        src = self.sources.pop(source_id, None)
        if src is None:
            return []
        gone = [s for s, o in self.owner.items() if o is src]
        for service in gone:
            del self.owner[service]
            self.registry.drop(service)
            # Another instance owns it now: stop exporting its last score from here.
            self.stats.latest.pop(service, None)
        return gone

    def reject(self, code: str, detail: str, raw: bytes, origin: Any) -> None:
        self.stats.rejected[code] += 1
        self.on_reject(code, detail, raw, origin)

    def feed(self, src: SourceWindows, raws: Sequence[bytes], origin_of: Callable[[int], Any]) -> None:
        """Process a batch of raw messages from one source, in order.

        ``origin_of(i)`` is called only for a rejected message, to say where it came from.
        """
        self.decoder.refresh_clock()
        scanner = self._scanner
        if scanner is None or type(raws) is not list:
            self.stats.accepted += self._feed_range(src, raws, 0, len(raws), origin_of)
        else:
            # The C scanner takes lines while they are the common case and stops at the first it does
            # not take (handed to the Python loop, which then does exactly what it does without the
            # scanner) or just after a line that made a window due (closed here, as below).
            decoder, owner, resolved = self.decoder, self.owner, self.registry.resolved
            scan = scanner.feed
            n = len(raws)
            i = accepted = 0
            while i < n:
                i, taken, due = scan(decoder, src, raws, i, owner, resolved)
                accepted += taken
                if due:
                    self.close(src.pop_closed())
                elif i < n:
                    accepted += self._feed_range(src, raws, i, i + 1, origin_of)
                    i += 1
            self.stats.accepted += accepted
        self.stats.services_tracked = len(self.owner)

    def _feed_range(self, src: SourceWindows, raws: Sequence[bytes], lo: int, hi: int,
                    origin_of: Callable[[int], Any]) -> int:
        """The Python loop of :meth:`feed` over ``raws[lo:hi]``; returns how many were accepted."""
        decode = self.decoder.decode
        settings_cache = self.registry.resolved  # the dict itself: a reload clears it in place
        settings_of = self.registry.settings
        add = src.add
        # The heap list itself (SourceWindows keeps one list for its lifetime): the due check below is
        # :meth:`SourceWindows.has_due` written out, once per message.
        heap = src._heap
        owner = self.owner
        max_services = self.config.limits.max_services
        accepted = 0
        for i in range(lo, hi):
            raw = raws[i]
            try:
                service, ts, metrics = decode(raw)
            except Rejected as r:
                self.reject(r.code, r.detail, raw, origin_of(i))
                continue
            # Subscripts in ``try`` rather than ``.get``: the lookups that miss (a new service, settings
            # not resolved yet) are rare, and a plain subscript is the cheaper operation.
            try:
                o = owner[service]
            except KeyError:
                o = None
            if o is not src:
                if o is None:
                    if len(owner) >= max_services:
                        self.reject("service_limit", f"already tracking {max_services} services", raw, origin_of(i))
                        continue
                    if not self.registry.admit(service, self.now):
                        self.reject("new_service_rate", f"new service {service!r} beyond limits.new_services_per_second",
                                    raw, origin_of(i))
                        continue
                    owner[service] = src
                else:
                    # One service's state lives with one source; a second source would fork it.
                    self.reject("unaligned_key", f"service {service!r} already arrives on another partition", raw, origin_of(i))
                    continue
            try:
                s = settings_cache[service]
            except KeyError:
                s = settings_of(service)
            if not add(service, ts, metrics, s.window, s.lateness):
                self.reject("late", f"event time {ts!r} is behind the watermark of service {service!r}", raw, origin_of(i))
                continue
            accepted += 1
            if heap and heap[0][0] <= src.high_mark:
                self.close(src.pop_closed())
        return accepted

    def feed_payloads(self, src: SourceWindows, raws: Sequence[bytes], origin_of: Callable[[int], Any],
                      decode_many: Callable[[bytes], list]) -> None:
        """Like :meth:`feed` for formats where one message carries many events (OTLP).

        ``decode_many(raw)`` returns ``[(service, ts, metrics), ...]`` or raises :class:`Rejected`.
        Events of one message that arrive late are counted one by one; the message is routed to the
        rejects sink once, with the number of late events in the detail.
        """
        self.decoder.refresh_clock()
        settings_of = self.registry.settings
        owner = self.owner
        accepted = 0
        for i, raw in enumerate(raws):
            try:
                events = decode_many(raw)
            except Rejected as r:
                self.reject(r.code, r.detail, raw, origin_of(i))
                continue
            late = unaligned = limited = rated = 0
            max_services = self.config.limits.max_services
            for service, ts, metrics in events:
                o = owner.get(service)
                if o is not src:
                    if o is None:
                        if len(owner) >= max_services:
                            limited += 1
                            continue
                        if not self.registry.admit(service, self.now):
                            rated += 1
                            continue
                        owner[service] = src
                    else:
                        unaligned += 1
                        continue
                s = settings_of(service)
                if not src.add(service, ts, metrics, s.window, s.lateness):
                    late += 1
                    continue
                accepted += 1
                if src.has_due():
                    self.close(src.pop_closed())
            if limited:
                self.stats.rejected["service_limit"] += limited - 1
                self.reject("service_limit", f"{limited} event(s) of new services beyond limits.max_services", raw,
                            origin_of(i))
            if rated:
                self.stats.rejected["new_service_rate"] += rated - 1
                self.reject("new_service_rate", f"{rated} event(s) of new services beyond limits.new_services_per_second",
                            raw, origin_of(i))
            if unaligned:
                self.stats.rejected["unaligned_key"] += unaligned - 1
                self.reject("unaligned_key", f"{unaligned} event(s) of services that arrive on another partition",
                            raw, origin_of(i))
            if late:
                self.stats.rejected["late"] += late - 1  # counted per event, routed once per message
                self.reject("late", f"{late} of {len(events)} event(s) behind the watermark", raw, origin_of(i))
        self.stats.accepted += accepted
        self.stats.services_tracked = len(owner)

    def _model_failed(self, service: str, window: Window, exc: Exception) -> None:
        """A model raised while scoring a window: count it, say so, and start the service afresh.

        Without this, one service's broken model would stop every other service's scoring, and a
        restart would meet the same model and the same error again. The window gets no score (a
        made-up one would be worse); the service's model is replaced by a fresh one (warming up
        again), which the next checkpoint or commit writes over the saved state, so a restart does
        not restore the failing model. Counted as ``tidewatch_model_failures_total``; logged at most
        once per service and process, with the error.
        """
        stats = self.stats
        stats.model_failures += 1
        self.registry.start_afresh(service, self.owner)
        logged = self._failures_logged
        if service not in logged and len(logged) < 10_000:
            logged.add(service)
            log.error("a model failed to score a window; the service starts a fresh model",
                      extra={"event": "model_failed", "service": service, "window_start": window.start,
                             "error": f"{type(exc).__name__}: {exc}"}, exc_info=exc)

    def flush(self, src: SourceWindows) -> None:
        """Close every open window of a source (end of a finite input)."""
        self.close(src.pop_closed(flush=True))

    def close(self, closed: list[tuple[str, Window]]) -> None:
        stats = self.stats
        registry = self.registry
        now = self.now()
        owner = self.owner  # eviction prefers services without an open window
        for service, window in closed:
            settings = registry.settings(service)
            model = registry.model(service, owner)
            steady: dict[str, bool] = {}
            features = window_features(window, settings.features, steady)
            try:
                assessment = model.assess(features, at=window.start, steady=steady)
            except Exception as exc:  # noqa: BLE001 - one service's model must not stop the fleet's scoring
                self._model_failed(service, window, exc)
                continue
            registry.dirty.add(service)
            payload = encode_score(
                service, window.start, window.end, window.count, model.kind, model.settings.threshold, assessment
            )
            stats.windows_closed += 1
            if assessment.anomalous:
                stats.windows_flagged += 1
            stats.latest[service] = (assessment.score, assessment.anomalous, window.end)
            stats.close_delay_seconds.observe(max(0.0, now - window.end))
            self.on_score(service, payload, window)
