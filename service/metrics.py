"""Prometheus exposition of the runtime's counters, computed at scrape time.

A custom collector reads :class:`service.stats.RuntimeStats` when scraped, so the
hot path never touches a prometheus-client object. The registry is passed in.

Metric names (all prefixed ``tidewatch_``; counters end in ``_total``, units in names):

========================================  =======================================================
``messages_total{outcome}``               messages accepted / rejected
``rejects_total{reason}``                 rejected messages by reason code (``late`` included)
``late_events_total``                     events whose window had already closed
``windows_closed_total``                  (service, window) pairs scored
``windows_flagged_total``                 of those, flagged anomalous
``models_live``                           models held in memory
``models_live_limit``                     the live-model limit in force (limits.max_live_models)
``models_evicted_total``                  models moved out of memory to the spill store (or discarded)
``models_evicted_active_total``           of those, services that still had an open window (limit below the active fleet)
``models_reloaded_total``                 spilled models read back when the service's window closed
``models_discarded_total``                models evicted with no spill store to take them: learned again
``models_spilled``                        models in the spill store now
``spill_store_bytes``                     bytes of the records in the spill store
``models_created_total``                  models created on first sight of a service
``model_failures_total``                  windows whose model raised: not scored, the service's model started afresh
``services_tracked``                      services tracked (bounded by limits.max_services)
``models_restored_total``                 models restored from saved state
``state_records_refused_total{kind}``     saved records refused (corrupt, newer format, bad signature)
``state_saves_total``                     checkpoints written
``state_save_failures_total``             checkpoints that failed
``state_save_failures_by_reason_total{reason}`` the same by reason: no_space, read_only, permission, io_error
``state_save_duration_seconds``           histogram of checkpoint durations
``window_close_delay_seconds``            histogram: wall clock from a window's end to its score
``score_commit_delay_seconds``            Kafka histogram: window close to its score committed
``source_high_mark_seconds{source}``      newest event time seen per source (epoch seconds)
``consumer_lag_messages{topic,partition}`` Kafka: messages between the committed position and the log end
``service_score{service}``                latest calibrated score per service
``service_anomalous{service}``            1 if the latest window was flagged
``service_window_end_seconds{service}``   end of the latest scored window (freshness of the two above)
``service_series_dropped``                services left out of the per-service series by the limit
``up_since_seconds``                      process start (epoch seconds)
========================================  =======================================================
"""

from __future__ import annotations

from collections.abc import Callable, Iterator

from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, HistogramMetricFamily, Metric
from prometheus_client.registry import Collector

from service.stats import SAVE_FAILURE_REASONS, Buckets, RuntimeStats

__all__ = ["RuntimeCollector", "build_registry"]

P = "tidewatch_"


def _histogram(name: str, doc: str, b: Buckets) -> HistogramMetricFamily:
    cumulative = []
    running = 0
    for bound, n in zip(b.bounds, b.counts):
        running += n
        cumulative.append((repr(float(bound)), running))
    cumulative.append(("+Inf", b.count))
    return HistogramMetricFamily(name, doc, buckets=cumulative, sum_value=b.sum)


