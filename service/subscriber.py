"""A subscriber of the score topic that posts alert notifications to a webhook.

An example consumer of tidewatch's score messages: it turns the stream of per-window
scores into one notification when a service *starts* scoring as unusual and one when
it has stopped, and POSTs each as JSON to a webhook (a chat bridge, a paging tool's
generic receiver, a ticket queue).

The rule
--------
Per service, an *episode* opens at the first flagged window (``anomalous`` true and
``warming_up`` false) while none is open: one ``firing`` notification. Further flagged
windows send nothing. The episode closes after ``clear_after`` (default 3) consecutive
windows that are not flagged: one ``resolved`` notification. A flagged window inside an
open episode starts that count again, so a service flapping between flagged and not
flagged stays one episode.

- Warm-up windows never open an episode. Inside an open episode they count towards
  clearing like any unflagged window (a model in warm-up cannot vouch for the alert
  either way) and the resolve says ``resolved_by: "model_warm_up"``.
- A message for a window at or before the last window seen for its service is ignored:
  redelivery after a restart, or a replayed file, never notifies twice.
- The tracker counts windows, it has no clock: a service that stops sending while an
  episode is open stays firing (windows without input produce no score message).

The webhook body (``notification_version`` 1)::

    {"notification_version": 1, "id": "ticket-api@2026-03-04T10:05:00Z/firing",
     "episode": "ticket-api@2026-03-04T10:05:00Z", "service": "ticket-api", "state": "firing",
     "window": {"start": "2026-03-04T10:05:00Z", "end": "2026-03-04T10:10:00Z"},
     "onset": "2026-03-04T10:05:00Z", "score": 0.998, "threshold": 0.99, "flagged_windows": 1,
     "peak_score": 0.998, "resolved_by": null,
     "top_contributors": [{"feature": "latency_p95_ms.mean", "metric": "latency_p95_ms",
                           "observed": 840.2, "expected": 205.7, "deviation": 9.8}],
     "summary": "ticket-api: unusual since 2026-03-04T10:05:00Z (score 0.998, threshold 0.99); ..."}

``episode`` is the same on an episode's firing and resolved notifications; ``id`` (also
sent as the ``Idempotency-Key`` header) lets a receiver drop a post it already has. A
resolved notification carries the last window seen and the contributors of the episode's
peak window: what the episode was about.

Delivery is at least once within bounds: each post is retried on connection errors,
timeouts, 408, 429 and 5xx answers with exponential back-off, up to ``retries`` times;
other 4xx answers are not retried. A notification that still fails is logged and counted,
and the subscriber goes on.

Drivers: :func:`run_file` reads a score JSONL file; :func:`run_kafka` consumes the score
topic read_committed (so scores of aborted transactions are never seen), commits its
offsets after the batch's notifications were sent, and with ``state_file`` keeps the
tracker across restarts. :func:`main` is the command line.

>>> t = AlertTracker(clear_after=2)
>>> def w(minute, anomalous, warming_up=False):
...     return {"service": "ticket-api", "window_start": f"2026-03-04T10:{minute:02d}:00Z",
...             "window_end": f"2026-03-04T10:{minute + 1:02d}:00Z", "score": 0.999 if anomalous else 0.4,
...             "threshold": 0.99, "anomalous": anomalous, "warming_up": warming_up, "contributors": []}
>>> [n.state for minute, flag in enumerate([True, True, False, True, False, False]) for n in t.observe(w(minute, flag))]
['firing', 'resolved']
>>> t.observe(w(3, True))  # already seen: ignored
[]
"""

from __future__ import annotations

import argparse
import http.client
import logging
import math
import os
import signal
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Literal, Protocol

import orjson

from service.errors import TidewatchError
from service.timefmt import parse_rfc3339

__all__ = [
    "NOTIFICATION_VERSION",
    "SubscriberError",
    "BadScoreMessage",
    "BusError",
    "Notification",
    "AlertTracker",
    "NotificationSink",
    "WebhookPoster",
    "PrintSink",
    "NotifyStats",
    "iter_score_file",
    "run_file",
    "run_kafka",
    "load_tracker",
    "save_tracker",
    "add_arguments",
    "build_parser",
    "run_args",
    "main",
]

