"""The embedded bus: JSON lines from a file or stdin in, JSON lines out.

``run`` is the long-running form: it restores learned state and its input and
output positions from the state directory, checkpoints at an interval and on a
stop request, and resumes where it stopped when started again on the same input.
``replay`` scores a recorded file from fresh models as fast as it can and flushes
every open window at the end.

A restarted ``run`` produces exactly the output of an uninterrupted one when the
output is a file: on restart the output (and rejects) file is cut back to its
size at the last checkpoint, and input resumes from the byte offset saved with it.

Faults. A checkpoint that the state directory refuses (read-only, full) is counted
by reason and logged once per failure episode; scoring and output go on, and the
next interval tries again with everything still unsaved. The checkpoint at the end
of a run is the last chance: if it fails, the run ends with
:class:`~service.errors.StateStoreError` (exit 1) after writing all its output. An
output that refuses a write (disk full) ends the run at once with
:class:`~service.errors.OutputError` (exit 1) and no further checkpoint: a
checkpoint only ever records input offsets whose scores were flushed and fsynced,
so the next start cuts the output back and redoes the rest exactly once.
"""

from __future__ import annotations

import logging
import os
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

from service.checkpoint import CheckpointSaveError, CheckpointStore
from service.config import Config
from service.engine import Engine
from service.errors import OutputError, StateStoreError
from service.httpserver import MetricsServer
from service.lines import LineReader
from service.metrics import build_registry
from service.sinks import LineSink, encode_reject
from service.stats import RuntimeStats
from service.windows import SourceWindows, Window

__all__ = ["RunSummary", "run_embedded", "replay", "SOURCE_ID"]

log = logging.getLogger("tidewatch.embedded")

SOURCE_ID = "embedded"
_READ_HINT = 1 << 20  # bytes per batch: large enough to amortise the loop, small enough to stay responsive
RUNTIME_FORMAT = 1


@dataclass
class RunSummary:
    """What a run or replay did."""

    lines: int = 0
    accepted: int = 0
    rejected: dict[str, int] = field(default_factory=dict)
    windows: int = 0
    flagged: int = 0
    services: int = 0
    seconds: float = 0.0
    resumed_at_line: int = 0
    refused_state: list[str] = field(default_factory=list)

    def describe(self) -> str:
        rej = sum(self.rejected.values())
        reasons = ", ".join(f"{k} {v}" for k, v in sorted(self.rejected.items())) or "none"
        rate = self.lines / self.seconds if self.seconds > 0 else 0.0
        return (
            f"read {self.lines} lines ({rate:,.0f}/s): {self.accepted} accepted, {rej} rejected ({reasons}); "
            f"{self.windows} windows scored for {self.services} services, {self.flagged} flagged"
        )


def _open_input(path: str) -> BinaryIO:
    if path == "-":
        return sys.stdin.buffer
    return open(path, "rb")


class _Loop:
    """Read batches of lines into the engine; shared by run and replay.

    Lines come through a :class:`~service.lines.LineReader`: a line longer than ``max_line`` is cut to
    its first ``max_line + 1`` bytes (and so refused as ``too_large``), so no single line, however long
    or unfinished, can exhaust memory.
    """

    def __init__(self, engine: Engine, src: SourceWindows, f: BinaryIO, *, line: int, follow: bool, stop: threading.Event,
                 decode_many=None, max_line: int, offset: int = 0):
        self.engine = engine
        self.src = src
        self.reader = LineReader(f, max_line=max_line, chunk=_READ_HINT, offset=offset)
        self.line = line
        self.follow = follow
        self.stop = stop
        self.on_idle = None  # called while following a file that has no new lines
        self.decode_many = decode_many  # OpenTelemetry lines: one payload, many events

    def offset(self) -> int:
        """Byte offset just past the last line handed to the engine."""
        return self.reader.offset

    def batches(self):
        read = self.reader.read_batch
        # A followed file's last line may be mid-write: it is kept until its line break arrives.
        final = not self.follow
        while not self.stop.is_set():
            lines = read(final=final)
            if lines is None:
                if self.follow:
                    self.engine.stats.heartbeat = time.monotonic()
                    if self.on_idle is not None:
                        self.on_idle()
                    self.stop.wait(0.2)
                    continue
                return
            if lines:
                yield lines

    def pump(self, on_batch=None, progress=None) -> None:
        engine = self.engine
        src = self.src
        done = self.reader.offset
        for lines in self.batches():
            base = self.line
            if self.decode_many is None:
                engine.feed(src, lines, lambda i, base=base: {"line": base + i + 1})
            else:
                engine.feed_payloads(src, lines, lambda i, base=base: {"line": base + i + 1}, self.decode_many)
            self.line = base + len(lines)
            engine.stats.heartbeat = time.monotonic()
            if progress is not None:
                progress.advance(self.reader.offset - done)
                done = self.reader.offset
            if on_batch is not None:
                on_batch()


