"""Tumbling windows and watermarks.

Reference: pandas (``DataFrame.resample`` with ``closed="left", label="left"``,
which is the [start, end) convention) computes the same per-window aggregates.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from service.windows import FeatureSpec, SourceWindows, Window, window_features

L, D = 60.0, 10.0


def test_window_bounds_include_start_and_exclude_end():
    sw = SourceWindows()
    # t=60 belongs to [60, 120), not [0, 60)
    sw.add("a", 0.0, {"x": 1.0}, L, D)
    sw.add("a", 59.999, {"x": 2.0}, L, D)
    sw.add("a", 60.0, {"x": 3.0}, L, D)
    closed = sw.pop_closed(flush=True)
    assert [(w.start, w.end, w.count) for _, w in closed] == [(0.0, 60.0, 2), (60.0, 120.0, 1)]


def test_windows_are_aligned_to_the_epoch():
    sw = SourceWindows()
    sw.add("a", 1772409600.0 + 95.0, {"x": 1.0}, 300.0, 0.0)
    (_, w), = sw.pop_closed(flush=True)
    assert w.start % 300.0 == 0 and w.start <= 1772409695.0 < w.end


def test_a_window_closes_only_when_the_watermark_passes_its_end():
    sw = SourceWindows()
    sw.add("a", 5.0, {"x": 1.0}, L, D)
    sw.add("a", 69.0, {"x": 1.0}, L, D)  # watermark 59 < 60: still open
    assert sw.pop_closed() == []
    sw.add("a", 70.0, {"x": 1.0}, L, D)  # watermark 60 >= 60: closes [0, 60)
    assert [w.start for _, w in sw.pop_closed()] == [0.0]


def test_late_events_are_refused_and_leave_state_unchanged():
    sw = SourceWindows()
    sw.add("a", 5.0, {"x": 1.0}, L, D)
    sw.add("a", 75.0, {"x": 1.0}, L, D)
    sw.pop_closed()
    before = sw.to_state()
    assert sw.add("a", 30.0, {"x": 9.0}, L, D) is False
    # a window that never opened but that the watermark passed is closed too
    assert sw.add("b", 2.0, {"x": 9.0}, L, D) is False
    assert sw.to_state() == before


def test_the_watermark_never_moves_back():
    sw = SourceWindows()
    marks = []
    for ts in [10.0, 50.0, 20.0, 200.0, 100.0, 199.0]:
        sw.add("a", ts, {"x": 1.0}, L, D)
        marks.append(sw.high_mark)
    assert marks == sorted(marks)


def test_flush_moves_the_watermark_past_flushed_windows():
    sw = SourceWindows()
    sw.add("a", 5.0, {"x": 1.0}, L, D)
    sw.pop_closed(flush=True)
    # A later event for the flushed window must not reopen it (it would be emitted twice).
    assert sw.add("a", 6.0, {"x": 1.0}, L, D) is False


def test_close_order_is_by_close_time_then_service():
    sw = SourceWindows()
    sw.add("b", 1.0, {"x": 1.0}, L, D)
    sw.add("a", 2.0, {"x": 1.0}, L, D)
    sw.add("a", 200.0, {"x": 1.0}, L, D)
    assert [s for s, _ in sw.pop_closed()] == ["a", "b"]


def test_snapshot_round_trip_gives_identical_results():
    rng = np.random.default_rng(3)
    ts = np.sort(rng.uniform(0, 3600, 500))
    events = [("svc-%d" % rng.integers(3), float(t), {"x": float(rng.normal())}) for t in ts]

    def run(split: int | None):
        sw = SourceWindows()
        out = []
        for i, (s, t, m) in enumerate(events):
            if split is not None and i == split:
                sw = SourceWindows.from_state(sw.to_state())
            sw.add(s, t, m, L, D)
            out += [(s, w.to_state()) for s, w in sw.pop_closed()]
        out += [(s, w.to_state()) for s, w in sw.pop_closed(flush=True)]
        return out

    assert run(None) == run(250)


def test_per_service_snapshot_round_trip():
    sw = SourceWindows()
    sw.add("a", 5.0, {"x": 1.0}, L, D)
    sw.add("b", 6.0, {"x": 2.0}, L, D)
    state = sw.service_state("a")
    sw.drop_service("a")
    assert list(sw.services()) == ["b"]
    sw.restore_service("a", state, D)
    assert sorted((s, w.start) for s, w in sw.pop_closed(flush=True)) == [("a", 0.0), ("b", 0.0)]


def test_window_aggregates_equal_pandas_resample():
    # Reference: pandas resample (closed="left", label="left" = [start, end) windows).
    rng = np.random.default_rng(11)
    n = 2000
    t0 = 1772409600.0
    ts = t0 + np.sort(rng.uniform(0, 6 * 3600, n))
    values = rng.normal(100, 15, n)
    sw = SourceWindows()
    for t, v in zip(ts, values):
        sw.add("api", float(t), {"lat": float(v)}, 300.0, 0.0)
    ours = {w.start: w for _, w in sw.pop_closed(flush=True)}

    df = pd.DataFrame({"lat": values}, index=pd.to_datetime(ts, unit="s", utc=True))
    ref = df["lat"].resample("300s", closed="left", label="left").agg(["count", "sum", "mean", "min", "max", "last"])
    ref = ref[ref["count"] > 0]
    assert len(ref) == len(ours)
    specs = tuple(FeatureSpec("lat", a) for a in ("count", "sum", "mean", "min", "max", "last"))
    for stamp, row in ref.iterrows():
        w = ours[stamp.timestamp()]
        f = window_features(w, specs)
        assert f["lat.count"] == row["count"]
        for agg in ("sum", "mean", "min", "max", "last"):
            assert math.isclose(f[f"lat.{agg}"], row[agg], rel_tol=1e-12), agg


def test_default_features_are_the_mean_of_each_metric_and_the_count():
    w = Window(0.0, 60.0)
    w.count = 3
    w.values = {"errors": [1.0, 3.0, 2.0], "lat": [10.0, 20.0]}
    specs = (FeatureSpec("*", "mean"), FeatureSpec(None, "count"))
    assert window_features(w, specs) == {"errors.mean": 2.0, "lat.mean": 15.0, "count": 3.0}


@pytest.mark.parametrize("glob,expected", [("lat*", {"lat_p50.max": 5.0, "lat_p95.max": 9.0}), ("err", {})])
def test_feature_globs_select_metrics(glob, expected):
    w = Window(0.0, 60.0)
    w.count = 1
    w.values = {"lat_p50": [5.0], "lat_p95": [9.0], "errors": [1.0]}
    assert window_features(w, (FeatureSpec(glob, "max"),)) == expected


def test_values_keep_arrival_order_when_metrics_come_and_go_within_a_window():
    # The reference: every value appended to its metric's list, a new metric's list made where it first
    # appears (so the window's metrics are in first-arrival order).
    msgs = [{"a": 1.0, "b": 2.0}, {"a": 3.0, "c": 4.0, "b": 5.0}, {"d": 6.0}, {"b": 7.0, "a": 8.0},
            {"c": 9.0, "e": 10.0, "a": 11.0}, {"e": 12.0, "f": 13.0}, {"a": 14.0, "b": 15.0, "c": 16.0}]
    sw = SourceWindows()
    want: dict[str, list] = {}
    for i, m in enumerate(msgs):
        assert sw.add("api", float(i), m, 60.0, 0.0)
        for name, value in m.items():
            want.setdefault(name, []).append(value)
    (window,) = sw.open["api"].values()
    assert window.count == len(msgs)
    assert list(window.values.items()) == list(want.items())


def test_window_features_report_which_metrics_held_still_all_window() -> None:
    w = Window(0.0, 300.0)
    w.count = 4
    w.values = {
        "cpu": [0.31, 0.31, 0.31, 0.31],  # held still: a frozen exporter's window
        "lat": [120.0, 131.5, 120.0],  # first and last equal, moved in between
        "queue": [3, 3.0, 3],  # ints and floats alike
        "temp": [21.5],  # seen once: no reading
        "disk": [7.0, 8.0],
    }
    specs = (FeatureSpec("*", "mean"), FeatureSpec("cpu", "max"), FeatureSpec("d*", "last"),
             FeatureSpec("queue", "count"), FeatureSpec(None, "count"))
    steady: dict[str, bool] = {}
    features = window_features(w, specs, steady)
    assert steady == {"cpu.mean": True, "lat.mean": False, "queue.mean": True, "disk.mean": False,
                      "cpu.max": True, "disk.last": False}
    assert set(steady) < set(features)  # no reading for the message count, a count aggregate, or one value
    assert window_features(w, specs) == features  # the readings change nothing else
