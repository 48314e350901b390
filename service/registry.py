"""Per-service models, created on first sight from the rule that matches the service.

At most ``limits.max_live_models`` models are held in memory. When one more is needed, the least
recently scored service that has no open window is *evicted*: its model is encoded (signed with the
state key when set) into the spill store (:mod:`service.spill`) and dropped from memory together with
its cached settings and its exported score. When that service's next window closes, its model is read
back, verified and scored on as if it had never left (*reloaded*). A record the store gives back
damaged is refused: counted under ``state_records_refused{kind}``, noted for the log, and the service
starts a fresh model.

The LRU bookkeeping is one ``OrderedDict.move_to_end`` per window close and nothing per message.

New services are also admitted at a bounded rate (:class:`NewServiceBucket`): a token bucket on the
wall clock, so a stream of ever-new names cannot turn the process into a model factory.
"""

from __future__ import annotations

import itertools
import time
from collections import OrderedDict
from collections.abc import Callable, Iterable, Mapping
from typing import Any

from models import ServiceModel, build_model, decode_state, encode_state
from models.errors import ModelError, StateError
from service.config import Config, ServiceSettings, resolve
from service.errors import StateStoreError
from service.spill import SpillStore
from service.stats import RuntimeStats

__all__ = ["LiveModels", "ModelRegistry", "NewServiceBucket"]

# Eviction looks at this many of the least recently scored models for one without an open window
# before it takes the least recent anyway: a constant bound, so an eviction is O(1).
_EVICT_SCAN = 8
# Notes for the log kept between two reads of them (a damaged store could refuse many records in a row).
_MAX_NOTES = 100


class LiveModels(OrderedDict):
    """The models held in memory, least recently scored first.

    ``spill`` is the store of the evicted ones (None until the first eviction): a checkpoint writes
    them too (:meth:`service.checkpoint.CheckpointStore.save`). ``notes`` are problems met while
    scoring (a refused spilled record, a spill store that failed), waiting for non-hot-path code to
    log them (:meth:`ModelRegistry.log_notes`).
    """

    def __init__(self) -> None:
        super().__init__()
        self.spill: SpillStore | None = None
        self.notes: list[tuple[str, dict[str, Any]]] = []


class NewServiceBucket:
    """A token bucket for new services: ``rate`` tokens a second up to ``burst``; one token per new service.

    >>> b = NewServiceBucket(rate=1.0, burst=2)
    >>> [b.take(100.0), b.take(100.0), b.take(100.0), b.take(101.5), b.take(101.5)]
    [True, True, False, True, False]
    """

    __slots__ = ("rate", "burst", "tokens", "at")

    def __init__(self, rate: float, burst: int) -> None:
        self.rate = rate
        self.burst = float(burst)
        self.tokens = float(burst)  # starts full: a cold start or a backtest sees a whole fleet at once
        self.at: float | None = None  # the clock at the last take; the first take sets it

    def take(self, now: float) -> bool:
        at = self.at
        if at is None or now > at:  # a wall clock stepped back refills nothing, and never drains
            if at is not None:
                self.tokens = min(self.burst, self.tokens + (now - at) * self.rate)
            self.at = now
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False


