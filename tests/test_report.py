"""The backtest report: its summary numbers, its rendering for the demo scenario, the page in a
real browser, and the replay progress bar."""

from __future__ import annotations

import doctest
import io
import os
import pty
import re
import select
import shutil
import subprocess
from collections import Counter, defaultdict
from datetime import datetime, timezone

import numpy as np
import orjson
import pytest

import service.progress
import service.report
from service.backtest import match_incidents
from service.config import parse_config
from service.demo import DEMO_CONFIG
from service.embedded import replay
from service.labels import Label, write_labels
from service.progress import Progress, format_bytes
from service.report import ReportError, read_score_file, render_report, summarize, window_means, write_report
from service.scenario import generate

T0 = 1772409600.0  # 2026-03-02T00:00:00Z
W = 300.0


def _iso(ts: float) -> str:
    return datetime.fromtimestamp(ts, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _msgs(service: str, n: int, flagged: set[int], *, window: float = W, warm: int = 0, top: str = "errors") -> list[dict]:
    return [
        {"service": service, "window_start": _iso(T0 + k * window), "window_end": _iso(T0 + (k + 1) * window),
         "score": 0.999 if k in flagged else 0.3, "anomalous": k in flagged, "threshold": 0.99,
         "warming_up": k < warm, "contributors": [{"metric": top}] if k in flagged else []}
        for k in range(n)
    ]


@pytest.mark.parametrize("module", [service.report, service.progress])
def test_docstring_examples_run(module) -> None:
    result = doctest.testmod(module, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0 and result.attempted > 0


# ------------------------------------------------------------------ summary numbers, by hand


def test_summary_counts_windows_flags_onsets_and_matches_incidents_by_hand() -> None:
    scores = (
        _msgs("a", 20, {5, 6, 12, 18}, warm=2)
        + _msgs("b", 12, {9, 10})
        + _msgs("c", 10, set())
        + _msgs("e", 10, {4})
        + _msgs("d", 10, {7})
    )
    labels = [
        # inside window 5 (flagged from its start): caught in the onset window, delay 0
        Label("a", T0 + 5 * W + 60, T0 + 8 * W, "errors"),
        # ends before the flag at window 12, which starts within 3 windows of its end: not caught,
        # but that onset is not a false one either
        Label("a", T0 + 10 * W + 120, T0 + 11 * W),
        # onset in window 6, first flag in window 9: caught 3 windows late
        Label("b", T0 + 6 * W + 30, T0 + 12 * W),
    ]
    rows = {r.service: r for r in summarize(scores, labels)}
    a, b, c, d, e = (rows[s] for s in "abcde")
    assert (a.windows, a.warming_up, a.flagged, a.onsets) == (20, 2, 4, 3)
    assert (a.incidents, a.caught, a.delays, a.false_onsets) == (2, 1, (0,), 1)  # only the onset at window 18 is false
    assert (b.windows, b.flagged, b.onsets, b.incidents, b.caught, b.delays, b.false_onsets) == (12, 2, 1, 1, 1, (3,), 0)
    assert (c.flagged, c.onsets, c.incidents, c.caught, c.false_onsets) == (0, 0, 0, 0, 0)
    assert (d.onsets, d.false_onsets, e.onsets, e.false_onsets) == (1, 1, 1, 1)
    assert {r.window for r in rows.values()} == {W}


def test_services_are_ordered_by_onsets_then_flagged_windows_then_name() -> None:
    scores = (_msgs("quiet", 10, set()) + _msgs("one-long", 10, {2, 3, 4}) + _msgs("zeta", 10, {1})
              + _msgs("alpha", 10, {1}) + _msgs("busy", 10, {1, 3, 5}))
    assert [r.service for r in summarize(scores)] == ["busy", "one-long", "alpha", "zeta", "quiet"]


def test_no_labels_differs_from_an_empty_labels_file() -> None:
    scores = _msgs("a", 10, {2, 3, 7})
    [without] = summarize(scores)
    [empty] = summarize(scores, [])
    assert (without.incidents, without.caught, without.false_onsets) == (None, None, None)
    assert (empty.incidents, empty.caught, empty.false_onsets) == (0, 0, 2)  # nothing happened: both onsets false


def test_each_service_is_matched_with_its_own_window_length() -> None:
    # 'fast' has 1-minute windows, 'slow' 10-minute ones; both first flag 20 minutes after the onset
    scores = _msgs("fast", 60, {20}, window=60.0) + _msgs("slow", 6, {2}, window=600.0)
    labels = [Label("fast", T0, T0 + 3000), Label("slow", T0, T0 + 3000)]
    rows = {r.service: r for r in summarize(scores, labels)}
    assert rows["fast"].window == 60.0 and rows["fast"].delays == (20,)
    assert rows["slow"].window == 600.0 and rows["slow"].delays == (2,)


def test_a_window_written_twice_counts_once_and_input_order_does_not_matter() -> None:
    scores = _msgs("a", 10, {3, 4})
    shuffled = scores[::-1] + [dict(scores[3])]  # a resumed run may write a window again
    assert summarize(shuffled) == summarize(scores)


def test_malformed_score_messages_are_reported() -> None:
    good = _msgs("a", 2, set())
    with pytest.raises(ReportError, match="score message 2: the score message has no 'window_end' field"):
        summarize([good[0], {k: v for k, v in good[1].items() if k != "window_end"}])
    with pytest.raises(ReportError, match="window_end must be after window_start"):
        summarize([{**good[0], "window_end": good[0]["window_start"]}])
    with pytest.raises(ReportError, match="must be a JSON object"):
        summarize([[1, 2]])


def test_score_file_errors_name_the_line(tmp_path) -> None:
    p = tmp_path / "scores.jsonl"
    p.write_bytes(orjson.dumps(_msgs("a", 1, set())[0]) + b"\n\n{broken\n")
    with pytest.raises(ReportError, match=r"line 3: not JSON"):
        read_score_file(p)
    with pytest.raises(ReportError, match="cannot read the score file"):
        read_score_file(tmp_path / "missing.jsonl")


def test_window_means_are_recomputed_from_the_input(tmp_path) -> None:
    p = tmp_path / "in.jsonl"
    lines = [
        {"service": "a", "ts": "2026-03-02T00:04:59Z", "metrics": {"x": 4.0, "y": 1}},
        {"service": "a", "ts": T0 * 1000 + 1000, "metrics": {"x": 2.0}},  # epoch milliseconds, same window
        {"service": "b", "ts": T0, "metrics": {"x": 100.0}},  # not asked for
        {"service": "a", "ts": T0 + 300, "metrics": {"x": 9.0}},  # next window
        {"service": "a", "ts": T0 + 10, "metrics": {"x": 6.0}},  # out of order: still the first window
    ]
    p.write_bytes(b"".join(orjson.dumps(m) + b"\n" for m in lines) + b'{"service": "a", "ts": "never"}\n')
    assert list(window_means(p, {"a": W})) == [
        ("a", T0, {"x": (4.0 + 2.0 + 6.0) / 3, "y": 1.0}),
        ("a", T0 + W, {"x": 9.0}),
    ]


def test_thinning_keeps_the_extremes_of_every_pixel_column() -> None:
    rng = np.random.default_rng(11)
    t = np.arange(20_000, dtype=float)
    y = rng.normal(size=t.size)
    y[12_345] = 40.0  # a one-window spike
    y[777] = -40.0
    keep = service.report._thin(t, y, 600, 0.0, float(t[-1]))
    assert keep.size <= 600
    assert np.all(np.diff(keep) > 0)  # in time order, no repeats
    assert {0, 777, 12_345, t.size - 1} <= set(keep.tolist())
    short = service.report._thin(t[:50], y[:50], 600, 0.0, 49.0)
    assert short.tolist() == list(range(50))


# ------------------------------------------------------------------ the demo scenario, end to end


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    d = tmp_path_factory.mktemp("report-demo")
    scn = generate(days=3, services=4)
    scn.write_jsonl(d / "metrics.jsonl", bad_lines=3)
    replay(parse_config(DEMO_CONFIG, "<demo>"), str(d / "metrics.jsonl"), str(d / "scores.jsonl"))
    write_labels(d / "labels.csv", scn.incidents)
    return scn, d


def _path_points(html: str) -> list[int]:
    return [len(re.findall(r"[ML]", d)) for d in re.findall(r'<path d="([^"]*)"', html)]


def test_report_for_the_demo_scenario(demo) -> None:
    scn, d = demo
    report = write_report(d / "report.html", d / "scores.jsonl", input_path=d / "metrics.jsonl",
                          labels_path=d / "labels.csv", generated_at=0.0)
    html = (d / "report.html").read_text()
    assert html == report.html

    # every service gets a score plot and one plot per metric it reports
    expected = {s: 1 + len(scn.metric_names(s)) for s in scn.services}
    found = Counter(re.findall(r'<svg class="plot [^"]*" data-service="([^"]+)"', html))
    assert dict(found) == expected and report.plots == sum(expected.values())

    # the summary agrees with counts made here from the score file itself
    scores = read_score_file(d / "scores.jsonl")
    flagged, onsets, windows = Counter(), Counter(), Counter()
    last: dict[str, bool] = defaultdict(bool)
    for m in sorted(scores, key=lambda m: (m["service"], m["window_start"])):
        svc = m["service"]
        windows[svc] += 1
        flagged[svc] += m["anomalous"]
        onsets[svc] += m["anomalous"] and not last[svc]
        last[svc] = m["anomalous"]
    rows = report.summaries
    assert [(r.service, r.windows, r.flagged, r.onsets) for r in rows] == sorted(
        ((s, windows[s], flagged[s], onsets[s]) for s in scn.services), key=lambda x: (-x[3], -x[2], x[0]))
    assert list(report.plotted) == [r.service for r in rows]
    # the page shows the services in the same order as the table
    assert [m for m in re.findall(r'<section class="service" id="svc-([^"]+)"', html)] == list(report.plotted)

    # incidents: the same answer as service.backtest on the scenario's own incidents
    results, false = match_incidents(scores, scn.incidents, 300.0)
    assert sum(r.caught or 0 for r in rows) == sum(r.caught for r in results)
    assert sum(r.false_onsets or 0 for r in rows) == len(false)
    assert sum(r.incidents or 0 for r in rows) == len(scn.incidents) == len(report.incidents)
    for inc in scn.incidents:
        assert html.count(f"<title>{inc.kind} on {inc.metric}: ") >= 1  # its band, with times, is drawn

    # self-contained and of a reasonable size
    assert not re.search(r"""(?:src|href)\s*=\s*["'](?!#)""", html)  # only in-page links
    assert "<script" not in html and "<link" not in html and "url(" not in html
    assert "default-src 'none'" in html
    assert len(html.encode()) < 1_500_000
    assert max(_path_points(html)) <= 1500
    # the caution and the reading guide are on the page
    assert "support judgment; they do not replace it" in html and "How to read this" in html


def test_long_series_are_thinned(demo) -> None:
    _, d = demo
    report = write_report(d / "small.html", d / "scores.jsonl", input_path=d / "metrics.jsonl",
                          generated_at=0.0, max_points=200)
    points = _path_points(report.html)
    assert points and max(points) <= 200  # min and max per bucket, plus the first and last point
    # 3 days of 5-minute windows is ~820 live windows per line: the full series would not fit
    full = write_report(d / "full.html", d / "scores.jsonl", input_path=d / "metrics.jsonl", generated_at=0.0)
    assert max(_path_points(full.html)) > 800


def test_report_is_deterministic_and_works_without_labels_or_input(demo) -> None:
    scn, d = demo
    a = write_report(d / "a.html", d / "scores.jsonl", input_path=d / "metrics.jsonl", generated_at=0.0)
    b = write_report(d / "b.html", d / "scores.jsonl", input_path=d / "metrics.jsonl", generated_at=0.0)
    assert (d / "a.html").read_bytes() == (d / "b.html").read_bytes()
    assert "No labels were given" in a.html and all(r.caught is None for r in a.summaries)
    assert "<th>Incidents caught</th>" not in a.html and "<h2>Labelled incidents</h2>" not in a.html
    assert a.plots == b.plots == sum(1 + len(scn.metric_names(s)) for s in scn.services)
    # stdin input cannot be read again: score plots only, and the page says why
    c = write_report(d / "c.html", d / "scores.jsonl", input_path="-", generated_at=0.0)
    assert c.plots == len(scn.services) and "Metric plots are left out" in c.html


def test_only_the_most_alerting_services_get_plots(demo) -> None:
    _, d = demo
    r = write_report(d / "top.html", d / "scores.jsonl", input_path=d / "metrics.jsonl", generated_at=0.0,
                     max_services=2, max_metrics=3)
    assert r.plotted == tuple(s.service for s in r.summaries[:2])
    assert r.plots == 2 * (1 + 3)
    assert len(re.findall(r'<tr><td><a href="#svc-', r.html)) == 2  # plotted services link to their plots
    assert all(s.service in r.html for s in r.summaries)  # the table still lists every service
    assert "Not plotted (more than 3 metrics)" in r.html


def test_write_report_advances_a_progress_bar_over_the_input(demo) -> None:
    _, d = demo
    buf = io.StringIO()
    bar = Progress.for_input(str(d / "metrics.jsonl"), stream=buf, enabled=True, label="report", width=100)
    write_report(d / "p.html", d / "scores.jsonl", input_path=d / "metrics.jsonl", progress=bar)
    assert bar.done == bar.total == (d / "metrics.jsonl").stat().st_size
    assert buf.getvalue().startswith("\rreport [") and buf.getvalue().endswith("\n") and " 100% " in buf.getvalue()


def test_write_report_refuses_an_unwritable_path(demo, tmp_path) -> None:
    _, d = demo
    with pytest.raises(ReportError, match="cannot write the report"):
        write_report(tmp_path / "no-such-dir" / "r.html", d / "scores.jsonl")
    assert not list(tmp_path.iterdir())  # no temporary file left behind


def test_an_empty_score_file_still_renders(tmp_path) -> None:
    (tmp_path / "s.jsonl").write_bytes(b"")
    r = write_report(tmp_path / "r.html", tmp_path / "s.jsonl", generated_at=0.0)
    assert r.plots == 0 and "nothing to report" in r.html


def test_service_names_are_escaped() -> None:
    r = render_report(_msgs('<b>"x"&', 5, {2}), generated_at=0.0)
    assert '<b>"x"&' not in r.html and "&lt;b&gt;&quot;x&quot;&amp;" in r.html


# ------------------------------------------------------------------ in a real browser

_CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                   "--disable-background-networking", "--disable-component-update", "--disable-sync",
                   "--enable-logging=stderr", "--v=0"]
# Chromium logs every console message (console.* calls, uncaught errors, refused loads) to stderr
# as "...:CONSOLE:<line>] ..." (older builds: "CONSOLE(<line>)"); observed with Chromium 156.
_CONSOLE = re.compile(r"CONSOLE[:(]\d+")


def _browser() -> str:
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        if os.environ.get("TIDEWATCH_REQUIRE_BROWSER"):
            pytest.fail("chromium is required here (TIDEWATCH_REQUIRE_BROWSER is set) but is not installed")
        pytest.skip("chromium is not installed (Debian: apt-get install -y chromium)")
    return exe


def _load(exe: str, page, profile) -> tuple[str, list[str]]:
    proc = subprocess.run([exe, *_CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--dump-dom", page.as_uri()],
                          capture_output=True, text=True, timeout=180)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout, [line for line in proc.stderr.splitlines() if _CONSOLE.search(line)]


def test_the_report_loads_in_chromium_with_no_console_errors_and_every_plot(demo, tmp_path) -> None:
    exe = _browser()
    scn, d = demo
    report = write_report(tmp_path / "report.html", d / "scores.jsonl", input_path=d / "metrics.jsonl",
                          labels_path=d / "labels.csv", generated_at=0.0)
    dom, console = _load(exe, tmp_path / "report.html", tmp_path / "profile")
    assert console == []
    assert "<h1>tidewatch backtest report</h1>" in dom  # the page was parsed, not an error page
    per_service = Counter(re.findall(r'<svg class="plot [^"]*" data-service="([^"]+)"', dom))
    assert dict(per_service) == {s: 1 + len(scn.metric_names(s)) for s in scn.services}
    assert sum(per_service.values()) == report.plots
    # each plot has its drawn line (a non-empty path) in the browser's DOM
    assert len(re.findall(r'<path d="M', dom)) == report.plots


def test_the_console_check_sees_errors_when_there_are_some(tmp_path) -> None:
    # control for the test above: the same page policy, a blocked fetch and a console error
    exe = _browser()
    page = tmp_path / "control.html"
    page.write_text("<!DOCTYPE html><html><head><meta charset='utf-8'>"
                    "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; script-src 'unsafe-inline'\">"
                    "</head><body><img src='http://127.0.0.1:9/x.png'><script>console.error('control')</script></body></html>")
    _, console = _load(exe, page, tmp_path / "profile")
    assert any("control" in line for line in console)
    assert any("Content Security Policy" in line for line in console)


# ------------------------------------------------------------------ progress bar


class FakeClock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def _read_all(fd: int) -> bytes:
    out = b""
    while select.select([fd], [], [], 0.5)[0]:
        try:
            chunk = os.read(fd, 65536)
        except OSError:  # Linux reports EIO on the master once the terminal side is closed
            break
        if not chunk:
            break
        out += chunk
    return out


def test_progress_draws_on_a_terminal(tmp_path) -> None:
    master, slave = pty.openpty()
    clock = FakeClock()
    try:
        with open(slave, "w", closefd=True) as tty:
            p = Progress(1_000_000, stream=tty, clock=clock, width=80)
            assert p.enabled
            clock.now += 2.0
            p.advance(250_000)  # first call draws at once
            for _ in range(1000):
                p.advance(100)  # the clock has not moved: no redraws
            clock.now += 2.0
            p.advance(150_000)
            p.finish()
            p.finish()  # only once
            assert p.draws == 3
        text = _read_all(master).decode()
    finally:
        os.close(master)
    lines = [part for part in text.replace("\r\n", "\n").split("\r") if part]
    assert len(lines) == 3
    assert "25%" in lines[0] and "250 kB of 1.0 MB" in lines[0] and "125 kB/s" in lines[0]
    # 250 kB in 2 s is 125 kB/s, so the remaining 750 kB need 6 s
    assert "ETA 0:06" in lines[0]
    assert "50%" in lines[1] and "ETA 0:04" in lines[1]
    assert "50%" in lines[2] and lines[2].rstrip().endswith("4 s") and text.endswith("\n")
    assert all(len(line.rstrip("\n")) <= 79 for line in lines)


@pytest.mark.parametrize("kind", ["pipe", "file", "stringio"])
def test_progress_is_quiet_when_not_a_terminal(kind, tmp_path) -> None:
    clock = FakeClock()
    if kind == "pipe":
        r, w = os.pipe()
        stream = open(w, "w")
    elif kind == "file":
        stream = open(tmp_path / "err.log", "w")
    else:
        stream = io.StringIO()
    p = Progress(1000, stream=stream, clock=clock)
    for _ in range(10):
        clock.now += 1.0
        p.advance(100)
    p.finish()
    assert not p.enabled and p.draws == 0 and p.done == 1000
    if kind == "stringio":
        assert stream.getvalue() == ""
    stream.close()
    if kind == "pipe":
        assert os.read(r, 100) == b""
        os.close(r)
    if kind == "file":
        assert (tmp_path / "err.log").read_text() == ""


def test_progress_without_a_known_size_shows_bytes_and_rate() -> None:
    buf = io.StringIO()
    clock = FakeClock()
    p = Progress(None, stream=buf, enabled=True, clock=clock, width=60)
    clock.now += 4.0
    p.advance(8_000_000)
    assert buf.getvalue() == "\rreplay  8.0 MB read  2.0 MB/s"


def test_progress_pads_over_a_longer_previous_line() -> None:
    buf = io.StringIO()
    clock = FakeClock()
    p = Progress(None, stream=buf, enabled=True, clock=clock, width=60)
    clock.now += 1.0
    p.advance(123_456_789)
    first = buf.getvalue()
    clock.now += 100.0
    p.advance(1)
    second = buf.getvalue()[len(first):]
    assert len(second) == len(first)  # the shorter line is padded to cover the old one


def test_progress_for_input_uses_the_file_size(tmp_path) -> None:
    p = tmp_path / "in.jsonl"
    p.write_bytes(b"x" * 12345)
    assert Progress.for_input(str(p), stream=io.StringIO()).total == 12345
    assert Progress.for_input(str(tmp_path / "missing"), stream=io.StringIO()).total is None


def test_progress_stops_drawing_when_the_stream_breaks() -> None:
    class Broken(io.StringIO):
        def isatty(self) -> bool:
            return True

        def write(self, s: str) -> int:
            raise BrokenPipeError("gone")

    p = Progress(100, stream=Broken(), clock=FakeClock())
    assert p.enabled
    p.advance(10)  # must not raise
    assert not p.enabled and p.done == 10


def test_format_bytes_units() -> None:
    # decimal SI prefixes (common practice for disk and transfer sizes)
    assert [format_bytes(n) for n in (0, 999, 1000, 123_456, 1_000_000, 2.5e9)] == [
        "0 B", "999 B", "1.0 kB", "123 kB", "1.0 MB", "2.50 GB"]
