"""Tests of the change-point F1 (service/eval_changepoint.py).

Sources named beside the checks:
- "paper": van den Burg & Williams 2020, arXiv:2003.06222 (F1 with margin 5, precision
  against the union of annotators, recall averaged over annotators, index 0 on both sides).
- "reference doctest": the doctests of TCPDBench analysis/scripts/metrics.py
  (``true_positives`` and ``f_measure``), also quoted in the task brief.
Hand-worked cases show their arithmetic.
"""

from __future__ import annotations

import doctest

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import service.eval_changepoint as eval_changepoint
from service.eval_changepoint import (
    ChangePointInputError,
    change_point_score,
    f_measure,
    onsets,
    true_positives,
)

# ------------------------------------------------------------------ reference doctests


def test_one_annotator_found_one_missed_one_empty() -> None:
    # reference doctest and brief: f_measure({1: [], 2: [10], 3: [50]}, [10]) == 0.9090909090909091
    assert f_measure({1: [], 2: [10], 3: [50]}, [10]) == pytest.approx(0.9090909090909091, abs=1e-12)


def test_no_prediction_still_matches_the_start() -> None:
    # reference doctest and brief: f_measure({1: [], 2: [10], 3: [50]}, []) == 0.8
    assert f_measure({1: [], 2: [10], 3: [50]}, []) == pytest.approx(0.8, abs=1e-12)


def test_predictions_within_the_margin_of_every_annotator_score_one() -> None:
    # reference doctest: f_measure({1: [10, 20], 2: [11, 20], 3: [10], 4: [0, 5]}, [10, 20]) == 1.0
    assert f_measure({1: [10, 20], 2: [11, 20], 3: [10], 4: [0, 5]}, [10, 20]) == 1.0


@pytest.mark.parametrize(
    ("annotations", "predictions", "expected"),
    [
        # reference doctests of true_positives
        ({1, 10, 20, 23}, {3, 8, 20}, {1, 10, 20}),
        ({1, 10, 20, 23}, {1, 3, 8, 20}, {1, 10, 20}),
        ({1, 10, 20, 23}, {1, 3, 5, 8, 20}, {1, 10, 20}),
        (set(), {1, 2, 3}, set()),
        ({1, 2, 3}, set(), set()),
    ],
)
def test_true_positives_match_the_reference_doctests(annotations, predictions, expected) -> None:
    assert true_positives(annotations, predictions) == expected


# ------------------------------------------------------------------------ hand-worked


def test_precision_uses_the_union_and_recall_the_mean_over_annotators() -> None:
    # paper's definitions, by hand. Annotators a = {0, 20}, b = {0, 40}; predictions {0, 22, 60}.
    # union {0, 20, 40}: 0 <- 0, 20 <- 22, 40 unmatched -> P = 2 / 3
    # a: 2 / 2, b: 1 / 2 -> R = 3 / 4;  F1 = 2 P R / (P + R) = 12 / 17
    s = change_point_score({"a": [20], "b": [40]}, [22, 60])
    assert s.precision == pytest.approx(2 / 3, abs=1e-12)
    assert s.recall == pytest.approx(3 / 4, abs=1e-12)
    assert s.f == pytest.approx(12 / 17, abs=1e-12)


def test_the_margin_is_inclusive_at_five_rows() -> None:
    # paper: margin 5; reference code matches when |tau - x| <= margin
    assert true_positives({10}, {15}) == {10}
    assert true_positives({10}, {5}) == {10}
    assert true_positives({10}, {16}) == set()
    assert true_positives({10}, {16}, margin=6) == {10}
    assert true_positives({10}, {10}, margin=0) == {10}


def test_a_burst_of_predictions_around_one_change_counts_once() -> None:
    # paper: no double counting. One annotator {0, 50}; predictions {0, 48, 50, 52}:
    # precision 2 / 4 (0 and one of the three), recall 2 / 2 -> F1 = 2 * 0.5 * 1 / 1.5 = 2 / 3
    s = change_point_score({"a": [50]}, [48, 50, 52])
    assert (s.precision, s.recall) == (0.5, 1.0)
    assert s.f == pytest.approx(2 / 3, abs=1e-12)


