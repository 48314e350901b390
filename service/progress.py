"""A progress bar for long replays: on stderr when it is a terminal, silent otherwise.

The replay loop reads its input in batches of about a megabyte and calls
:meth:`Progress.advance` once per batch with the bytes it consumed. ``advance`` only adds
to a counter unless the bar is shown and a quarter of a second has passed since it was
last drawn, so it costs nothing measurable even when called far more often. Output to
a file or pipe (CI logs, ``2> replay.log``) stays clean: the bar is only drawn when the
stream is a terminal.

The line is redrawn in place with a carriage return and padded with spaces to cover the
previous one (no terminal escape codes, so it works on any terminal)::

    replay [##########..........]  50%  143.0 MB of 286.0 MB  35.2 MB/s  ETA 0:04

Examples
--------
>>> import io
>>> p = Progress(2_000_000, stream=io.StringIO())  # not a terminal: silent
>>> p.enabled
False
>>> p.advance(500_000); p.advance(500_000)
>>> p.done, p.fraction
(1000000, 0.5)
>>> render_line(label="replay", done=1_430_000, total=2_860_000, rate=352_000.0, width=80)
'replay [#############..............]  50%  1.4 MB of 2.9 MB  352 kB/s  ETA 0:04'
"""

from __future__ import annotations

import os
import stat
import sys
import time
from collections.abc import Callable
from typing import TextIO

__all__ = ["Progress", "format_bytes", "render_line"]

_MIN_BAR = 10
_DEFAULT_INTERVAL = 0.25  # seconds between redraws: often enough to look alive, rarely enough to cost nothing


def format_bytes(n: float) -> str:
    """Decimal (SI) byte sizes, as disks and network rates are usually quoted.

    >>> format_bytes(999), format_bytes(1_500), format_bytes(286_000_000), format_bytes(3.2e9)
    ('999 B', '1.5 kB', '286.0 MB', '3.20 GB')
    """
    if n < 1000:
        return f"{n:.0f} B"
    if n < 1e6:
        return f"{n / 1e3:.1f} kB" if n < 1e5 else f"{n / 1e3:.0f} kB"
    if n < 1e9:
        return f"{n / 1e6:.1f} MB"
    return f"{n / 1e9:.2f} GB"


