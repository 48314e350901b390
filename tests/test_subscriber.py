"""The score-topic subscriber: episode rule, webhook posting, file and Kafka drivers."""

from __future__ import annotations

import io
import socket
import threading
import time
import uuid
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import numpy as np
import orjson
import pytest

from service.config import parse_config
from service.embedded import replay
from service.subscriber import (
    AlertTracker,
    BadScoreMessage,
    Notification,
    PrintSink,
    SubscriberError,
    WebhookPoster,
    load_tracker,
    main,
    run_file,
    run_kafka,
    save_tracker,
)
from service.timefmt import parse_rfc3339

T0 = 1_772_582_400  # 2026-03-04T00:00:00Z


def _iso(ts: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(ts))


def score(service: str, k: int, anomalous: bool, *, warming_up: bool = False, value: float | None = None,
          window: int = 60) -> dict:
    """A score message for window number ``k`` of ``service``, shaped as config/score-message.schema.json."""
    start = T0 + k * window
    s = value if value is not None else (0.997 if anomalous else 0.42)
    return {
        "schema_version": 1, "service": service, "window_start": _iso(start), "window_end": _iso(start + window),
        "score": s, "anomalous": anomalous, "threshold": 0.99, "warming_up": warming_up, "model": "combined",
        "count": 5, "raw_score": 1.0,
        "contributors": [
            {"feature": "latency_p95_ms.mean", "metric": "latency_p95_ms", "observed": 840.2, "expected": 205.7,
             "deviation": 9.8 + k / 100},
            {"feature": "errors.mean", "metric": "errors", "observed": 12.0, "expected": 1.5, "deviation": 4.1},
        ],
    }


def flags(tracker: AlertTracker, service: str, pattern: str, start: int = 0) -> list[tuple[int, str]]:
    """Feed windows from a pattern ('F' flagged, '.' not, 'w' warming up); return (window, state) per notification."""
    out = []
    for i, ch in enumerate(pattern):
        for n in tracker.observe(score(service, start + i, ch == "F", warming_up=ch == "w")):
            out.append((start + i, n.state))
    return out


# --- the episode rule ----------------------------------------------------------------


def test_one_notification_at_onset_and_one_when_cleared():
    t = AlertTracker(clear_after=3)
    assert flags(t, "ticket-api", "...FFFFF...") == [(3, "firing"), (10, "resolved")]
    assert t.firing == frozenset()


def test_a_flagged_window_restarts_the_clear_count_so_flapping_is_one_episode():
    t = AlertTracker(clear_after=3)
    # flagged, then alternating: never three quiet windows in a row until the end
    assert flags(t, "ticket-api", "F.F.F..F.F...") == [(0, "firing"), (12, "resolved")]


def test_a_new_episode_after_clearing_fires_again_with_a_new_id():
    t = AlertTracker(clear_after=2)
    notes = [n for i, ch in enumerate("FF..F..") for n in t.observe(score("fare-quote", i, ch == "F"))]
    assert [(n.state, n.episode) for n in notes] == [
        ("firing", f"fare-quote@{_iso(T0)}"),
        ("resolved", f"fare-quote@{_iso(T0)}"),
        ("firing", f"fare-quote@{_iso(T0 + 4 * 60)}"),
        ("resolved", f"fare-quote@{_iso(T0 + 4 * 60)}"),
    ]
    assert len({n.id for n in notes}) == 4


def test_clear_after_one_resolves_at_the_first_quiet_window():
    t = AlertTracker(clear_after=1)
    assert flags(t, "ticket-api", "FF.F.") == [(0, "firing"), (2, "resolved"), (3, "firing"), (4, "resolved")]


def test_warming_up_windows_never_fire():
    t = AlertTracker()
    for k in range(40):
        # even a (malformed) message claiming both warm-up and anomalous must not fire
        assert t.observe(score("crew-roster", k, k % 2 == 0, warming_up=True, value=0.9999)) == []
    assert t.firing == frozenset()


