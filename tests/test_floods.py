"""Flood protection: the live-model limit with eviction to the spill store, the new-service rate limit,
and the metrics that show them."""

from __future__ import annotations

import logging
import sqlite3
import threading

import orjson
import pytest
from prometheus_client.parser import text_string_to_metric_families

from models import encode_state
from service.checkpoint import CheckpointStore
from service.config import LimitsConfig, parse_config
from service.decode import REASONS, Rejected
from service.embedded import RunOptions, replay, run_embedded
from service.engine import Engine
from service.errors import ConfigError
from service.metrics import build_registry
from service.registry import ModelRegistry
from service.spill import SPILL_FILE, SpillStore
from service.stats import RuntimeStats

T0 = 1772409600  # 2026-03-02T00:00:00Z
WALL = float(T0 + 30 * 86400)  # a fixed wall clock after every event time used here


def _config(limits: str, extra: str = ""):
    return parse_config(f'[defaults]\nwindow = "1m"\nwarm_up = 3\n[http]\nlisten = ""\n[limits]\n{limits}\n{extra}')


def _msg(service: str, ts: float, x: float) -> bytes:
    return orjson.dumps({"service": service, "ts": ts, "metrics": {"lat": x, "err": x % 3}})


class _Collect:
    """The two engine callbacks, keeping what they were given."""

    def __init__(self) -> None:
        self.scores: list[bytes] = []
        self.rejects: list[tuple[str, bytes]] = []

    def engine(self, config, clock=lambda: WALL) -> Engine:
        e = Engine(config, on_score=lambda s, p, w: self.scores.append(p),
                   on_reject=lambda c, d, raw, o: self.rejects.append((c, raw)), now=clock)
        e.registry.clock = clock
        return e


def _feed(engine: Engine, raws: list[bytes]) -> None:
    src = engine.source("s")
    for i in range(0, len(raws), 1000):
        engine.feed(src, raws[i:i + 1000], lambda j: {"line": j})


# --- the flood -------------------------------------------------------------------------------------------
def test_a_flood_of_new_names_keeps_every_per_service_structure_bounded():
    n, max_services, live = 200_000, 3000, 100
    c = _Collect()
    e = c.engine(_config(f"max_services = {max_services}\nmax_live_models = {live}\nnew_services_per_second = 0"))
    # Every message names a new service, one second apart: windows close all along the flood.
    raws = [_msg(f"flood-{i:06d}", T0 + i, float(i % 17)) for i in range(n)]
    src = e.source("s")
    peak = {"models": 0, "resolved": 0, "latest": 0, "open": 0}
    for i in range(0, n, 1000):
        e.feed(src, raws[i:i + 1000], lambda j: {"line": j})
        peak = {"models": max(peak["models"], len(e.registry.models)),
                "resolved": max(peak["resolved"], len(e.registry.resolved)),
                "latest": max(peak["latest"], len(e.stats.latest)),
                "open": max(peak["open"], len(src.open))}
        # Cached settings and exported scores only for services in memory or with an open window.
        assert set(e.registry.resolved) <= set(e.registry.models) | set(src.open)
        assert set(e.stats.latest) <= set(e.registry.models)
    e.flush(src)
    st = e.stats
    assert st.accepted + sum(st.rejected.values()) == n
    assert st.accepted == max_services and st.rejected["service_limit"] == n - max_services
    assert peak["models"] <= live and len(e.registry.models) <= live
    assert len(e.owner) == max_services and peak["resolved"] <= live + peak["open"] and peak["latest"] <= live
    assert peak["open"] <= 100  # one-second steps, one-minute windows, ten seconds of lateness
    assert st.models_created == max_services and len(c.scores) == max_services
    assert st.models_evicted == max_services - len(e.registry.models)
    assert st.models_spilled == len(e.registry.spill) == max_services - len(e.registry.models)
    assert st.models_evicted_active == 0 and st.models_discarded == 0
    assert st.spill_bytes > 0
    e.registry.close()


