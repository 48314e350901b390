"""``tidewatch run`` on Kafka: exactly-once consume, score, produce.

One transactional producer per process (KIP-447 style). At each commit interval
(paced by :class:`CommitPacer`: sooner when caught up, stretched under a backlog),
inside one transaction, go: the score messages of the windows closed since the
last commit, the dead-lettered rejects, the changelog records of every service
whose state changed, and the consumer offsets (``send_offsets_to_transaction`` with
the consumer's group metadata). A read_committed reader of the score topic
therefore sees each (service, window) once, whatever crashes in between.

State lives in a compacted changelog topic, partition-aligned with the scoring
topic. On assignment the assigned partitions' services are restored from it
(read_committed) before any of their messages is processed; on revocation the
open transaction is committed first; on loss it is aborted and the state dropped.
When a transaction must be aborted, every assigned partition is rewound to its
committed offset and its state restored from the changelog, so the work is redone
exactly. A fenced producer (the broker bumps its epoch when it times out a
transaction, for example during a broker outage) is re-initialised once and the
work redone; fenced again within two minutes means another live process holds
the id. That, and every other fatal error, raises :class:`BusFatalError` and the
process exits non-zero so the orchestrator restarts it.

When producers do not key input by service (``input_keyed = false``), input is
first forwarded, in the same transactions, to an internal repartition topic keyed
by service; the scoring stage reads that topic, so state stays partition-aligned.
"""

from __future__ import annotations

import gc
import logging
import os
import socket
import threading
import time
from collections import deque
from collections.abc import Callable, Iterator
from typing import Any, TypeVar

import orjson
from confluent_kafka import OFFSET_BEGINNING, Consumer, KafkaError, KafkaException, Producer, TopicPartition
from confluent_kafka.admin import AdminClient, NewTopic

from models import decode_state
from models.errors import StateError
from service.changelog import PartitionState, apply_record, encode_mark, encode_windows, mark_key, model_key, windows_key
from service.config import Config, KafkaConfig
from service.decode import Rejected
from service.engine import Engine
from service.errors import BusFatalError, ConfigError, TidewatchError
from service.httpserver import MetricsServer
from service.metrics import build_registry
from service.stats import RuntimeStats
from service.windows import Window

__all__ = ["CommitPacer", "KafkaRunner", "consumer_settings", "producer_settings"]

log = logging.getLogger("tidewatch.kafka")

T = TypeVar("T")
_CALL_TIMEOUT = 30.0  # seconds for one transactional call before it is retried
# A call still blocked this long after it started will not return (see KafkaRunner._watch_calls).
_STUCK_AFTER_S = _CALL_TIMEOUT + 15.0
EXIT_STUCK = 75  # EX_TEMPFAIL: the supervisor restarts the worker
_QUEUE_PAUSE = 20_000  # unkeyed input: queued messages per partition at which fetching it pauses
_BACKLOG_BATCHES = 10  # batches still to read from which commits are stretched (CommitPacer.min_backlog)


class CommitPacer:
    """When the loop commits: every ``interval``, sooner when caught up with scores waiting, later under a backlog.

    Caught up (the last batch was not full), a transaction that holds scores goes as soon as a tenth of an
    interval has passed since the last commit, rather than holding alerts back for the rest of the interval;
    otherwise the interval commits. Behind by a backlog (the batch was full and at least ``min_backlog``
    messages are still to read), a commit is due once the interval has passed *and* ``work_per_commit`` times
    the last commit's duration has gone by since it ended, at most ``stretch_max`` intervals: a commit writes
    the record of every model scored since the last one, under a backlog that is nearly every model however
    short the interval, so its cost hardly grows with the gap and committing then takes at most
    ``1 / (1 + work_per_commit)`` of the loop's time. A full batch with less than that left to read (the
    messages that came in while a burst of windows was scored) and the first batch that is not full fall back
    to the interval and the early commits, so the latency when caught up is unchanged.

    Times are ``time.monotonic()`` seconds, passed in by the caller (no clock is read here).

    >>> p = CommitPacer(1.0, now=0.0, min_backlog=20_000)
    >>> p.due(1.0, caught_up=False, scores_waiting=True, backlog=lambda: 500_000)
    True
    >>> p.committed(started=1.0, ended=1.5)  # a half-second commit: 7.5 s of work before the next
    >>> p.due(2.6, caught_up=False, scores_waiting=True, backlog=lambda: 450_000)
    False
    >>> p.due(2.6, caught_up=False, scores_waiting=True, backlog=lambda: 3_000)
    True
    >>> p.due(9.0, caught_up=False, scores_waiting=True, backlog=lambda: 400_000)
    True
    """

    __slots__ = ("interval", "min_backlog", "work_per_commit", "stretch_max", "next_tick", "last_end", "gap")

    def __init__(self, interval: float, *, now: float, min_backlog: int, work_per_commit: float = 15.0,
                 stretch_max: float = 10.0) -> None:
        self.interval = interval
        self.min_backlog = min_backlog
        # 15: commits take at most 1/16 (about 6 %) of the loop under a backlog.
        self.work_per_commit = work_per_commit
        # 10 intervals: bounds the work redone after a crash and how long a transaction stays open under a
        # backlog (10 s at the default interval, far below the producer's transaction.timeout.ms).
        self.stretch_max = stretch_max
        self.next_tick = now + interval
        self.last_end = float("-inf")
        self.gap = 0.0  # seconds of work due after the last commit under a backlog; 0 until one was timed

    def due(self, now: float, *, caught_up: bool, scores_waiting: bool, backlog: Callable[[], int]) -> bool:
        """Commit now? ``backlog()`` gives the messages still to read; asked only when the answer turns on it."""
        if now >= self.next_tick:
            return caught_up or now >= self.last_end + self.gap or backlog() < self.min_backlog
        return caught_up and scores_waiting and now >= self.last_end + self.interval / 10

    def committed(self, started: float, ended: float) -> None:
        """A commit due by :meth:`due` ran from ``started`` to ``ended``."""
        self.last_end = ended
        self.gap = min((ended - started) * self.work_per_commit, self.interval * self.stretch_max)
        # Fixed rate: a commit's own duration does not stretch the interval. Overloaded (a commit longer
        # than the interval), it falls back to an interval of work between commits. An early commit leaves
        # the next tick where it was.
        if ended >= self.next_tick:
            self.next_tick += self.interval
            if self.next_tick <= ended:
                self.next_tick = ended + self.interval


