"""Checkpoint segments: atomic writes, restore, compaction, and refusal of damaged records."""

from __future__ import annotations

import os
import struct
import subprocess
import sys
import tracemalloc
import zlib
from pathlib import Path

import orjson
import pytest

from models import ModelSettings, build_model, encode_state
from service.checkpoint import CheckpointStore
from service.errors import StateStoreError
from service.stats import RuntimeStats


def _models(n: int = 3, windows: int = 5) -> dict:
    out = {}
    for i in range(n):
        m = build_model(f"svc-{i}", ModelSettings(warm_up=2))
        for w in range(windows):
            m.assess({"lat.mean": 100.0 + w + i, "count": 5.0})
        out[f"svc-{i}"] = m
    return out


def _same(a, b) -> bool:
    x = {"lat.mean": 130.0, "count": 5.0}
    return a.assess(dict(x)).score == b.assess(dict(x)).score and a.windows_seen == b.windows_seen


def test_save_then_load_restores_models_and_the_runtime_record(tmp_path):
    ms = _models()
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"input": {"offset": 42}})
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.runtime == {"input": {"offset": 42}} and restored.refused == []
    for name in ms:
        assert _same(ms[name], restored.models[name])


def test_deltas_carry_only_dirty_models_and_the_last_record_wins(tmp_path):
    ms = _models()
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"n": 1})
    ms["svc-1"].assess({"lat.mean": 500.0, "count": 5.0})
    store.save(ms, {"svc-1"}, {"n": 2})
    assert len(list(tmp_path.glob("ckpt-*.twc"))) == 2
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.runtime == {"n": 2}
    assert restored.models["svc-1"].windows_seen == 6 and restored.models["svc-0"].windows_seen == 5


def test_compaction_writes_a_new_base_and_removes_older_segments(tmp_path):
    ms = _models(n=2)
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    for i in range(12):
        for m in ms.values():
            m.assess({"lat.mean": 100.0 + i, "count": 5.0})
        store.save(ms, set(ms), {"n": i})
    segments = sorted(tmp_path.glob("ckpt-*.twc"))
    assert len(segments) < 12
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.runtime == {"n": 11} and restored.models["svc-0"].windows_seen == 17


