"""Plain counters the runtime updates on its hot path.

They are ints and dicts, not prometheus-client objects, so an increment costs one
attribute add; :mod:`service.metrics` turns them into metric families at scrape time.
"""

from __future__ import annotations

import bisect
import time
from collections import Counter

__all__ = ["RuntimeStats", "Buckets"]


class Buckets:
    """A cumulative-bucket histogram with fixed upper bounds (seconds).

    >>> b = Buckets((0.1, 1.0)); b.observe(0.05); b.observe(0.5); b.observe(3.0)
    >>> b.counts, b.count, round(b.sum, 2)
    ([1, 1, 1], 3, 3.55)
    """

    __slots__ = ("bounds", "counts", "count", "sum")

    def __init__(self, bounds: tuple[float, ...]) -> None:
        self.bounds = bounds
        self.counts = [0] * (len(bounds) + 1)  # last slot: above every bound (+Inf)
        self.count = 0
        self.sum = 0.0

    def observe(self, value: float) -> None:
        self.counts[bisect.bisect_left(self.bounds, value)] += 1
        self.count += 1
        self.sum += value


# why a checkpoint save failed (service.checkpoint classifies the OSError)
SAVE_FAILURE_REASONS = ("no_space", "read_only", "permission", "io_error")

SAVE_BOUNDS = (0.001, 0.005, 0.01, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)
COMMIT_BOUNDS = (0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0)
# Window close delay spans live runs (sub-second) and replays of old data (days).
DELAY_BOUNDS = (0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 300.0, 3600.0, 86400.0)


class RuntimeStats:
    """Counters and gauges of one process."""

    def __init__(self) -> None:
        self.accepted = 0
        self.rejected: Counter[str] = Counter()  # by reason code; "late" included
        self.windows_closed = 0
        self.windows_flagged = 0
        self.models_created = 0
        self.model_failures = 0  # windows whose model raised (service.engine.Engine._model_failed)
        self.services_tracked = 0  # set by the engine after each batch
        self.models_restored = 0
        # live-model limit and eviction (service.registry)
        self.models_live_limit = 0
        self.models_evicted = 0  # moved to the spill store (or discarded, below)
        self.models_evicted_active = 0  # of those, services that had an open window (the limit is below the active fleet)
        self.models_reloaded = 0  # read back from the spill store when a window closed
        self.models_reload_refused = 0  # spilled records refused on reload (also under state_records_refused)
        self.models_discarded = 0  # evicted or restored past the limit with no spill store: learned again
        self.models_spilled = 0  # models in the spill store now
        self.spill_bytes = 0  # their record bytes
        self.state_records_refused: Counter[str] = Counter()  # by error kind
        self.state_saves = 0
        self.state_save_failures = 0
        # failed checkpoint saves by reason (one of SAVE_FAILURE_REASONS)
        self.state_save_failure_reasons: Counter[str] = Counter()
        self.last_save_seconds = 0.0
        self.save_seconds = Buckets(SAVE_BOUNDS)
        # wall-clock seconds from a window's end to its score being emitted
        self.close_delay_seconds = Buckets(DELAY_BOUNDS)
        # Kafka: seconds from a window's close (the watermark passing its end) to its score being committed
        self.commit_delay_seconds = Buckets(COMMIT_BOUNDS)
        # service -> (score, anomalous, window_end); read by the metrics collector
        self.latest: dict[str, tuple[float, bool, float]] = {}
        self.high_marks: dict[str, float] = {}  # source -> high mark (event seconds)
        self.consumer_lag: dict[tuple[str, int], int] = {}  # (topic, partition) -> messages behind the log end
        self.started = time.time()
        self.heartbeat = time.monotonic()
        self.ready = False
