"""Stuck values, held values (a counter that sits at one value), the alert count on noise and the
format-2 / format-3 upgrades of the baseline's new statistics, on synthetic streams with known
answers."""

from __future__ import annotations

import numpy as np

from models import ModelSettings, ServiceModel, build_model
from models.seasonal import (HOLD_RATE, NEW_IN_FORMAT_3, NEW_IN_FORMAT_4, NEW_INTS_IN_FORMAT_4,
                             SeasonalBaseline)

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
    assert restored.to_state()["format"] == 7
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


def with_counter(model, x, counter, start: int = 0):
    return [model.assess({"cpu.mean": float(v), "restarts.mean": float(c), "count": 5.0},
                         at=T0 + STEP * (start + k)) for k, (v, c) in enumerate(zip(x, counter))]


def test_a_counter_that_holds_its_value_does_not_page_on_its_routine_blips() -> None:
    # A restart counter: 0 but for one window per deploy, a few deploys a week. Its error scale is
    # made of a handful of changes, so each blip is a huge z; without the hold rule the first
    # blips after warm-up open alerts (this test fails with HOLD_RATE set above 1).
    n = 2400
    counter = np.zeros(n)
    counter[[500, 1100, 1700, 2200]] = 0.2
    results = with_counter(build_model("svc", ModelSettings()), cpu(7, n), counter)
    assert onsets(results[36:]) == []
    blip = build_model("svc", ModelSettings())
    with_counter(blip, cpu(7, 500), counter[:500])
    ev = blip._baseline.evidence_one({"cpu.mean": 0.3, "restarts.mean": 0.2, "count": 5.0},
                                     at=T0 + STEP * 500)["restarts.mean"]
    i = blip._baseline.locate(["restarts.mean"])[0]
    f = blip._baseline._f  # the repeat rate counting the run in progress (the counter at 0)
    q = (f["rep"][i] + f["rpend"][i] + 0.5) / (f["repw"][i] + 1.0)
    assert q >= HOLD_RATE and ev.held and abs(ev.z) > 10.0
    assert ev.p == 1.0 - q  # its rate of change, not its z


def test_a_held_value_that_moves_away_and_stays_opens_an_alert_on_the_second_window() -> None:
    # A light sensor at 0 all night is switched on (the room is in use): the first window away is
    # judged by the rate of change, the second by its deviation, which the first must not have
    # taught the tail to expect.
    n = 700
    light = np.zeros(n)
    light[500:] = 420.0 + np.round(5.0 * np.random.default_rng(8).normal(size=200), 1)
    results = with_counter(build_model("svc", ModelSettings()), cpu(9, n), light)
    found = [36 + k for k in onsets(results[36:])]
    assert found and found[0] == 501
    assert not any(r.anomalous for r in results[36:500])


def test_the_hold_limit_is_for_features_that_nearly_never_change() -> None:
    # A value that repeats in most windows but changes in more than one window in 20 (a small
    # integer count) keeps its deviation evidence: its changes are common enough to be measured.
    assert 0.9 < HOLD_RATE < 1.0
    rng = np.random.default_rng(10)
    x = rng.poisson(0.2, size=900).astype(float)  # repeats in about 70 % of windows
    x[700] = 12.0
    model = build_model("svc", ModelSettings(kind="adaptive_baseline"))
    results = [model.assess({"queue.mean": float(v), "count": 5.0}, at=T0 + STEP * k)
               for k, v in enumerate(x)]
    assert 700 in [36 + k for k in onsets(results[36:])]


def test_a_format_3_state_loads_with_the_held_value_at_the_last_value() -> None:
    model = build_model("svc", ModelSettings())
    counter = np.zeros(300)
    counter[200] = 0.2
    with_counter(model, cpu(11, 300), counter)
    state = model.to_state()
    assert state["format"] == 7
    dropped = set(NEW_IN_FORMAT_4) | set(NEW_INTS_IN_FORMAT_4)
    old = dict(state, format=3, baseline={k: v for k, v in state["baseline"].items() if k not in dropped})
    restored = ServiceModel.from_state(old)
    base = restored._baseline
    assert base._f["held"] == base._f["last"] and base._i["away"] == [0] * len(base.features)
    assert restored.to_state()["format"] == 7
    feats = {"cpu.mean": 0.31, "restarts.mean": 0.0, "count": 5.0}
    at = T0 + STEP * 300
    assert model.assess(dict(feats), at=at).score == restored.assess(dict(feats), at=at).score
    import pytest

    from models.errors import CorruptState
    with pytest.raises(CorruptState):  # a current state must carry them
        ServiceModel.from_state(dict(state, baseline={k: v for k, v in state["baseline"].items()
                                                      if k != "held"}))


