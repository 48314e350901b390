"""Tests of the NAB scoring rules (service/eval_nab.py).

Sources named beside the checks:
- "paper": Lavin & Ahmad 2015, arXiv:1510.03336 (scoring section, application profiles).
- "reference scorer": the benchmark's own scorer, nab/sweeper.py of NAB v1.1 (probationary
  cap, position formula, clamping at y >= 3, windows wholly in the probation not counted).
Expected numbers in the hand-worked cases are written out with the formula they come from.
"""

from __future__ import annotations

import doctest
import json
import math
from datetime import datetime, timezone

import numpy as np
import pytest

import service.eval_nab as eval_nab
from service.eval_nab import (
    PROFILES,
    NabInputError,
    best_threshold,
    label_rows,
    load_windows,
    normalise,
    perfect_detections,
    probationary_length,
    scaled_sigmoid,
    score_corpus,
    score_file,
)

STANDARD, LOW_FP, LOW_FN = PROFILES["standard"], PROFILES["reward_low_FP"], PROFILES["reward_low_FN"]
SIG_M1 = 2 / (1 + math.exp(-5)) - 1  # sigma(-1) = 0.98661, the paper's value for the earliest detection


def detections(n: int, *rows: int) -> np.ndarray:
    mask = np.zeros(n, dtype=bool)
    mask[list(rows)] = True
    return mask


# --------------------------------------------------------------------------- the sigmoid


@pytest.mark.parametrize(
    ("y", "expected"),
    [(-1.0, 0.98661), (-0.5, 0.84828), (0.0, 0.0), (1.0, -0.98661)],  # paper (and reference scorer docstring)
)
def test_scaled_sigmoid_gives_the_papers_values(y: float, expected: float) -> None:
    assert scaled_sigmoid(y) == pytest.approx(expected, abs=5e-6)


def test_scaled_sigmoid_is_clamped_to_minus_one_from_three_window_widths() -> None:
    # reference scorer: "FP well behind window" -> -1.0 for y >= 3
    assert scaled_sigmoid(3.0) == -1.0
    assert scaled_sigmoid(50.0) == -1.0
    assert scaled_sigmoid(2.999) > -1.0


def test_scaled_sigmoid_falls_as_the_detection_comes_later() -> None:
    # paper: earlier detections earn more; the sigmoid is strictly decreasing below the clamp
    ys = np.linspace(-1.0, 2.99, 200)
    values = [scaled_sigmoid(float(y)) for y in ys]
    assert all(a > b for a, b in zip(values, values[1:]))


# ------------------------------------------------------------------- probation and profiles


@pytest.mark.parametrize(
    ("rows", "expected"),
    # reference scorer: min(floor(0.15 * n), 0.15 * 5000)
    [(20, 3), (40, 6), (4032, 604), (4999, 749), (5000, 750), (22695, 750)],
)
def test_probationary_period_is_15_percent_capped_at_750_rows(rows: int, expected: int) -> None:
    assert probationary_length(rows) == expected


def test_profiles_carry_the_published_weights() -> None:
    # paper, application profiles table: (A_TP, A_FP, A_FN, A_TN)
    assert (STANDARD.tp, STANDARD.fp, STANDARD.fn, STANDARD.tn) == (1.0, 0.11, 1.0, 1.0)
    assert (LOW_FP.tp, LOW_FP.fp, LOW_FP.fn, LOW_FP.tn) == (1.0, 0.22, 1.0, 1.0)
    assert (LOW_FN.tp, LOW_FN.fp, LOW_FN.fn, LOW_FN.tn) == (1.0, 0.11, 2.0, 1.0)


# --------------------------------------------------------------- hand-worked single files
#
# 40 rows at t = 0..39, one window [20, 29] (width 10), probation floor(0.15 * 40) = 6 rows:
#
#   rows 0-5 unscored | 6-19 before the window | 20-29 window | 30-39 after it
#


@pytest.fixture
def one_window():
    return label_rows(range(40), [(20.0, 29.0)])


@pytest.mark.parametrize("profile", list(PROFILES.values()), ids=list(PROFILES))
def test_detection_at_the_windows_first_row_earns_exactly_a_tp(one_window, profile) -> None:
    # paper: the earliest possible detection is worth A_TP (reference scorer divides by sigma(-1))
    assert score_file(one_window, detections(40, 20), profile).raw == pytest.approx(profile.tp, abs=1e-12)


def test_detection_halfway_through_the_window_earns_the_sigmoid_at_minus_a_half(one_window) -> None:
    # row 25: y = -(29 - 25 + 1) / 10 = -0.5 -> 0.84828 / 0.98661 = 0.85979 (paper's sigmoid values)
    assert score_file(one_window, detections(40, 25), STANDARD).raw == pytest.approx(0.84828 / 0.98661, abs=1e-5)