log = logging.getLogger("tidewatch.notify")

NOTIFICATION_VERSION = 1
STATE_VERSION = 1
TOP_CONTRIBUTORS = 3
# Seconds the Kafka driver waits for messages in one poll; also how quickly it notices a stop.
_POLL_S = 0.5

State = Literal["firing", "resolved"]


class SubscriberError(TidewatchError):
    """The subscriber cannot go on (bad arguments, unusable state file, fatal bus error)."""


class BadScoreMessage(SubscriberError, ValueError):
    """A score message lacks a field the tracker needs, or has one of the wrong type."""


class BusError(SubscriberError):
    """The Kafka client reported an error it cannot recover from."""


# --- notifications -------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Notification:
    """One alert notification: an episode's onset (``firing``) or its end (``resolved``)."""

    service: str
    state: State
    episode: str
    window_start: str
    window_end: str
    onset: str
    score: float
    threshold: float
    flagged_windows: int
    peak_score: float
    top_contributors: tuple[dict[str, Any], ...]
    summary: str
    resolved_by: str | None = None

    @property
    def id(self) -> str:
        """Unique per notification; stable across retries and redeliveries."""
        return f"{self.episode}/{self.state}"

    def to_json(self) -> dict[str, Any]:
        """The webhook body as a dict (see the module docstring)."""
        return {
            "notification_version": NOTIFICATION_VERSION,
            "id": self.id,
            "episode": self.episode,
            "service": self.service,
            "state": self.state,
            "window": {"start": self.window_start, "end": self.window_end},
            "onset": self.onset,
            "score": self.score,
            "threshold": self.threshold,
            "flagged_windows": self.flagged_windows,
            "peak_score": self.peak_score,
            "resolved_by": self.resolved_by,
            "top_contributors": list(self.top_contributors),
            "summary": self.summary,
        }

    def body(self) -> bytes:
        return orjson.dumps(self.to_json())


def _describe_contributors(contributors: Sequence[Mapping[str, Any]], n: int = 2) -> str:
    parts = []
    for c in contributors[:n]:
        try:
            parts.append(f"{c['feature']} {float(c['observed']):.4g}, usually {float(c['expected']):.4g} "
                         f"(z {float(c['deviation']):+.1f})")
        except (KeyError, TypeError, ValueError):
            continue  # a contributor we cannot read still leaves the rest of the line useful
    return "; ".join(parts)


# --- the tracker ---------------------------------------------------------------------


@dataclass(slots=True)
class _Episode:
    onset: str
    peak: float
    peak_contributors: tuple[dict[str, Any], ...]
    flagged: int = 1
    quiet: int = 0  # consecutive unflagged windows since the last flagged one
    last_flagged_end: str = ""


@dataclass(slots=True)
class _Track:
    last_start: float = -math.inf
    episode: _Episode | None = None


@dataclass(frozen=True, slots=True)
class _Window:
    service: str
    start: str
    end: str
    start_s: float
    score: float
    threshold: float
    anomalous: bool
    warming_up: bool
    contributors: tuple[dict[str, Any], ...]


_KIND_NAMES = {str: "a string", bool: "a boolean", (int, float): "a number"}


def _field(msg: Mapping[str, Any], name: str, kind: type | tuple[type, ...]) -> Any:
    if name not in msg:
        raise BadScoreMessage(f"score message has no {name!r}")
    value = msg[name]
    # bool is an int: a flag must not pass as a score, nor a number as a flag
    if isinstance(value, bool) != (kind is bool) or not isinstance(value, kind):
        raise BadScoreMessage(f"score message field {name!r} is {type(value).__name__}, not {_KIND_NAMES[kind]}")
    return value


