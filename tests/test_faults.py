"""Faults on the embedded bus: the state directory read-only or full, the output full, SIGTERM mid-save.

The faults are real: small tmpfs filesystems mounted for the test (``mount -t tmpfs -o size=...``),
remounted read-only or filled to the last byte. Root ignores permission bits, so ``chmod`` would
prove nothing here; mounting needs root, and the tests skip with that reason when it is refused.
Every test compares the final output with an uninterrupted run's, byte for byte: no gaps, no
duplicates.
"""

from __future__ import annotations

import errno
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path

import orjson
import pytest

from service.checkpoint import CheckpointSaveError, CheckpointStore
from service.stats import RuntimeStats

T0 = 1772409600  # 2026-03-02T00:00:00Z
# Bounds on waiting for a subprocess to reach a state; they time nothing.
DEADLINE_S = 120.0


# --- helpers ---------------------------------------------------------------------------------


def write_stream(path: Path, windows: int, services: int, seed: int = 3) -> None:
    """One message per service per 20 s, ``windows`` minutes long; one incident on svc-1."""
    rng = random.Random(seed)
    with open(path, "wb") as f:
        for step in range(windows * 3):
            for s in range(services):
                lat = 100.0 + 5.0 * ((step // 30) % 4) + rng.gauss(0.0, 3.0)
                if s == 1 and windows * 3 // 2 < step < windows * 3 // 2 + 6:
                    lat += 300.0
                f.write(orjson.dumps({"service": f"svc-{s}", "ts": T0 + 20 * step,
                                      "metrics": {"lat": round(lat, 3), "errors": rng.randrange(3)}}) + b"\n")


def config(path: Path, interval: str, listen: str = "") -> Path:
    path.write_text(f'[defaults]\nwindow = "1m"\nwarm_up = 5\n[state]\ncheckpoint_interval = "{interval}"\n'
                    f'[http]\nlisten = "{listen}"\n')
    return path


def cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, timeout=600)


def start(args: list[str], log: Path) -> subprocess.Popen:
    with open(log, "ab") as err:
        return subprocess.Popen([sys.executable, "-m", "service.cli", *args], stdout=subprocess.DEVNULL, stderr=err)


def wait_for(what: str, cond: Callable[[], bool], p: subprocess.Popen | None = None, log: Path | None = None) -> None:
    deadline = time.monotonic() + DEADLINE_S
    while not cond():
        if p is not None and p.poll() is not None:
            raise AssertionError(f"the run exited ({p.returncode}) before {what}: " + (log.read_text()[-3000:] if log else ""))
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}: " + (log.read_text()[-3000:] if log else ""))
        time.sleep(0.05)


def events(log: Path, name: str) -> list[dict]:
    out = []
    for line in log.read_bytes().splitlines():
        try:
            rec = orjson.loads(line)
        except orjson.JSONDecodeError:
            continue
        if rec.get("event") == name:
            out.append(rec)
    return out


def load_copy(state: Path, tmp: Path) -> tuple[CheckpointStore, object]:
    """Load a copy of ``state`` (the run may still be using the original)."""
    dst = tmp / f"copy-{time.monotonic_ns()}"
    shutil.copytree(state, dst)
    store = CheckpointStore(dst, stats=RuntimeStats())
    return store, store.load()


def scrape(port: int) -> dict[str, float]:
    text = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=10).read().decode()
    out = {}
    for line in text.splitlines():
        if line and not line.startswith("#"):
            name, _, value = line.rpartition(" ")
            out[name] = float(value)
    return out


def fill(directory: Path) -> Path:
    """Fill the filesystem of ``directory`` to the last byte; return the filler file."""
    filler = directory / "filler"
    with open(filler, "wb", buffering=0) as f:  # unbuffered: nothing left to flush at close
        for size in (65536, 512, 1):  # top up with smaller writes where a larger one no longer fits
            try:
                while f.write(b"\0" * size) == size:
                    pass
            except OSError as exc:
                assert exc.errno == errno.ENOSPC, exc
    return filler


@pytest.fixture
def small_fs(tmp_path: Path) -> Iterator[Callable[[str, str], Path]]:
    """Mount small tmpfs filesystems under ``tmp_path``; unmounted at teardown."""
    mounted: list[Path] = []

    def make(name: str, size: str) -> Path:
        if os.geteuid() != 0:
            pytest.skip("needs root to mount a small tmpfs (a real full or read-only filesystem)")
        d = tmp_path / name
        d.mkdir()
        r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(d)], capture_output=True, text=True)
        if r.returncode != 0:
            pytest.skip(f"mounting a tmpfs is not permitted here: {r.stderr.strip()}")
        mounted.append(d)
        return d

    yield make
    for d in reversed(mounted):
        subprocess.run(["umount", str(d)], capture_output=True)
        if os.path.ismount(d):
            subprocess.run(["umount", "-l", str(d)], capture_output=True)