def test_warm_up_inside_an_episode_counts_towards_clearing_and_says_so():
    t = AlertTracker(clear_after=3)
    notes = [n for i, ch in enumerate("FF.ww") for n in t.observe(score("berth-planner", i, ch == "F", warming_up=ch == "w"))]
    assert [n.state for n in notes] == ["firing", "resolved"]
    assert notes[1].resolved_by == "model_warm_up"
    assert "warming up" in notes[1].summary
    quiet = AlertTracker(clear_after=1)
    assert [n.resolved_by for i, ch in enumerate("F.") for n in quiet.observe(score("x", i, ch == "F"))] == [None, "unflagged_windows"]


def test_services_are_independent():
    t = AlertTracker(clear_after=2)
    got = []
    for k in range(6):
        for svc, pattern in (("ticket-api", "FF...."), ("fare-quote", ".FFF.."), ("berth-planner", "......")):
            got += [(svc, k, n.state) for n in t.observe(score(svc, k, pattern[k] == "F"))]
    assert got == [("ticket-api", 0, "firing"), ("fare-quote", 1, "firing"), ("ticket-api", 3, "resolved"),
                   ("fare-quote", 5, "resolved")]


def test_redelivered_and_out_of_order_windows_are_ignored():
    t = AlertTracker(clear_after=2)
    assert [n.state for n in t.observe(score("ticket-api", 5, True))] == ["firing"]
    assert t.observe(score("ticket-api", 5, True)) == []  # the same window again
    assert t.observe(score("ticket-api", 3, False)) == []  # older: must not count towards clearing
    assert t.observe(score("ticket-api", 4, False)) == []
    assert t.firing == {"ticket-api"}
    assert t.observe(score("ticket-api", 6, False)) == []
    assert [n.state for n in t.observe(score("ticket-api", 7, False))] == ["resolved"]


def test_episode_summary_and_peak():
    t = AlertTracker(clear_after=1)
    fire = t.observe(score("ticket-api", 0, True, value=0.993))[0]
    assert t.observe(score("ticket-api", 1, True, value=0.9991)) == []
    t.observe(score("ticket-api", 2, True, value=0.995))
    done = t.observe(score("ticket-api", 3, False, value=0.3))[0]
    assert fire.summary.startswith(f"ticket-api: unusual since {_iso(T0)} (score 0.993, threshold 0.99)")
    assert "latency_p95_ms.mean 840.2, usually 205.7 (z +9.8)" in fire.summary
    assert (done.flagged_windows, done.peak_score, done.score) == (3, 0.9991, 0.3)
    # the resolve carries the peak window's contributors: what the episode was about
    assert done.top_contributors[0]["deviation"] == pytest.approx(9.81)
    assert f"from {_iso(T0)} to {_iso(T0 + 3 * 60)}, 3 window(s) flagged, peak score 0.999" in done.summary


@pytest.mark.parametrize(
    ("change", "needle"),
    [
        ({"service": ""}, "empty"),
        ({"service": 3}, "'service'"),
        ({"anomalous": "yes"}, "'anomalous'"),
        ({"anomalous": 1}, "'anomalous'"),
        ({"score": True}, "'score'"),
        ({"window_start": "soon"}, "RFC 3339"),
        ({"contributors": {"a": 1}}, "contributors"),
    ],
)
def test_bad_messages_are_refused_with_a_reason(change, needle):
    msg = {**score("ticket-api", 0, True), **change}
    with pytest.raises(BadScoreMessage, match=needle):
        AlertTracker().observe(msg)
    missing = score("ticket-api", 0, True)
    del missing["warming_up"]
    with pytest.raises(BadScoreMessage, match="warming_up"):
        AlertTracker().observe(missing)
    with pytest.raises(BadScoreMessage):
        AlertTracker().observe(["not", "an", "object"])  # type: ignore[arg-type]


@pytest.mark.parametrize("k", [0, -1, 2.5, True])
def test_clear_after_must_be_a_positive_whole_number(k):
    with pytest.raises(SubscriberError):
        AlertTracker(clear_after=k)  # type: ignore[arg-type]