def test_only_the_earliest_detection_in_a_window_counts(one_window) -> None:
    # paper: later detections in the same window are ignored.
    # row 22: y = -(29 - 22 + 1) / 10 = -0.8 -> sigma(-0.8) = 2 / (1 + e^-4) - 1 = 0.96403
    earliest = (2 / (1 + math.exp(-4)) - 1) / SIG_M1
    result = score_file(one_window, detections(40, 22, 25, 27, 29), STANDARD)
    assert result.raw == pytest.approx(earliest, abs=1e-12)
    assert result.raw == pytest.approx(0.97711, abs=1e-5)
    assert (result.detected_windows, result.missed_windows, result.false_positives) == (1, 0, 0)


@pytest.mark.parametrize("profile", list(PROFILES.values()), ids=list(PROFILES))
def test_a_missed_window_costs_a_fn(one_window, profile) -> None:
    # paper: each window without a detection scores -A_FN
    result = score_file(one_window, detections(40), profile)
    assert result.raw == -profile.fn
    assert result.missed_windows == 1


@pytest.mark.parametrize("profile", list(PROFILES.values()), ids=list(PROFILES))
def test_a_false_positive_before_any_window_costs_the_full_a_fp(one_window, profile) -> None:
    # brief and reference scorer: no preceding window -> -1 * A_FP; the window is still missed
    result = score_file(one_window, detections(40, 10), profile)
    assert result.raw == pytest.approx(-profile.fn - profile.fp, abs=1e-12)
    assert result.false_positives == 1


def test_detections_in_the_probationary_period_are_not_scored(one_window) -> None:
    # paper: the first 15% of a file is not scored; rows 0..5 here
    assert score_file(one_window, detections(40, 0, 3, 5), STANDARD).raw == -1.0
    assert score_file(one_window, detections(40, 6), STANDARD).raw == pytest.approx(-1.11, abs=1e-12)


def test_a_false_positive_just_after_a_window_costs_little(one_window) -> None:
    # reference scorer: y = (30 - 29) / (10 - 1) = 1/9 -> sigma(1/9) = 2 / (1 + e^(5/9)) - 1 = -0.27085
    result = score_file(one_window, detections(40, 20, 30), STANDARD)
    fp = 0.11 * (2 / (1 + math.exp(5 / 9)) - 1)
    assert result.raw == pytest.approx(1.0 + fp, abs=1e-12)
    assert fp == pytest.approx(-0.029793, abs=1e-6)


def test_false_positives_cost_more_the_further_they_are_from_the_window() -> None:
    # brief: FPs far after a window cost the full A_FP; reference scorer: y >= 3 clamps to -1.
    # 100 rows, window 20..29 (width 10): row 60 sits at y = 31 / 9 = 3.44
    labels = label_rows(range(100), [(20.0, 29.0)])
    costs = [score_file(labels, detections(100, 20, r), STANDARD).false_positive_cost for r in (30, 35, 45, 60, 99)]
    assert all(a > b for a, b in zip(costs[:3], costs[1:4]))
    assert costs[3] == pytest.approx(-0.11, abs=1e-15)
    assert costs[4] == pytest.approx(-0.11, abs=1e-15)


def test_a_false_positive_is_measured_from_the_preceding_window_not_the_next() -> None:
    # reference scorer: outside rows use the distance past the last window. Windows 10..14
    # and 40..44 in 60 rows (probation 9): row 16 is y = 2/4 after the first window.
    labels = label_rows(range(60), [(10.0, 14.0), (40.0, 44.0)])
    result = score_file(labels, detections(60, 10, 16, 40), STANDARD)
    assert result.false_positive_cost == pytest.approx(0.11 * (2 / (1 + math.exp(2.5)) - 1), abs=1e-12)
    assert result.raw == pytest.approx(2.0 + result.false_positive_cost, abs=1e-12)


# ------------------------------------------------------------------------- normalisation


def _corpus(seed: int = 7):
    """Three seeded synthetic files: two windows, one window, none."""
    rng = np.random.default_rng(seed)
    files = [
        label_rows(np.arange(300.0) * 60, [(120 * 60.0, 139 * 60.0), (220 * 60.0, 229 * 60.0)], name="a"),
        label_rows(np.arange(200.0) * 60, [(150 * 60.0, 169 * 60.0)], name="b"),
        label_rows(np.arange(100.0) * 60, [], name="c"),
    ]
    scores = [np.round(rng.random(f.n_rows), 2) for f in files]  # rounding makes ties
    return files, scores


