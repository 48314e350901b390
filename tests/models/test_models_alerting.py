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


def test_pair_tail_is_the_binomial_tail_of_two_rare_windows_in_three() -> None:
    from scipy import stats

    from models.calibration import PAIR_DEPENDENCE, pair_tail
    # Reference: scipy.stats. P(at least 2 of 3 uniforms <= x) is the binomial upper tail and,
    # as Wilkinson (1951, Psychological Bulletin 48) combines the r-th smallest of k p-values,
    # the Beta(2, 2) CDF of the second smallest.
    for x in (1e-6, 1e-4, 1.8e-3, 0.01, 0.1):
        want = min(1.0, PAIR_DEPENDENCE * stats.binom.sf(1, 3, x))
        assert math.isclose(pair_tail(x, x, 0.9), want, rel_tol=1e-12)
        assert math.isclose(want, min(1.0, PAIR_DEPENDENCE * stats.beta.cdf(x, 2, 2)), rel_tol=1e-9)
        # The second smallest decides, in whichever order the earlier windows came.
        assert pair_tail(x / 10, x, 0.9) == pair_tail(x / 10, 0.9, x) == pair_tail(x, x, 0.9)
        assert pair_tail(x, x / 10, 0.9) == pair_tail(x, 0.9, x / 10) == pair_tail(x, x, 0.9)
    # This window must be one of the two rarest: two old rare windows are not new evidence.
    assert pair_tail(0.5, 1e-5, 1e-5) == 1.0
    assert pair_tail(0.2, 0.1, 0.3) == 1.0  # capped


def test_two_moderately_rare_windows_open_an_alert_that_either_alone_does_not() -> None:
    # Windows 4.25 and 5.5 sigma off, two apart: alone, each scores under the threshold.
    x = noise(11, 600)
    first, second, both = x.copy(), x.copy(), x.copy()
    first[500] += 8.5
    second[502] += 11.0
    both[500] += 8.5
    both[502] += 11.0
    runs = [assess_all(build_model("svc", ModelSettings(kind="adaptive_baseline")), y)
            for y in (first, second, both)]
    for r, k in ((runs[0], 500), (runs[1], 502)):
        assert not any(w.anomalous for w in r[400:])
        assert 0.9 < r[k].score < 0.99
    r = runs[2]
    assert r[500] == runs[0][500]
    assert onsets(r[400:]) == [102] and r[502].score >= 0.99
    assert not r[503].anomalous  # the first window that is ordinary with its neighbours clears it


def test_the_first_window_of_an_alert_teaches_the_tails_when_the_alert_ends() -> None:
    model = build_model("svc", ModelSettings(kind="adaptive_baseline"))
    x = noise(12, 530)
    x[500:506] += 40.0
    assess_all(model, x[:500])
    tails = {k: v.copy() for k, v in model._baseline._f.items() if k[0] in "xy" and k[1:] in "rwne"}
    during = assess_all(model, x[500:506], start=500)
    assert all(r.anomalous for r in during)
    unchanged = {k: v for k, v in model._baseline._f.items() if k in tails}
    assert all(np.array_equal(tails[k], unchanged[k]) for k in tails)  # nothing learned yet
    after = assess_all(model, x[506:], start=506)
    assert not after[0].anomalous
    i = model._baseline.locate(["lat.mean"])[0]
    # Exactly one exceedance counted (decayed by the windows learned since).
    assert 0.9 < model._baseline._f["xn"][i] - tails["xn"][i] <= 1.0


def test_a_format_5_state_loads_with_no_recent_windows_and_no_lesson_waiting() -> None:
    from models import ServiceModel
    from models.errors import CorruptState
    x = noise(13, 520)
    x[505:508] += 40.0
    a = build_model("svc", ModelSettings())
    assess_all(a, x[:506])
    state = a.to_state()
    assert state["format"] == 7 and state["alert"]["lesson"].shape == (2, 2)  # lat.mean, count
    old = dict(state, format=5, alert={k: v for k, v in state["alert"].items()
                                       if k not in ("recent_p", "lesson_at", "lesson")})
    b = ServiceModel.from_state(old)
    assert (b._p_earlier, b._p_before, b._lesson) == (1.0, 1.0, [])
    assert b.to_state()["format"] == 7
    bad = dict(state, alert={**state["alert"], "recent_p": np.array([0.5, 1.5])})
    with pytest.raises(CorruptState):
        ServiceModel.from_state(bad)
    bad = dict(state, alert={**state["alert"], "lesson_at": np.array([0, 99], dtype=np.int64)})
    with pytest.raises(CorruptState):
        ServiceModel.from_state(bad)