def test_tracker_state_round_trips_an_open_episode(tmp_path):
    t = AlertTracker(clear_after=2)
    flags(t, "ticket-api", "FF.")
    path = tmp_path / "notify-state.json"
    save_tracker(t, path)
    again = load_tracker(path, clear_after=2)
    assert again.firing == {"ticket-api"}
    assert again.observe(score("ticket-api", 2, False)) == []  # already seen before the save
    [done] = again.observe(score("ticket-api", 3, False))
    assert (done.state, done.flagged_windows, done.onset) == ("resolved", 2, _iso(T0))
    assert load_tracker(tmp_path / "absent.json", 3).firing == frozenset()
    (tmp_path / "bad.json").write_text("{not json")
    with pytest.raises(SubscriberError, match="not JSON"):
        load_tracker(tmp_path / "bad.json", 3)


# --- posting -------------------------------------------------------------------------


class Receiver:
    """A webhook receiver on 127.0.0.1 answering with scripted status codes (then 200)."""

    def __init__(self, codes: list[int] | None = None, delay: float = 0.0) -> None:
        self.codes = list(codes or [])
        self.delay = delay
        self.posts: list[tuple[dict, dict]] = []  # (headers, JSON body)
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                body = self.rfile.read(int(self.headers["Content-Length"]))
                outer.posts.append((dict(self.headers), orjson.loads(body)))
                if outer.delay:
                    time.sleep(outer.delay)
                code = outer.codes.pop(0) if outer.codes else 200
                try:
                    self.send_response(code)
                    self.send_header("Content-Length", "0")
                    self.end_headers()
                except OSError:
                    pass  # the client gave up (timeout test)

            def log_message(self, format: str, *args: object) -> None:  # noqa: A002
                return

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.httpd.daemon_threads = True
        threading.Thread(target=self.httpd.serve_forever, daemon=True).start()

    @property
    def url(self) -> str:
        host, port = self.httpd.server_address[:2]
        return f"http://{host}:{port}/hooks/tidewatch"

    def bodies(self) -> list[dict]:
        return [b for _, b in self.posts]

    def close(self) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()


@pytest.fixture
def receiver():
    made: list[Receiver] = []

    def make(codes: list[int] | None = None, delay: float = 0.0) -> Receiver:
        r = Receiver(codes, delay)
        made.append(r)
        return r

    yield make
    for r in made:
        r.close()


def _one_notification() -> Notification:
    return AlertTracker().observe(score("ticket-api", 0, True))[0]


def test_post_delivers_the_json_body_with_an_idempotency_key(receiver):
    r = receiver()
    n = _one_notification()
    poster = WebhookPoster(r.url, sleep=lambda s: None)
    assert poster.send(n) is True
    [(headers, body)] = r.posts
    assert headers["Content-Type"] == "application/json"
    assert headers["Idempotency-Key"] == n.id == f"ticket-api@{_iso(T0)}/firing"
    assert body == n.to_json()
    assert body["state"] == "firing" and body["service"] == "ticket-api"
    assert body["window"] == {"start": _iso(T0), "end": _iso(T0 + 60)}
    assert [c["feature"] for c in body["top_contributors"]] == ["latency_p95_ms.mean", "errors.mean"]
    assert (poster.delivered, poster.failed, poster.attempts) == (1, 0, 1)


def test_retryable_answers_are_retried_with_backoff(receiver):
    r = receiver([503, 429])
    waits: list[float] = []
    poster = WebhookPoster(r.url, retries=3, backoff=0.25, sleep=waits.append)
    assert poster.send(_one_notification()) is True
    assert len(r.posts) == 3 and waits == [0.25, 0.5]
    assert (poster.delivered, poster.failed) == (1, 0)


def test_a_client_error_is_not_retried_and_is_counted(receiver):
    r = receiver([400])
    waits: list[float] = []
    poster = WebhookPoster(r.url, retries=3, sleep=waits.append)
    assert poster.send(_one_notification()) is False
    assert len(r.posts) == 1 and waits == []
    assert (poster.delivered, poster.failed) == (0, 1)


def test_retries_are_bounded_when_the_receiver_keeps_failing(receiver):
    r = receiver([500] * 10)
    poster = WebhookPoster(r.url, retries=2, sleep=lambda s: None)
    assert poster.send(_one_notification()) is False
    assert len(r.posts) == 3 and poster.failed == 1


