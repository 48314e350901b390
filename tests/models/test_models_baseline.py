"""Adaptive baseline and EWMA control chart, checked against pandas, scipy and the NIST handbook."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from models.baseline import AdaptiveBaseline, alpha_from_half_life, ewma_chart, normal_equivalent
from models.errors import FeatureError, SettingsError


def _stream(seed: int, n: int = 400) -> np.ndarray:
    rng = np.random.default_rng(seed)
    # A level that drifts, noise, and a few jumps: everything a baseline has to follow.
    level = 200.0 + np.cumsum(rng.normal(0.0, 0.5, n))
    values = level + rng.normal(0.0, 4.0, n)
    values[rng.choice(n, 5, replace=False)] += 60.0
    return values


@pytest.mark.parametrize("adjust", [False, True])
@pytest.mark.parametrize("half_life", [1.0, 6.0, 24.0])
def test_mean_and_variance_equal_pandas_ewm_after_every_update(adjust: bool, half_life: float) -> None:
    values = _stream(seed=int(half_life * 10) + adjust)
    baseline = AdaptiveBaseline(half_life, adjust=adjust)
    series = pd.Series(values)
    ewm = series.ewm(alpha=baseline.alpha, adjust=adjust)
    # Reference: pandas Series.ewm(alpha, adjust=...) -- mean(), var(bias=True) for the biased
    # weighted variance the baseline keeps, var(bias=False) for the de-biased one used in z-scores.
    ref_mean = ewm.mean().to_numpy()
    ref_biased = ewm.var(bias=True).to_numpy()
    ref_unbiased = ewm.var(bias=False).to_numpy()
    for t, x in enumerate(values):
        baseline.learn_one({"latency_p95_ms.mean": float(x)})
        mean, biased, unbiased, count = baseline.statistics("latency_p95_ms.mean")
        assert count == t + 1
        assert mean == pytest.approx(ref_mean[t], rel=1e-12)  # pandas ewm().mean()
        assert biased == pytest.approx(ref_biased[t], rel=1e-9, abs=1e-9)  # pandas var(bias=True)
        if t == 0:
            assert math.isnan(unbiased) and math.isnan(ref_unbiased[t])  # pandas: NaN for one value
        else:
            assert unbiased == pytest.approx(ref_unbiased[t], rel=1e-9)  # pandas var(bias=False)


def test_two_values_give_the_sample_variance() -> None:
    # For two values the de-biased weighted variance is the ordinary sample variance
    # (numpy var with ddof=1 as the reference), whatever the weights.
    for adjust in (False, True):
        baseline = AdaptiveBaseline(24.0, adjust=adjust)
        baseline.learn_one({"a": 3.0})
        baseline.learn_one({"a": 7.5})
        assert baseline.statistics("a")[2] == pytest.approx(np.var([3.0, 7.5], ddof=1), rel=1e-12)


def test_alpha_from_half_life_halves_the_weight() -> None:
    # Definition in the settings: alpha = 1 - 0.5 ** (1 / half_life), so (1 - alpha) ** half_life == 0.5.
    for half_life in (1.0, 2.5, 24.0, 500.0):
        assert (1.0 - alpha_from_half_life(half_life)) ** half_life == pytest.approx(0.5, rel=1e-12)
    with pytest.raises(SettingsError):
        alpha_from_half_life(0.0)


def test_z_scores_follow_the_baseline_before_the_window() -> None:
    baseline = AdaptiveBaseline(4.0)
    for x in (10.0, 12.0, 11.0, 13.0, 12.0):
        baseline.learn_one({"a": x, "b": 100.0 - x})
    idx = baseline.locate(["a", "b"])
    mean_a, _, var_a, _ = baseline.statistics("a")
    expected, z, _, scorable = baseline.compare(idx, [20.0, 80.0])
    assert scorable == [True, True]
    assert expected[0] == mean_a
    assert z[0] == pytest.approx((20.0 - mean_a) / math.sqrt(var_a), rel=1e-12)
    # b mirrors a, so its deviation is the mirror image.
    assert z[1] == pytest.approx(-z[0], rel=1e-9)


def test_features_seen_once_are_not_scorable_and_unknown_ones_are_ignored() -> None:
    baseline = AdaptiveBaseline(24.0)
    baseline.learn_one({"a": 1.0})
    assert baseline.score_one({"a": 50.0}) == 0.0  # one value: no spread yet
    assert baseline.deviation("never_seen", 3.0)[1] == 0.0
    assert math.isnan(baseline.deviation("never_seen", 3.0)[0])
    baseline.learn_one({"a": 2.0})
    assert baseline.score_one({"a": 50.0, "never_seen": 1e9}) > 0.0


def test_missing_and_non_finite_features_leave_the_baseline_untouched() -> None:
    baseline = AdaptiveBaseline(24.0)
    for x in (1.0, 2.0, 3.0):
        baseline.learn_one({"a": x, "b": x})
    before = baseline.statistics("b")
    baseline.learn_one({"a": 4.0})
    baseline.learn_one({"a": 5.0, "b": float("nan")})
    baseline.learn_one({"a": 6.0, "b": float("inf")})
    assert baseline.statistics("b") == before
    assert baseline.statistics("a")[3] == 6


def test_flat_metric_gets_a_finite_deviation() -> None:
    # Zero variance: the floor (absolute + 0.1 % of the level) keeps z finite and signed.
    baseline = AdaptiveBaseline(24.0)
    for _ in range(50):
        baseline.learn_one({"errors.mean": 0.0, "latency": 200.0})
    _, z_err = baseline.deviation("errors.mean", 0.5)
    _, z_lat = baseline.deviation("latency", 199.8)
    assert math.isfinite(z_err) and z_err > 1e3
    assert z_lat == pytest.approx(-0.2 / (1e-9 + 1e-3 * 200.0), rel=1e-6)
    assert baseline.deviation("latency", 200.0)[1] == 0.0


def test_bad_feature_values_are_refused() -> None:
    baseline = AdaptiveBaseline()
    for bad in ({"a": "12"}, {"a": None}, {"a": True}, {3: 1.0}):
        with pytest.raises(FeatureError):
            baseline.learn_one(bad)


@pytest.mark.parametrize("dof", [0.5, 1.0, 2.0, 5.0, 10.0, 30.0, 100.0])
def test_normal_equivalent_matches_scipy_student_t(dof: float) -> None:
    # Reference: scipy.stats -- the normal deviate with the same upper tail as Student's t,
    # norm.isf(t.sf(x, dof)). The closed-form approximation is within 0.12 up to |t| = 10 and
    # keeps the sign; far in the tail it errs on the low (conservative) side, by at most 20 %
    # at the smallest dof and 6 % from 3 dof on.
    for t in (0.25, 1.0, 2.0, 3.0, 5.0, 10.0):
        ref = stats.norm.isf(stats.t.sf(t, dof))
        assert normal_equivalent(t, dof) == pytest.approx(ref, abs=0.12)
        assert normal_equivalent(-t, dof) == pytest.approx(-ref, abs=0.12)
    for t in (100.0, 1e4):
        ref = stats.norm.isf(stats.t.sf(t, dof))
        approx = normal_equivalent(t, dof)
        assert approx <= ref
        assert approx == pytest.approx(ref, rel=0.20 if dof < 3 else 0.06)
    assert normal_equivalent(1.0, 0.0) == 0.0


@pytest.mark.parametrize("history", [2, 3, 5, 10, 40, 200])
def test_predictive_deviation_is_standard_normal_for_young_and_old_baselines(history: int) -> None:
    # For i.i.d. normal data the predictive deviation of the next value, on the normal scale,
    # should be N(0, 1) however short the baseline (reference: scipy.stats.kstest against
    # the standard normal). The plain z-score of a 2-value baseline is far wider.
    rng = np.random.default_rng(history)
    tail, plain = [], []
    for _ in range(2000):
        baseline = AdaptiveBaseline(24.0)
        xs = rng.normal(50.0, 7.0, history + 1)
        for x in xs[:-1]:
            baseline.learn_one({"a": float(x)})
        _, z, t, _ = baseline.compare(baseline.locate(["a"]), [float(xs[-1])])
        tail.append(t[0])
        plain.append(z[0])
    assert stats.kstest(tail, "norm").pvalue > 0.01  # scipy.stats.kstest vs N(0, 1)
    assert np.std(tail) == pytest.approx(1.0, abs=0.05)
    if history == 2:
        assert np.mean(np.abs(plain) > 3.0) > 0.1  # P(|N(0,1)| > 3) is 0.0027


def test_state_round_trip_continues_identically() -> None:
    values = _stream(seed=3, n=120)
    a = AdaptiveBaseline(12.0)
    for x in values[:60]:
        a.learn_one({"x": float(x), "y": float(-x)})
    b = AdaptiveBaseline.from_state(a.to_state())
    for x in values[60:]:
        row = {"y": float(-x), "x": float(x)}
        assert a.score_one(row) == b.score_one(row)
        a.learn_one(row)
        b.learn_one(row)
    assert a.statistics("x") == b.statistics("x")


# ---------------------------------------------------------------- EWMA control chart

# NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.4 "EWMA Control Charts",
# worked example. The 20 observations below are quoted from memory of the handbook page;
# lambda = 0.3, target 50, s = 2.0539, k = 3 are the example's parameters and the limits it
# states are UCL = 52.5884 and LCL = 47.4115, with no point out of control.
NIST_VALUES = [52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
               49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1]


def test_ewma_chart_reproduces_the_nist_handbook_example() -> None:
    chart = ewma_chart(NIST_VALUES, lam=0.3, target=50.0, sigma=2.0539, k=3.0)
    assert chart.upper == pytest.approx(52.5884, abs=1e-4)  # NIST 6.3.2.4: UCL 52.5884
    assert chart.lower == pytest.approx(47.4115, abs=1e-4)  # NIST 6.3.2.4: LCL 47.4115
    assert chart.center == 50.0
    assert not chart.out_of_control.any()  # NIST 6.3.2.4: the process is in control
    # The statistic against a hand loop of EWMA_t = lam * y_t + (1 - lam) * EWMA_{t-1}, EWMA_0 = target.
    level, hand = 50.0, []
    for y in NIST_VALUES:
        level = 0.3 * y + 0.7 * level
        hand.append(level)
    np.testing.assert_allclose(chart.statistic, hand, rtol=0, atol=1e-12)


def test_ewma_chart_flags_a_shift() -> None:
    shifted = NIST_VALUES[:10] + [v + 4.0 for v in NIST_VALUES[10:]]
    chart = ewma_chart(shifted, lam=0.3, target=50.0, sigma=2.0539, k=3.0)
    assert chart.out_of_control.any()
    assert not chart.out_of_control[:10].any()
    assert np.array_equal(chart.out_of_control,
                          (chart.statistic > chart.upper) | (chart.statistic < chart.lower))


def test_ewma_chart_refuses_bad_parameters() -> None:
    for lam in (0.0, 1.5):
        with pytest.raises(SettingsError):
            ewma_chart(NIST_VALUES, lam=lam, target=50.0, sigma=1.0)
    with pytest.raises(SettingsError):
        ewma_chart(NIST_VALUES, lam=0.3, target=50.0, sigma=-1.0)