def test_a_flood_with_the_rate_limit_on_is_counted_and_routed_by_reason(tmp_path):
    src = tmp_path / "flood.jsonl"
    with open(src, "wb") as f:
        for i in range(5000):
            f.write(_msg(f"flood-{i:05d}", T0 + i * 0.01, 1.0) + b"\n")
    rej = tmp_path / "rej.jsonl"
    cfg = _config("new_services_per_second = 0.001\nnew_services_burst = 40\nmax_live_models = 10")
    summary = replay(cfg, str(src), str(tmp_path / "out.jsonl"), str(rej))
    rejects = [orjson.loads(line) for line in rej.read_bytes().splitlines()]
    assert summary.accepted + sum(summary.rejected.values()) == 5000
    # A replay runs in well under the 1,000 s one more token takes at this rate.
    assert summary.accepted == 40 and summary.rejected == {"new_service_rate": 4960}
    assert len(rejects) == 4960 and {r["reason"] for r in rejects} == {"new_service_rate"}
    assert orjson.loads(rejects[0]["raw"])["service"] == "flood-00040"
    assert "new_service_rate" in REASONS


# --- eviction and reload ------------------------------------------------------------------------------------
def _fleet(services: int, windows: int, *, idle: dict | None = None) -> list[bytes]:
    """One message per service every 20 s; a service in ``idle`` sends nothing during those windows."""
    out = []
    for k in range(windows * 3):
        for s in range(services):
            name = f"svc-{s}"
            w = k // 3
            if idle and name in idle and w in idle[name]:
                continue
            out.append(_msg(name, T0 + 20 * k, 100.0 + 10 * s + (k * 7 + s) % 5))
    return out


def test_an_evicted_model_comes_back_with_the_state_it_left_with_and_scores_on():
    # svc-3 sends only in windows 10-19, while svc-0 is quiet: svc-0 becomes the least recently scored
    # service without an open window and is evicted once; when it returns, svc-3 makes room.
    raws = _fleet(4, 30, idle={"svc-0": range(10, 20), "svc-3": set(range(10)) | set(range(20, 30))})
    limited, free = _Collect(), _Collect()
    e = limited.engine(_config("max_live_models = 3"))
    ref = free.engine(_config(""))
    left_with: dict[int, bytes] = {}
    evict = e.registry.evict

    def spy(service: str, *, active: bool = False) -> None:
        if service == "svc-0":
            left_with[e.registry.models[service].windows_seen] = encode_state(service, e.registry.models[service])
        evict(service, active=active)

    e.registry.evict = spy
    _feed(e, raws[: 4 * 3 * 15 - 9])  # into window 14, svc-0 long quiet
    assert "svc-0" not in e.registry.models and "svc-0" in e.registry.spill
    assert e.stats.models_spilled == 1
    (seen, record), = left_with.items()
    assert e.registry.spill.get("svc-0") == record  # parked exactly as it was
    _feed(e, raws[4 * 3 * 15 - 9:])
    e.flush(e.source("s"))
    _feed(ref, raws)
    ref.flush(ref.source("s"))
    assert e.stats.models_reloaded == 1 and e.stats.models_evicted == 2 and e.stats.models_evicted_active == 0
    # The limited run scored every window exactly as the run that kept every model in memory.
    assert limited.scores == free.scores
    assert e.stats.models_created == 4  # nothing was learned again from scratch
    e.registry.close()


def test_a_refused_spilled_record_is_counted_noted_and_the_service_starts_fresh(caplog):
    c = _Collect()
    e = c.engine(_config("max_live_models = 2"))
    _feed(e, _fleet(3, 6, idle={"svc-0": range(3, 6)}))
    store = e.registry.spill
    assert "svc-0" in store
    store._db.execute("UPDATE models SET record = ? WHERE service = 'svc-0'", (b"TWMS" + b"\x00" * 40,))
    _feed(e, [_msg("svc-0", T0 + 20 * 30, 1.0), _msg("svc-1", T0 + 20 * 40, 1.0)])
    assert e.stats.models_reload_refused == 1 and e.stats.state_records_refused["CorruptState"] == 1
    assert e.registry.models["svc-0"].windows_seen == 1  # a fresh model, scored once
    with caplog.at_level(logging.ERROR):
        e.registry.log_notes(logging.getLogger("tidewatch.test"))
    assert [r.getMessage() for r in caplog.records].count("spilled model refused; the service starts fresh") == 1
    assert e.registry.models.notes == []
    e.registry.close()