def test_an_unreachable_receiver_never_raises(receiver):
    r = receiver()
    url = r.url
    r.close()  # nothing listens on that port any more
    poster = WebhookPoster(url, retries=1, sleep=lambda s: None)
    assert poster.send(_one_notification()) is False
    assert (poster.attempts, poster.failed) == (2, 1)


def test_a_slow_receiver_times_out_and_is_counted(receiver):
    r = receiver(delay=1.5)
    poster = WebhookPoster(r.url, timeout=0.2, retries=0, sleep=lambda s: None)
    assert poster.send(_one_notification()) is False
    assert poster.failed == 1


def test_a_receiver_answering_garbage_is_retried_and_counted():
    # A TCP listener that answers every connection with bytes that are not HTTP.
    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(8)
    seen = []

    def serve() -> None:
        while True:
            try:
                conn, _ = srv.accept()
            except OSError:
                return
            with conn:
                conn.recv(65536)
                seen.append(1)
                conn.sendall(b"HELLO THERE\r\n\r\n")

    threading.Thread(target=serve, daemon=True).start()
    try:
        poster = WebhookPoster(f"http://127.0.0.1:{srv.getsockname()[1]}/", retries=1, sleep=lambda s: None)
        assert poster.send(_one_notification()) is False
        assert (len(seen), poster.failed) == (2, 1)
    finally:
        srv.close()


@pytest.mark.parametrize("url", ["file:///etc/passwd", "ftp://example.invalid/", "127.0.0.1:9000"])
def test_only_http_webhooks_are_accepted(url):
    with pytest.raises(SubscriberError):
        WebhookPoster(url)


def test_print_sink_writes_json_lines():
    buf = io.StringIO()
    sink = PrintSink(buf)
    n = _one_notification()
    assert sink.send(n)
    assert orjson.loads(buf.getvalue()) == n.to_json()


# --- the file driver on real tidewatch output ----------------------------------------