def _parse(msg: Mapping[str, Any]) -> _Window:
    if not isinstance(msg, Mapping):
        raise BadScoreMessage(f"a score message is a JSON object, not {type(msg).__name__}")
    service = _field(msg, "service", str)
    if not service:
        raise BadScoreMessage("score message has an empty 'service'")
    start = _field(msg, "window_start", str)
    end = _field(msg, "window_end", str)
    try:
        start_s = parse_rfc3339(start)
        parse_rfc3339(end)
    except ValueError as exc:
        raise BadScoreMessage(f"score message window is not RFC 3339: {exc}") from None
    score = float(_field(msg, "score", (int, float)))
    threshold = float(_field(msg, "threshold", (int, float)))
    contributors = msg.get("contributors", [])
    if not isinstance(contributors, list):
        raise BadScoreMessage("score message field 'contributors' is not a list")
    return _Window(
        service=service, start=start, end=end, start_s=start_s, score=score, threshold=threshold,
        anomalous=_field(msg, "anomalous", bool), warming_up=_field(msg, "warming_up", bool),
        contributors=tuple(dict(c) for c in contributors[:TOP_CONTRIBUTORS] if isinstance(c, Mapping)),
    )


class AlertTracker:
    """Per-service episodes from score messages: ``observe(msg) -> [Notification, ...]``.

    Parameters
    ----------
    clear_after
        Consecutive unflagged windows that close an episode (at least 1).

    Examples
    --------
    >>> t = AlertTracker(clear_after=1)
    >>> msg = {"service": "berth-planner", "window_start": "2026-03-04T10:00:00Z",
    ...        "window_end": "2026-03-04T10:01:00Z", "score": 0.997, "threshold": 0.99,
    ...        "anomalous": True, "warming_up": False, "contributors": []}
    >>> [n] = t.observe(msg); n.state, n.episode
    ('firing', 'berth-planner@2026-03-04T10:00:00Z')
    >>> sorted(t.firing)
    ['berth-planner']
    """

    def __init__(self, clear_after: int = 3) -> None:
        if isinstance(clear_after, bool) or not isinstance(clear_after, int) or clear_after < 1:
            raise SubscriberError(f"clear_after must be a whole number of windows >= 1, got {clear_after!r}")
        self.clear_after = clear_after
        self._tracks: dict[str, _Track] = {}

    @property
    def firing(self) -> frozenset[str]:
        """Services with an open episode."""
        return frozenset(s for s, t in self._tracks.items() if t.episode is not None)

    def observe(self, msg: Mapping[str, Any]) -> list[Notification]:
        """Take one score message; return the notifications it causes (zero or one).

        Raises :class:`BadScoreMessage` when a field the rule needs is missing or mistyped.
        """
        w = _parse(msg)
        track = self._tracks.get(w.service)
        if track is None:
            track = self._tracks[w.service] = _Track()
        if w.start_s <= track.last_start:
            return []  # seen already (redelivery, replay) or out of order
        track.last_start = w.start_s
        flagged = w.anomalous and not w.warming_up
        ep = track.episode
        if ep is None:
            if not flagged:
                return []
            track.episode = _Episode(onset=w.start, peak=w.score, peak_contributors=w.contributors,
                                     last_flagged_end=w.end)
            return [self._firing(w)]
        if flagged:
            ep.flagged += 1
            ep.quiet = 0
            ep.last_flagged_end = w.end
            if w.score > ep.peak:
                ep.peak, ep.peak_contributors = w.score, w.contributors
            return []
        ep.quiet += 1
        if ep.quiet < self.clear_after:
            return []
        track.episode = None
        return [self._resolved(w, ep, "model_warm_up" if w.warming_up else "unflagged_windows")]

    def observe_many(self, messages: Iterable[Mapping[str, Any]]) -> list[Notification]:
        """``observe`` over an iterable, notifications in order (bad messages raise)."""
        return [n for m in messages for n in self.observe(m)]

    def _firing(self, w: _Window) -> Notification:
        top = _describe_contributors(w.contributors)
        summary = (f"{w.service}: unusual since {w.start} (score {w.score:.3f}, threshold {w.threshold:g})"
                   + (f"; most unusual: {top}" if top else "")
                   + ". Unusual for its own recent past; check what changed before calling it an outage.")
        return Notification(
            service=w.service, state="firing", episode=f"{w.service}@{w.start}", window_start=w.start,
            window_end=w.end, onset=w.start, score=w.score, threshold=w.threshold, flagged_windows=1,
            peak_score=w.score, top_contributors=w.contributors, summary=summary,
        )

    def _resolved(self, w: _Window, ep: _Episode, why: str) -> Notification:
        if why == "model_warm_up":
            how = "its model was reset and is warming up, so it cannot judge for now"
        else:
            how = f"{self.clear_after} window(s) in a row not flagged (last score {w.score:.3f})"
        summary = (f"{w.service}: no longer flagged: {how}. It was unusual from {ep.onset} to "
                   f"{ep.last_flagged_end}, {ep.flagged} window(s) flagged, peak score {ep.peak:.3f}.")
        return Notification(
            service=w.service, state="resolved", episode=f"{w.service}@{ep.onset}", window_start=w.start,
            window_end=w.end, onset=ep.onset, score=w.score, threshold=w.threshold, flagged_windows=ep.flagged,
            peak_score=ep.peak, top_contributors=ep.peak_contributors, summary=summary, resolved_by=why,
        )

    # --- persistence (JSON; small: one entry per service seen) ------------------------
    def to_state(self) -> dict[str, Any]:
        services = {}
        for service, t in self._tracks.items():
            services[service] = {
                "last_start": t.last_start,
                "episode": None if t.episode is None else {**asdict(t.episode),
                                                            "peak_contributors": list(t.episode.peak_contributors)},
            }
        return {"version": STATE_VERSION, "clear_after": self.clear_after, "services": services}

    @classmethod
    def from_state(cls, doc: Mapping[str, Any], clear_after: int | None = None) -> "AlertTracker":
        """Rebuild a tracker; ``clear_after`` overrides the saved one (a changed flag wins)."""
        try:
            if doc["version"] != STATE_VERSION:
                raise SubscriberError(f"tracker state version {doc['version']!r} is not {STATE_VERSION}")
            tracker = cls(doc["clear_after"] if clear_after is None else clear_after)
            for service, t in doc["services"].items():
                ep = t["episode"]
                tracker._tracks[service] = _Track(
                    last_start=float(t["last_start"]),
                    episode=None if ep is None else _Episode(**{**ep, "peak_contributors": tuple(ep["peak_contributors"])}),
                )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise SubscriberError(f"tracker state is malformed: {exc!r}") from exc
        return tracker