@pytest.mark.parametrize("profile", list(PROFILES.values()), ids=list(PROFILES))
def test_the_null_detector_scores_0_and_the_perfect_one_100(profile) -> None:
    # paper: normalised so that a detector that never fires scores 0 and a perfect one 100
    files, _ = _corpus()
    null = score_corpus(files, [detections(f.n_rows) for f in files], profile)
    perfect = score_corpus(files, [perfect_detections(f) for f in files], profile)
    assert null.normalised == 0.0
    assert perfect.normalised == pytest.approx(100.0, abs=1e-9)
    assert null.null == -3 * profile.fn  # three scored windows
    assert perfect.perfect == pytest.approx(3 * profile.tp, abs=1e-12)


def test_a_detector_between_null_and_perfect_scores_between_0_and_100() -> None:
    # one of three windows caught at its first row, nothing else, by hand:
    # raw = 1 - 1 - 1 = -1, null = -3, perfect = 3 -> 100 * (-1 + 3) / (3 + 3) = 33.3
    files, _ = _corpus()
    dets = [detections(300, 120), detections(200), detections(100)]
    assert score_corpus(files, dets, STANDARD).normalised == pytest.approx(100 * 2 / 6, abs=1e-9)


def test_normalise_has_no_value_when_there_is_no_window() -> None:
    assert normalise(-0.5, 0.0, 0.0) is None
    assert normalise(1.0, -1.0, 1.0) == 100.0


def test_a_window_wholly_inside_the_probation_is_neither_caught_nor_missed() -> None:
    # reference scorer: rows of the probationary period carry no window name, so such a
    # window never enters the score. 40 rows: probation is rows 0..5.
    labels = label_rows(range(40), [(1.0, 4.0), (20.0, 29.0)])
    assert labels.scored_windows.tolist() == [1]
    assert score_file(labels, detections(40), STANDARD).raw == -1.0


def test_a_window_straddling_the_probation_is_perfectly_caught_at_the_first_scored_row() -> None:
    # 40 rows, probation rows 0..5, window rows 2..11 (width 10): the first scored row is 6,
    # y = -(11 - 6 + 1) / 10 = -0.6, worth sigma(-0.6) / sigma(-1)
    labels = label_rows(range(40), [(2.0, 11.0)])
    assert perfect_detections(labels).nonzero()[0].tolist() == [6]
    result = score_corpus([labels], [perfect_detections(labels)], STANDARD)
    assert result.perfect == pytest.approx((2 / (1 + math.exp(-3)) - 1) / SIG_M1, abs=1e-12)
    assert result.normalised == pytest.approx(100.0)


# ---------------------------------------------------------------------- threshold sweep


def _brute_force(files, scores, profile):
    """Score every candidate threshold separately with score_corpus (highest wins ties)."""
    candidates = sorted({float(v) for s, f in zip(scores, files) for v in s[f.scored]} | {math.inf}, reverse=True)
    best = None
    for t in candidates:
        raw = score_corpus(files, [s >= t for s in scores], profile).raw
        if best is None or raw > best[1] + 1e-12:
            best = (t, raw)
    return best


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("profile", list(PROFILES.values()), ids=list(PROFILES))
def test_the_sweep_finds_the_same_optimum_as_scoring_every_threshold(seed: int, profile) -> None:
    files, scores = _corpus(seed)
    # Make one window's start stand out so the optimum is not always "detect nothing".
    scores[0][120] = 0.995
    scores[1][155] = 0.99
    choice = best_threshold(files, scores, profile)
    t, raw = _brute_force(files, scores, profile)
    assert choice.raw == pytest.approx(raw, abs=1e-9)
    assert choice.threshold == t
    rescored = score_corpus(files, [s >= choice.threshold for s in scores], profile)
    assert rescored.raw == pytest.approx(choice.raw, abs=1e-9)
    assert choice.normalised == pytest.approx(rescored.normalised, abs=1e-9)


def test_the_sweep_detects_nothing_when_every_detection_costs() -> None:
    # Scores high only outside windows: any threshold adds FPs before any TP.
    files, scores = _corpus()
    for f, s in zip(files, scores):
        s[:] = np.where(f.window >= 0, 0.0, 0.5)
    choice = best_threshold(files, scores, STANDARD)
    assert choice.threshold == math.inf
    assert choice.normalised == 0.0


def test_rows_with_equal_scores_detect_together() -> None:
    # Detection is score >= threshold, so a tie cannot be split: here all rows or none.
    # All rows of a 40-row file with window 20..29 at one score: 1 TP and 24 FPs (rows 6..19, 30..39).
    labels = label_rows(range(40), [(20.0, 29.0)])
    flat = np.full(40, 0.5)
    choice = best_threshold([labels], [flat], LOW_FN)
    everything = score_file(labels, np.ones(40, dtype=bool), LOW_FN).raw
    assert choice.raw == pytest.approx(max(everything, -2.0), abs=1e-12)
    assert choice.threshold in (0.5, math.inf)