def test_eviction_passes_over_the_least_recently_scored_service_while_it_has_an_open_window():
    c = _Collect()
    e = c.engine(_config("max_live_models = 2"))
    # a, b and c close their first window together (a first); a has already opened its next one.
    _feed(e, [_msg("a", T0, 1.0), _msg("b", T0 + 1, 1.0), _msg("c", T0 + 2, 1.0), _msg("a", T0 + 65, 1.0),
              _msg("a", T0 + 70, 1.0)])
    assert list(e.registry.models) == ["a", "c"] and list(e.registry.spill.services()) == ["b"]
    assert e.stats.models_evicted == 1 and e.stats.models_evicted_active == 0
    # Only services with open windows left to pass over: the least recently scored goes anyway.
    _feed(e, [_msg("c", T0 + 71, 1.0), _msg("d", T0 + 72, 1.0), _msg("c", T0 + 121, 1.0), _msg("a", T0 + 130, 1.0)])
    assert e.stats.models_evicted_active == 1 and list(e.registry.models) == ["c", "d"]
    assert sorted(e.registry.spill.services()) == ["a", "b"]
    e.registry.close()


# --- restart ---------------------------------------------------------------------------------------------
def _run(cfg, tmp_path, part, out, state):
    return run_embedded(cfg, RunOptions(input=str(part), output=str(out), state_dir=str(state)), threading.Event())


@pytest.mark.parametrize("key", [None, b"state key"])
def test_a_restart_after_evictions_loses_no_model(tmp_path, key):
    raws = _fleet(6, 24, idle={"svc-0": range(4, 12), "svc-3": range(2, 9)})
    half = len(raws) // 2
    outs = {}
    for limits in ("max_live_models = 2", ""):
        d = tmp_path / (limits.replace(" ", "") or "free")
        d.mkdir()
        part = d / "in.jsonl"
        part.write_bytes(b"\n".join(raws[:half]) + b"\n")
        cfg = _config(limits)
        opts = dict(output=str(d / "out.jsonl"), state_dir=str(d / "st"), state_key=key)
        first = run_embedded(cfg, RunOptions(input=str(part), **opts), threading.Event())
        with open(part, "ab") as f:
            f.write(b"\n".join(raws[half:]) + b"\n")
        second = run_embedded(cfg, RunOptions(input=str(part), **opts), threading.Event())
        outs[limits] = (d / "out.jsonl").read_bytes()
        if limits:
            assert first.resumed_at_line == 0 and second.resumed_at_line == half and not second.refused_state
            assert first.services == second.services == 6 and first.windows > 0  # 2 live, the rest spilled
            # Every service's model was in the checkpoint, the evicted ones included.
            restored = CheckpointStore(d / "st", stats=RuntimeStats(), key=key).load()
            assert sorted(restored.models) == [f"svc-{s}" for s in range(6)] and not restored.refused
    assert outs["max_live_models = 2"] == outs[""]