def load_tracker(path: str | os.PathLike[str], clear_after: int) -> AlertTracker:
    """The tracker saved at ``path``, or a fresh one when the file does not exist."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        return AlertTracker(clear_after)
    except OSError as exc:
        raise SubscriberError(f"cannot read the state file {p}: {exc}") from exc
    try:
        doc = orjson.loads(raw)
    except orjson.JSONDecodeError as exc:
        raise SubscriberError(f"the state file {p} is not JSON: {exc}; move it away to start fresh") from exc
    return AlertTracker.from_state(doc, clear_after)


def save_tracker(tracker: AlertTracker, path: str | os.PathLike[str]) -> None:
    """Write the tracker atomically (temporary file, fsync, rename)."""
    p = Path(path)
    tmp = p.with_name(f".{p.name}.tmp")
    try:
        with open(tmp, "wb") as f:
            f.write(orjson.dumps(tracker.to_state()))
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, p)
    except OSError as exc:
        raise SubscriberError(f"cannot write the state file {p}: {exc}") from exc


# --- sinks ---------------------------------------------------------------------------


class NotificationSink(Protocol):
    def send(self, notification: Notification) -> bool:
        """Deliver one notification; True when it was delivered. Never raises for delivery failures."""
        ...


class WebhookPoster:
    """POST notifications as JSON to ``url`` with a timeout and bounded retries.

    Parameters
    ----------
    url
        ``http://`` or ``https://`` address of the receiver.
    timeout
        Seconds for one attempt (connect and answer).
    retries
        Further attempts after a retryable failure (connection error, timeout, 408, 429, 5xx).
    backoff
        Seconds before the first retry; doubled for each next one.
    sleep
        Waits between attempts (tests pass a recorder).
    """

    # Timeout and rate limiting say "try later"; so do 5xx answers. Other 4xx answers mean the
    # request itself is wrong and would fail again (common practice for webhook senders).
    RETRY_STATUS = frozenset({408, 429})

    def __init__(self, url: str, *, timeout: float = 5.0, retries: int = 3, backoff: float = 0.5,
                 sleep: Callable[[float], None] = time.sleep, headers: Mapping[str, str] | None = None) -> None:
        if not url.startswith(("http://", "https://")):
            raise SubscriberError(f"webhook {url!r} must be an http:// or https:// address")
        if timeout <= 0 or retries < 0 or backoff < 0:
            raise SubscriberError("timeout must be > 0, retries and backoff >= 0")
        self.url = url
        self.timeout = timeout
        self.retries = retries
        self.backoff = backoff
        self.sleep = sleep
        self.headers = dict(headers or {})
        self.delivered = 0
        self.failed = 0
        self.attempts = 0

    def _attempt(self, n: Notification) -> tuple[bool, bool, str]:
        """One POST: (delivered, worth retrying, what happened)."""
        req = urllib.request.Request(
            self.url, data=n.body(), method="POST",
            # Idempotency-Key: the header name of the IETF httpapi draft for safely retried POSTs.
            headers={"Content-Type": "application/json", "User-Agent": "tidewatch-notify/1",
                     "Idempotency-Key": n.id, **self.headers},
        )
        self.attempts += 1
        try:
            with urllib.request.urlopen(req, timeout=self.timeout) as resp:
                resp.read()
                return True, False, f"HTTP {resp.status}"
        except urllib.error.HTTPError as exc:
            exc.close()
            return False, exc.code in self.RETRY_STATUS or exc.code >= 500, f"HTTP {exc.code}"
        except (urllib.error.URLError, TimeoutError, OSError) as exc:
            reason = getattr(exc, "reason", exc)
            return False, True, f"{type(reason).__name__}: {reason}"
        except http.client.HTTPException as exc:
            # The receiver answered something that is not HTTP (or hung up mid-answer): may pass.
            return False, True, f"{type(exc).__name__}: {exc}"
        except ValueError as exc:
            # urllib refused the request itself (e.g. an unusable address): retrying cannot help.
            return False, False, f"{type(exc).__name__}: {exc}"

    def send(self, notification: Notification) -> bool:
        delay = self.backoff
        what = ""
        for attempt in range(self.retries + 1):
            ok, retry, what = self._attempt(notification)
            if ok:
                self.delivered += 1
                log.info("notification sent", extra={"event": "notify_sent", "service": notification.service,
                                                     "state": notification.state, "attempts": attempt + 1})
                return True
            if not retry or attempt == self.retries:
                break
            log.warning("webhook post failed; retrying", extra={"event": "notify_retry", "service": notification.service,
                                                                "error": what, "attempt": attempt + 1})
            self.sleep(delay)
            delay *= 2
        self.failed += 1
        log.error("notification not delivered", extra={"event": "notify_failed", "service": notification.service,
                                                       "state": notification.state, "id": notification.id, "error": what})
        return False


class PrintSink:
    """Write each notification as one JSON line to a stream (``--webhook -``: try the rule without a receiver)."""

    def __init__(self, stream: Any = None) -> None:
        self.stream = stream if stream is not None else sys.stdout
        self.delivered = 0
        self.failed = 0

    def send(self, notification: Notification) -> bool:
        self.stream.write(notification.body().decode() + "\n")
        self.stream.flush()
        self.delivered += 1
        return True


# --- drivers -------------------------------------------------------------------------


@dataclass
class NotifyStats:
    """What a driver did."""

    messages: int = 0
    skipped: int = 0
    firing: int = 0
    resolved: int = 0
    delivered: int = 0
    failed: int = 0
    notifications: list[Notification] = field(default_factory=list, repr=False)

    def describe(self) -> str:
        return (f"read {self.messages} score messages ({self.skipped} skipped); sent {self.firing} firing and "
                f"{self.resolved} resolved notifications, {self.delivered} delivered, {self.failed} failed")


def _handle(doc: Any, where: str, tracker: AlertTracker, sink: NotificationSink, stats: NotifyStats) -> None:
    stats.messages += 1
    try:
        notes = tracker.observe(doc)
    except BadScoreMessage as exc:
        stats.skipped += 1
        log.warning("score message skipped", extra={"event": "score_skipped", "where": where, "error": str(exc)})
        return
    for n in notes:
        if n.state == "firing":
            stats.firing += 1
        else:
            stats.resolved += 1
        stats.notifications.append(n)
        if sink.send(n):
            stats.delivered += 1
        else:
            stats.failed += 1


def iter_score_file(path: str | os.PathLike[str]) -> Iterator[tuple[int, Any]]:
    """``(line number, decoded JSON or the undecodable bytes)`` for each non-empty line."""
    try:
        f = open(path, "rb")
    except OSError as exc:
        raise SubscriberError(f"cannot read the score file {path}: {exc}") from exc
    with f:
        for lineno, line in enumerate(f, start=1):
            if not line.strip():
                continue
            try:
                yield lineno, orjson.loads(line)
            except orjson.JSONDecodeError:
                yield lineno, line


def run_file(path: str | os.PathLike[str], tracker: AlertTracker, sink: NotificationSink) -> NotifyStats:
    """Feed a score JSONL file through the tracker, sending each notification as it arises."""
    stats = NotifyStats()
    for lineno, doc in iter_score_file(path):
        _handle(doc, f"{path}:{lineno}", tracker, sink, stats)
    return stats


def run_kafka(tracker: AlertTracker, sink: NotificationSink, *, bootstrap: str, topic: str, group: str,
              stop: threading.Event | None = None, idle_exit: float | None = None,
              properties: Mapping[str, Any] | None = None, state_file: str | os.PathLike[str] | None = None,
              batch: int = 500) -> NotifyStats:
    """Consume the score topic (read_committed) until ``stop`` is set, or until ``idle_exit``
    seconds pass without a message once partitions are assigned.

    Offsets are committed after each batch's notifications were sent (and the tracker saved to
    ``state_file``, when given), so a crash re-reads at most one batch: its notifications may be
    sent again (same ``id``), never lost.
    """
    from confluent_kafka import Consumer, KafkaError, KafkaException

    conf: dict[str, Any] = {
        "bootstrap.servers": bootstrap,
        "group.id": group,
        # tidewatch writes scores in transactions: only committed ones are real.
        "isolation.level": "read_committed",
        "enable.auto.commit": False,
        # A new group starts at the oldest retained score, so nothing produced before its first start is missed.
        "auto.offset.reset": "earliest",
    }
    conf.update(properties or {})
    stop = stop or threading.Event()
    stats = NotifyStats()
    assigned_at: list[float] = []

    def on_assign(consumer: Any, partitions: list) -> None:
        if not assigned_at:
            assigned_at.append(time.monotonic())

    consumer = Consumer(conf)
    consumer.subscribe([topic], on_assign=on_assign)
    last = time.monotonic()
    try:
        while not stop.is_set():
            msgs = consumer.consume(num_messages=batch, timeout=_POLL_S)
            now = time.monotonic()
            if not msgs:
                if idle_exit is not None and assigned_at and now - max(last, assigned_at[0]) >= idle_exit:
                    break
                continue
            last = now
            for m in msgs:
                err = m.error()
                if err is not None:
                    if err.fatal():
                        raise BusError(f"fatal Kafka error: {err.str()}")
                    if err.code() != KafkaError._PARTITION_EOF:
                        log.warning("consumer error", extra={"event": "consumer_error", "error": err.str()})
                    continue
                try:
                    doc: Any = orjson.loads(m.value() or b"")
                except orjson.JSONDecodeError:
                    doc = m.value()
                _handle(doc, f"{m.topic()}/{m.partition()}/{m.offset()}", tracker, sink, stats)
            if state_file is not None:
                save_tracker(tracker, state_file)
            try:
                consumer.commit(asynchronous=False)
            except KafkaException as exc:
                err = exc.args[0] if exc.args else None
                if not (isinstance(err, KafkaError) and err.code() == KafkaError._NO_OFFSET):
                    # The next commit covers these offsets too; a redelivery is deduplicated by window.
                    log.warning("offset commit failed", extra={"event": "commit_failed", "error": str(exc)})
    finally:
        consumer.close()
    return stats


# --- command line --------------------------------------------------------------------


def add_arguments(p: argparse.ArgumentParser) -> argparse.ArgumentParser:
    """The ``notify`` options, for a stand-alone parser or a ``tidewatch notify`` subparser."""
    src = p.add_argument_group("source (one of)")
    src.add_argument("--scores", metavar="FILE", help="a score JSONL file (tidewatch run/replay --output)")
    src.add_argument("--bootstrap", metavar="HOST:PORT", help="Kafka brokers; with --topic and --group")
    src.add_argument("--topic", help="the score topic (kafka.output_topic)")
    src.add_argument("--group", help="consumer group of this subscriber (not tidewatch's own group)")
    p.add_argument("--webhook", required=True, metavar="URL",
                   help="where notifications are POSTed as JSON; - prints them as JSON lines instead")
    p.add_argument("--clear-after", type=int, default=3, metavar="K",
                   help="consecutive unflagged windows that resolve an episode (default 3)")
    p.add_argument("--timeout", type=float, default=5.0, metavar="SECONDS", help="per post attempt (default 5)")
    p.add_argument("--retries", type=int, default=3, help="retries of a failed post (default 3)")
    p.add_argument("--state-file", metavar="FILE",
                   help="keep open episodes and the last window per service here across restarts")
    p.add_argument("--idle-exit", type=float, default=None, metavar="SECONDS",
                   help="Kafka: stop after this long without a message (default: run until stopped)")
    return p


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tidewatch notify",
        description="Turn score messages into alert notifications: one when a service starts scoring as unusual, "
                    "one when it has stopped, POSTed as JSON to a webhook.",
        epilog="exit codes: 0 ok, 1 runtime failure, 2 usage error, 3 fatal Kafka error",
    )
    return add_arguments(p)


def _sink(args: argparse.Namespace) -> NotificationSink:
    if args.webhook == "-":
        return PrintSink()
    return WebhookPoster(args.webhook, timeout=args.timeout, retries=args.retries)


def run_args(args: argparse.Namespace, stop: threading.Event | None = None) -> int:
    """Run from parsed arguments; returns the exit code."""
    kafka = (args.bootstrap, args.topic, args.group)
    if (args.scores is None) == all(v is None for v in kafka):
        print("tidewatch notify: give either --scores FILE or --bootstrap, --topic and --group", file=sys.stderr)
        return 2
    if args.scores is None and any(v is None for v in kafka):
        print("tidewatch notify: --bootstrap, --topic and --group go together", file=sys.stderr)
        return 2
    try:
        sink = _sink(args)
        if args.state_file:
            tracker = load_tracker(args.state_file, args.clear_after)
        else:
            tracker = AlertTracker(args.clear_after)
    except SubscriberError as exc:
        print(f"tidewatch notify: {exc}", file=sys.stderr)
        return 2
    try:
        if args.scores is not None:
            stats = run_file(args.scores, tracker, sink)
            if args.state_file:
                save_tracker(tracker, args.state_file)
        else:
            stats = run_kafka(tracker, sink, bootstrap=args.bootstrap, topic=args.topic, group=args.group,
                              stop=stop, idle_exit=args.idle_exit, state_file=args.state_file)
    except BusError as exc:
        log.critical(str(exc), extra={"event": "bus_fatal"})
        return 3
    except SubscriberError as exc:
        log.error(str(exc), extra={"event": "failed"})
        return 1
    log.info(stats.describe(), extra={"event": "notify_finished", "firing": stats.firing, "resolved": stats.resolved,
                                      "delivered": stats.delivered, "failed": stats.failed})
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """``tidewatch notify``: stops cleanly on SIGTERM/SIGINT (Kafka: after the batch in hand)."""
    from service.logs import configure_logging

    args = build_parser().parse_args(argv)
    if not logging.getLogger("tidewatch").handlers:
        configure_logging(None)
    stop = threading.Event()
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda signum, frame: stop.set())
    return run_args(args, stop)


if __name__ == "__main__":
    sys.exit(main())
