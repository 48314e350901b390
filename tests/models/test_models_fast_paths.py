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


def test_single_path_score_matches_the_batch_score() -> None:
    rng = np.random.default_rng(4)
    for height, window in ((1, 2), (3, 5), (8, 36)):
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