def test_each_prediction_is_used_by_at_most_one_annotation() -> None:
    # Annotations 10 and 14, one prediction 12 within both margins: the earlier
    # annotation takes it (ascending order, as the reference code's set iteration).
    assert true_positives({10, 14}, {12}) == {10}
    # The nearest free prediction is taken, the smaller one on a tie.
    assert true_positives({10, 20}, {8, 12, 19}) == {10, 20}


def test_duplicate_and_unordered_predictions_change_nothing() -> None:
    ann = {"a": [30, 80], "b": [31], "c": []}
    assert change_point_score(ann, [80, 31, 31, 80]) == change_point_score(ann, [31, 80])


def test_alpha_weights_precision_against_recall() -> None:
    # F = P R / (alpha R + (1 - alpha) P); with P = 1/2, R = 1 (burst case above), alpha 0.25:
    # 0.5 / (0.25 + 0.375) = 0.8
    assert f_measure({"a": [50]}, [48, 50, 52], alpha=0.25) == pytest.approx(0.8, abs=1e-12)


def test_a_prediction_at_index_zero_is_the_implicit_start() -> None:
    # paper: 0 is in every set already, so predicting it changes nothing
    ann = {"a": [25], "b": [26]}
    assert change_point_score(ann, [0, 25]) == change_point_score(ann, [25])


# ------------------------------------------------------------------------- properties


locations = st.lists(st.integers(min_value=0, max_value=300), max_size=12)


@settings(max_examples=150, deadline=None, derandomize=True)  # seeded: same cases every run
@given(annotators=st.lists(locations, min_size=1, max_size=5), predictions=locations)
def test_scores_lie_in_the_unit_interval(annotators, predictions) -> None:
    s = change_point_score({str(i): a for i, a in enumerate(annotators)}, predictions)
    assert 0.0 < s.precision <= 1.0
    assert 0.0 < s.recall <= 1.0
    assert min(s.precision, s.recall) <= s.f <= max(s.precision, s.recall)  # a weighted harmonic mean


@settings(max_examples=100, deadline=None, derandomize=True)
@given(truth=locations, n=st.integers(min_value=1, max_value=4))
def test_predicting_what_every_annotator_marked_scores_one(truth, n) -> None:
    assert f_measure({str(i): truth for i in range(n)}, truth) == 1.0


# ----------------------------------------------------------------------------- onsets


@pytest.mark.parametrize(
    ("flags", "expected"),
    [
        ([], []),
        ([False, False], []),
        ([False, True, True, False, True], [1, 4]),
        ([True, True, False, True], [0, 3]),
        ([0, 1, 1, 1], [1]),
    ],
)
def test_onsets_are_the_rising_edges_of_the_alert(flags, expected) -> None:
    assert onsets(flags) == expected


# ----------------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("annotations", "predictions", "kwargs", "message"),
    [
        ({}, [1], {}, "at least one annotator"),
        ({"a": [-1]}, [], {}, "negative"),
        ({"a": [1]}, [2.5], {}, "not a row index"),
        ({"a": [1]}, ["3"], {}, "not a row index"),
        ({"a": [1]}, [True], {}, "not a row index"),
        ({"a": [1]}, [2], {"alpha": 1.0}, "alpha"),
        ({"a": [1]}, [2], {"margin": -1}, "margin"),
    ],
)
def test_bad_inputs_are_refused(annotations, predictions, kwargs, message) -> None:
    with pytest.raises(ChangePointInputError, match=message):
        change_point_score(annotations, predictions, **kwargs)


def test_the_docstring_examples_run() -> None:
    result = doctest.testmod(eval_changepoint)
    assert result.attempted > 5
    assert result.failed == 0