def _make_engine(config: Config, scores: LineSink, rejects: LineSink | None, stats: RuntimeStats, source_name: str) -> Engine:
    def on_score(service: str, payload: bytes, window: Window) -> None:
        scores.write(payload)

    def on_reject(code: str, detail: str, raw: bytes, origin: Any) -> None:
        if rejects is not None:
            if isinstance(origin, dict):
                origin = {"source": source_name, **origin}
            rejects.write(encode_reject(code, detail, raw, origin))

    return Engine(config, on_score=on_score, on_reject=on_reject, stats=stats)


def _summary(engine: Engine, lines: int, started: float) -> RunSummary:
    st = engine.stats
    return RunSummary(
        lines=lines,
        accepted=st.accepted,
        rejected=dict(st.rejected),
        windows=st.windows_closed,
        flagged=st.windows_flagged,
        services=len(engine.registry.models) + st.models_spilled,
        seconds=time.perf_counter() - started,
    )


def _payload_decoder(config: Config, input_format: str):
    if input_format == "native":
        return None
    if input_format != "otlp_json":
        raise ValueError(f"line files carry native or otlp_json messages, not {input_format}")
    from service.otlp import OtlpDecoder

    return OtlpDecoder("otlp_json", **otlp_settings(config))


def _max_line(config: Config, decoder) -> int:
    """Longest input line kept whole: the size limit of the format the lines are decoded with."""
    return config.limits.max_message_bytes if decoder is None else decoder.max_message_bytes


def otlp_settings(config: Config) -> dict:
    """The OpenTelemetry decoder's settings from the config (the current ones win over saved state)."""
    lim = config.limits
    return {
        "service_attributes": config.otlp.service_attributes,
        "histogram_quantile": config.otlp.histogram_quantile,
        "max_series": config.otlp.max_series,
        # Collector batches are large: the native message-size limit does not apply to a payload.
        "max_service_name": lim.max_service_name,
        "max_metrics": lim.max_metrics,
        "max_future_skew": lim.max_future_skew,
    }


def replay(config: Config, input_path: str, output: str, rejects: str | None = None, *, progress=None,
           input_format: str = "native") -> RunSummary:
    """Score a recorded file from fresh models; flush every window at the end.

    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> p = os.path.join(d, "in.jsonl")
    >>> with open(p, "w") as f:
    ...     for i in range(120):
    ...         _ = f.write('{"service": "api", "ts": %d, "metrics": {"x": %d}}\\n' % (1772409600 + 30 * i, i % 7))
    >>> s = replay(Config(), p, os.path.join(d, "out.jsonl"))
    >>> s.lines, s.accepted, s.windows
    (120, 120, 60)
    """
    started = time.perf_counter()
    stats = RuntimeStats()
    scores = LineSink(output, truncate_to=0) if output != "-" else LineSink(output)
    rej = LineSink(rejects, truncate_to=0) if rejects not in (None, "-") else (LineSink("-") if rejects == "-" else None)
    engine = _make_engine(config, scores, rej, stats, input_path)
    src = engine.source(SOURCE_ID)
    try:
        with _open_input(input_path) as f:
            decoder = _payload_decoder(config, input_format)
            loop = _Loop(engine, src, f, line=0, follow=False, stop=threading.Event(),
                         decode_many=None if decoder is None else decoder.decode,
                         max_line=_max_line(config, decoder))
            loop.pump(progress=progress)
        engine.flush(src)
    finally:
        if progress is not None:
            progress.finish()
        scores.close()
        if rej is not None:
            rej.close()
        engine.registry.close()
    return _summary(engine, loop.line, started)