def test_a_checkpoint_holds_spilled_models_in_bases_and_dirty_ones_in_deltas(tmp_path):
    c = _Collect()
    e = c.engine(_config("max_live_models = 2"))
    _feed(e, _fleet(5, 8))
    reg = e.registry
    spilled = set(reg.spill.services())
    assert len(spilled) == 3 and spilled <= reg.dirty
    store = CheckpointStore(tmp_path, stats=RuntimeStats(), key=b"k")
    store.save(reg.models, reg.dirty, {"n": 1})  # the first save is a base
    reg.dirty.clear()
    _feed(e, [_msg("svc-0", T0 + 20 * 60, 1.0)])  # svc-0 scored again, someone else spilled
    store.save(reg.models, reg.dirty, {"n": 2})
    restored = CheckpointStore(tmp_path, stats=RuntimeStats(), key=b"k").load()
    assert sorted(restored.models) == [f"svc-{s}" for s in range(5)]
    for s in range(5):
        rec = reg.record(f"svc-{s}", None)
        assert encode_state(f"svc-{s}", restored.models[f"svc-{s}"]) == rec
    reg.close()


# --- restore parking (the Kafka path uses has_room / put / park) ------------------------------------------------
def test_restoring_more_models_than_the_limit_parks_the_rest_as_their_records():
    c = _Collect()
    donor = c.engine(_config(""))
    _feed(donor, _fleet(5, 6))
    records = [(s, encode_state(s, m, key=b"k")) for s, m in donor.registry.models.items()]
    reg = ModelRegistry(_config("max_live_models = 2"), RuntimeStats())
    reg.key = b"k"
    reg.restore(records, key=b"k")
    assert list(reg.models) == ["svc-0", "svc-1"] and sorted(reg.spill.services()) == ["svc-2", "svc-3", "svc-4"]
    assert reg.stats.models_restored == 5 and reg.stats.models_evicted == 0  # parked, never held live
    for service, record in records[2:]:
        assert reg.spill.get(service) == record  # the verified record, as it was
    model = reg.model("svc-4")
    assert encode_state("svc-4", model, key=b"k") == records[4][1] and reg.stats.models_reloaded == 1
    assert len(reg.models) == 2
    reg.close()


def test_the_spill_store_starts_empty_and_a_temporary_one_is_removed(tmp_path):
    s = SpillStore(tmp_path)
    s.put("a", b"x" * 10)
    s.put("a", b"y" * 4)
    assert len(s) == 1 and s.bytes == 4 and s.get("a") == b"yyyy"
    s.close()
    again = SpillStore(tmp_path)  # a file left behind is stale: the checkpoint is the record
    assert len(again) == 0 and again.get("a") is None
    assert sqlite3.connect(tmp_path / SPILL_FILE).execute("SELECT count(*) FROM models").fetchone() == (0,)
    again.close()
    tmp = SpillStore(None)
    where = tmp.dir
    assert where.exists()
    tmp.close()
    assert not where.exists()


# --- the rate limit ----------------------------------------------------------------------------------------
def test_the_rate_limit_rejects_new_services_with_its_reason_and_refills():
    clock = [WALL]
    c = _Collect()
    e = c.engine(_config("new_services_per_second = 2\nnew_services_burst = 3"), clock=lambda: clock[0])
    _feed(e, [_msg(f"n{i}", T0, 1.0) for i in range(5)])
    assert [code for code, _ in c.rejects] == ["new_service_rate", "new_service_rate"]
    assert orjson.loads(c.rejects[0][1])["service"] == "n3" and e.stats.rejected["new_service_rate"] == 2
    _feed(e, [_msg("n0", T0 + 1, 1.0)])  # a tracked service never takes a token
    clock[0] += 1.0  # two tokens
    _feed(e, [_msg(f"m{i}", T0 + 2, 1.0) for i in range(3)])
    assert e.stats.rejected["new_service_rate"] == 3 and len(e.owner) == 5
    clock[0] -= 100.0  # a clock stepped back refills nothing
    _feed(e, [_msg("late-comer", T0 + 3, 1.0)])
    assert e.stats.rejected["new_service_rate"] == 4
    assert e.stats.accepted + sum(e.stats.rejected.values()) == 10  # 5 + 1 + 3 + 1 sent