@pytest.fixture(scope="module")
def scored_file(tmp_path_factory) -> Path:
    """Scores from ``replay`` of four services with an injected latency incident on quay-1."""
    d = tmp_path_factory.mktemp("scored")
    src = d / "in.jsonl"
    rng = np.random.default_rng(3)
    with open(src, "wb") as f:
        for i in range(3000):
            service = f"quay-{i % 4}"
            ts = T0 + (i // 4) * 20
            latency = 150 + rng.normal(0, 5) + (600 if service == "quay-1" and 2000 <= i < 2100 else 0)
            f.write(orjson.dumps({"service": service, "ts": ts, "metrics": {"latency_ms": latency}}) + b"\n")
    out = d / "scores.jsonl"
    replay(parse_config('[defaults]\nwindow = "1m"\nwarm_up = 20\n'), str(src), str(out))
    with open(out, "ab") as f:
        f.write(b"{broken line\n")  # a bad line must be skipped, not stop the run
    return out


def test_file_driver_on_replayed_scores(scored_file, receiver):
    r = receiver()
    stats = run_file(scored_file, AlertTracker(clear_after=3), WebhookPoster(r.url, sleep=lambda s: None))
    scores = [orjson.loads(line) for line in scored_file.read_bytes().splitlines()[:-1]]
    assert stats.messages == len(scores) + 1 and stats.skipped == 1
    bodies = r.bodies()
    assert len(bodies) == stats.firing + stats.resolved == stats.delivered and stats.failed == 0
    by_window = {(s["service"], s["window_start"]): s for s in scores}
    incident = (T0 + 500 * 20, T0 + 525 * 20)  # messages 2000..2099, four services per 20 s step
    caught = False
    for service in {b["service"] for b in bodies}:
        states = [b["state"] for b in bodies if b["service"] == service]
        # firing and resolved alternate, starting with firing
        assert states == ["firing", "resolved"] * (len(states) // 2) + ["firing"] * (len(states) % 2)
        windows = sorted(s["window_start"] for s in scores if s["service"] == service)
        for b in bodies:
            if b["service"] != service:
                continue
            w = by_window[(service, b["window"]["start"])]
            if b["state"] == "firing":
                assert w["anomalous"] and not w["warming_up"]
                start = parse_rfc3339(b["onset"])
                caught |= service == "quay-1" and incident[0] - 60 <= start < incident[1]
            else:
                # the three windows up to and including the resolving one are all unflagged
                i = windows.index(b["window"]["start"])
                assert all(not by_window[(service, ws)]["anomalous"] for ws in windows[i - 2:i + 1])
    assert caught, "the injected incident on quay-1 produced no firing notification"


def test_main_reads_a_score_file_and_posts(scored_file, receiver, tmp_path):
    r = receiver()
    state = tmp_path / "state.json"
    argv = ["--scores", str(scored_file), "--webhook", r.url, "--clear-after", "3", "--state-file", str(state)]
    assert main(argv) == 0
    first = len(r.posts)
    assert first > 0
    assert main(argv) == 0  # same file again, same state: every window was seen
    assert len(r.posts) == first


@pytest.mark.parametrize(
    "argv",
    [
        ["--webhook", "-"],
        ["--scores", "x.jsonl", "--bootstrap", "127.0.0.1:1", "--topic", "t", "--group", "g", "--webhook", "-"],
        ["--bootstrap", "127.0.0.1:1", "--webhook", "-"],
        ["--scores", "x.jsonl", "--webhook", "gopher://x"],
        ["--scores", "x.jsonl", "--webhook", "-", "--clear-after", "0"],
    ],
)
def test_main_refuses_bad_arguments(argv):
    assert main(argv) == 2


# --- the Kafka driver ----------------------------------------------------------------


def _produce_transaction(bootstrap: str, topic: str, messages: list[dict], *, commit: bool) -> None:
    from confluent_kafka import Producer

    p = Producer({"bootstrap.servers": bootstrap, "transactional.id": f"notify-test-{uuid.uuid4().hex}"})
    p.init_transactions(30)
    p.begin_transaction()
    for m in messages:
        p.produce(topic, key=m["service"].encode(), value=orjson.dumps(m))
    p.flush(30)
    if commit:
        p.commit_transaction(30)
    else:
        p.abort_transaction(30)


@pytest.mark.kafka
def test_kafka_driver_reads_committed_scores_only_and_commits_its_offsets(kafka_bootstrap, kafka_topic, receiver, tmp_path):
    topic = kafka_topic("notify-scores", 2)
    group = f"notify-{uuid.uuid4().hex}"
    committed = [score("ticket-api", k, ch == "F") for k, ch in enumerate("..FFF....")]
    committed += [score("fare-quote", k, ch == "F") for k, ch in enumerate(".F.")]
    # an aborted transaction: a read_committed reader must never act on it
    _produce_transaction(kafka_bootstrap, topic, [score("crew-roster", 0, True)], commit=False)
    _produce_transaction(kafka_bootstrap, topic, committed, commit=True)

    r = receiver()
    state = tmp_path / "state.json"
    stats = run_kafka(AlertTracker(3), WebhookPoster(r.url, sleep=lambda s: None), bootstrap=kafka_bootstrap,
                      topic=topic, group=group, idle_exit=5.0, state_file=state)
    got = sorted((b["service"], b["state"], b["window"]["start"]) for b in r.bodies())
    assert got == [
        ("fare-quote", "firing", _iso(T0 + 60)),
        ("ticket-api", "firing", _iso(T0 + 2 * 60)),
        ("ticket-api", "resolved", _iso(T0 + 7 * 60)),
    ]
    assert stats.messages == len(committed) and stats.delivered == 3
    assert load_tracker(state, 3).firing == {"fare-quote"}

    # Same group again: the offsets were committed, so nothing is read or sent twice. A new
    # score resolving fare-quote arrives and is the only thing acted on.
    _produce_transaction(kafka_bootstrap, topic, [score("fare-quote", k, False) for k in (3, 4)], commit=True)
    rc = main(["--bootstrap", kafka_bootstrap, "--topic", topic, "--group", group, "--webhook", r.url,
               "--state-file", str(state), "--idle-exit", "5"])
    assert rc == 0
    assert [(b["service"], b["state"]) for b in r.bodies()[3:]] == [("fare-quote", "resolved")]