class _AbortNeeded(Exception):
    """The transaction must be aborted and the work since the last commit redone."""


class _Fenced(_AbortNeeded):
    """The producer was fenced: its epoch was bumped (a transaction timed out on the broker, or another
    process took over this transactional id)."""


_FENCED_CODES = frozenset({KafkaError._FENCED, KafkaError.PRODUCER_FENCED, KafkaError.INVALID_PRODUCER_EPOCH})
# A producer fenced again this soon after being replaced means another live process holds the id.
_REFENCE_WINDOW_S = 120.0
# Refusals that asking again will not change.
_DENIED_CODES = frozenset({KafkaError.TOPIC_AUTHORIZATION_FAILED, KafkaError.CLUSTER_AUTHORIZATION_FAILED,
                           KafkaError.SASL_AUTHENTICATION_FAILED, KafkaError._AUTHENTICATION})


class _Stopped(Exception):
    """A stop was requested while restoring; nothing restored half-way is used."""


_CLIENT_LOG = logging.getLogger("tidewatch.librdkafka")


def _common(k: KafkaConfig) -> dict[str, Any]:
    # librdkafka's own log lines go through our JSON logging instead of raw stderr.
    conf: dict[str, Any] = {"bootstrap.servers": k.bootstrap_servers, "logger": _CLIENT_LOG}
    conf.update(k.properties)
    return conf


def consumer_settings(k: KafkaConfig) -> dict[str, Any]:
    conf = _common(k)
    conf.update(
        {
            "group.id": k.group_id,
            # Offsets are committed inside the producer's transaction, never by the consumer.
            "enable.auto.commit": False,
            "enable.auto.offset.store": False,
            # librdkafka's default already, stated because exactly-once depends on it: the
            # repartition topic is written transactionally and aborted writes must stay unseen.
            "isolation.level": "read_committed",
            # A new group starts at the oldest retained message so nothing produced before the
            # first start is skipped.
            "auto.offset.reset": "earliest",
        }
    )
    conf.update(k.consumer_properties)
    return conf


def producer_settings(k: KafkaConfig, instance: str) -> dict[str, Any]:
    conf = _common(k)
    conf.update(
        {
            # Stable across restarts of this instance, so a restarted process fences its previous
            # incarnation and aborts the transaction it left open at once (no waiting for the timeout).
            "transactional.id": f"{k.group_id}.{instance}",
            # Key -> partition exactly as Java producers place keys, so scores and repartitioned
            # input land where JVM consumers and Kafka Streams expect them.
            "partitioner": "murmur2_random",
            # Bounds how long a crashed, never-restarted instance's open transaction can hold back
            # read_committed readers; well above the commit interval to ride out broker hiccups.
            "transaction.timeout.ms": 60000,
            # Scores of one commit interval go out in a few large batches; the commit flushes anyway.
            "linger.ms": 20,
        }
    )
    conf.update(k.producer_properties)
    return conf