class RuntimeCollector(Collector):
    """Yields the metric families of one runtime at each scrape.

    Parameters
    ----------
    stats
        The counters to read.
    live_models
        Callable returning how many models are in memory.
    max_service_series
        At most this many services get per-service series (the highest scores first),
        so a flood of new service names cannot blow up the scrape.
    """

    def __init__(self, stats: RuntimeStats, live_models: Callable[[], int], max_service_series: int = 5000) -> None:
        self.stats = stats
        self.live_models = live_models
        self.max_service_series = max_service_series

    def describe(self) -> list[Metric]:
        # Returning nothing tells the registry not to call collect() at registration.
        return []

    def collect(self) -> Iterator[Metric]:
        s = self.stats
        rejected_total = sum(s.rejected.values())
        m = CounterMetricFamily(P + "messages", "Messages read, by outcome.", labels=["outcome"])
        m.add_metric(["accepted"], s.accepted)
        m.add_metric(["rejected"], rejected_total)
        yield m
        m = CounterMetricFamily(P + "rejects", "Rejected messages by reason code.", labels=["reason"])
        for reason, n in sorted(s.rejected.copy().items()):
            m.add_metric([reason], n)
        yield m
        yield CounterMetricFamily(P + "late_events", "Events whose window had already closed.", value=s.rejected.get("late", 0))
        yield CounterMetricFamily(P + "windows_closed", "Service windows closed and scored.", value=s.windows_closed)
        yield CounterMetricFamily(P + "windows_flagged", "Service windows flagged anomalous.", value=s.windows_flagged)
        yield GaugeMetricFamily(P + "models_live", "Per-service models held in memory.", value=self.live_models())
        yield GaugeMetricFamily(P + "models_live_limit", "Most per-service models held in memory (limits.max_live_models).",
                                value=s.models_live_limit)
        yield CounterMetricFamily(P + "models_evicted", "Models moved out of memory to the spill store, or discarded.",
                                  value=s.models_evicted)
        yield CounterMetricFamily(P + "models_evicted_active",
                                  "Evicted models whose service still had an open window (the limit is below the active fleet).",
                                  value=s.models_evicted_active)
        yield CounterMetricFamily(P + "models_reloaded", "Spilled models read back when their service's window closed.",
                                  value=s.models_reloaded)
        yield CounterMetricFamily(P + "models_discarded", "Models evicted with no spill store to take them (learned again).",
                                  value=s.models_discarded)
        yield GaugeMetricFamily(P + "models_spilled", "Per-service models in the spill store on disk.", value=s.models_spilled)
        yield GaugeMetricFamily(P + "spill_store_bytes", "Bytes of the model records in the spill store.", value=s.spill_bytes)
        yield GaugeMetricFamily(P + "services_tracked", "Services this process tracks (windows or a model).",
                                value=s.services_tracked)
        yield CounterMetricFamily(P + "models_created", "Models created on first sight of a service.", value=s.models_created)
        yield CounterMetricFamily(P + "model_failures",
                                  "Windows whose model raised: not scored, and the service's model started afresh.",
                                  value=s.model_failures)
        yield CounterMetricFamily(P + "models_restored", "Models restored from saved state.", value=s.models_restored)
        m = CounterMetricFamily(P + "state_records_refused", "Saved state records refused, by kind.", labels=["kind"])
        for kind, n in sorted(s.state_records_refused.copy().items()):
            m.add_metric([kind], n)
        yield m
        yield CounterMetricFamily(P + "state_saves", "Checkpoints written.", value=s.state_saves)
        yield CounterMetricFamily(P + "state_save_failures", "Checkpoints that failed.", value=s.state_save_failures)
        # failed saves by reason, every reason present from the start so rate() works
        m = CounterMetricFamily(P + "state_save_failures_by_reason", "Checkpoints that failed, by reason.",
                                labels=["reason"])
        for reason in SAVE_FAILURE_REASONS:
            m.add_metric([reason], s.state_save_failure_reasons.get(reason, 0))
        yield m
        yield _histogram(P + "state_save_duration_seconds", "Time to write one checkpoint.", s.save_seconds)
        yield _histogram(
            P + "window_close_delay_seconds",
            "Wall-clock time from a window's end to its score being emitted.",
            s.close_delay_seconds,
        )
        yield _histogram(
            P + "score_commit_delay_seconds",
            "Kafka: time from a window's close to its score message being committed.",
            s.commit_delay_seconds,
        )
        m = GaugeMetricFamily(P + "source_high_mark_seconds", "Newest event time seen per source.", labels=["source"])
        for source, mark in sorted(s.high_marks.copy().items()):
            m.add_metric([source], mark)
        yield m
        m = GaugeMetricFamily(
            P + "consumer_lag_messages", "Messages between the committed position and the log end, per input partition.",
            labels=["topic", "partition"],
        )
        for (topic, partition), lag in sorted(s.consumer_lag.copy().items()):
            m.add_metric([topic, str(partition)], lag)
        yield m
        latest = s.latest.copy()
        items = latest.items()
        dropped = 0
        if len(latest) > self.max_service_series:
            ranked = sorted(items, key=lambda kv: (-kv[1][0], kv[0]))
            dropped = len(ranked) - self.max_service_series
            items = ranked[: self.max_service_series]
        score = GaugeMetricFamily(P + "service_score", "Latest calibrated score per service (0 to 1).", labels=["service"])
        flag = GaugeMetricFamily(P + "service_anomalous", "1 if the service's latest window was flagged.", labels=["service"])
        end = GaugeMetricFamily(P + "service_window_end_seconds",
                                "End of the service's latest scored window (epoch seconds): how fresh the two above are.",
                                labels=["service"])
        for service, (value, anomalous, window_end) in sorted(items):
            score.add_metric([service], value)
            flag.add_metric([service], 1.0 if anomalous else 0.0)
            end.add_metric([service], window_end)
        yield score
        yield flag
        yield end
        yield GaugeMetricFamily(
            P + "service_series_dropped", "Services left out of per-service series by the limit.", value=dropped
        )
        yield GaugeMetricFamily(P + "up_since_seconds", "Process start time (epoch seconds).", value=s.started)


def build_registry(stats: RuntimeStats, live_models: Callable[[], int], max_service_series: int) -> CollectorRegistry:
    """A fresh registry holding only this runtime's collector."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(RuntimeCollector(stats, live_models, max_service_series))
    return registry
