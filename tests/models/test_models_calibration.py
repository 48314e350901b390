"""Empirical-CDF calibration, checked against numpy over the same history."""

from __future__ import annotations

import collections

import numpy as np
import pytest

from models.calibration import EmpiricalCalibrator
from models.errors import CorruptState, ModelError, SettingsError

# Quantile levels away from the k/n grid, so float rounding at exact steps cannot decide a check.
LEVELS = np.linspace(0.0137, 0.9973, 37)


def _check_against_numpy(cal: EmpiricalCalibrator, history: collections.deque, x: float) -> None:
    h = np.asarray(history, dtype=np.float64)
    score = cal.score(x)
    if h.size == 0:
        assert score == 0.0
        return
    # Reference: numpy -- the fraction of the history strictly below x.
    assert score == float(np.mean(h < x))
    assert cal.score(x, count_self=True) == float(np.sum(h < x)) / (h.size + 1)
    # Consistency with numpy's quantiles: score >= q exactly when x is above the q-quantile of
    # the history by the inverted-CDF definition (numpy.quantile(method="inverted_cdf")).
    quantiles = np.quantile(h, LEVELS, method="inverted_cdf")
    assert np.array_equal(score >= LEVELS, x > quantiles)
    assert np.array_equal(cal.history, h)


@pytest.mark.parametrize("capacity", [1, 7, 50])
def test_scores_equal_numpy_ecdf_after_every_update_with_ties_and_wrap_around(capacity: int) -> None:
    rng = np.random.default_rng(capacity)
    # Small integers: many ties; 600 updates: the ring wraps many times.
    raws = rng.integers(0, 12, 600).astype(float)
    cal = EmpiricalCalibrator(capacity)
    reference: collections.deque = collections.deque(maxlen=capacity)
    for raw in raws:
        _check_against_numpy(cal, reference, raw)
        for probe in (-1.0, 0.0, 5.0, 5.5, 11.0, 100.0):
            _check_against_numpy(cal, reference, probe)
        assert cal.score_learn(raw) == (float(np.mean(np.asarray(reference) < raw)) if reference else 0.0)
        reference.append(raw)
        assert len(cal) == len(reference)


def test_continuous_scores_match_numpy_and_ranks_are_uniform() -> None:
    rng = np.random.default_rng(5)
    cal = EmpiricalCalibrator(1000)
    reference: collections.deque = collections.deque(maxlen=1000)
    scores = []
    for raw in rng.gamma(2.0, 1.5, 3000):
        _check_against_numpy(cal, reference, float(raw))
        scores.append(cal.score_learn(float(raw)))
        reference.append(float(raw))
    # Common practice: the rank of an exchangeable value among its predecessors is uniform,
    # so about 1 % of i.i.d. raw scores reach 0.99 once the history is full.
    tail = np.asarray(scores[1000:])
    assert 0.005 < np.mean(tail >= 0.99) < 0.02


def test_ties_count_as_not_exceeded() -> None:
    cal = EmpiricalCalibrator(10)
    for _ in range(10):
        assert cal.score_learn(4.0) == 0.0  # a constant raw score never looks unusual
    assert cal.score(4.0) == 0.0
    assert cal.score(4.0 + 1e-12) == 1.0


def test_nan_and_bad_capacity_are_refused() -> None:
    cal = EmpiricalCalibrator(3)
    with pytest.raises(ModelError):
        cal.score(float("nan"))
    with pytest.raises(ModelError):
        cal.learn(float("nan"))
    for capacity in (0, -1, 2.5, True):
        with pytest.raises(SettingsError):
            EmpiricalCalibrator(capacity)  # type: ignore[arg-type]


def test_state_round_trip_keeps_order_and_future_scores() -> None:
    rng = np.random.default_rng(9)
    raws = rng.normal(size=80)
    a = EmpiricalCalibrator(25)
    for raw in raws[:53]:  # past a wrap-around, mid-ring
        a.learn(float(raw))
    b = EmpiricalCalibrator.from_state(a.to_state())
    assert np.array_equal(a.history, b.history)
    for raw in raws[53:]:
        assert a.score_learn(float(raw)) == b.score_learn(float(raw))
    assert np.array_equal(a.history, b.history)


def test_malformed_state_is_corrupt() -> None:
    good = EmpiricalCalibrator(4).to_state()
    for bad in ({}, {**good, "history": [1.0]}, {**good, "history": np.zeros(9)},
                {**good, "history": np.array([np.nan])}, {**good, "capacity": 0}):
        with pytest.raises(CorruptState):
            EmpiricalCalibrator.from_state(bad)