def _frozen_and_learning_runs(x: np.ndarray, length: int) -> tuple[list[float], list[float]]:
    """Stuck evidence of a run of ``x[-1]`` on two copies of one baseline: one learns through the
    run, the other only counts it (as while an alert is open)."""
    learning, frozen = SeasonalBaseline(24.0), SeasonalBaseline(24.0)
    for k, v in enumerate(x):
        learning.learn_one({"x": float(v)}, at=T0 + STEP * k)
        frozen.learn_one({"x": float(v)}, at=T0 + STEP * k)
    a, b = [], []
    for k in range(length):
        at = T0 + STEP * (len(x) + k)
        f = {"x": float(x[-1])}
        a.append(learning.evidence_one(f, at=at)["x"].stuck)
        b.append(frozen.evidence_one(f, at=at)["x"].stuck)
        learning.learn_one(f, at=at)
        idx = frozen.locate(["x"])
        frozen.update(idx, [f["x"]], at, learn=False, evidence=frozen.compare(idx, [f["x"]], at))
    return a, b


def test_a_run_is_judged_by_the_repeat_rate_from_before_it() -> None:
    # A metric that repeats now and then (about 1 % of windows). Learning through a run must not
    # weaken the run's evidence: its own repeats would make runs look common while it is judged.
    # Before the run was kept out of the rate, the learning copy fell behind by 0.18 at the third
    # window and 0.75 at the eighth.
    x = cpu(2, 600)
    x[97::97] = x[96::97][: len(x[97::97])]
    learning, frozen = _frozen_and_learning_runs(x, 8)
    assert all(b > a for a, b in zip(learning, learning[1:]))
    assert all(abs(a - b) <= 0.05 for a, b in zip(learning, frozen)), (learning, frozen)


def test_a_run_that_ends_joins_the_repeat_rate() -> None:
    # rep + rpend is the EWMA of "same as the previous window" over every learnt window, the run
    # in progress included; once the run ends nothing waits.
    from models.seasonal import REPEAT_FACTOR

    x = cpu(4, 400)
    x[200:230] = x[199]
    x[300:305] = x[299]
    base = SeasonalBaseline(24.0)
    kr = 0.5 ** (1.0 / (REPEAT_FACTOR * 24.0))
    ref = 0.0
    for k, v in enumerate(x):
        base.learn_one({"x": float(v)}, at=T0 + STEP * k)
        if k:
            ref = kr * ref + (1.0 if x[k] == x[k - 1] else 0.0)
        f = base._f
        assert np.isclose(f["rep"][0] + f["rpend"][0], ref, rtol=1e-12, atol=1e-12)
        if k in (215, 302):
            assert f["rpend"][0] > 0.0
        if k in (231, 306, 399):
            assert f["rpend"][0] == 0.0


def _daily(shape, days: int = 4) -> tuple[SeasonalBaseline, float]:
    base = SeasonalBaseline(24.0)
    rng = np.random.default_rng(12)
    n = days * 288
    for k in range(n):
        at = T0 + STEP * k
        base.learn_one({"x": float(shape(at) + rng.normal())}, at=at)
    i = base.locate(["x"])[0]
    return base, base._f["err1b"][i] / base._f["err1"][i]