def remount(d: Path, opts: str) -> None:
    # A read-only remount is refused (EBUSY) while a file on it is open for writing, i.e. while the
    # run is in the middle of a save: try again until it lands between saves.
    deadline = time.monotonic() + DEADLINE_S
    while True:
        r = subprocess.run(["mount", "-o", f"remount,{opts}", str(d)], capture_output=True, text=True)
        if r.returncode == 0:
            return
        if time.monotonic() > deadline:
            raise AssertionError(f"remount,{opts} of {d} failed: {r.stderr}")
        time.sleep(0.01)


def free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def stream(tmp_path_factory) -> tuple[Path, bytes]:
    """Input of 8 services for 300 minutes and the output of one uninterrupted run over it."""
    d = tmp_path_factory.mktemp("stream")
    src = d / "in.jsonl"
    write_stream(src, windows=300, services=8)
    out = d / "clean.jsonl"
    r = cli("run", "--config", str(config(d / "c.toml", "30s")), "--input", str(src), "--output", str(out),
            "--state-dir", str(d / "state"))
    assert r.returncode == 0, r.stderr
    return src, out.read_bytes()


# --- the state directory fails ------------------------------------------------------------------


@pytest.mark.parametrize("fault", ["read_only", "no_space"])
def test_state_directory_fails_scoring_goes_on_saves_retry_and_recover(small_fs, stream, tmp_path, fault):
    src, clean = stream
    lines = src.read_bytes().splitlines(keepends=True)
    parts = [lines[: len(lines) // 3], lines[len(lines) // 3 : 2 * len(lines) // 3], lines[2 * len(lines) // 3 :]]
    state = small_fs("state", "8m")
    live, out, log = tmp_path / "live.jsonl", tmp_path / "out.jsonl", tmp_path / "run.log"
    port = free_port()
    cfg = config(tmp_path / "c.toml", "250ms", f"127.0.0.1:{port}")
    args = ["run", "--config", str(cfg), "--input", str(live), "--output", str(out), "--state-dir", str(state)]
    live.write_bytes(b"".join(parts[0]))
    p = start([*args, "--follow"], log)
    try:
        failures = f'tidewatch_state_save_failures_by_reason_total{{reason="{fault}"}}'
        wait_for("a first save of the first part", lambda: _saved_offset(state, tmp_path) == live.stat().st_size, p, log)
        filler = None
        if fault == "read_only":
            remount(state, "ro")
        else:
            filler = fill(state)
        with open(live, "ab") as f:
            f.write(b"".join(parts[1]))
        size_at_fault = out.stat().st_size
        wait_for("a first failed save", lambda: scrape(port)[failures] >= 1, p, log)
        saves_before = scrape(port)["tidewatch_state_saves_total"]
        first = scrape(port)[failures]
        # Scoring and output go on while every save fails, and saves are tried again and again.
        wait_for("output of the second part", lambda: out.stat().st_size > size_at_fault, p, log)
        wait_for("three more failed saves", lambda: scrape(port)[failures] >= first + 3, p, log)
        m = scrape(port)
        assert m["tidewatch_state_saves_total"] == saves_before
        assert m["tidewatch_state_save_failures_total"] >= 3
        failed = events(log, "state_save_failed")
        assert len(failed) == 1 and failed[0]["reason"] == fault, failed  # once per episode, not per attempt
        assert not [q for q in state.iterdir() if q.name.endswith(".tmp")], "a failed save left its file behind"
        # What is on disk is still the last good checkpoint, loadable and intact.
        _, restored = load_copy(state, tmp_path)
        assert restored.refused == [] and restored.runtime["input"]["offset"] == len(b"".join(parts[0]))
        # The filesystem recovers: the next interval saves everything since the fault.
        if fault == "read_only":
            remount(state, "rw")
        else:
            filler.unlink()
        wait_for("a save after recovery", lambda: _saved_offset(state, tmp_path) == live.stat().st_size, p, log)
        assert len(events(log, "state_save_recovered")) == 1
        assert len(events(log, "state_save_failed")) == 1
    finally:
        p.send_signal(signal.SIGKILL)  # no shutdown checkpoint: the restart uses the recovered one
        p.wait(timeout=60)
    with open(live, "ab") as f:
        f.write(b"".join(parts[2]))
    r = cli(*args)
    assert r.returncode == 0, r.stderr
    assert out.read_bytes() == clean


def _saved_offset(state: Path, tmp: Path) -> int | None:
    if not any(_is_segment(q) for q in state.iterdir()):
        return None
    try:
        _, restored = load_copy(state, tmp)
    except (OSError, shutil.Error):
        return None  # a segment replaced while being copied: ask again
    rt = restored.runtime
    return None if rt is None else rt["input"]["offset"]


def _is_segment(p: Path) -> bool:
    return re.fullmatch(r"ckpt-\d{12}\.twc", p.name) is not None


def test_the_last_checkpoint_failing_ends_the_run_with_exit_1_after_all_output(small_fs, stream, tmp_path):
    src, clean = stream
    state = small_fs("state", "8m")
    remount(state, "ro")
    out = tmp_path / "out.jsonl"
    r = cli("run", "--config", str(config(tmp_path / "c.toml", "30s")), "--input", str(src), "--output", str(out),
            "--state-dir", str(state))
    assert r.returncode == 1, r.stderr
    assert "last checkpoint of this run failed" in r.stderr and "read_only" in r.stderr
    assert out.read_bytes() == clean  # scoring went on without state


def test_a_full_disk_never_leaves_a_segment_that_shadows_the_last_good_one(small_fs, tmp_path):
    from models import ModelSettings, build_model

    state = small_fs("state", "4m")
    models = {}
    for i in range(20):
        m = build_model(f"svc-{i}", ModelSettings(warm_up=2))
        for w in range(30):
            m.assess({"lat.mean": 100.0 + (w + i) % 7, "count": 3.0})
        models[f"svc-{i}"] = m
    stats = RuntimeStats()
    store = CheckpointStore(state, stats=stats)
    store.save(models, set(models), {"n": 1})
    filler = fill(state)
    with pytest.raises(CheckpointSaveError) as exc:
        store.save(models, set(models), {"n": 2})
    assert exc.value.reason == "no_space" and stats.state_save_failure_reasons["no_space"] == 1
    assert sorted(q.name for q in state.iterdir() if q.name != "filler") == ["ckpt-000000000001.twc"]
    # A writer that is not atomic would leave what fits of a new base under the final name: free a
    # little room, write the next segment straight there until the disk is full again.
    good = (state / "ckpt-000000000001.twc").read_bytes()
    with open(filler, "r+b") as f:
        f.truncate(filler.stat().st_size - 64 * 1024)
    with pytest.raises(OSError) as full:
        with open(state / "ckpt-000000000002.twc", "wb") as f:
            f.write(good)
    assert full.value.errno == errno.ENOSPC
    torn = (state / "ckpt-000000000002.twc").stat().st_size
    assert 0 < torn < len(good)
    filler.unlink()
    restored = CheckpointStore(state, stats=RuntimeStats()).load()
    assert restored.runtime == {"n": 1}, "the torn segment shadowed the last good one"
    assert sorted(restored.models) == sorted(models)
    assert any("truncated" in line for line in restored.refused)
    assert list(state.glob("ckpt-000000000002.twc.corrupt-*"))  # set aside for inspection


def test_a_torn_newest_base_never_replaces_the_good_base_and_delta_before_it(tmp_path):
    from models import ModelSettings, build_model

    ms = {f"svc-{i}": build_model(f"svc-{i}", ModelSettings(warm_up=2)) for i in range(3)}
    for m in ms.values():
        m.assess({"lat.mean": 100.0, "count": 3.0})
    store = CheckpointStore(tmp_path, stats=RuntimeStats())
    store.save(ms, set(ms), {"n": 1})  # base
    ms["svc-0"].assess({"lat.mean": 101.0, "count": 3.0})
    store.save(ms, {"svc-0"}, {"n": 2})  # delta
    base = (tmp_path / "ckpt-000000000001.twc").read_bytes()
    # Generation 3, flagged base, cut inside its second record: every frame before the cut passes its CRC.
    torn = bytearray(base[: len(base) * 2 // 3])
    torn[4 + 2 + 1 : 4 + 2 + 1 + 8] = (3).to_bytes(8, "little")
    (tmp_path / "ckpt-000000000003.twc").write_bytes(bytes(torn))
    stats = RuntimeStats()
    again = CheckpointStore(tmp_path, stats=stats)
    restored = again.load()
    assert restored.runtime == {"n": 2} and sorted(restored.models) == sorted(ms)
    assert restored.models["svc-0"].windows_seen == 2
    assert stats.state_records_refused["CorruptState"] >= 1
    again.save(ms, set(), {"n": 3})
    assert again.generation == 4  # past the torn one's number
    assert CheckpointStore(tmp_path, stats=RuntimeStats()).load().runtime == {"n": 3}


# --- the output fails ---------------------------------------------------------------------------


def test_a_full_output_disk_exits_1_records_nothing_unwritten_and_a_restart_fills_in_exactly(small_fs, tmp_path):
    # Input of several read batches (1 MiB each), so checkpoints fall between batches before the disk fills.
    src = tmp_path / "in.jsonl"
    write_stream(src, windows=600, services=40, seed=4)
    assert src.stat().st_size > 4 << 20
    r = cli("run", "--config", str(config(tmp_path / "clean.toml", "30s")), "--input", str(src),
            "--output", str(tmp_path / "clean.jsonl"), "--state-dir", str(tmp_path / "s0"))
    assert r.returncode == 0, r.stderr
    clean = (tmp_path / "clean.jsonl").read_bytes()
    outdir = small_fs("out", f"{max(len(clean) // 2 // 4096, 1) * 4096}")
    assert len(clean) > 2 * 65536, "the clean output must be larger than a few write buffers"
    out, state = outdir / "out.jsonl", tmp_path / "state"
    args = ["run", "--config", str(config(tmp_path / "c.toml", "100ms")), "--input", str(src), "--output", str(out),
            "--state-dir", str(state)]
    r = cli(*args)
    assert r.returncode == 1, r.stderr
    assert "No space left on device" in r.stderr and "resumes there" in r.stderr
    written = out.read_bytes()
    restored = CheckpointStore(state, stats=RuntimeStats()).load()
    rt = restored.runtime
    # The checkpoint never claims more output than the file holds, and what it claims is the clean run's.
    assert 0 < rt["output"]["offset"] <= len(written)
    assert written[: rt["output"]["offset"]] == clean[: rt["output"]["offset"]]
    assert 0 < rt["input"]["offset"] < src.stat().st_size
    # Space is freed; the next start cuts the output back and writes each missing score once.
    remount(outdir, f"size={len(clean) * 2 // 4096 * 4096 + 65536}")
    r = cli(*args)
    assert r.returncode == 0, r.stderr
    assert out.read_bytes() == clean


# --- SIGTERM during a save ----------------------------------------------------------------------


def test_sigterm_during_saves_never_leaves_a_torn_checkpoint(tmp_path):
    """Large saves (600 services), signalled while a save's temporary file exists: a first SIGTERM
    (stop, then the final checkpoint) and, after a varied delay, a second one (exit at once, maybe
    mid-save) or a SIGKILL. After every round the state loads intact, and the end result equals an
    uninterrupted run's output."""
    src = tmp_path / "in.jsonl"
    write_stream(src, windows=60, services=600, seed=9)
    cfg = config(tmp_path / "c.toml", "200ms")
    clean = tmp_path / "clean.jsonl"
    r = cli("run", "--config", str(config(tmp_path / "clean.toml", "30s")), "--input", str(src), "--output", str(clean),
            "--state-dir", str(tmp_path / "s0"))
    assert r.returncode == 0, r.stderr
    out, state, log = tmp_path / "out.jsonl", tmp_path / "state", tmp_path / "run.log"
    args = ["run", "--config", str(cfg), "--input", str(src), "--output", str(out), "--state-dir", str(state)]
    rng = random.Random(20261202)  # seeded: the same signal points on every run
    signalled_mid_save = 0
    for round_ in range(6):
        p = start(args, log)
        deadline = time.monotonic() + DEADLINE_S
        while p.poll() is None and time.monotonic() < deadline:
            if state.exists() and any(q.name.endswith(".tmp") for q in state.iterdir()):
                break
            time.sleep(0.002)
        if p.poll() is not None:
            break  # the input was finished before a save could be caught
        p.send_signal(signal.SIGTERM)
        signalled_mid_save += 1
        time.sleep(rng.uniform(0.0, 0.4))
        p.send_signal(signal.SIGKILL if round_ % 3 == 2 else signal.SIGTERM)
        p.wait(timeout=60)
        # 0: stopped cleanly; 130: the second signal cut the shutdown; -SIGKILL; -SIGTERM: the second
        # signal came after the run had finished, while the interpreter was exiting (default handler again).
        assert p.returncode in (0, 130, -signal.SIGKILL, -signal.SIGTERM), log.read_text()[-3000:]
        _, restored = load_copy(state, tmp_path)
        assert restored.refused == [], restored.refused  # the previous snapshot, or the new complete one
        assert restored.runtime is not None
    assert signalled_mid_save >= 2, "no save was caught in progress"
    r = cli(*args)
    assert r.returncode == 0, r.stderr
    assert out.read_bytes() == clean.read_bytes()