@pytest.mark.parametrize("damage", ["flip_model_byte", "truncate", "bad_magic", "newer_format"])
def test_damaged_segments_are_refused_counted_and_set_aside(tmp_path, damage):
    ms = _models()
    stats = RuntimeStats()
    CheckpointStore(tmp_path, stats=stats).save(ms, set(ms), {"n": 1})
    (seg,) = tmp_path.glob("ckpt-*.twc")
    data = bytearray(seg.read_bytes())
    if damage == "flip_model_byte":
        data[200] ^= 0x01
    elif damage == "truncate":
        data = data[: len(data) // 2]
    elif damage == "bad_magic":
        data[0:4] = b"XXXX"
    else:
        struct.pack_into("<H", data, 4, 99)
    seg.write_bytes(bytes(data))
    stats2 = RuntimeStats()
    restored = CheckpointStore(tmp_path, stats=stats2).load()
    assert restored.refused, "the damage went unnoticed"
    assert sum(stats2.state_records_refused.values()) >= 1
    expected_models = {"flip_model_byte": 2, "truncate": None, "bad_magic": 0, "newer_format": 0}[damage]
    if expected_models is None:
        assert len(restored.models) < 3  # the records before the cut survive
    else:
        assert len(restored.models) == expected_models
    assert len(list(tmp_path.glob("ckpt-*.corrupt-*"))) == 1  # kept for inspection, out of the way


def test_a_signed_store_refuses_unsigned_and_wrongly_signed_records(tmp_path):
    ms = _models(n=1)
    CheckpointStore(tmp_path / "a", stats=RuntimeStats(), key=b"k1").save(ms, set(ms), {})
    CheckpointStore(tmp_path / "b", stats=RuntimeStats()).save(ms, set(ms), {})
    wrong = CheckpointStore(tmp_path / "a", stats=RuntimeStats(), key=b"k2").load()
    unsigned = CheckpointStore(tmp_path / "b", stats=RuntimeStats(), key=b"k1").load()
    good = CheckpointStore(tmp_path / "a", stats=RuntimeStats(), key=b"k1").load()
    assert wrong.models == {} and wrong.refused
    assert unsigned.models == {} and unsigned.refused
    assert list(good.models) == ["svc-0"]


def test_a_failing_write_raises_counts_and_keeps_the_previous_checkpoint(tmp_path):
    ms = _models(n=1)
    stats = RuntimeStats()
    store = CheckpointStore(tmp_path / "state", stats=stats)
    store.save(ms, set(ms), {"n": 1})
    # Make the directory unusable in a way root cannot override: replace it by a regular file.
    (tmp_path / "state").rename(tmp_path / "saved")
    (tmp_path / "state").write_text("not a directory")
    with pytest.raises(StateStoreError):
        store.save(ms, set(ms), {"n": 2})
    assert stats.state_save_failures == 1
    (tmp_path / "state").unlink()
    (tmp_path / "saved").rename(tmp_path / "state")
    assert CheckpointStore(tmp_path / "state", stats=RuntimeStats()).load().runtime == {"n": 1}


# --- streaming saves, copies of unchanged records, compaction, crashes ------------------------------

def _format1_segment(generation: int, base: bool, records: list[bytes], runtime: bytes) -> bytes:
    """A format-1 segment joined in memory from the layout in service/checkpoint.py's docstring, the way
    the earlier whole-file writer built it (header, frames, then a trailer CRC over all before it)."""
    parts = [b"TWCK" + struct.pack("<HBQ", 1, 1 if base else 0, generation)]
    for kind, payload in [(1, r) for r in records] + [(2, runtime)]:
        parts.append(struct.pack("<BII", kind, len(payload), zlib.crc32(payload)) + payload)
    body = b"".join(parts)
    return body + struct.pack("<BI", 0xFF, zlib.crc32(body))


def test_a_streamed_segment_is_byte_for_byte_the_format_1_layout(tmp_path):
    ms = _models()
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    written = store.save(ms, set(ms), {"n": 1})
    (seg,) = tmp_path.glob("ckpt-*.twc")
    expected = _format1_segment(1, True, [encode_state(s, m) for s, m in ms.items()], orjson.dumps({"n": 1}))
    assert seg.read_bytes() == expected and written == len(expected)


def test_segments_joined_by_the_earlier_writer_still_load(tmp_path):
    ms = _models()
    (tmp_path / "ckpt-000000000001.twc").write_bytes(
        _format1_segment(1, True, [encode_state(s, m) for s, m in ms.items()], b'{"n":1}'))
    ms["svc-2"].assess({"lat.mean": 400.0, "count": 5.0})
    (tmp_path / "ckpt-000000000002.twc").write_bytes(
        _format1_segment(2, False, [encode_state("svc-2", ms["svc-2"])], b'{"n":2}'))
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    restored = store.load()
    assert restored.refused == [] and restored.runtime == {"n": 2} and restored.generation == 2
    assert [restored.models[s].windows_seen for s in sorted(ms)] == [5, 5, 6]
    # ... and a base written over them copies their unchanged records.
    ms["svc-0"].assess({"lat.mean": 300.0, "count": 5.0})
    ms["svc-1"].assess({"lat.mean": 300.0, "count": 5.0})
    store.save(ms, {"svc-0", "svc-1"}, {"n": 3})
    assert store.last_save.base and store.last_save.copied == 1 and store.last_save.encoded == 2
    again = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert [again.models[s].windows_seen for s in sorted(ms)] == [6, 6, 6]
    assert all(_same(ms[s], again.models[s]) for s in ms)


def test_a_save_and_a_restore_never_hold_the_whole_checkpoint_in_memory(tmp_path):
    ms = _models(n=150)
    total = sum(len(encode_state(s, m)) for s, m in ms.items())
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        written = store.save(ms, set(ms), {"n": 1})
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert written > total > 4 * 2**20
    # The write buffer (1 MiB) and one record; the whole-file writer peaked above twice the total.
    assert peak < total / 3, (peak, total)
    # A restore holds the records it restores, but not the file's bytes besides them.
    tracemalloc.start()
    try:
        restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert len(restored.models) == 150 and peak < 1.5 * total, (peak, total)


def test_a_base_copies_unchanged_records_and_encodes_the_changed(tmp_path):
    ms = _models()
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"n": 0})
    for i, name in enumerate(sorted(ms)):
        ms[name].assess({"lat.mean": 200.0 + i, "count": 5.0})
        store.save(ms, {name}, {"n": i + 1})
    # Two one-record deltas, then the third superseded as many bytes as are live: a base.
    report = store.last_save
    assert report.base and (report.encoded, report.copied) == (1, 2)
    assert [p.name for p in tmp_path.glob("ckpt-*.twc")] == ["ckpt-000000000004.twc"]
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.runtime == {"n": 3}
    assert all(restored.models[s].windows_seen == 6 and _same(ms[s], restored.models[s]) for s in ms)


def test_a_record_that_does_not_read_back_intact_is_encoded_from_the_live_model(tmp_path):
    ms = _models()
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"n": 0})
    (seg,) = tmp_path.glob("ckpt-*.twc")
    data = bytearray(seg.read_bytes())
    data[200] ^= 0x01  # inside svc-0's record, which the base below would copy
    seg.write_bytes(bytes(data))
    ms["svc-1"].assess({"lat.mean": 250.0, "count": 5.0})
    ms["svc-2"].assess({"lat.mean": 250.0, "count": 5.0})
    store.save(ms, {"svc-1", "svc-2"}, {"n": 1})
    assert store.last_save.base and (store.last_save.encoded, store.last_save.copied) == (3, 0)
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.refused == [] and all(_same(ms[s], restored.models[s]) for s in ms)


