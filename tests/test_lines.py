"""Bounded line reading: the lines, the offsets and the memory bound, against bytes.split as reference."""

from __future__ import annotations

import io

from hypothesis import given, settings
from hypothesis import strategies as st

from service.lines import LineReader


def _reference(data: bytes) -> list[bytes]:
    lines = data.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    return lines


@settings(max_examples=400, deadline=None)
@given(
    parts=st.lists(st.one_of(st.binary(max_size=40), st.just(b"\n"), st.just(b"\n\n"), st.binary(min_size=60, max_size=300)),
                   max_size=30),
    max_line=st.integers(1, 64),
    chunk=st.integers(1, 128),
)
def test_lines_offsets_and_bound_match_the_reference(parts, max_line, chunk):
    data = b"".join(parts)
    r = LineReader(io.BytesIO(data), max_line=max_line, chunk=chunk)
    got: list[bytes] = []
    ends = []
    while True:
        batch = r.read_batch(final=True)
        assert len(r._pending) <= max_line + 1  # never more than the bound of one unfinished line
        if batch is None:
            break
        got.extend(batch)
        ends.append((len(got), r.offset))
    want = _reference(data)
    assert len(got) == len(want)
    for g, w in zip(got, want):
        assert g == w or (len(w) > max_line and g == w[: max_line + 1])
    # after each batch the offset stands just past the last line handed out
    for n, off in ends:
        assert off == min(len(data), sum(len(w) + 1 for w in want[:n]))
    assert r.offset == len(data)
    assert r.cut == sum(1 for g, w in zip(got, want) if g != w)


def test_an_endless_line_is_cut_and_what_follows_is_read(tmp_path):
    """One line of 50 MB without a break: held to max_line + 1 bytes, the next line still comes."""
    path = tmp_path / "flood.jsonl"
    with open(path, "wb") as f:
        for _ in range(50):
            f.write(b"y" * 1_000_000)
        f.write(b'\n{"ok": 1}\n')
    with open(path, "rb") as f:
        r = LineReader(f, max_line=65_536, chunk=1 << 16)
        lines = [line for batch in r.batches() for line in batch]
    assert [len(x) for x in lines] == [65_537, 9]
    assert r.cut == 1 and r.offset == path.stat().st_size


def test_following_a_file_keeps_an_unfinished_line_until_its_break_arrives(tmp_path):
    path = tmp_path / "live.jsonl"
    path.write_bytes(b'{"a": 1}\n{"b"')
    with open(path, "rb") as f:
        r = LineReader(f, max_line=100)
        assert r.read_batch(final=False) == [b'{"a": 1}']
        assert r.offset == 9
        assert r.read_batch(final=False) is None  # the writer is mid-line
        with open(path, "ab") as w:
            w.write(b': 2}\n')
        assert r.read_batch(final=False) == [b'{"b": 2}']
        assert r.offset == path.stat().st_size


def test_a_resumed_reader_counts_on_from_its_start(tmp_path):
    path = tmp_path / "in.jsonl"
    path.write_bytes(b"one\ntwo\nthree\n")
    with open(path, "rb") as f:
        f.seek(4)
        r = LineReader(f, max_line=100, offset=4)
        assert [x for b in r.batches() for x in b] == [b"two", b"three"]
        assert r.offset == 14