def test_a_restored_service_is_not_a_new_one():
    c = _Collect()
    donor = c.engine(_config(""))
    _feed(donor, _fleet(3, 4))
    e = _Collect().engine(_config("new_services_per_second = 1\nnew_services_burst = 1\nmax_live_models = 1"))
    for service, model in donor.registry.models.items():
        e.registry.put(service, model)
    _feed(e, [_msg(f"svc-{s}", T0 + 20 * 50, 1.0) for s in range(3)] + [_msg("new-0", T0 + 20 * 50, 1.0),
                                                                          _msg("new-1", T0 + 20 * 50, 1.0)])
    assert e.stats.rejected == {"new_service_rate": 1} and len(e.owner) == 4
    e.registry.close()


def test_payload_events_of_new_services_past_the_rate_are_counted_each_and_routed_once():
    c = _Collect()
    e = c.engine(_config("new_services_per_second = 0.5\nnew_services_burst = 2"))

    def decode_many(raw: bytes) -> list:
        if raw == b"bad":
            raise Rejected("otlp_invalid", "not a payload")
        return [(f"p{i}", float(T0), {"x": 1.0}) for i in range(int(raw))]

    e.feed_payloads(e.source("s"), [b"5", b"bad"], lambda i: {"line": i}, decode_many)
    assert e.stats.rejected == {"new_service_rate": 3, "otlp_invalid": 1}
    assert [code for code, _ in c.rejects] == ["new_service_rate", "otlp_invalid"] and e.stats.accepted == 2


# --- config ------------------------------------------------------------------------------------------------
def test_limits_are_validated_in_order():
    with pytest.raises(ConfigError, match="max_live_models"):
        parse_config("[limits]\nmax_services = 10\nmax_live_models = 20\n")
    lim = LimitsConfig(max_services=10)  # the default live limit is capped, not an error
    assert lim.live_model_limit == 10 and LimitsConfig(max_live_models=5).live_model_limit == 5
    with pytest.raises(ConfigError):
        parse_config("[limits]\nnew_services_per_second = -1\n")
    with pytest.raises(ConfigError):
        parse_config("[limits]\nnew_services_burst = 0\n")
    d = LimitsConfig()
    # A backtest of a full default fleet must get through the bucket at once.
    assert d.new_services_burst >= d.max_services and d.live_model_limit <= d.max_services


def test_a_lowered_live_limit_applies_on_reload():
    c = _Collect()
    e = c.engine(_config(""))
    _feed(e, _fleet(5, 4))
    assert len(e.registry.models) == 5
    e.reconfigure(_config("max_live_models = 2"))
    assert len(e.registry.models) == 2 and len(e.registry.spill) == 3
    e.registry.close()


# --- metrics ------------------------------------------------------------------------------------------------
def test_the_metrics_show_live_evicted_reloaded_spilled_and_rate_limited():
    from prometheus_client import generate_latest

    c = _Collect()
    e = c.engine(_config("max_live_models = 3\nnew_services_per_second = 0.001\nnew_services_burst = 4"))
    raws = _fleet(4, 30, idle={"svc-0": range(10, 20)}) + [_msg("svc-9", T0 + 20 * 100, 1.0)]
    _feed(e, raws)
    text = generate_latest(build_registry(e.stats, lambda: len(e.registry.models), 100)).decode()
    samples = {(s.name, tuple(sorted(s.labels.items()))): s.value
               for f in text_string_to_metric_families(text) for s in f.samples}
    assert samples[("tidewatch_models_live", ())] == 3
    assert samples[("tidewatch_models_live_limit", ())] == 3
    assert samples[("tidewatch_models_evicted_total", ())] == e.stats.models_evicted >= 1
    assert samples[("tidewatch_models_reloaded_total", ())] == e.stats.models_reloaded >= 1
    assert samples[("tidewatch_models_spilled", ())] == len(e.registry.spill) == 1
    assert samples[("tidewatch_spill_store_bytes", ())] == e.registry.spill.bytes > 0
    assert samples[("tidewatch_models_discarded_total", ())] == 0
    assert samples[("tidewatch_rejects_total", (("reason", "new_service_rate"),))] == 1
    e.registry.close()