def test_a_corpus_without_windows_has_no_normalised_score() -> None:
    labels = label_rows(range(50), [])
    choice = best_threshold([labels], [np.linspace(0, 1, 50)], STANDARD)
    assert (choice.threshold, choice.raw, choice.normalised) == (math.inf, 0.0, None)


# -------------------------------------------------------------------------- labelling


def test_windows_open_and_close_on_the_first_matching_timestamp() -> None:
    # reference scorer: enters at the row equal to the start, leaves at the first row equal
    # to the end, even when the clock repeats a value.
    ts = [0, 1, 2, 3, 3, 4, 5, 6]
    labels = label_rows(ts, [(2.0, 3.0)], probation_fraction=0.0)
    assert labels.window.tolist() == [-1, -1, 0, 0, -1, -1, -1, -1]
    assert labels.bounds == ((2, 3),)


def test_window_bounds_between_samples_take_the_rows_inside() -> None:
    labels = label_rows([0, 10, 20, 30, 40, 50], [(15.0, 35.0)], probation_fraction=0.0)
    assert labels.window.tolist() == [-1, -1, 0, 0, -1, -1]


def test_a_window_that_no_row_falls_in_is_left_out() -> None:
    labels = label_rows([0, 10, 20, 30], [(11.0, 19.0), (20.0, 30.0)], probation_fraction=0.0)
    assert labels.bounds == ((2, 3),)
    assert labels.window.tolist() == [-1, -1, 0, 0]


def test_windows_are_taken_in_time_order_whatever_the_input_order() -> None:
    a = label_rows(range(60), [(40.0, 44.0), (10.0, 14.0)])
    b = label_rows(range(60), [(10.0, 14.0), (40.0, 44.0)])
    assert a.window.tolist() == b.window.tolist()
    assert np.array_equal(a.unit, b.unit)


def test_overlapping_or_reversed_windows_are_refused() -> None:
    with pytest.raises(NabInputError, match="overlap"):
        label_rows(range(40), [(10.0, 20.0), (20.0, 30.0)])
    with pytest.raises(NabInputError, match="ends before it starts"):
        label_rows(range(40), [(20.0, 10.0)])


def test_inputs_of_the_wrong_length_or_with_nan_are_refused() -> None:
    labels = label_rows(range(40), [(20.0, 29.0)])
    with pytest.raises(NabInputError, match="39 detections for 40 rows"):
        score_file(labels, np.zeros(39, dtype=bool), STANDARD)
    with pytest.raises(NabInputError, match="scores for 40 rows"):
        best_threshold([labels], [np.zeros(41)], STANDARD)
    bad = np.zeros(40)
    bad[7] = np.nan
    with pytest.raises(NabInputError, match="NaN"):
        best_threshold([labels], [bad], STANDARD)
    with pytest.raises(NabInputError, match="finite"):
        label_rows([0.0, math.inf], [])
    with pytest.raises(NabInputError, match="2 detection series for 1 files"):
        score_corpus([labels], [np.zeros(40, dtype=bool)] * 2, STANDARD)


def test_nab_input_error_is_a_value_error_and_a_tidewatch_error() -> None:
    from service.errors import TidewatchError

    assert issubclass(NabInputError, ValueError)
    assert issubclass(NabInputError, TidewatchError)


# --------------------------------------------------------------------------- windows file


def test_windows_file_timestamps_are_read_as_utc(tmp_path) -> None:
    # shared corpus notes and brief: timestamps carry no zone, treat as UTC;
    # Python's datetime with an explicit UTC zone is the reference for the epoch value.
    path = tmp_path / "windows.json"
    path.write_text(json.dumps({
        "fam/a.csv": [["2014-04-10 07:15:00.000000", "2014-04-11 16:45:00.000000"]],
        "fam/b.csv": [],
    }))
    windows = load_windows(path)
    start = datetime(2014, 4, 10, 7, 15, tzinfo=timezone.utc).timestamp()
    end = datetime(2014, 4, 11, 16, 45, tzinfo=timezone.utc).timestamp()
    assert windows == {"fam/a.csv": [(start, end)], "fam/b.csv": []}
    assert start == 1397114100.0


@pytest.mark.parametrize(
    "content", ["not json", json.dumps([1, 2]), json.dumps({"a.csv": [["2014-01-01 00:00:00"]]})]
)
def test_a_malformed_windows_file_is_refused(tmp_path, content: str) -> None:
    path = tmp_path / "windows.json"
    path.write_text(content)
    with pytest.raises(NabInputError):
        load_windows(path)


def test_a_missing_windows_file_is_refused(tmp_path) -> None:
    with pytest.raises(NabInputError, match="cannot read"):
        load_windows(tmp_path / "absent.json")


def test_the_docstring_examples_run() -> None:
    result = doctest.testmod(eval_nab)
    assert result.attempted > 10
    assert result.failed == 0
