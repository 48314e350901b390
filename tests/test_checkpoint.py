"""Checkpoint segments: atomic writes, restore, compaction, and refusal of damaged records."""

from __future__ import annotations

import struct

import pytest

from models import ModelSettings, build_model
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