class ModelRegistry:
    """The live models of one process, the spilled ones, and the settings each service resolved to.

    ``dirty`` holds the services whose model changed since the last checkpoint, so a checkpoint
    writes only those; an evicted dirty service stays dirty and its record is taken from the spill
    store (:meth:`record`).

    Parameters
    ----------
    config, stats
        The config and the counters.
    spill_dir
        Where the spill store goes (the state directory); None: a private temporary directory,
        made at the first eviction.
    key
        HMAC key of spilled records (the state key).
    """

    def __init__(self, config: Config, stats: RuntimeStats, *, spill_dir: str | None = None,
                 key: bytes | None = None) -> None:
        self.config = config
        self.stats = stats
        self.resolved: dict[str, ServiceSettings] = {}  # service -> settings, filled on first sight
        self.models: LiveModels = LiveModels()
        self.dirty: set[str] = set()
        self.spill_dir = spill_dir
        self.key = key
        self._spill_failed = False  # the store could not be opened: evicted models are discarded
        self._apply_limits(config)

    def _apply_limits(self, config: Config) -> None:
        lim = config.limits
        self.live_limit = lim.live_model_limit
        self.stats.models_live_limit = self.live_limit
        rate = lim.new_services_per_second
        old = getattr(self, "bucket", None)
        if rate <= 0:
            self.bucket: NewServiceBucket | None = None
        elif old is None or old.rate != rate or old.burst != lim.new_services_burst:
            self.bucket = NewServiceBucket(rate, lim.new_services_burst)

    # The wall clock of the creation bucket (replaced in tests).
    clock: Callable[[], float] = staticmethod(time.time)

    # --- the spill store -----------------------------------------------------------------
    @property
    def spill(self) -> SpillStore | None:
        return self.models.spill

    def attach_spill(self, directory: str | None = None, *, key: bytes | None = None) -> SpillStore | None:
        """Open the spill store in ``directory`` (None: a private temporary one), signed with ``key``.

        Models already spilled are moved over. Returns the store, or None when it cannot be opened
        (noted for the log; evicted models are then discarded and learned again).
        """
        self.spill_dir = directory
        self.key = key
        old = self.models.spill
        try:
            store = SpillStore(directory, key=key)
        except StateStoreError as exc:
            self._spill_failed = True
            self._note("model spill store unavailable; evicted models are discarded and learned again",
                       {"event": "spill_unavailable", "error": str(exc)})
            return None
        self._spill_failed = False
        self.models.spill = store
        if old is not None:
            for service, record in old.records():
                self._park_record(service, record, old.key)
            old.close()
        return store

    def _store(self) -> SpillStore | None:
        store = self.models.spill
        if store is None and not self._spill_failed:
            store = self.attach_spill(self.spill_dir, key=self.key)
        return store

    def _note(self, msg: str, fields: dict[str, Any]) -> None:
        notes = self.models.notes
        if len(notes) < _MAX_NOTES:
            notes.append((msg, fields))

    def log_notes(self, log: Any) -> None:
        """Log and clear the problems met while scoring (call between batches, never per message)."""
        notes = self.models.notes
        for msg, fields in notes:
            log.error(msg, extra=fields)
        notes.clear()

    def _sync_gauges(self) -> None:
        store = self.models.spill
        self.stats.models_spilled = 0 if store is None else store.count
        self.stats.spill_bytes = 0 if store is None else store.bytes

    # --- lookups ---------------------------------------------------------------------------
    def settings(self, service: str) -> ServiceSettings:
        s = self.resolved.get(service)
        if s is None:
            s = self.resolved[service] = resolve(self.config, service)
        return s

    def known(self, service: str) -> bool:
        """True when the service has a model, in memory or spilled."""
        store = self.models.spill
        return service in self.models or (store is not None and service in store)

    def admit(self, service: str, now: Callable[[], float]) -> bool:
        """May a service this process does not track yet start? Known services always may (they were
        restored); a brand-new one takes a token of the creation bucket."""
        bucket = self.bucket
        if bucket is None or self.known(service):
            return True
        return bucket.take(now())

    def model(self, service: str, owner: Mapping[str, Any] | None = None) -> ServiceModel:
        """The service's model: live (marked most recently scored), reloaded from the spill store, or new.

        ``owner`` maps services to the source holding their open windows (``SourceWindows``); eviction
        prefers services with none.
        """
        models = self.models
        m = models.get(service)
        if m is not None:
            models.move_to_end(service)
            return m
        m = self._reload(service)
        if m is None:
            m = build_model(service, self.settings(service).model)
            self.stats.models_created += 1
        models[service] = m
        if len(models) > self.live_limit:
            self._evict(owner)
        return m

    def _reload(self, service: str) -> ServiceModel | None:
        store = self.models.spill
        if store is None or service not in store:
            return None
        record = store.take(service)
        self._sync_gauges()
        kind = None
        if record is None:
            kind, detail = "CorruptState", "the spill store could not give the record back"
        else:
            try:
                name, model = decode_state(record, key=store.key)
                if name != service:
                    raise StateError(f"the record names {name!r}")
            except StateError as exc:
                kind, detail = type(exc).__name__, str(exc)
        if kind is not None:
            self.stats.state_records_refused[kind] += 1
            self.stats.models_reload_refused += 1
            self._note("spilled model refused; the service starts fresh",
                       {"event": "state_refused", "service": service, "kind": kind, "error": detail})
            return None
        self.stats.models_reloaded += 1
        wanted = self.settings(service).model
        if model.settings != wanted:
            # The config changed while it was spilled: rebuilt, as a reload would have done (reconfigure).
            self.dirty.add(service)
            self.stats.models_created += 1
            return build_model(service, wanted)
        return model

    def _evict(self, owner: Mapping[str, Any] | None) -> None:
        models = self.models
        # Never the newest (the one just put in, at the end).
        scan = list(itertools.islice(models, min(_EVICT_SCAN, len(models) - 1)))
        victim = None
        for service in scan:
            src = owner.get(service) if owner is not None else None
            if src is None or service not in src.open:
                victim = service
                break
        active = victim is None
        if active:
            victim = scan[0]
        self.evict(victim, active=active)

    def evict(self, service: str, *, active: bool = False) -> None:
        """Move a live model to the spill store (discarded, counted, when there is none)."""
        model = self.models.pop(service, None)
        if model is None:
            return
        self.resolved.pop(service, None)
        self.stats.latest.pop(service, None)  # no per-service series for a model no longer here
        self.stats.models_evicted += 1
        if active:
            self.stats.models_evicted_active += 1
        store = self._store()
        if store is not None:
            try:
                store.put(service, encode_state(service, model, key=store.key))
            except (StateStoreError, ModelError) as exc:
                self._note("a model could not be spilled; it is discarded and learned again",
                           {"event": "spill_failed", "service": service, "error": str(exc)})
                store = None
        if store is None:
            self.stats.models_discarded += 1
            self.dirty.discard(service)
        self._sync_gauges()

    def record(self, service: str, key: bytes | None) -> bytes | None:
        """The encoded record of a service's current model, signed with ``key``: from memory, else from
        the spill store (copied as it is when signed with the same key). None when neither holds it."""
        model = self.models.get(service)
        if model is not None:
            return encode_state(service, model, key=key)
        store = self.models.spill
        if store is None or service not in store:
            return None
        record = store.get(service)
        if record is None:
            return None
        if store.key == key:
            return record
        try:
            _, model = decode_state(record, key=store.key)
        except StateError:
            return None
        return encode_state(service, model, key=key)

    # --- restore ---------------------------------------------------------------------------
    def has_room(self) -> bool:
        return len(self.models) < self.live_limit

    def put(self, service: str, model: ServiceModel) -> None:
        """Install a restored model (its settings are kept as saved); past the live limit it is spilled."""
        store = self.models.spill
        if store is not None:
            store.delete(service)
        self.models[service] = model
        self.stats.models_restored += 1
        if len(self.models) > self.live_limit:
            self.evict(next(iter(self.models)))

    def park(self, service: str, record: bytes, key: bytes | None) -> None:
        """Install a restored model straight into the spill store, as its encoded record (signed with
        ``key``), without holding it in memory. The caller has verified the record."""
        self.models.pop(service, None)
        self._park_record(service, record, key)
        self.stats.models_restored += 1

    def _park_record(self, service: str, record: bytes, key: bytes | None) -> None:
        store = self._store()
        if store is None:
            self.stats.models_discarded += 1
            return
        try:
            if store.key != key:
                _, model = decode_state(record, key=key)
                record = encode_state(service, model, key=store.key)
            store.put(service, record)
        except (StateError, StateStoreError, ModelError) as exc:
            self.stats.models_discarded += 1
            self._note("a restored model could not be spilled; it is learned again",
                       {"event": "spill_failed", "service": service, "error": str(exc)})
        self._sync_gauges()

    def restore(self, records: Iterable[tuple[str, bytes]], key: bytes | None) -> None:
        """Install restored (verified) records: decoded while there is room, parked in the spill store after."""
        for service, record in records:
            if self.has_room():
                try:
                    _, model = decode_state(record, key=key)
                except StateError:
                    continue  # verified by the caller; a record that no longer decodes is left out
                self.put(service, model)
            else:
                self.park(service, record, key)

    # --- lifecycle ---------------------------------------------------------------------------
    def reconfigure(self, config: Config) -> tuple[int, int]:
        """Take a new config: later windows use the new rules; a model whose kind or parameters
        changed is rebuilt (fresh, it learns again), every other model is kept. Returns (kept, rebuilt).
        Spilled models are checked when they are reloaded."""
        self.config = config
        self.resolved.clear()
        self._apply_limits(config)
        kept = rebuilt = 0
        for service, model in list(self.models.items()):
            wanted = self.settings(service).model
            if model.settings == wanted:
                kept += 1
                continue
            self.models[service] = build_model(service, wanted)
            self.dirty.add(service)
            self.stats.models_created += 1
            rebuilt += 1
        while len(self.models) > self.live_limit:  # a lowered limit applies at once
            self.evict(next(iter(self.models)))
        return kept, rebuilt

    def drop(self, service: str) -> None:
        self.models.pop(service, None)
        self.resolved.pop(service, None)
        store = self.models.spill
        if store is not None and service in store:
            store.delete(service)
            self._sync_gauges()
        self.dirty.discard(service)

    def start_afresh(self, service: str, owner: Mapping[str, Any] | None = None) -> None:
        """Replace a service's model (live or spilled) with a fresh one, marked changed: the next
        checkpoint or changelog commit writes it over the saved state, so a restart does not bring
        the old model back (used after a model fails, :meth:`service.engine.Engine._model_failed`)."""
        self.drop(service)
        self.model(service, owner)
        self.dirty.add(service)

    def close(self) -> None:
        """Close the spill store (its temporary directory, if any, is removed)."""
        store = self.models.spill
        if store is not None:
            store.close()

    def __len__(self) -> int:
        return len(self.models)