def test_a_smooth_daily_curve_is_read_as_a_line_and_a_switching_one_as_steps() -> None:
    # Sampled every five minutes, a sine of a day's period changes by up to 26 % of its amplitude
    # within one hour slot: read as steps it leaves that much error at each slot's ends. A service
    # that switches at whole hours (a batch shift from 08:00 to 20:00) is exact as steps and smeared
    # as a line. Each feature keeps the reading that has been the more accurate.
    import math

    smooth, ratio_smooth = _daily(lambda at: 100.0 + 50.0 * math.sin(2 * math.pi * (at % 86400) / 86400))
    switching, ratio_switching = _daily(lambda at: 150.0 if 8 <= (at % 86400) // 3600 < 20 else 50.0)
    assert ratio_smooth < 0.8 and ratio_switching > 1.0, (ratio_smooth, ratio_switching)
    at = T0 + 4 * 86400 + 6.75 * 3600  # 06:45, a quarter hour past the middle of its slot
    want = 100.0 + 50.0 * math.sin(2 * math.pi * 6.75 / 24)
    ev = smooth.evidence_one({"x": want}, at=at)["x"]
    assert abs(ev.expected - want) < 1.5  # the line, not the step (the 06:00 slot's mean is 6 below)


def test_a_format_4_state_loads_with_nothing_waiting_and_the_stepped_profile_in_use() -> None:
    from models.seasonal import NEW_IN_FORMAT_5

    model = build_model("svc", ModelSettings())
    x = cpu(13, 400)
    x[390:] = x[389]  # a run in progress when the state is written
    run(model, x)
    state = model.to_state()
    old = dict(state, format=4, baseline={k: v for k, v in state["baseline"].items() if k not in NEW_IN_FORMAT_5})
    restored = ServiceModel.from_state(old)
    base = restored._baseline
    assert base._f["rpend"] == [0.0] * len(base.features)
    assert base._f["err1b"] == base._f["err1"]
    assert restored.to_state()["format"] == 7
    a = restored.assess({"cpu.mean": 0.31, "count": 5.0}, at=T0 + STEP * 400)
    assert 0.0 <= a.score <= 1.0


def test_the_blended_profile_is_a_continuous_line_through_every_slot_middle() -> None:
    # blend_of's reading of a profile: equal to a slot's mean at the middle of its hour, linear in
    # between, with no jump at an hour boundary, a day boundary or the week's wrap (Sunday 23:59 to
    # Monday 00:00 joins slots 167 and 0 of the week profile).
    from models.seasonal import blend_of

    rng = np.random.default_rng(14)
    day, week = rng.normal(size=24), rng.normal(size=168)

    def read(at: float) -> tuple[float, float]:
        hour, how, nh, nw, w = blend_of(at)
        assert 0.0 <= w <= 0.5
        return (1 - w) * day[hour] + w * day[nh], (1 - w) * week[how] + w * week[nw]

    for k in range(168):
        middle = T0 + 3600.0 * k + 1800.0
        assert read(middle) == (day[k % 24], week[k])
        boundary = T0 + 3600.0 * (k + 1)
        before, after = read(boundary - 1e-3), read(boundary)
        assert abs(before[0] - after[0]) < 1e-5 and abs(before[1] - after[1]) < 1e-5
    quarter = read(T0 + 7 * 86400 - 900.0)  # Sunday 23:45: a quarter of the way to Monday 00:30
    assert np.isclose(quarter[1], 0.75 * week[167] + 0.25 * week[0])


def scraped_windows(seed: int, n: int, freeze_at: int | None = None, per_window: int = 5):
    """Window means and within-window readings of a metric scraped ``per_window`` times a window (four
    decimals of a noisy utilisation); from scrape ``freeze_at`` on it repeats its last value."""
    scrapes = cpu(seed, n * per_window)
    if freeze_at is not None:
        scrapes[freeze_at:] = scrapes[freeze_at - 1]
    rows = scrapes.reshape(n, per_window)
    return [float(r.mean()) for r in rows], [bool((r == r[0]).all()) for r in rows]


def run_scraped(model, means, steady):
    return [model.assess({"cpu.mean": m, "count": 5.0}, at=T0 + STEP * k,
                         steady=None if s is None else {"cpu.mean": s})
            for k, (m, s) in enumerate(zip(means, steady))]


def test_a_frozen_exporter_scraped_several_times_a_window_is_caught_in_its_first_whole_windows() -> None:
    # Frozen from the third scrape of window 600: window 600 is part moving, 601 the first whole
    # frozen window. Read per window (equal means), the run needs two equal whole windows before it
    # even starts (602); read within the window, 601 already held still all window, which a metric
    # that moves at every scrape almost never does.
    means, steady = scraped_windows(4, 700, freeze_at=600 * 5 + 2)
    with_readings = run_scraped(build_model("svc", ModelSettings()), means, steady)
    without = run_scraped(build_model("svc", ModelSettings()), means, [None] * len(means))
    assert not any(r.anomalous for r in with_readings[100:600])
    found = onsets(with_readings[100:])
    assert len(found) == 1 and 601 <= 100 + found[0] <= 602
    assert with_readings[100 + found[0]].contributors[0].feature == "cpu.mean"
    assert 100 + onsets(without[100:])[0] > 100 + found[0]  # the per-window reading alone is later


def test_a_metric_refreshed_once_a_window_is_judged_by_equal_windows() -> None:
    # An exporter that refreshes once a window: every window holds one value, and the next holds
    # another. Holding still all window is its normal, so that alone starts no run (nothing alerts);
    # when it freezes, equal windows still tell, as they did before within-window readings.
    means = [float(v) for v in cpu(5, 1000)]
    means[900:] = [means[899]] * 100
    model = build_model("svc", ModelSettings())
    results = run_scraped(model, means, [True] * len(means))
    assert not any(r.anomalous for r in results[36:900])
    found = onsets(results[36:])
    assert len(found) == 1 and 900 <= 36 + found[0] <= 903
    assert results[36 + found[0]].contributors[0].feature == "cpu.mean"


def test_a_format_6_state_loads_with_windows_that_hold_still_not_known_to_be_rare() -> None:
    from models.seasonal import NEW_IN_FORMAT_7, STUCK_MAX_RATE

    model = build_model("svc", ModelSettings())
    means, steady = scraped_windows(14, 400)
    run_scraped(model, means, steady)
    state = model.to_state()
    assert state["format"] == 7
    old = dict(state, format=6, baseline={k: v for k, v in state["baseline"].items() if k not in NEW_IN_FORMAT_7})
    restored = ServiceModel.from_state(old)
    base = restored._baseline
    assert base._f["sr"] == [STUCK_MAX_RATE * (w + 1.0) for w in base._f["repw"]]
    assert model._baseline._f["sr"][0] < 1.0  # learnt: the metric moves at every scrape
    assert restored.to_state()["format"] == 7
