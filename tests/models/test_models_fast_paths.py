"""The per-window code written out for speed agrees exactly with the reference helpers.

``SeasonalBaseline.compare`` inlines ``_predictions``, ``_best`` and ``_tail_p``;
``HalfSpaceTrees._score_path`` scores one window without the batch arithmetic of
``_score_paths``; ``_path`` walks the trees over cached arrays. These tests pin the results to
the helpers bit for bit (``==`` on floats), so the two cannot drift apart.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from models.hst import HalfSpaceTrees
from models.seasonal import SeasonalBaseline, blend_of

T0 = 1772409600.0  # 2026-03-02T00:00:00Z, a Monday
STEP = 300.0


def stream(seed: int, n: int) -> list[dict[str, float]]:
    rng = np.random.default_rng(seed)
    out = []
    for k in range(n):
        day = math.sin(2.0 * math.pi * ((k * STEP) % 86400.0) / 86400.0)
        out.append({
            "lat.mean": 200.0 + 40.0 * day + 5.0 * rng.standard_normal() + (400.0 if k % 211 == 150 else 0.0),
            "count": float(round(30.0 + 10.0 * day + 3.0 * rng.standard_normal())),
            "restarts.sum": 1.0 if k % 173 == 90 else 0.0,  # holds its value
            "rounded.max": float(round(3.0 + rng.standard_normal())),  # repeats sometimes
            "frozen.mean": 7.0 if 600 <= k < 640 else float(rng.standard_normal()),  # a stuck run
        })
    return out


@pytest.mark.parametrize("seed", [0, 1])
def test_compare_matches_the_prediction_and_tail_helpers(seed: int) -> None:
    base = SeasonalBaseline(24.0)
    checked = 0
    for k, feats in enumerate(stream(seed, 3 * 288)):
        at = T0 + STEP * k
        names = list(feats)
        values = [feats[n] for n in names]
        idx = base.locate(names, add=True)
        evidence = base.compare(idx, values, at)
        use_day, use_week = base._cycles(at)
        for i, x, ev in zip(idx, values, evidence):
            if base._i["count"][i] == 0:
                assert math.isnan(ev.expected) and not ev.scorable
                continue
            preds = base._predictions(i, use_day, use_week, blend_of(at))
            assert ev.expected == preds[base._best(i)]
            if ev.scorable and ev.stuck == 0.0 and not ev.held:
                want = min(base._tail_p(i, abs(ev.z), "x"), 2.0 * base._tail_p(i, abs(ev.drift), "y"))
                assert ev.p == want
                checked += 1
        base.update(idx, values, at, evidence=evidence)
    assert checked > 1000


@pytest.mark.parametrize("scorer", ["c", "python"])
def test_single_path_score_matches_the_batch_score(scorer: str, monkeypatch) -> None:
    from models import hst

    if scorer == "c" and hst._c_score_path is None:
        pytest.skip("built without the C extension")
    if scorer == "python":
        monkeypatch.setattr(hst, "_c_score_path", None)
    rng = np.random.default_rng(4)
    # Window sizes up to 300 give uint16 masses as well as uint8 ones; the C sum takes both.
    for height, window in ((1, 2), (3, 5), (8, 36), (4, 300)):
        trees = HalfSpaceTrees(6, height, window, seed=height)
        trees.build([f"f{i}" for i in range(5)])
        for k in range(4 * window + 3):
            v = rng.random(5) if k % 4 else np.full(5, 0.5)  # repeats build up mass
            path = trees._path(v)
            if trees.ready:
                one = trees._score_path(path)
                assert type(one) is float
                assert one == float(trees._score_paths(path[None])[0])
            trees._learn_path(path)


@pytest.mark.parametrize("walker", ["c", "python"])
@pytest.mark.parametrize("n_features", [4, 300])  # uint8 and uint16 split features
def test_path_matches_a_level_by_level_walk(walker: str, n_features: int, monkeypatch) -> None:
    from models import hst as hst_module

    if walker == "python":
        monkeypatch.setattr(hst_module, "_c_walk", None)
    elif hst_module._c_walk is None:
        pytest.skip("built without the C extension")
    rng = np.random.default_rng(5)
    trees = HalfSpaceTrees(7, 6, 10, seed=9)
    trees.build([f"f{i}" for i in range(n_features)])
    n_internal = 2 ** trees.height - 1
    for _ in range(200):
        v = rng.random(n_features)
        v[rng.integers(0, n_features, 3)] = trees._threshold.ravel()[rng.integers(0, trees._threshold.size, 3)]  # ties
        go_right = v[trees._feature] >= trees._threshold  # float32 thresholds, as stored
        node = np.zeros(trees.n_trees, dtype=np.intp)
        want = [node.copy()]
        for _ in range(trees.height):
            node = 2 * node + 1 + go_right.ravel()[np.arange(trees.n_trees) * n_internal + node]
            want.append(node.copy())
        want = np.stack(want, axis=1) + (np.arange(trees.n_trees) * trees.n_nodes)[:, None]
        np.testing.assert_array_equal(trees._path(v), want)


def _steady(rng, names: list[str], feats: dict[str, float], before: dict[str, float]) -> list:
    """A window's within-window readings (see models.seasonal.repeats): None for the count and for some
    features (seen once), True where the value stayed put and now and then by chance (a run starting
    mid-window at another value), otherwise False."""
    out = []
    for name in names:
        r = rng.random()
        if name == "count" or r < 0.2:
            out.append(None)
        else:
            out.append(feats[name] == before.get(name) or r > 0.97)
    return out


def _fields(ev) -> tuple:
    return tuple((type(v), repr(v)) for v in (ev.expected, ev.z, ev.change, ev.stuck, ev.scorable, ev.p, ev.drift,
                                               ev.held))


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("timed", [True, False])
@pytest.mark.parametrize("with_steady", [False, True])
def test_the_c_compare_gives_the_python_compare_s_evidence_bit_for_bit(seed: int, timed: bool,
                                                                        with_steady: bool) -> None:
    from models import seasonal

    if seasonal._c_compare is None:
        pytest.skip("built without the C extension")
    base = SeasonalBaseline(24.0)
    rng = np.random.default_rng(seed)
    compared = stuck = held = 0
    before: dict[str, float] = {}
    # Three weeks of five-minute windows: both profiles come into use (two cycles each), and the
    # stream's spikes, repeats, held counter and stuck run reach every branch.
    for k, feats in enumerate(stream(seed, 21 * 288)):
        at = T0 + STEP * k if timed else None
        names = list(feats)
        if rng.random() < 0.1:
            names.pop(int(rng.integers(0, len(names))))  # a feature missing from a window
        values = [feats[n] for n in names]
        steady = _steady(rng, names, feats, before) if with_steady else None
        before = feats
        idx = base.locate(names, add=True)
        fast = base.compare(idx, values, at, steady)
        slow = base._compare(idx, values, at, steady)
        assert [_fields(e) for e in fast] == [_fields(e) for e in slow], k
        compared += len(fast)
        stuck += sum(e.stuck > 0.0 for e in fast)
        held += sum(e.held for e in fast)
        base.update(idx, values, at, learn=rng.random() > 0.05, evidence=fast, steady=steady)
    assert compared > 20000 and stuck > 10 and held > 100


def _smooth_week_stream(n: int, seed: int):
    rng = np.random.default_rng(seed)
    for k in range(n):
        at = T0 + STEP * k
        day = math.sin(2.0 * math.pi * (at % 86400.0) / 86400.0)
        yield at, {"lat.mean": 200.0 + 50.0 * day + rng.standard_normal(),
                   "count": float(round(30.0 + 10.0 * day + rng.standard_normal())),
                   "cpu.mean": 0.5 + 0.2 * day + 0.01 * rng.standard_normal()}


def test_feature_order_does_not_change_what_the_baseline_learns() -> None:
    # A river-style check (common practice for online estimators): the same window in another key order
    # must teach the same statistics. It caught the week profile's update reading a slot count as the
    # neighbouring slot for every feature after the first, once both profiles were in use.
    forward, backward = SeasonalBaseline(24.0), SeasonalBaseline(24.0)
    for at, feats in _smooth_week_stream(3 * 7 * 288, seed=3):
        for base, names in ((forward, list(feats)), (backward, list(feats)[::-1])):
            values = [feats[n] for n in names]
            idx = base.locate(names, add=True)
            base.update(idx, values, at, evidence=base.compare(idx, values, at))
    for name in feats:
        i, j = forward._index[name], backward._index[name]
        assert {k: v[i] for k, v in forward._f.items()} == {k: v[j] for k, v in backward._f.items()}, name
        assert forward._week[i] == backward._week[j] and forward._week_n[i] == backward._week_n[j]


def test_fifteen_weeks_of_five_minute_windows_run_through() -> None:
    # Past 14 weeks a week slot has been visited more than 167 times; the bug above then indexed the
    # profile with that count and raised IndexError.
    base = SeasonalBaseline(24.0)
    for at, feats in _smooth_week_stream(15 * 7 * 288, seed=4):
        names = list(feats)
        values = [feats[n] for n in names]
        idx = base.locate(names, add=True)
        base.update(idx, values, at, evidence=base.compare(idx, values, at))
    assert min(base._week_n[0]) >= 15 * 12 - 12


def _state_bytes(base: SeasonalBaseline) -> dict:
    return {k: (v.tobytes() if isinstance(v, np.ndarray) else v) for k, v in base.to_state().items()}


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("timed", [True, False])
@pytest.mark.parametrize("with_steady", [False, True])
def test_the_c_update_learns_the_python_update_s_statistics_bit_for_bit(seed: int, timed: bool, with_steady: bool,
                                                                        monkeypatch) -> None:
    from models import seasonal

    if seasonal._c_update_loop is None:
        pytest.skip("built without the C extension")
    c_loop, c_learn = seasonal._c_update_loop, seasonal._c_learn_evidence
    fast, slow = SeasonalBaseline(24.0), SeasonalBaseline(24.0)
    rng = np.random.default_rng(seed)
    before: dict[str, float] = {}
    for k, feats in enumerate(stream(seed, 21 * 288)):
        at = T0 + STEP * k if timed else None
        names = list(feats)
        if rng.random() < 0.1:
            names.pop(int(rng.integers(0, len(names))))
        if k == 3000:
            names.append("late.mean")  # a feature first seen after the profiles are in use
            feats["late.mean"] = float(rng.standard_normal())
        values = [feats[n] for n in names]
        learn = rng.random() > 0.05
        steady = _steady(rng, names, feats, before) if with_steady else None
        before = feats
        for base, loop, learn_c in ((fast, c_loop, c_learn), (slow, None, None)):
            monkeypatch.setattr(seasonal, "_c_update_loop", loop)
            monkeypatch.setattr(seasonal, "_c_learn_evidence", learn_c)  # the tails and the drift too
            idx = base.locate(names, add=True)
            evidence = base.compare(idx, values, at, steady)
            base.update(idx, values, at, learn=learn, evidence=evidence, steady=steady)
            if k % 101 == 7:
                base.learn_tail(idx, evidence)  # as an alert's first window is taught when the alert ends
        if k % 997 == 0:
            assert _state_bytes(fast) == _state_bytes(slow), k
    assert _state_bytes(fast) == _state_bytes(slow)


@pytest.mark.parametrize("capacity", [1, 2, 7, 1000])
def test_the_c_history_learn_keeps_the_python_learn_s_arrays_bit_for_bit(capacity: int, monkeypatch) -> None:
    from models import calibration
    from models.calibration import EmpiricalCalibrator

    if calibration._c_history_learn is None:
        pytest.skip("built without the C extension")
    c_learn = calibration._c_history_learn
    fast, slow = EmpiricalCalibrator(capacity), EmpiricalCalibrator(capacity)
    rng = np.random.default_rng(capacity)
    # Ties (rounded values), signed zeros and a run of one value: where a search's side decides the position.
    values = np.concatenate([np.round(rng.normal(size=3 * capacity + 50), 1), [0.0, -0.0] * 20, [1.5] * 30,
                             rng.exponential(size=200)])
    for k, raw in enumerate(values.tolist()):
        for cal, learn in ((fast, c_learn), (slow, None)):
            monkeypatch.setattr(calibration, "_c_history_learn", learn)
            cal.learn(raw)
        assert (fast._size, fast._head) == (slow._size, slow._head), k
        assert fast._sorted.tobytes() == slow._sorted.tobytes() and fast._ring.tobytes() == slow._ring.tobytes(), k
    assert fast._size == capacity


@pytest.mark.parametrize("capacity", [1, 20, 25, 1000])
def test_the_c_tail_rank_gives_the_python_p_value(capacity: int, monkeypatch) -> None:
    from models import calibration
    from models.calibration import TailCalibrator

    if calibration._c_tail_rank is None:
        pytest.skip("built without the C extension")
    c_rank = calibration._c_tail_rank
    cal = TailCalibrator(capacity)
    rng = np.random.default_rng(capacity)
    # Ties and their neighbours (where "at or below the tail level" and the search's side decide), values far
    # beyond the tail (the Python fit), below everything, and short histories (p = 1).
    history = np.concatenate([np.round(rng.normal(size=2 * capacity + 60), 1), [1.5] * 40, rng.exponential(size=80)])
    asked = 0
    for raw in history.tolist():
        probes = [raw, math.nextafter(raw, math.inf), math.nextafter(raw, -math.inf), -1e9, 1e9, 0.0, -0.0,
                  float(rng.normal(scale=3.0))]
        if len(cal):
            top = float(cal._cal._sorted[len(cal) - 1])
            probes += [top, math.nextafter(top, math.inf)]
        for probe in probes:
            monkeypatch.setattr(calibration, "_c_tail_rank", c_rank)
            fast = cal.p_value(probe)
            monkeypatch.setattr(calibration, "_c_tail_rank", None)
            assert fast == cal.p_value(probe), (len(cal), probe)
            asked += 1
        cal.learn(raw)
    assert asked > 1000
    ordered = np.zeros(4)
    with pytest.raises(ValueError):
        c_rank(ordered, 5, 0.0, 1, 1, 0.1)  # more values than the array holds
    with pytest.raises(ValueError):
        c_rank(np.zeros(4, dtype=np.float32), 2, 0.0, 1, 1, 0.1)
    with pytest.raises(ValueError):
        c_rank(ordered, 2, float("nan"), 1, 1, 0.1)
    assert c_rank(ordered, 2, 0.0, 20, 10, 0.1) == 1.0  # a short history: nothing is surprising


def test_the_c_contributions_and_evidence_slots_are_the_python_objects() -> None:
    # The window's contributors built in C hold the very objects the Python comprehension would; Evidence written
    # and read at its slots' offsets behaves as one made by its own __init__.
    from models import _baselinecore
    from models.seasonal import Evidence
    from models.service_model import Contribution

    names = ["a.mean", "b.mean", "count"]
    values = [1.5, -2.0, 3.0]
    evidence = [Evidence(1.0, 0.5, 0.0, 0.0, True, 0.2), Evidence(-1.0, -3.5, 1.0, 0.0, True, 1e-4, 0.3, False),
                Evidence(math.nan, 0.0, 0.0, 0.0, False)]
    built = _baselinecore.contributions(Contribution, names, values, evidence, [1, 0])
    assert built == [Contribution(names[i], values[i], evidence[i].expected, evidence[i].z) for i in (1, 0)]
    assert all(type(c) is Contribution for c in built)
    assert built[0].feature is names[1] and built[0].observed is values[1] and built[0].deviation is evidence[1].z
    built[0].deviation = 9.0  # an ordinary, writable instance
    assert built[0].deviation == 9.0 and _baselinecore.contributions(Contribution, names, values, evidence, []) == []
    with pytest.raises(IndexError):
        _baselinecore.contributions(Contribution, names, values, evidence, [3])
    with pytest.raises(TypeError):
        _baselinecore.contributions(Contribution, names, values[:2], evidence, [0])

    class Looser:  # not slotted: every field through the attribute protocol
        pass

    loose = _baselinecore.contributions(Looser, names, values, evidence, [0])
    assert (loose[0].feature, loose[0].observed, loose[0].expected, loose[0].deviation) == ("a.mean", 1.5, 1.0, 0.5)
    with pytest.raises(AttributeError):
        _baselinecore.summarise([Looser()], ["x"], 1)  # a field it does not have: raised, not read as garbage
    half = Evidence(1.0, 0.5, 0.0, 0.0, True)
    del half.p
    with pytest.raises(AttributeError):
        _baselinecore.summarise([half], ["x"], 1)  # an empty slot falls back to the attribute protocol, which raises


def test_the_c_learn_path_counts_the_masses_numpy_counts(monkeypatch) -> None:
    from models import hst

    if hst._c_learn_path is None:
        pytest.skip("built without the C extension")
    c_learn = hst._c_learn_path
    rng = np.random.default_rng(9)
    for height, window in ((1, 2), (3, 5), (8, 36), (4, 300)):  # uint8 and uint16 masses
        fast, slow = (HalfSpaceTrees(6, height, window, seed=height) for _ in range(2))
        for trees in (fast, slow):
            trees.build([f"f{i}" for i in range(5)])
        for k in range(3 * window + 5):  # across mass-window swaps
            v = rng.random(5) if k % 3 else np.full(5, 0.5)
            for trees, learn in ((fast, c_learn), (slow, None)):
                monkeypatch.setattr(hst, "_c_learn_path", learn)
                trees._learn_path(trees._path(v))
            assert fast._l_mass.tobytes() == slow._l_mass.tobytes() and fast._r_mass.tobytes() == slow._r_mass.tobytes()
            assert (fast.counter, fast.ready) == (slow.counter, slow.ready)


def test_the_new_c_loops_refuse_arrays_of_the_wrong_shape_or_type() -> None:
    # They write into and read from raw buffers: every size and index is checked before any is touched.
    from models import _hstcore

    mass = np.zeros((2, 7), dtype=np.uint8)  # 2 trees of height 2
    path = np.zeros((2, 3), dtype=np.intp)
    assert _hstcore.score_path(mass, path, 2, 2, 0.5) == 0
    with pytest.raises(ValueError):
        _hstcore.score_path(np.zeros((2, 6), dtype=np.uint8), path, 2, 2, 0.5)
    with pytest.raises(ValueError):
        _hstcore.score_path(mass.astype(np.uint32), path, 2, 2, 0.5)  # wider masses stay in Python
    with pytest.raises(ValueError):
        _hstcore.learn_path(mass, path[:, :2].copy(), 2, 2)
    with pytest.raises(IndexError):
        _hstcore.learn_path(mass, np.full((2, 3), 14, dtype=np.intp), 2, 2)
    assert not mass.any()  # nothing was counted by the refused call
    with pytest.raises((ValueError, BufferError)):
        _hstcore.learn_path(mass[:, ::-1], path, 2, 2)  # not contiguous
    frozen = np.zeros((2, 7), dtype=np.uint8)
    frozen.setflags(write=False)
    with pytest.raises((ValueError, BufferError)):
        _hstcore.learn_path(frozen, path, 2, 2)  # read-only
    ring, ordered = np.zeros(4), np.zeros(4)
    with pytest.raises(ValueError):
        _hstcore.history_learn(ordered, ring, 0, 0, float("nan"))
    with pytest.raises(ValueError):
        _hstcore.history_learn(ordered, ring, 5, 0, 1.0)
    with pytest.raises(ValueError):
        _hstcore.history_learn(np.zeros(3), ring, 0, 0, 1.0)


def _model_stream(seed: int, n: int) -> list[tuple[dict[str, float], float, dict[str, bool]]]:
    """A service whose features come and go (a metric missing for a while, one added late), for a whole model."""
    out = []
    for k, feats in enumerate(stream(seed, n)):
        feats = dict(feats)
        if 300 <= k < 340:
            del feats["rounded.max"]  # an exporter that stopped sending one metric
        if 400 <= k < 420:
            feats["spare.max"] = feats.pop("rounded.max")  # another metric in its place: as many names, not the same
        if k >= 500:
            feats["late.mean"] = 1.0 + 0.01 * (k % 7)  # a metric first sent on day two
        if k % 97 == 13:
            feats["lat.mean"] = float("nan")  # an aggregate over nothing: missing
        steady = {name: feats[name] == 7.0 for name in feats if name == "frozen.mean"}
        out.append((feats, T0 + STEP * k, steady))
    return out


def _run_model(items, clear_caches: bool = False):
    from models import ModelSettings, build_model

    model = build_model("ferry-gate", ModelSettings(warm_up=20))
    seen = []
    for feats, at, steady in items:
        if clear_caches:
            model._known = model._tree_layout = None
        a = model.assess(feats, at=at, steady=steady)
        seen.append((a.score, a.raw, a.anomalous, a.warming_up,
                     [(c.feature, c.observed, c.expected, c.deviation) for c in a.contributors]))
    return seen, model


def _model_record(model) -> bytes:
    from models.persistence import encode_state

    return encode_state(model.service, model)


@pytest.mark.parametrize("seed", [0, 1])
def test_the_whole_model_scores_the_same_with_and_without_the_c_loops(seed: int, monkeypatch) -> None:
    # Every C accelerator of the models (compare, update, the tails, the trees' build, walk, masses and
    # history, the window summary) against the Python reference, over a service whose features change.
    from models import calibration, hst, seasonal, service_model

    if service_model._c_summarise is None or hst._c_squash_walk is None:
        pytest.skip("built without the C extension")
    items = _model_stream(seed, 900)
    fast, fast_model = _run_model(items)
    for module, names in ((seasonal, ("_c_compare", "_c_update_loop", "_c_learn_evidence")),
                          (hst, ("_c_draw_padded", "_c_learn_path", "_c_score_path", "_c_squash_walk", "_c_walk")),
                          (calibration, ("_c_history_learn", "_c_tail_rank")), (service_model, ("_c_summarise", "_c_contributions"))):
        for name in names:
            monkeypatch.setattr(module, name, None)
    slow, slow_model = _run_model(items)
    assert fast == slow
    assert any(a[2] for a in fast) and any(a[4] for a in fast)  # alerts and contributors were compared
    assert _model_record(fast_model) == _model_record(slow_model)


def test_the_per_window_caches_change_nothing() -> None:
    # The positions of the last window's features (baseline and trees) are reused while the names stay the same.
    items = _model_stream(2, 700)
    cached, cached_model = _run_model(items)
    fresh, fresh_model = _run_model(items, clear_caches=True)
    assert cached == fresh
    assert _model_record(cached_model) == _model_record(fresh_model)


def _evidence(rng: np.random.Generator, n: int) -> list:
    from models.seasonal import Evidence

    out = []
    for _ in range(n):
        tie = rng.random() < 0.3  # equal p and strength: the name decides
        z = 2.0 if tie else float(rng.normal(0.0, 3.0))
        out.append(Evidence(float(rng.normal()), z, float(rng.normal(0.0, 2.0)),
                            float(rng.choice([0.0, 0.0, abs(z), 4.0])), bool(rng.random() < 0.8),
                            0.01 if tie else float(rng.choice([1.0, rng.random(), 1e-6 * rng.random()])),
                            0.0, False))
    return out


def test_the_c_summary_ranks_the_contributors_as_the_python_summary_does() -> None:
    from models import service_model
    from models.service_model import MAX_CONTRIBUTORS, ServiceModel

    if service_model._c_summarise is None:
        pytest.skip("built without the C extension")
    rng = np.random.default_rng(5)
    for trial in range(400):
        n = int(rng.integers(0, 40))
        names = [f"m{int(k):03d}.mean" for k in rng.permutation(n)]
        evidence = _evidence(rng, n)
        got = service_model._c_summarise(evidence, names, MAX_CONTRIBUTORS)
        assert got == ServiceModel._summarise(names, evidence), trial
    evidence = _evidence(rng, 3)
    evidence[1].scorable, evidence[1].p = True, float("nan")
    assert service_model._c_summarise(evidence, ["a", "b", "c"], 5) is None  # NaN: the Python sort decides
    with pytest.raises(TypeError):
        service_model._c_summarise(evidence, ["a", "b"], 5)


def test_the_c_squashed_walk_walks_the_python_vector(monkeypatch) -> None:
    from models import hst

    if hst._c_squash_walk is None:
        pytest.skip("built without the C extension")
    c_walk = hst._c_squash_walk
    rng = np.random.default_rng(6)
    for n_features in (1, 3, 40):  # 40 features: an 80-slot vector, beyond the C stack buffer
        trees = HalfSpaceTrees(8, 6, 50, seed=n_features)
        trees.build([f"f{i}|{part}" for i in range(n_features) for part in ("level", "change")])
        for _ in range(50):
            evidence = _evidence(rng, n_features)
            level = [int(v) for v in rng.permutation(n_features) * 2]
            change = [a + 1 for a in level]
            for k in rng.choice(n_features, size=n_features // 3, replace=False):
                level[k] = change[k] = -1  # a feature the trees were not built on
            monkeypatch.setattr(hst, "_c_squash_walk", c_walk)
            fast = trees._squashed_path(evidence, level, change, 3.0)
            monkeypatch.setattr(hst, "_c_squash_walk", None)
            slow = trees._squashed_path(evidence, level, change, 3.0)
            assert fast.dtype == slow.dtype and np.array_equal(fast, slow)
    path = np.empty((trees.n_trees, trees.height + 1), dtype=np.intp)
    args = (trees._feature, trees._threshold, trees.n_trees, trees.height, trees.n_nodes, path)
    with pytest.raises(IndexError):
        c_walk(evidence[:1], [80], [81], 80, 3.0, *args)  # a slot beyond the vector
    with pytest.raises(TypeError):
        c_walk(evidence[:2], [0], [1], 80, 3.0, *args)  # lists of different lengths
    with pytest.raises(ValueError):
        c_walk(evidence[:1], [0], [1], 2, 3.0, *args)  # the trees split features beyond a 2-slot vector