class KafkaRunner:
    """Runs the exactly-once loop until ``stop`` is set.

    Parameters
    ----------
    config
        The loaded config; ``config.kafka`` must be set.
    stop
        Set by the signal handler: finish the batch, commit, leave the group.
    state_key
        HMAC key for model records, or None.
    """

    def __init__(self, config: Config, stop: threading.Event, *, state_key: bytes | None = None,
                 stats: RuntimeStats | None = None, http_listen: str | None = None, reloader=None) -> None:
        if config.kafka is None:
            raise TidewatchError("the config has no [kafka] table")
        self.config = config
        self.k = k = config.kafka
        self.stop = stop
        self.state_key = state_key
        self.stats = stats if stats is not None else RuntimeStats()
        self.instance = k.instance_id or socket.gethostname()
        self.http_listen = config.http.listen if http_listen is None else http_listen
        # The topic whose partitions carry state: the input itself, or the repartition topic.
        self.scoring_topics = set(k.input_topics) if k.input_keyed else {k.repartition_topic}
        self.forward_topics = set() if k.input_keyed else set(k.input_topics)
        self.engine = Engine(config, on_score=self._on_score, on_reject=self._on_reject, stats=self.stats)
        # OpenTelemetry topics: one decoder each (a decoder remembers cumulative sums per series).
        self._otlp: dict[str, Any] = {}
        for topic, fmt in k.input_formats.items():
            if fmt != "native":
                from service.embedded import otlp_settings
                from service.otlp import OtlpDecoder

                # Cumulative-sum memory is not checkpointed on Kafka: after a restart or a partition move
                # each cumulative series gives no rate for one export interval (its first point is a baseline).
                self._otlp[topic] = OtlpDecoder(fmt, **otlp_settings(config))
        self.consumer: Consumer | None = None
        self.producer: Producer | None = None
        self.in_txn = False
        self.pending_offsets: dict[tuple[str, int], int] = {}
        self.assigned: set[tuple[str, int]] = set()
        self._abort_pending = False
        self.reloader = reloader
        self._closed_at: list[float] = []  # when each window scored in the open transaction closed
        self._fwd_marks: dict[tuple[str, int], float] = {}  # unkeyed input: newest event time forwarded per partition
        self._fwd_queue: dict[tuple[str, int], deque] = {}  # unkeyed input waiting to be forwarded, per partition
        self._next_offset: dict[tuple[str, int], int] = {}
        self._paused: set[tuple[str, int]] = set()
        self._call_started: float | None = None  # monotonic start of the transactional call under way
        self._replaced_at: float | None = None  # when the producer was last re-initialised after a fence
        self._watch_stop = threading.Event()

    # --- set-up ----------------------------------------------------------------------
    def _ensure_topics(self) -> None:
        k = self.k
        try:
            admin = AdminClient(_common(k))
        except KafkaException as exc:
            # The first client made: settings librdkafka refuses (an unknown SASL mechanism) end here.
            raise ConfigError(f"[kafka] client settings refused by librdkafka: {exc.args[0].str()}") from exc
        md = self._metadata(admin)
        counts = set()
        for t in k.input_topics:
            if t not in md.topics or md.topics[t].error is not None:
                raise TidewatchError(f"input topic {t!r} does not exist on {k.bootstrap_servers}")
            counts.add(len(md.topics[t].partitions))
        if len(counts) != 1:
            raise TidewatchError(f"input topics {list(k.input_topics)} must have the same number of partitions")
        n = counts.pop()
        wanted = {
            k.output_topic: (n, {}),
            k.rejects_topic: (n, {}),
            # Compacted: only the latest state of each service is needed to restore it.
            k.changelog_topic: (n, {"cleanup.policy": "compact", "min.compaction.lag.ms": "0"}),
        }
        if not k.input_keyed:
            wanted[k.repartition_topic] = (n, {})
        missing = [t for t in wanted if t not in md.topics]
        if missing and k.create_topics:
            futures = admin.create_topics(
                [NewTopic(t, num_partitions=wanted[t][0], replication_factor=k.replication_factor, config=wanted[t][1])
                 for t in missing]
            )
            for t, f in futures.items():
                try:
                    f.result(_CALL_TIMEOUT)
                except KafkaException as exc:
                    if exc.args[0].code() != KafkaError.TOPIC_ALREADY_EXISTS:
                        raise TidewatchError(f"cannot create topic {t!r}: {exc}") from exc
        elif missing:
            raise TidewatchError(f"topics {missing} do not exist and create_topics is false")
        md = self._metadata(admin)
        state_parts = len(md.topics[k.changelog_topic].partitions) if k.changelog_topic in md.topics else n
        scoring_parts = n if k.input_keyed else len(md.topics[k.repartition_topic].partitions)
        if state_parts != scoring_parts:
            raise TidewatchError(
                f"changelog topic {k.changelog_topic!r} has {state_parts} partitions but the scoring topic has "
                f"{scoring_parts}; they must be equal (partition p of the changelog holds partition p's services)"
            )

    def _metadata(self, admin: AdminClient):
        """Cluster metadata, asked in short tries so librdkafka's log lines (a TLS handshake that
        fails, a refused connection) are served to the log between them and a stop request is heard."""
        deadline = time.monotonic() + _CALL_TIMEOUT
        while True:
            try:
                return admin.list_topics(timeout=1.0)
            except KafkaException as exc:
                admin.poll(0)
                if self.stop.is_set():
                    raise _Stopped() from exc
                if time.monotonic() > deadline:
                    raise TidewatchError(f"no answer from the brokers {self.k.bootstrap_servers} within "
                                         f"{_CALL_TIMEOUT:.0f} s (see the librdkafka log lines above): {exc}") from exc

    # --- callbacks from the engine (inside a transaction) ----------------------------------
    def _produce(self, topic: str, value: bytes, key: bytes | None = None, partition: int | None = None,
                 headers: list | None = None) -> None:
        p = self.producer
        kwargs: dict[str, Any] = {"value": value}
        if key is not None:
            kwargs["key"] = key
        if partition is not None:
            kwargs["partition"] = partition
        if headers:
            kwargs["headers"] = headers
        while True:
            try:
                p.produce(topic, **kwargs)
                return
            except BufferError:
                # The local queue is full: serve delivery reports until there is room.
                p.poll(0.05)
            except KafkaException as exc:
                self._classify(exc)

    def _on_score(self, service: str, payload: bytes, window: Window) -> None:
        self._produce(self.k.output_topic, payload, key=service.encode("utf-8"))
        self._closed_at.append(time.monotonic())

    def _on_reject(self, code: str, detail: str, raw: bytes, origin: Any) -> None:
        topic, partition, offset = origin
        headers = [
            ("tidewatch-reason", code.encode()),
            ("tidewatch-detail", detail.encode("utf-8", errors="replace")),
            ("tidewatch-origin", f"{topic}/{partition}/{offset}".encode("utf-8", errors="replace")),
        ]
        self._produce(self.k.rejects_topic, raw, headers=headers)

    # --- transactions ------------------------------------------------------------------
    def _classify(self, exc: KafkaException) -> None:
        err = exc.args[0] if exc.args else None
        if isinstance(err, KafkaError):
            if err.fatal():
                if err.code() in _FENCED_CODES:
                    raise _Fenced(err.str()) from exc
                raise BusFatalError(f"fatal Kafka error, exiting so the orchestrator restarts: {err.str()}") from exc
            if err.txn_requires_abort():
                raise _AbortNeeded(err.str()) from exc
            if err.retriable():
                return
        raise _AbortNeeded(str(exc)) from exc

    def _call(self, fn: Callable[[], T]) -> T:
        """Call a transactional API, retrying what is retriable."""
        while True:
            self._call_started = time.monotonic()
            try:
                return fn()
            except KafkaException as exc:
                self._classify(exc)
                log.warning("retriable Kafka error; retrying", extra={"event": "kafka_retry", "error": str(exc)})
                time.sleep(0.2)
            finally:
                self._call_started = None

    def _watch_calls(self) -> None:
        """Leave the process when a transactional call outlives its timeout for good.

        After the coordinator broker restarts, librdkafka (2.x) can leave a coordinator request waiting
        for a broker state change that never comes, and the call then blocks past its timeout
        (librdkafka issues 5456 and 5511); nothing inside the process can unblock it. The open
        transaction is never committed, so exiting is safe: the supervisor (``tidewatch run``'s parent
        process) or the orchestrator starts a new worker, which fences this transactional id, aborts the
        transaction and redoes the work from the changelog. Runs in a daemon thread.
        """
        while not self._watch_stop.wait(2.0):
            started = self._call_started
            if started is None or time.monotonic() - started < _STUCK_AFTER_S:
                continue
            log.critical("a transactional call is stuck past its timeout; exiting for a clean restart",
                         extra={"event": "txn_call_stuck", "seconds": round(time.monotonic() - started, 1)})
            logging.shutdown()
            os._exit(EXIT_STUCK)

    def _begin(self) -> None:
        if not self.in_txn:
            # Marked first: if begin fails half-way, the rewind path aborts whatever is left open.
            self.in_txn = True
            self._call(self.producer.begin_transaction)

    def _write_state(self) -> None:
        k = self.k
        engine = self.engine
        for source_id, src in engine.sources.items():
            if not src.touched:
                continue
            partition = int(source_id.rpartition(":")[2])
            for service in src.touched:
                self._produce(k.changelog_topic, encode_windows(source_id, src.service_state(service)),
                              key=windows_key(service), partition=partition)
            src.touched.clear()
            if src.high_mark != float("-inf"):
                self._produce(k.changelog_topic, encode_mark(src.high_mark), key=mark_key(source_id), partition=partition)
        self._write_models()

    def _write_models(self) -> None:
        """Produce the record of every model changed since the last call into the open transaction."""
        k = self.k
        engine = self.engine
        registry = engine.registry
        for service in sorted(registry.dirty):
            src = engine.owner.get(service)
            if src is None:
                continue
            # Live, or evicted to the spill store since it changed: either way its latest state.
            record = registry.record(service, self.state_key)
            if record is None:
                continue
            self._produce(k.changelog_topic, record, key=model_key(service), partition=src.tag)
        registry.dirty.clear()

    def commit(self) -> None:
        """Commit scores, state and offsets in one transaction (begun if offsets moved)."""
        if not self.in_txn and not self.pending_offsets:
            return
        try:
            self._begin()
            self._write_state()
            self.engine.registry.log_notes(log)
            if self.pending_offsets:
                offsets = [TopicPartition(t, p, o) for (t, p), o in sorted(self.pending_offsets.items())]
                meta = self.consumer.consumer_group_metadata()
                self._call(lambda: self.producer.send_offsets_to_transaction(offsets, meta, _CALL_TIMEOUT))
            self._call(lambda: self.producer.commit_transaction(_CALL_TIMEOUT))
            self.in_txn = False
            now = time.monotonic()
            observe = self.stats.commit_delay_seconds.observe
            for t in self._closed_at:
                observe(now - t)
            self._closed_at.clear()
            self._record_lag()
            self.pending_offsets.clear()
        except _AbortNeeded as exc:
            log.warning("transaction aborted; rewinding to the committed offsets", extra={"event": "txn_abort", "error": str(exc)})
            self._abort_and_rewind()

    def _cached_lag(self) -> Iterator[tuple[tuple[str, int], int]]:
        """``((topic, partition), high watermark - next offset)`` of each assigned partition with both known.

        Cached watermarks come with every fetch response: no extra request.
        """
        for topic, partition in self.assigned:
            offset = self._next_offset.get((topic, partition))
            if offset is None:
                continue
            try:
                _low, high = self.consumer.get_watermark_offsets(TopicPartition(topic, partition), cached=True)
            except KafkaException:
                continue
            if high >= 0:
                yield (topic, partition), high - offset

    def _record_lag(self) -> None:
        lag = self.stats.consumer_lag
        for tp, behind in self._cached_lag():
            lag[tp] = max(0, behind)

    def _backlog(self) -> int:
        """Messages still to read on the assigned partitions, from the cached watermarks (no request)."""
        return sum(behind for _tp, behind in self._cached_lag() if behind > 0)

    def _abort(self) -> None:
        """Abort whatever transaction the producer may hold, retrying through broker outages."""
        while True:
            try:
                self.producer.abort_transaction(_CALL_TIMEOUT)
                break
            except KafkaException as exc:
                err = exc.args[0]
                if not isinstance(err, KafkaError):
                    raise
                if err.fatal():
                    if err.code() in _FENCED_CODES:
                        raise _Fenced(err.str()) from exc
                    raise BusFatalError(f"fatal Kafka error while aborting: {err.str()}") from exc
                if err.code() == KafkaError._STATE:
                    break  # no transaction in progress: nothing to abort
                log.warning("abort not acknowledged yet; retrying", extra={"event": "txn_abort_retry", "error": err.str()})
                time.sleep(0.5)
        self.in_txn = False

    def _replace_producer(self, reason: str) -> None:
        """Start a new transactional producer under the same id (what the orchestrator would do by
        restarting us), unless this one was already replaced moments ago: then another live process
        holds the id, and this one must go."""
        now = time.monotonic()
        if self._replaced_at is not None and now - self._replaced_at < _REFENCE_WINDOW_S:
            raise BusFatalError(f"fenced again soon after re-initialising; another instance holds this "
                                f"transactional id, exiting: {reason}")
        self._replaced_at = now
        log.error("producer fenced; re-initialising it and redoing the work since the last commit",
                  extra={"event": "producer_replaced", "reason": reason})
        old = self.producer
        try:
            old.purge()
        except (KafkaException, RuntimeError):
            pass
        self.producer = Producer(producer_settings(self.k, self.instance))
        self._call(lambda: self.producer.init_transactions(_CALL_TIMEOUT))
        self.in_txn = False

    def _abort_and_rewind(self) -> None:
        try:
            self._abort()
        except _Fenced as exc:
            self._replace_producer(str(exc))
        if self._paused:
            self.consumer.resume([TopicPartition(t, p) for t, p in self._paused])
            self._paused.clear()
        self.pending_offsets.clear()
        self._closed_at.clear()
        parts = sorted(self.assigned)
        for topic, partition in parts:
            self._drop(topic, partition)
        self._restore([(t, p) for t, p in parts if t in self.scoring_topics])
        committed = self.consumer.committed([TopicPartition(t, p) for t, p in parts], timeout=_CALL_TIMEOUT)
        for tp in committed:
            offset = tp.offset if tp.offset >= 0 else OFFSET_BEGINNING
            self.consumer.seek(TopicPartition(tp.topic, tp.partition, offset))

    # --- state per partition ---------------------------------------------------------
    @staticmethod
    def _source_id(topic: str, partition: int) -> str:
        return f"{topic}:{partition}"

    def _drop(self, topic: str, partition: int) -> None:
        self._fwd_marks.pop((topic, partition), None)
        self._fwd_queue.pop((topic, partition), None)
        self._next_offset.pop((topic, partition), None)
        self._paused.discard((topic, partition))
        self.engine.drop_source(self._source_id(topic, partition))
        self.stats.consumer_lag.pop((topic, partition), None)
        self.stats.high_marks.pop(self._source_id(topic, partition), None)

    def _restore(self, parts: list[tuple[str, int]]) -> None:
        """Read the changelog partitions of ``parts`` and install their services."""
        if not parts:
            return
        # Thousands of long-lived records and models are made here in one go; the cyclic collector would
        # walk them over and over while they are made (about a quarter of a 10,000-model restore) and find
        # nothing to free. Reference counting still frees whatever is dropped.
        collecting = gc.isenabled()
        gc.disable()
        try:
            self._restore_parts(parts)
        finally:
            if collecting:
                gc.enable()

    def _restore_parts(self, parts: list[tuple[str, int]]) -> None:
        started = time.monotonic()
        k = self.k
        partitions = sorted({p for _, p in parts})
        conf = _common(k)
        conf.update(
            {
                "group.id": f"{k.group_id}.restore",  # never subscribes or commits; required by the client
                "enable.auto.commit": False,
                "isolation.level": "read_committed",  # only committed state counts
                "enable.partition.eof": True,  # tells us when a partition has been read to its end
                "auto.offset.reset": "earliest",
            }
        )
        # The operator's consumer tuning (prefetch limits, TLS) applies here too, but never their group.
        conf.update({key: v for key, v in k.consumer_properties.items() if key not in ("group.id", "isolation.level")})
        # Where each changelog partition ends counting records of transactions still open. A read_committed
        # reader reports its end at the last stable offset, before an open transaction; when the previous
        # owner's last transaction is finishing (it was killed after sending its commit, or handed over in a
        # hurry), stopping there would miss that transaction's state while the group hands us its input
        # offsets, and windows whose every message it held would never be scored. So reading goes on until
        # the end reaches this mark: the transaction commits (its state counts) or aborts (it does not).
        bounds = self._log_bounds(conf, partitions)
        log.info("restoring state", extra={"event": "state_restoring", "partitions": partitions})
        restorer = Consumer(conf)
        states: dict[int, PartitionState] = {p: PartitionState() for p in partitions}
        try:
            todo = set()
            assignment = []
            ends = {p: high for p, (_, high) in bounds.items()}
            for p in partitions:
                low, high = bounds[p]
                if high > low:
                    todo.add(p)
                    assignment.append(TopicPartition(k.changelog_topic, p, OFFSET_BEGINNING))
            if assignment:
                restorer.assign(assignment)
            next_note = time.monotonic() + 10.0
            while todo:
                if self.stop.is_set():
                    raise _Stopped()
                if time.monotonic() > next_note:
                    # A crashed instance's open transaction holds the changelog back until the broker
                    # aborts it (transaction.timeout.ms); the group's offset fetch waits for it too.
                    log.info("still restoring; an open transaction may hold the changelog back",
                             extra={"event": "restore_waiting", "partitions": sorted(todo)})
                    next_note = time.monotonic() + 10.0
                # The loop is alive while it restores: /healthz must not fail a long restore.
                self.stats.heartbeat = time.monotonic()
                for msg in restorer.consume(num_messages=5000, timeout=0.5):
                    err = msg.error()
                    if err is not None:
                        if err.code() == KafkaError._PARTITION_EOF:
                            # The end is reported again each time it moves, so an early one just waits.
                            if msg.offset() >= ends[msg.partition()]:
                                todo.discard(msg.partition())
                            continue
                        if err.fatal():
                            raise BusFatalError(f"fatal error reading the changelog: {err.str()}")
                        continue
                    apply_record(states[msg.partition()], msg.key(), msg.value())
        finally:
            restorer.close()
        n_models = 0
        registry = self.engine.registry
        if registry.spill is None:
            # Spilled records are signed like changelog ones; without a state directory on Kafka the store is a
            # private temporary file (the changelog stays the record).
            registry.key = self.state_key
        for topic, partition in parts:
            source_id = self._source_id(topic, partition)
            src = self.engine.source(source_id)
            src.tag = partition
            st = states[partition]
            for line in st.refused:
                self.stats.state_records_refused["CorruptState"] += 1
                log.error("changelog record refused", extra={"event": "state_refused", "detail": line})
            mark = st.marks.get(source_id)
            if mark is not None and mark > src.high_mark:
                src.high_mark = mark
            for service, doc in st.windows.items():
                if doc["source"] != source_id:
                    continue
                settings = self.engine.registry.settings(service)
                src.restore_service(service, doc["windows"], settings.lateness)
                self.engine.owner[service] = src
            for service, blob in st.models.items():
                owner_doc = st.windows.get(service)
                if owner_doc is not None and owner_doc["source"] != source_id:
                    continue
                try:
                    name, model = decode_state(blob, key=self.state_key)
                except StateError as exc:
                    self.stats.state_records_refused[type(exc).__name__] += 1
                    log.error("model record refused; the service starts fresh",
                              extra={"event": "state_refused", "service": service, "error": str(exc)})
                    continue
                if registry.has_room():
                    registry.put(name, model)
                else:
                    # Past limits.max_live_models: verified above, parked as its record, never held live.
                    del model
                    registry.park(name, blob, self.state_key)
                self.engine.owner.setdefault(name, src)
                n_models += 1
            registry.log_notes(log)
            src.touched.clear()
        log.info("state restored", extra={"event": "state_restored", "partitions": partitions, "models": n_models,
                                          "seconds": round(time.monotonic() - started, 3)})

    def _log_bounds(self, conf: dict[str, Any], partitions: list[int]) -> dict[int, tuple[int, int]]:
        """The changelog's (first offset, high watermark read uncommitted) for ``partitions``."""
        k = self.k
        while True:
            # A client of its own each time: one made before a broker restart can keep asking with a
            # stale leader epoch and be refused for good.
            probe = Consumer({**conf, "isolation.level": "read_uncommitted"})
            try:
                return {p: probe.get_watermark_offsets(TopicPartition(k.changelog_topic, p), timeout=_CALL_TIMEOUT)
                        for p in partitions}
            except KafkaException as exc:
                err = exc.args[0] if exc.args else None
                if isinstance(err, KafkaError) and err.code() in _DENIED_CODES:
                    raise BusFatalError(f"reading the changelog's end offsets was refused: {err.str()}") from exc
                if self.stop.is_set():
                    raise _Stopped() from exc
                # The broker is away or electing a leader: not ready (readyz) but alive, so keep asking.
                self.stats.heartbeat = time.monotonic()
                log.warning("changelog end offsets not read; retrying",
                            extra={"event": "kafka_retry", "error": str(exc)})
                time.sleep(0.5)
            finally:
                probe.close()

    # --- rebalance callbacks -----------------------------------------------------------
    def _on_assign(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        parts = [(tp.topic, tp.partition) for tp in partitions]
        self.assigned.update(parts)
        self.stats.ready = False  # /readyz: not until the assigned state is restored
        self._restore([(t, p) for t, p in parts if t in self.scoring_topics])
        self.stats.ready = True
        log.info("partitions assigned", extra={"event": "assigned", "partitions": sorted(parts)})

    def _on_revoke(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        # Hand over cleanly: everything done so far is committed before another member takes over.
        self.commit()
        for tp in partitions:
            self._drop(tp.topic, tp.partition)
            self.assigned.discard((tp.topic, tp.partition))
            self.pending_offsets.pop((tp.topic, tp.partition), None)
        log.info("partitions revoked", extra={"event": "revoked", "partitions": sorted((tp.topic, tp.partition) for tp in partitions)})

    def _on_lost(self, consumer: Consumer, partitions: list[TopicPartition]) -> None:
        # Another member may already own them: nothing of ours about them may be committed.
        try:
            self._abort()
        except _Fenced as exc:
            self._replace_producer(str(exc))
        for tp in partitions:
            self._drop(tp.topic, tp.partition)
            self.assigned.discard((tp.topic, tp.partition))
        self.pending_offsets.clear()
        self._closed_at.clear()
        # What this transaction held for partitions we still own must be redone too.
        self._abort_pending = bool(self.assigned)
        log.warning("partitions lost", extra={"event": "lost", "partitions": sorted((tp.topic, tp.partition) for tp in partitions)})

    # --- the loop ------------------------------------------------------------------------
    def _process(self, msgs: list) -> None:
        engine = self.engine
        i, n = 0, len(msgs)
        while i < n:
            msg = msgs[i]
            err = msg.error()
            if err is not None:
                if err.fatal():
                    raise BusFatalError(f"fatal consumer error: {err.str()}")
                log.warning("consumer error", extra={"event": "consumer_error", "error": err.str()})
                i += 1
                continue
            topic, partition = msg.topic(), msg.partition()
            j = i + 1
            while j < n and msgs[j].error() is None and msgs[j].partition() == partition and msgs[j].topic() == topic:
                j += 1
            run = msgs[i:j]
            self._begin()
            if topic in self.forward_topics:
                # Queued, then forwarded in event-time step with the other input partitions (_drain);
                # offsets are committed only up to what has been forwarded.
                self._queue(run)
                self._next_offset[(topic, partition)] = run[-1].offset() + 1
                i = j
                continue
            else:
                src = engine.source(self._source_id(topic, partition))
                src.tag = partition
                values = [m.value() or b"" for m in run]
                origin = lambda idx, run=run: (run[idx].topic(), run[idx].partition(), run[idx].offset())  # noqa: E731
                otlp = self._otlp.get(topic)
                if otlp is None:
                    engine.feed(src, values, origin)
                else:
                    engine.feed_payloads(src, values, origin, otlp.decode)
                if src.high_mark != float("-inf"):
                    self.stats.high_marks[self._source_id(topic, partition)] = src.high_mark
            self.pending_offsets[(topic, partition)] = run[-1].offset() + 1
            self._next_offset[(topic, partition)] = run[-1].offset() + 1
            i = j

    def _queue(self, run: list) -> None:
        """Unkeyed input: validate and queue a run of one input partition for re-keying."""
        tp = (run[0].topic(), run[0].partition())
        q = self._fwd_queue.setdefault(tp, deque())
        otlp = self._otlp.get(tp[0])
        decode = self.engine.decoder.decode
        for m in run:
            raw = m.value() or b""
            origin = (m.topic(), m.partition(), m.offset())
            try:
                if otlp is None:
                    service, ts, _metrics = decode(raw)
                    items = [(service, raw)]
                else:
                    events = otlp.decode(raw)
                    if not events:
                        q.append((float("-inf"), m.offset(), []))
                        continue
                    ts = max(e[1] for e in events)
                    items = [(s, orjson.dumps({"service": s, "ts": t, "metrics": x})) for s, t, x in events]
            except Rejected as r:
                self.engine.reject(r.code, r.detail, raw, origin)
                q.append((float("-inf"), m.offset(), []))  # nothing to forward, but its offset must pass
                continue
            q.append((ts, m.offset(), items))
        if len(q) >= _QUEUE_PAUSE and tp not in self._paused:
            # Bounded memory: stop fetching a partition that is far ahead until its queue drains.
            self.consumer.pause([TopicPartition(*tp)])
            self._paused.add(tp)

    def _mark(self, tp: tuple[str, int]) -> float:
        """Event time of ``tp``'s next message to forward, else of the last one forwarded."""
        q = self._fwd_queue.get(tp)
        if q:
            return max(q[0][0], self._fwd_marks.get(tp, float("-inf")))
        return self._fwd_marks.get(tp, float("-inf"))

    def _drain(self) -> None:
        """Forward queued input in event-time step: an input partition may forward a message only while
        it is at most ``repartition_alignment`` ahead of the slowest other busy partition.

        Every input partition feeds every repartition partition; read from a backlog, one input partition
        can be hours ahead of another and the merged stream would make the slower one's events late. A
        partition read to its log end with nothing queued is idle and holds no one back. The slowest
        partition can always forward, so this never stalls.
        """
        parts = [tp for tp in self.assigned if tp[0] in self.forward_topics]
        if not parts:
            return
        align = self.k.repartition_alignment
        while True:
            busy = [tp for tp in parts if self._fwd_queue.get(tp) or not self._at_end(tp)]
            progressed = False
            for tp in parts:
                q = self._fwd_queue.get(tp)
                if not q:
                    continue
                others = [self._mark(o) for o in busy if o != tp]
                limit = min(others) + align if others else float("inf")
                mark = self._fwd_marks.get(tp, float("-inf"))
                while q and (q[0][0] <= limit or q[0][0] <= mark):
                    ts, offset, items = q.popleft()
                    for service, payload in items:
                        self._produce(self.k.repartition_topic, payload, key=service.encode("utf-8"))
                    if ts > mark:
                        mark = ts
                    self.pending_offsets[tp] = offset + 1
                    progressed = True
                self._fwd_marks[tp] = mark
                if tp in self._paused and len(q) < _QUEUE_PAUSE // 2:
                    self.consumer.resume([TopicPartition(*tp)])
                    self._paused.discard(tp)
            if not progressed:
                return

    def _at_end(self, tp: tuple[str, int]) -> bool:
        try:
            _low, high = self.consumer.get_watermark_offsets(TopicPartition(*tp), cached=True)
        except KafkaException:
            return True
        return high < 0 or self._next_offset.get(tp, 0) >= high

    def run(self) -> None:
        k = self.k
        try:
            self._ensure_topics()
        except _Stopped:
            log.info("stopped before the brokers answered", extra={"event": "stopped"})
            return
        try:
            self.producer = Producer(producer_settings(k, self.instance))
            self.consumer = Consumer(consumer_settings(k))
        except KafkaException as exc:
            raise ConfigError(f"[kafka] client settings refused by librdkafka: {exc.args[0].str()}") from exc
        watchdog = threading.Thread(target=self._watch_calls, name="tidewatch-txn-watch", daemon=True)
        watchdog.start()
        self._call(lambda: self.producer.init_transactions(_CALL_TIMEOUT))
        topics = sorted(self.scoring_topics | self.forward_topics)
        self.consumer.subscribe(topics, on_assign=self._on_assign, on_revoke=self._on_revoke, on_lost=self._on_lost)
        server = None
        if self.http_listen:
            registry = build_registry(self.stats, lambda: len(self.engine.registry.models), self.config.limits.max_service_series)
            server = MetricsServer(self.http_listen, registry, self.stats).start()
        log.info("consuming", extra={"event": "started", "topics": topics, "instance": self.instance,
                                     "transactional_id": f"{k.group_id}.{self.instance}"})
        # Ten full batches still to read: more than the input that gathers while a burst of windows is scored
        # when caught up, far less than a backlog worth stretching the commits for.
        pacer = CommitPacer(k.commit_interval, now=time.monotonic(), min_backlog=_BACKLOG_BATCHES * k.batch_size)
        try:
            while not self.stop.is_set():
                msgs = self.consumer.consume(num_messages=k.batch_size, timeout=0.1)
                self.stats.heartbeat = time.monotonic()
                if self.reloader is not None:
                    self.reloader.poll(self.engine)
                if self._abort_pending:
                    self._abort_pending = False
                    self._abort_and_rewind()
                    continue
                try:
                    if msgs:
                        self._process(msgs)
                    if self.forward_topics:
                        self._drain()
                    self.producer.poll(0)
                except _AbortNeeded as exc:
                    log.warning("transaction must abort; rewinding", extra={"event": "txn_abort", "error": str(exc)})
                    self._abort_and_rewind()
                    continue
                now = time.monotonic()
                caught_up = len(msgs) < k.batch_size
                if pacer.due(now, caught_up=caught_up, scores_waiting=bool(self._closed_at), backlog=self._backlog):
                    self.commit()
                    pacer.committed(now, time.monotonic())
                elif self.in_txn and caught_up and self.engine.registry.dirty:
                    # Caught up (the batch was not full): use the slack to encode and send the changed
                    # models now, not all at once inside the commit, so the commit only adds what changed
                    # since. A model changed again before the commit is written again (the later record
                    # wins on the compacted changelog); under a backlog this is skipped, so it costs nothing.
                    try:
                        self._write_models()
                    except _AbortNeeded as exc:
                        log.warning("transaction must abort; rewinding", extra={"event": "txn_abort", "error": str(exc)})
                        self._abort_and_rewind()
            self.commit()
        except _Stopped:
            log.info("stopped while restoring state", extra={"event": "stopped_restoring"})
        finally:
            try:
                # Leaves the group; the revoke callback commits anything still open.
                self.consumer.close()
            except (KafkaException, RuntimeError) as exc:
                log.warning("consumer close failed", extra={"event": "close_failed", "error": str(exc)})
            if server is not None:
                server.stop()
            self._watch_stop.set()
            self.producer.flush(10)
        log.info("stopped cleanly", extra={"event": "stopped", "windows": self.stats.windows_closed})
