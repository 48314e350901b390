"""Bounded reading of newline-delimited input (files, pipes, stdin).

``readline``-style reading holds a whole line in memory however long it is, so one
line of gigabytes without a break, or a writer that never sends one, would take the
process down. :class:`LineReader` reads in chunks and never holds more than one
chunk plus ``max_line + 1`` bytes of an unfinished line: a longer line is cut to its
first ``max_line + 1`` bytes (enough for the decoder to refuse it as ``too_large``
and for the rejects sink to show how it began), the rest is skipped up to its
line break, and the byte offset still counts every byte, so a resumed run starts
exactly after the last line handed out.

>>> import io
>>> r = LineReader(io.BytesIO(b'{"a":1}\\n' + b"x" * 50 + b'\\n{"b":2}'), max_line=10, chunk=16)
>>> [line for batch in r.batches() for line in batch]
[b'{"a":1}', b'xxxxxxxxxxx', b'{"b":2}']
>>> r.offset, r.cut
(66, 1)
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import BinaryIO

__all__ = ["LineReader"]


class LineReader:
    """Chunked line reader with a bound on the bytes kept of one line.

    Parameters
    ----------
    f
        A binary stream; ``read1`` is used where it exists, so a pipe or stdin hands
        over what has arrived instead of waiting for a full chunk.
    max_line
        Longest line kept whole, in bytes (the line break not counted).
    chunk
        Bytes asked for per read.
    offset
        Where ``f`` stands now (a resumed file); :attr:`offset` counts on from it.

    Attributes
    ----------
    offset
        Byte offset just past the last line handed out.
    cut
        How many lines were longer than ``max_line`` and were cut.
    """

    __slots__ = ("f", "max_line", "chunk", "offset", "cut", "_pending", "_skipping", "_read")

    def __init__(self, f: BinaryIO, *, max_line: int, chunk: int = 1 << 20, offset: int = 0) -> None:
        self.f = f
        self.max_line = max_line
        self.chunk = chunk
        self.offset = offset
        self.cut = 0
        self._pending = b""  # the start of a line whose break has not arrived (at most max_line + 1 bytes)
        self._skipping = 0  # bytes of an over-long line dropped so far (0: not inside one)
        self._read = getattr(f, "read1", None) or f.read

    def read_batch(self, *, final: bool) -> list[bytes] | None:
        """The complete lines that one read brings, ``[]`` when it brought none, None at end of input.

        At end of input an unfinished last line is handed out when ``final`` is true (a file read to its
        end) and kept when it is false (a followed file whose writer may still finish the line).
        """
        data = self._read(self.chunk)
        if not data:
            if final and (self._pending or self._skipping):
                return [self._finish(0)]
            return None
        end = data.rfind(b"\n")
        if end < 0:
            self._grow(data)
            return []
        pieces = data[:end].split(b"\n")
        # The first piece ends the line that earlier reads began (or is a whole line of its own).
        self._grow(pieces[0])
        pieces[0] = self._finish(1)
        # The others are whole lines within this chunk: kept as they are (the decoder refuses an
        # over-long one with its true length, and a chunk bounds them anyway).
        self.offset += sum(map(len, pieces)) - len(pieces[0]) + len(pieces) - 1
        self._grow(data[end + 1 :])
        return pieces

    def _finish(self, line_break: int) -> bytes:
        """Hand out the line being gathered and count every byte it had, dropped ones too."""
        line = self._pending
        self.offset += len(line) + self._skipping + line_break
        self._pending, self._skipping = b"", 0
        return line

    def _grow(self, piece: bytes) -> None:
        """Add the start of an unfinished line, keeping at most ``max_line + 1`` bytes of it."""
        if not piece:
            return
        if self._skipping:
            self._skipping += len(piece)
            return
        room = self.max_line + 1 - len(self._pending)
        if len(piece) <= room:
            self._pending += piece
            return
        self._pending += piece[:room]
        self._skipping = len(piece) - room
        self.cut += 1

    def batches(self) -> Iterator[list[bytes]]:
        """Every line of a finite input, in batches of about one chunk."""
        while True:
            batch = self.read_batch(final=True)
            if batch is None:
                return
            if batch:
                yield batch
