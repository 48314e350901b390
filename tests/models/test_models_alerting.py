"""Alert hysteresis, frozen learning while alerting, level shifts becoming the new normal,
seasonal baselines and the tail calibration, on synthetic streams with known answers."""

from __future__ import annotations

import math

import numpy as np
import pytest

from models import ModelSettings, build_model
from models.calibration import TailCalibrator, surprise_score
from models.seasonal import SeasonalBaseline, slots_of, tail_deviate

T0 = 1772409600.0  # 2026-03-02T00:00:00Z, a Monday
STEP = 300.0


def noise(seed: int, n: int, level: float = 100.0, sd: float = 2.0) -> np.ndarray:
    return level + np.random.default_rng(seed).normal(size=n) * sd


def assess_all(model, values, start: int = 0, extra=None):
    out = []
    for k, v in enumerate(values):
        feats = {"lat.mean": float(v), "count": 5.0 + (k % 2)}
        if extra is not None:
            feats.update(extra(k))
        out.append(model.assess(feats, at=T0 + STEP * (start + k)))
    return out


def onsets(results) -> list[int]:
    return [k for k in range(len(results)) if results[k].anomalous and (k == 0 or not results[k - 1].anomalous)]


def test_an_incident_with_a_wobbling_score_is_one_alert_and_clears_after_recovery() -> None:
    model = build_model("svc", ModelSettings(kind="adaptive_baseline"))
    x = noise(1, 700)
    # 20 windows of incident whose size alternates between huge and merely high.
    x[500:520] += np.where(np.arange(20) % 2 == 0, 40.0, 14.0)
    results = assess_all(model, x)
    assert onsets(results[400:]) == [100]
    calm = ModelSettings().calm_windows
    assert all(r.anomalous for r in results[500:520])
    assert not any(r.anomalous for r in results[520 + calm:])


def test_nothing_is_learned_while_alerting() -> None:
    model = build_model("svc", ModelSettings(kind="adaptive_baseline", adapt_after=1000))
    x = noise(2, 520)
    assess_all(model, x[:500])
    before = model._baseline.evidence_one({"lat.mean": 100.0})["lat.mean"].expected
    results = assess_all(model, x[500:] + 50.0, start=500)  # a sustained shift, 20 windows
    assert all(r.anomalous for r in results)
    after = model._baseline.evidence_one({"lat.mean": 100.0})["lat.mean"].expected
    assert after == before  # the level did not follow the incident


def test_a_persistent_level_shift_becomes_the_new_normal_after_adapt_after_windows() -> None:
    adapt = ModelSettings().adapt_after
    model = build_model("svc", ModelSettings(kind="adaptive_baseline"))
    x = noise(3, 1000)
    x[600:] += 30.0  # a deploy moved the level for good
    results = assess_all(model, x)
    assert onsets(results[400:]) == [200]
    assert all(r.anomalous for r in results[600 : 600 + adapt - 1])
    assert not results[600 + adapt - 1].anomalous  # the alert clears: the shift is the new normal
    assert not any(r.anomalous for r in results[600 + adapt :])
    expected = model._baseline.evidence_one({"lat.mean": 130.0})["lat.mean"].expected
    assert abs(expected - 130.0) < 2.0


def test_a_daily_cycle_is_learned_and_a_flat_service_falls_back_to_the_level() -> None:
    n = int(6 * 86400 / STEP)
    t = T0 + STEP * np.arange(n)
    rng = np.random.default_rng(4)
    cyclic = SeasonalBaseline(24.0)
    flat = SeasonalBaseline(24.0)
    for k in range(n):
        hour = (t[k] % 86400) / 3600
        cyclic.learn_one({"x": 100.0 + 50.0 * math.sin(2 * math.pi * hour / 24) + rng.normal()}, at=t[k])
        flat.learn_one({"x": 100.0 + rng.normal()}, at=t[k])
    assert cyclic._best(0) == 1  # hour of day beats the level by far
    assert flat._best(0) == 0  # no cycle: the simpler prediction stays
    at = T0 + STEP * n
    hour = (at % 86400) / 3600
    ev = cyclic.evidence_one({"x": 100.0 + 50.0 * math.sin(2 * math.pi * hour / 24)}, at=at)["x"]
    assert abs(ev.z) < 3.0  # the usual value at this hour is not unusual


def test_a_stuck_value_of_a_metric_that_never_repeats_is_evidence() -> None:
    base = SeasonalBaseline(24.0)
    x = noise(5, 400)
    for k, v in enumerate(x):
        base.learn_one({"x": float(v)}, at=T0 + STEP * k)
    stuck = [base.evidence_one({"x": float(x[-1])}, at=T0 + STEP * 400)["x"].stuck]
    assert stuck[0] > 2.0
    assert base.evidence_one({"x": float(x[-1]) + 0.5}, at=T0 + STEP * 400)["x"].stuck == 0.0


def test_slots_and_deviates() -> None:
    assert slots_of(T0) == (0, 0) and slots_of(T0 + 86400 + 3600) == (1, 25)
    # Normal tail values (common practice): P(Z > 1.6449) = 0.05, P(Z > 3.0902) = 0.001.
    assert tail_deviate(0.05) == pytest.approx(1.6449, abs=1e-4)
    assert tail_deviate(0.001) == pytest.approx(3.0902, abs=1e-4)


def test_tail_calibrator_is_empirical_in_the_bulk_and_exponential_beyond() -> None:
    cal = TailCalibrator(1000)
    rng = np.random.default_rng(6)
    draws = rng.exponential(1.0, size=1000)
    for v in draws:
        cal.learn(float(v))
    # In the bulk: (#{h >= raw} + 1) / (n + 1), by definition.
    assert cal.p_value(0.5) == pytest.approx(((draws >= 0.5).sum() + 1) / 1001)
    # Beyond: an exponential tail of unit scale gives P(X > 8) = exp(-8) (exact for the
    # exponential distribution); the fit is within a factor of 3.
    assert math.exp(-8) / 3 < cal.p_value(8.0) < 3 * math.exp(-8)
    assert TailCalibrator(10).p_value(5.0) == 1.0  # no history: nothing is surprising
    assert surprise_score(1e-4) == pytest.approx(0.99) and surprise_score(1.0) == 0.0


def test_alert_state_survives_a_round_trip_mid_alert() -> None:
    from models import ServiceModel
    x = noise(7, 600)
    x[500:540] += 40.0
    a = build_model("svc", ModelSettings())
    assess_all(a, x[:510])
    assert a.alerting
    b = ServiceModel.from_state(a.to_state())
    assert assess_all(a, x[510:], start=510) == assess_all(b, x[510:], start=510)