@dataclass
class RunOptions:
    """Options of ``tidewatch run`` in embedded mode."""

    input: str = "-"
    output: str = "-"
    rejects: str | None = None
    state_dir: str | None = None
    follow: bool = False
    http_listen: str | None = None  # None: take the config's
    state_key: bytes | None = None
    reloader: object | None = None  # a service.reload.ConfigReloader, polled between batches
    input_format: str = "native"  # or otlp_json: one OpenTelemetry ExportMetricsServiceRequest per line


def run_embedded(config: Config, opts: RunOptions, stop: threading.Event) -> RunSummary:
    """Run until the input ends (or, with ``follow``, until ``stop`` is set)."""
    started = time.perf_counter()
    stats = RuntimeStats()
    state_dir = opts.state_dir or config.state.dir
    store = CheckpointStore(state_dir, stats=stats, key=opts.state_key)
    restored = store.load()
    for line in restored.refused:
        log.error("saved state refused; the service starts fresh", extra={"event": "state_refused", "detail": line})

    in_path = None if opts.input == "-" else str(Path(opts.input).resolve())
    out_path = None if opts.output == "-" else str(Path(opts.output).resolve())
    rej_path = None if opts.rejects in (None, "-") else str(Path(opts.rejects).resolve())
    rt = restored.runtime or {}
    resume = bool(in_path) and rt.get("input", {}).get("path") == in_path
    if resume:
        try:
            size = os.path.getsize(in_path)  # type: ignore[arg-type]
        except OSError:
            size = -1
        if size < rt["input"]["offset"]:
            log.warning(
                "input is shorter than the saved position; reading it from the start",
                extra={"event": "resume_refused", "path": in_path},
            )
            resume = False

    def position(section: str, path: str | None) -> int | None:
        if resume and path is not None and rt.get(section, {}).get("path") == path:
            return int(rt[section]["offset"])
        return None

    scores = LineSink(opts.output, truncate_to=position("output", out_path))
    rej: LineSink | None = None
    if opts.rejects == "-":
        rej = LineSink("-")
    elif opts.rejects:
        rej = LineSink(opts.rejects, truncate_to=position("rejects", rej_path))
    engine = _make_engine(config, scores, rej, stats, opts.input)
    # Evicted models go to a spill store, signed like the checkpoints; only the models that fit under
    # limits.max_live_models are decoded at start, the rest are parked there. The store is a cache
    # rebuilt at every start, so it lives in a private temporary directory ($TMPDIR), not the state
    # directory: a state directory that turns read-only or full must not stop eviction and scoring.
    engine.registry.attach_spill(None, key=opts.state_key)
    engine.registry.restore(restored.models.records(), key=opts.state_key)
    if resume and SOURCE_ID in rt.get("sources", {}):
        engine.sources[SOURCE_ID] = SourceWindows.from_state(rt["sources"][SOURCE_ID])
    src = engine.source(SOURCE_ID)

    listen = config.http.listen if opts.http_listen is None else opts.http_listen
    server = None
    if listen:
        registry = build_registry(stats, lambda: len(engine.registry.models), config.limits.max_service_series)
        server = MetricsServer(listen, registry, stats).start()
        log.info("serving metrics", extra={"event": "http_listening", "address": "%s:%d" % server.address})

    f = _open_input(opts.input)
    start_line = 0
    if resume:
        f.seek(int(rt["input"]["offset"]))
        start_line = int(rt["input"].get("line", 0))
        log.info("resuming", extra={"event": "resumed", "line": start_line, "generation": restored.generation})
    decoder = _payload_decoder(config, opts.input_format)
    if decoder is not None and resume and "otlp" in rt:
        decoder = type(decoder).from_state(rt["otlp"], **otlp_settings(config))  # cumulative sums carry on exactly
    loop = _Loop(engine, src, f, line=start_line, follow=opts.follow, stop=stop,
                 decode_many=None if decoder is None else decoder.decode,
                 max_line=_max_line(config, decoder), offset=int(rt["input"]["offset"]) if resume else 0)
    stats.ready = True

    saved_at_offset = -1
    saved_line = start_line
    failing: str | None = None  # the reason of the save-failure episode under way, if any
    failed_attempts = 0

    def checkpoint(final: bool = False) -> None:
        nonlocal saved_at_offset, saved_line, failing, failed_attempts
        if loop.offset() == saved_at_offset and not engine.registry.dirty and in_path:
            return  # nothing new since the last checkpoint
        # Output first: an OutputError here propagates and nothing of this checkpoint is recorded,
        # so the saved input offset never runs ahead of scores on disk.
        out_off = scores.sync()
        rej_off = rej.sync() if rej is not None else None
        stats.high_marks[SOURCE_ID] = src.high_mark
        runtime = {
            "format": RUNTIME_FORMAT,
            "input": {"path": in_path, "offset": loop.offset() if in_path else 0, "line": loop.line},
            "output": {"path": out_path, "offset": out_off},
            "rejects": {"path": rej_path, "offset": rej_off},
            "sources": {SOURCE_ID: src.to_state()} if in_path else {},
            **({"otlp": decoder.to_state()} if decoder is not None and in_path else {}),
            "saved_at": time.time(),
        }
        try:
            store.save(engine.registry.models, engine.registry.dirty, runtime)
        except CheckpointSaveError as exc:
            # Scoring goes on; the next interval tries again with everything still dirty. One log line
            # per episode (and per change of reason), not one per attempt.
            failed_attempts += 1
            if final:
                raise StateStoreError(
                    f"the last checkpoint of this run failed ({exc}); the output is complete, and the next start "
                    f"resumes from the last saved checkpoint (input line {saved_line}) and redoes the rest exactly"
                ) from exc
            if failing != exc.reason:
                failing = exc.reason
                log.error("checkpoint failed; scoring goes on and each interval tries again",
                          extra={"event": "state_save_failed", "reason": exc.reason, "error": str(exc),
                                 "saved_line": saved_line})
            return
        engine.registry.dirty.clear()
        saved_at_offset = runtime["input"]["offset"]
        saved_line = loop.line
        if failing is not None:
            log.warning("checkpoint saved again", extra={"event": "state_save_recovered", "failed_attempts": failed_attempts,
                                                          "reason": failing})
            failing, failed_attempts = None, 0

    interval = config.state.checkpoint_interval
    next_at = time.monotonic() + interval

    def on_batch() -> None:
        nonlocal next_at
        if opts.reloader is not None:
            opts.reloader.poll(engine)
        if src.high_mark > float("-inf"):
            stats.high_marks[SOURCE_ID] = src.high_mark
        if time.monotonic() >= next_at:
            checkpoint()
            next_at = time.monotonic() + interval

    loop.on_idle = on_batch
    failed = False
    try:
        if not resume and in_path:
            # A first checkpoint before any line is read: a run stopped before its first interval
            # restarts from here (output cut back to its size now) instead of appending it all again.
            checkpoint()
        loop.pump(on_batch)
        if not stop.is_set():
            # The input ended: every open window is final.
            engine.flush(src)
        checkpoint(final=True)
    except OutputError as exc:
        # Propagates (exit 1) without a checkpoint: nothing past the last checkpoint is acknowledged,
        # and the next start cuts the output back and resumes there.
        failed = True
        raise OutputError(
            f"{exc}; stopping. Nothing after the last checkpoint (input line {saved_line}) is recorded as done: "
            f"once the output can be written again, the next start resumes there and writes each score once"
        ) from exc
    except BaseException:
        failed = True
        raise
    finally:
        if server is not None:
            server.stop()
        if f is not sys.stdin.buffer:
            f.close()
        # After a failure, closing must not raise over the error that ended the run.
        for sink in (scores, rej):
            if sink is None:
                continue
            if failed:
                sink.abandon()
            else:
                sink.close()
        engine.registry.close()  # after the final checkpoint, which reads spilled models
    summary = _summary(engine, loop.line - start_line, started)
    summary.resumed_at_line = start_line
    summary.refused_state = restored.refused
    return summary