def test_the_directory_stays_under_twice_the_live_state_plus_one_delta(tmp_path):
    ms = _models(n=8)
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"n": 0})
    live = sum(f.stat().st_size for f in tmp_path.glob("ckpt-*.twc"))
    record = max(len(encode_state(s, m)) for s, m in ms.items())
    bases = 0
    for i in range(40):
        name = f"svc-{i % 8}"
        ms[name].assess({"lat.mean": 100.0 + i % 5, "count": 5.0})
        store.save(ms, {name}, {"n": i + 1})
        bases += store.last_save.base
        on_disk = sum(f.stat().st_size for f in tmp_path.glob("ckpt-*.twc"))
        assert on_disk <= 2 * live + record + 4096, (i, on_disk, live)
    assert bases >= 4  # compaction ran, each time copying the seven unchanged records
    restored = CheckpointStore(tmp_path, stats=RuntimeStats()).load()
    assert restored.runtime == {"n": 40} and all(_same(ms[s], restored.models[s]) for s in ms)


_KILLED_SAVER = r"""
import sys
from models import ModelSettings, build_model
from service.checkpoint import CheckpointStore
from service.stats import RuntimeStats

store = CheckpointStore(sys.argv[1], stats=RuntimeStats())
restored = store.load()
n = restored.runtime["n"] if restored.runtime else 0
ms = {s: restored.models[s] for s in restored.models}
for i in range(40):
    name = f"svc-{i}"
    if name not in ms:
        ms[name] = build_model(name, ModelSettings(warm_up=2))
        for w in range(5):
            ms[name].assess({"lat.mean": 100.0 + w, "count": 5.0})
for _ in range(100_000):  # bounded: the parent kills it long before
    n += 1
    # Save n moves svc-(n % 40) one window on, and every 7th save every service: deltas and bases.
    dirty = set(ms) if n % 7 == 0 else {f"svc-{n % 40}"}
    for name in dirty:
        ms[name].assess({"lat.mean": 100.0 + n % 9, "count": 5.0})
    store.save(ms, dirty, {"n": n})
    print(n, flush=True)
"""


def _windows_after(n: int, service: int) -> int:
    """Windows of svc-<service> after save n of _KILLED_SAVER: 5 to start, one per save that moved it."""
    return 5 + sum(1 for k in range(1, n + 1) if k % 7 == 0 or k % 40 == service)


def _kill_mid_write(proc: subprocess.Popen, state: Path, at_bytes: int) -> None:
    """SIGKILL the saver once a save's temporary file holds at least ``at_bytes`` (so the kill lands
    inside a write, at a different depth each round); bounded by count, not by time."""
    for _ in range(2_000_000):
        for p in state.glob(".ckpt-*.tmp"):
            try:
                if p.stat().st_size >= at_bytes:
                    proc.kill()
                    return
            except FileNotFoundError:
                pass  # renamed (committed) between the listing and the stat
        if proc.poll() is not None:
            break
    proc.kill()
    raise AssertionError("no save in progress was seen")


def test_sigkill_at_any_point_of_a_save_leaves_a_checkpoint_that_loads_and_resumes(tmp_path):
    state = tmp_path / "state"
    root = str(Path(__file__).resolve().parents[1])
    last = 0
    # Depths into the temporary file; a base of the 40 models is about 1.2 MB, a delta about 30 kB.
    # The signal can arrive just after the save it was aimed at renamed its file (the kill is sent
    # after the size is seen): that is still a crash to recover from, but not one inside a write, so
    # such a depth is tried again (at most 5 times) until a kill leaves a temporary file behind.
    depths = [(at_bytes, attempt) for at_bytes in (0, 20_000, 300_000, 900_000, 1, 600_000)
              for attempt in range(5)]
    inside: set[int] = set()
    for at_bytes, _attempt in depths:
        if at_bytes in inside:
            continue
        proc = subprocess.Popen([sys.executable, "-c", _KILLED_SAVER, str(state)], cwd=root,
                                stdout=subprocess.PIPE, text=True, env={**os.environ, "PYTHONPATH": root})
        assert proc.stdout is not None
        first = proc.stdout.readline()
        assert first, "the saver ended before its first save"
        _kill_mid_write(proc, state, at_bytes)
        proc.wait(timeout=60)
        done = int((first + proc.stdout.read()).split()[-1])  # the last save that returned
        proc.stdout.close()
        if list(state.glob(".ckpt-*.tmp")):
            inside.add(at_bytes)
        restored = CheckpointStore(state, stats=RuntimeStats()).load()
        assert restored.refused == [] and not list(state.glob(".ckpt-*.tmp"))
        n = restored.runtime["n"]
        assert done <= n <= done + 1 and n > last  # the last save that returned, or the one whose rename got in
        assert {s: restored.models[s].windows_seen for s in restored.models} == {
            f"svc-{i}": _windows_after(n, i) for i in range(40)}
        last = n
    assert inside == {0, 20_000, 300_000, 900_000, 1, 600_000}, "some kills never landed inside a write"
