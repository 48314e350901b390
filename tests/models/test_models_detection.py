"""Stuck values, the alert count on noise and the format-2 upgrade of the baseline's new statistics, on
synthetic streams with known answers."""

from __future__ import annotations

import numpy as np

from models import ModelSettings, ServiceModel, build_model
from models.seasonal import NEW_IN_FORMAT_3, SeasonalBaseline

T0 = 1772409600.0  # 2026-03-02T00:00:00Z, a Monday
STEP = 300.0


def run(model, values, start: int = 0):
    out = []
    for k, v in enumerate(values):
        out.append(model.assess({"cpu.mean": float(v), "count": 5.0}, at=T0 + STEP * (start + k)))
    return out


def onsets(results) -> list[int]:
    return [k for k in range(len(results)) if results[k].anomalous and (k == 0 or not results[k - 1].anomalous)]


def cpu(seed: int, n: int) -> np.ndarray:
    # A continuous metric: never repeats exactly (four decimals of a noisy utilisation).
    return np.round(0.3 + 0.02 * np.random.default_rng(seed).normal(size=n), 4)


def test_a_flatlined_continuous_metric_opens_one_alert_within_three_windows() -> None:
    # A frozen exporter repeats its last value; the level itself stays normal, so only the run
    # can tell (common practice: a flatline of a metric that always moves is a monitoring fault).
    x = cpu(1, 900)
    x[600:660] = x[599]
    results = run(build_model("svc", ModelSettings()), x)
    assert not any(r.anomalous for r in results[100:600])
    found = onsets(results[100:])
    assert len(found) == 1 and 600 <= 100 + found[0] <= 603  # one incident, one onset, within 3 windows
    top = results[100 + found[0]].contributors[0]
    assert top.feature == "cpu.mean"


def test_a_run_in_progress_does_not_teach_the_model_that_runs_go_on() -> None:
    base = SeasonalBaseline(24.0)
    x = cpu(2, 600)
    for k, v in enumerate(x):
        base.learn_one({"x": float(v)}, at=T0 + STEP * k)
    stuck = []
    for k in range(6):  # learnt while it lasts (no alert state here): the evidence must still grow
        stuck.append(base.evidence_one({"x": float(x[-1])}, at=T0 + STEP * (600 + k))["x"].stuck)
        base.learn_one({"x": float(x[-1])}, at=T0 + STEP * (600 + k))
    assert all(b > a for a, b in zip(stuck, stuck[1:]))


def test_a_metric_whose_repeats_come_in_runs_is_not_stuck_when_it_repeats() -> None:
    # A gauge refreshed every few windows repeats in runs of 2-4; such a run is its normal.
    rng = np.random.default_rng(3)
    values: list[float] = []
    while len(values) < 1500:
        v = float(np.round(0.3 + 0.02 * rng.normal(), 4))
        values += [v] * (1 if rng.random() < 0.95 else int(rng.integers(3, 5)))
    results = run(build_model("svc", ModelSettings()), values[:1500])
    assert not any(r.anomalous for r in results[200:])


def test_noise_without_incident_gives_no_alert() -> None:
    rng = np.random.default_rng(5)
    results = run(build_model("svc", ModelSettings()), 100.0 + 5.0 * rng.normal(size=3000))
    assert len(onsets(results[36:])) <= 1  # about one chance onset in 10 000 windows at p <= 1e-4


def test_a_format_2_state_loads_with_fresh_drift_statistics() -> None:
    model = build_model("svc", ModelSettings())
    run(model, cpu(6, 300))
    state = model.to_state()
    old = dict(state, format=2, baseline={k: v for k, v in state["baseline"].items() if k not in NEW_IN_FORMAT_3})
    restored = ServiceModel.from_state(old)
    for k in NEW_IN_FORMAT_3:
        assert restored._baseline._f[k] == [0.0] * len(restored._baseline.features)
    assert restored.to_state()["format"] == 3
    # It keeps scoring: same predictions as the model it came from.
    ev_a = model._baseline.evidence_one({"cpu.mean": 0.3})["cpu.mean"]
    ev_b = restored._baseline.evidence_one({"cpu.mean": 0.3})["cpu.mean"]
    assert ev_a.expected == ev_b.expected and ev_a.z == ev_b.z
    # A format-3 state must carry the new statistics.
    import pytest

    from models.errors import CorruptState
    broken = dict(state, baseline={k: v for k, v in state["baseline"].items() if k != "ez"})
    with pytest.raises(CorruptState):
        ServiceModel.from_state(broken)