def _clock_text(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def render_line(*, label: str, done: int, total: int | None, rate: float, width: int,
                elapsed: float | None = None) -> str:
    """One progress line, at most ``width - 1`` characters (the last column is left free
    because some terminals wrap when it is written).

    ``elapsed`` marks the final line: it shows the time taken instead of an ETA.

    >>> render_line(label="replay", done=5_000_000, total=None, rate=2e6, width=60)
    'replay  5.0 MB read  2.0 MB/s'
    >>> render_line(label="replay", done=10, total=10, rate=5.0, width=40, elapsed=2.0)
    'replay [##############] 100%  10 B  2 s'
    """
    speed = f"{format_bytes(rate)}/s" if rate > 0 else "-- B/s"
    if total is None or total <= 0:
        tail = f"{format_bytes(done)} read" + (f" in {_clock_text(elapsed)}" if elapsed is not None else "")
        return f"{label}  {tail}  {speed}"[: max(1, width - 1)]
    frac = min(1.0, done / total)
    if elapsed is not None:
        info = f" {frac:4.0%}  {format_bytes(done)}  {elapsed:.0f} s" if elapsed < 60 else \
            f" {frac:4.0%}  {format_bytes(done)}  {_clock_text(elapsed)}"
    else:
        eta = _clock_text((total - done) / rate) if rate > 0 and done < total else "--:--"
        info = f" {frac:4.0%}  {format_bytes(done)} of {format_bytes(total)}  {speed}  ETA {eta}"
    room = width - 1 - len(label) - 3 - len(info)
    if room < _MIN_BAR:
        return f"{label}{info}"[: max(1, width - 1)]
    filled = int(frac * room)
    return f"{label} [{'#' * filled}{'.' * (room - filled)}]{info}"


class Progress:
    """Bytes read of an input of known (or unknown) size, drawn as a bar on a terminal.

    Parameters
    ----------
    total
        Input size in bytes, or None when unknown (stdin, a pipe): then bytes and rate only.
    stream
        Where to draw (default ``sys.stderr``).
    label
        Text in front of the bar.
    enabled
        Force the bar on or off; by default it is on exactly when ``stream`` is a terminal.
    interval
        Least seconds between redraws.
    clock
        Monotonic clock in seconds (injected by tests).
    width
        Line width; by default the terminal's width, or 80.
    """

    __slots__ = ("total", "stream", "label", "enabled", "interval", "done", "_clock", "_start", "_next",
                 "_last_len", "_width", "_finished", "draws")

    def __init__(self, total: int | None, *, stream: TextIO | None = None, label: str = "replay",
                 enabled: bool | None = None, interval: float = _DEFAULT_INTERVAL,
                 clock: Callable[[], float] = time.monotonic, width: int | None = None) -> None:
        self.total = total if total is None or total > 0 else None
        self.stream = sys.stderr if stream is None else stream
        self.label = label
        self.enabled = _is_terminal(self.stream) if enabled is None else bool(enabled)
        self.interval = interval
        self.done = 0
        self._clock = clock
        self._start = clock()
        self._next = self._start  # the first advance draws at once
        self._last_len = 0
        self._width = width
        self._finished = False
        self.draws = 0  # lines drawn so far (for tests and for the curious)

    @classmethod
    def for_input(cls, path: str, **kwargs) -> "Progress":
        """A bar sized to the input file; ``"-"`` or a non-regular file (a pipe) has no known size.

        >>> import io
        >>> Progress.for_input("-", stream=io.StringIO()).total is None
        True
        """
        total = None
        if path != "-":
            try:
                st = os.stat(path)
                if stat.S_ISREG(st.st_mode):
                    total = st.st_size
            except OSError:
                total = None  # the reader will report the real error
        return cls(total, **kwargs)

    @property
    def fraction(self) -> float | None:
        """Share of the input read, in [0, 1], or None when the size is unknown."""
        return None if self.total is None else min(1.0, self.done / self.total)

    def advance(self, nbytes: int) -> None:
        """Count ``nbytes`` more bytes read; redraw if shown and the interval has passed."""
        self.done += nbytes
        if not self.enabled:
            return
        now = self._clock()
        if now < self._next:
            return
        self._next = now + self.interval
        self._draw(now, final=False)

    def finish(self) -> None:
        """Draw the final line and end it with a newline (once; nothing when not shown)."""
        if self._finished:
            return
        self._finished = True
        if self.enabled:
            self._draw(self._clock(), final=True)

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc: object) -> None:
        self.finish()

    def _line_width(self) -> int:
        if self._width is not None:
            return self._width
        try:
            return os.get_terminal_size(self.stream.fileno()).columns
        except (OSError, AttributeError, ValueError):
            return 80

    def _draw(self, now: float, *, final: bool) -> None:
        elapsed = now - self._start
        rate = self.done / elapsed if elapsed > 0 else 0.0
        line = render_line(label=self.label, done=self.done, total=self.total, rate=rate,
                           width=self._line_width(), elapsed=elapsed if final else None)
        pad = " " * max(0, self._last_len - len(line))
        self._last_len = len(line)
        try:
            self.stream.write("\r" + line + pad + ("\n" if final else ""))
            self.stream.flush()
        except (OSError, ValueError):
            # a closed or broken terminal must never stop a replay: stop drawing instead
            self.enabled = False
            return
        self.draws += 1


def _is_terminal(stream: object) -> bool:
    try:
        return bool(stream.isatty())  # type: ignore[attr-defined]
    except (AttributeError, ValueError, OSError):
        return False
