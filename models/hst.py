"""Half-space trees in flat numpy arrays.

The algorithm is the one of Tan, Ting & Liu, "Fast anomaly detection for streaming data"
(IJCAI 2011), with the split rule and scoring of river's ``anomaly.HalfSpaceTrees``:

* each tree is a complete binary tree of ``height`` levels of random axis-parallel splits of the
  feature space, built once (when the first observation arrives) without looking at the data;
* every node counts the observations that reached it during the current window (``l_mass``,
  the "latest" window) and keeps the count of the previous, complete window (``r_mass``, the
  "reference" window); after ``window_size`` observations the latest counts become the reference
  and the latest counts restart at zero;
* an observation's score sums ``r_mass * 2 ** depth`` along its path in every tree, stopping at
  the first node whose reference mass is below ``0.1 * window_size``, and is flipped and
  normalised to [0, 1] so that *higher means more unusual*; before the first window is complete
  there is no reference and the score is 0.

Two split rules are available. ``"padded"`` (default, river's rule) picks a feature with
probability proportional to the width of its current range and splits uniformly inside the middle
70 % of that range. ``"work_range"`` is the paper's rule: each tree first draws a random
*work range* per feature (a random point ``s`` of the feature range, widened to
``s ± 2 * max(s - low, high - s)``), then every node picks a feature uniformly and splits its
work range at the mid-point.

The layout is heap order: node ``i`` has children ``2i + 1`` (value < threshold) and ``2i + 2``;
the ``2 ** height - 1`` internal nodes store a feature index and a float32 threshold, and all
``2 ** (height + 1) - 1`` nodes store two masses in the smallest unsigned dtype that holds
``window_size``. At 10 trees of height 8 and a window of 36 that is about 23 KiB per model.

Features are expected in [0, 1] unless ``limits`` says otherwise; the feature set is fixed by the
first observation learned (sorted names). A feature missing from a later observation is treated
as the mid-point of its limits, and unknown features are ignored.

Examples
--------
>>> from models.hst import HalfSpaceTrees
>>> hst = HalfSpaceTrees(n_trees=5, height=3, window_size=3, seed=42)
>>> for x in [0.5, 0.45, 0.43]:
...     hst.learn_one({"x": x})
>>> for x in [0.5, 0.45, 0.43, 0.44, 0.445, 0.45, 0.0]:
...     hst.learn_one({"x": x})
...     print(f"{x:.3f} {hst.score_one({'x': x}):.3f}")
0.500 0.231
0.450 0.116
0.430 0.116
0.440 0.116
0.445 0.116
0.450 0.000
0.000 0.667
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any, NamedTuple

import numpy as np

from models.base import PURE_PYTHON, split_features
from models.errors import CorruptState, SettingsError

try:
    # The padded rule's build and the walk down the trees as plain C loops (models/_hstcore.c), the same
    # results as _draw_padded and _path's Python walk; absent where the install had no C compiler, off
    # with TIDEWATCH_PURE_PYTHON=1.
    from models._hstcore import draw_padded as _c_draw_padded
    from models._hstcore import learn_path as _c_learn_path
    from models._hstcore import score_path as _c_score_path
    from models._hstcore import squash_walk as _c_squash_walk
    from models._hstcore import walk as _c_walk
except ImportError:  # pragma: no cover - depends on the install
    _c_draw_padded = _c_learn_path = _c_score_path = _c_squash_walk = _c_walk = None
if PURE_PYTHON:
    _c_draw_padded = _c_learn_path = _c_score_path = _c_squash_walk = _c_walk = None

__all__ = ["HalfSpaceTrees", "SPLIT_RULES"]

#: Accepted values of ``HalfSpaceTrees(split=...)``.
SPLIT_RULES: tuple[str, ...] = ("padded", "work_range")

# Share of the range left out on each side by the "padded" rule (river uses the same 0.15).
_PADDING = 0.15
# Nodes whose reference mass is below this share of the window stop the scoring walk
# (Tan, Ting & Liu 2011 use 0.1).
_SIZE_LIMIT = 0.1


# The dtype helpers run on every restore: plain integer limits, not ``np.iinfo`` (which builds an
# object per call); the dtypes chosen are the same.
_UINT_DTYPES = ((0xFF, np.dtype(np.uint8)), (0xFFFF, np.dtype(np.uint16)),
                (0xFFFF_FFFF, np.dtype(np.uint32)))
_FLOAT32 = np.dtype(np.float32)


def _mass_dtype(window_size: int) -> np.dtype:
    for limit, dtype in _UINT_DTYPES:
        if window_size <= limit:
            return dtype
    return np.dtype(np.uint64)


def _feature_dtype(n_features: int) -> np.dtype:
    return np.dtype(np.uint8 if n_features <= 256 else np.uint16 if n_features <= 65536
                    else np.uint32)


def _state_array(state: Mapping[str, Any], key: str, shape: tuple[int, int],
                 dtype: np.dtype) -> np.ndarray:
    """An owned, writable copy of ``state[key]`` after checking its type, shape and dtype.

    The decoder may hand over read-only views of a record's bytes: the copy is the one copy the
    trees' arrays get on their way into place.
    """
    arr = state[key]
    if not isinstance(arr, np.ndarray) or arr.shape != shape or arr.dtype != dtype:
        raise CorruptState(f"{key!r} must be a {dtype} array of shape {shape}")
    return arr.copy()


class _PaddedOrder(NamedTuple):
    """Index arrays of :meth:`HalfSpaceTrees._draw_padded` for one (trees, height, features)."""

    draws: np.ndarray  # position order of the draws: per level the two blocks, each (trees, n) by position
    heap: np.ndarray  # column of each heap-order internal node in the by-position columns
    levels: tuple[tuple[np.ndarray, np.ndarray], ...]  # per level: index bases (4, trees, n), multipliers


# A fleet builds thousands of trees of one shape, and these depend on nothing else. Read-only arrays.
_PADDED_ORDERS: dict[tuple[int, int, int], _PaddedOrder] = {}


def _padded_order(trees: int, height: int, n_f: int) -> _PaddedOrder:
    key = (trees, height, n_f)
    found = _PADDED_ORDERS.get(key)
    if found is not None:
        return found
    draws, heap, levels = [], [], []
    heap_of = np.zeros(1, dtype=np.intp)  # heap index within the level of the node at each position
    pos = 0
    for level in range(height):
        n = 1 << level
        size = trees * n
        by_position = (np.arange(trees, dtype=np.intp)[:, None] * n + heap_of[None, :]).ravel()
        draws += [pos + by_position, pos + size + by_position]
        heap.append((n - 1) + np.argsort(heap_of))
        node = np.arange(size, dtype=np.intp).reshape(trees, n)  # tree * n + position
        child = (node // n) * (2 * n) + node % n  # the left child's tree * 2n + position
        # Flat position of feature f: base + f * multiplier; [0] low and [1] high of the node in
        # this level's (2, features, trees, n) array, [2] the left child's high and [3] the right
        # child's low in the children's (2, features, trees, 2n) array.
        bases = np.stack((node, n_f * size + node, n_f * 2 * size + child, child + n))
        multipliers = np.array([size, size, 2 * size, 2 * size], dtype=np.intp)[:, None, None]
        levels.append((bases, multipliers))
        pos += 2 * size
        heap_of = np.concatenate((2 * heap_of, 2 * heap_of + 1))
    found = _PaddedOrder(np.concatenate(draws), np.concatenate(heap), tuple(levels))
    for arr in (found.draws, found.heap, *(a for pair in levels for a in pair)):
        arr.setflags(write=False)
    if len(_PADDED_ORDERS) >= 64:  # a handful of shapes in practice; bounded all the same
        _PADDED_ORDERS.clear()
    _PADDED_ORDERS[key] = found
    return found


class HalfSpaceTrees:
    """Streaming half-space trees; see the module docstring for the algorithm.

    Parameters
    ----------
    n_trees
        Number of trees.
    height
        Number of split levels per tree (a tree has ``2 ** (height + 1) - 1`` nodes).
    window_size
        Observations per mass window.
    limits
        ``{feature: (low, high)}``; features not listed use ``(0.0, 1.0)``.
    seed
        Seed of the numpy ``Generator`` that draws the splits.
    split
        ``"padded"`` (river's rule) or ``"work_range"`` (the paper's rule).
    """

    __slots__ = ("n_trees", "height", "window_size", "limits", "seed", "split",
                 "features", "_index", "_low", "_high", "_feature", "_threshold", "_walk",
                 "_l_mass", "_r_mass", "counter", "_first_window", "_weights")

    def __init__(self, n_trees: int = 10, height: int = 8, window_size: int = 250,
                 limits: Mapping[str, tuple[float, float]] | None = None, seed: int = 0,
                 split: str = "padded") -> None:
        for name, value, low in (("n_trees", n_trees, 1), ("height", height, 1),
                                 ("window_size", window_size, 1), ("seed", seed, 0)):
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise SettingsError(f"{name} must be an integer >= {low}, got {value!r}")
        if height > 24:
            raise SettingsError(f"height must be <= 24, got {height}")
        if split not in SPLIT_RULES:
            raise SettingsError(f"split must be one of {SPLIT_RULES}, got {split!r}")
        self.n_trees, self.height, self.window_size = n_trees, height, window_size
        self.seed, self.split = seed, split
        self.limits: dict[str, tuple[float, float]] = {}
        for feature, pair in (limits or {}).items():
            try:
                low, high = (float(v) for v in pair)
            except (TypeError, ValueError) as exc:
                raise SettingsError(f"limits of {feature!r} must be a (low, high) pair") from exc
            if not (math.isfinite(low) and math.isfinite(high) and low < high):
                raise SettingsError(f"limits of {feature!r} must be finite with low < high")
            self.limits[str(feature)] = (low, high)
        self.features: tuple[str, ...] | None = None  # fixed by the first learn
        self._index: dict[str, int] = {}
        self._low = self._high = np.zeros(0)
        self._feature = np.zeros((0, 0), dtype=np.uint8)
        self._threshold = np.zeros((0, 0), dtype=np.float32)
        # (feature, threshold, the same as intp and float64) for :meth:`_path`: a cache, rebuilt
        # whenever either array is replaced; not part of the state.
        self._walk: tuple[np.ndarray, ...] = ()
        mass = _mass_dtype(window_size)
        self._l_mass = np.zeros((0, 0), dtype=mass)
        self._r_mass = np.zeros((0, 0), dtype=mass)
        self.counter = 0
        self._first_window = True
        self._weights = 2 ** np.arange(height + 1, dtype=np.int64)

    # ------------------------------------------------------------------ construction
    @property
    def n_nodes(self) -> int:
        """Nodes per tree."""
        return 2 ** (self.height + 1) - 1

    @property
    def size_limit(self) -> float:
        """Reference mass below which the scoring walk stops."""
        return _SIZE_LIMIT * self.window_size

    @property
    def max_score(self) -> float:
        """Largest possible unnormalised mass score."""
        return float(self.n_trees * self.window_size * self.n_nodes)

    @property
    def feature_index(self) -> dict[str, int]:
        """Position of each tree feature in the vectors of the vector API (empty before build)."""
        return self._index

    @property
    def ready(self) -> bool:
        """Whether a reference window exists (before that every score is 0)."""
        return not self._first_window

    def build(self, features: list[str] | tuple[str, ...]) -> None:
        """Draw the trees for ``features`` (done automatically by the first learn)."""
        names = tuple(sorted(set(features)))
        if not names:
            raise SettingsError("half-space trees need at least one feature")
        self.features = names
        self._index = {n: i for i, n in enumerate(names)}
        self._low = np.array([self.limits.get(n, (0.0, 1.0))[0] for n in names])
        self._high = np.array([self.limits.get(n, (0.0, 1.0))[1] for n in names])
        n_f = len(names)
        rng = np.random.default_rng(self.seed)
        if self.split == "padded" and _c_draw_padded is not None:
            # The same draws and arithmetic as _draw_padded, node by node in C (models/_hstcore.c).
            internal = 2 ** self.height - 1
            draws = rng.random(2 * self.n_trees * internal)
            feature = np.empty((self.n_trees, internal), dtype=np.int64)
            threshold = np.empty((self.n_trees, internal), dtype=np.float64)
            _c_draw_padded(draws, self._low, self._high, self.n_trees, self.height, _PADDING, feature, threshold)
        elif self.split == "padded":
            feature, threshold = self._draw_padded(rng, n_f)
        else:
            feature, threshold = self._draw_work_range(rng, n_f)
        self._feature = feature.astype(_feature_dtype(n_f))
        self._threshold = threshold.astype(np.float32)
        mass = _mass_dtype(self.window_size)
        self._l_mass = np.zeros((self.n_trees, self.n_nodes), dtype=mass)
        self._r_mass = np.zeros((self.n_trees, self.n_nodes), dtype=mass)

    def _draw_padded(self, rng: np.random.Generator, n_f: int) -> tuple[np.ndarray, np.ndarray]:
        """Split features (intp) and thresholds (float64), shape ``(n_trees, internal nodes)``, heap order.

        One level of every tree at a time. The ranges of a level's nodes are one array of shape
        ``(2, features, trees, nodes in level)`` (low, then high): features first, so the cumulative
        width and the count below the drawn point run over whole rows instead of along short
        rows, which numpy does slowly. Within a level the nodes are not in heap order but in the
        order that lets the children be made by one ``concatenate`` (children of the node at
        position ``k`` of ``n`` sit at ``k`` (left) and ``k + n`` (right)); the draws are permuted
        into that order first, the results back into heap order at the end.

        The numbers drawn, their order and every arithmetic operation are those of the plain
        level-by-level form (each level drew the feature-picking block, then the split-placing
        block, each of shape ``(trees, nodes in level)``): ``Generator.random`` fills float64 values
        one 64-bit draw at a time, so one call for all levels yields the same values in the same
        order; a cumulative sum is the same sequence of additions along either axis; and ``b - a``
        of a gathered low ``a`` and high ``b`` is the subtraction that gave the width there. The
        trees are bit-identical; tests/models/test_models_hst.py checks it against the plain form.
        """
        trees, height = self.n_trees, self.height
        order = _padded_order(trees, height, n_f)
        draws = rng.random(2 * trees * (2 ** height - 1))
        # Where in its range each split falls (the middle 70 %); computed for every draw at once,
        # the feature-picking blocks' values are simply not used.
        draws = draws.take(order.draws)
        place = _PADDING + (1.0 - 2.0 * _PADDING) * draws
        lh = np.empty((2, n_f, trees, 1))
        lh[0] = self._low[:, None, None]
        lh[1] = self._high[:, None, None]
        features_by_level, thresholds_by_level = [], []
        pos = 0
        last = n_f - 1
        for level, (bases, multipliers) in enumerate(order.levels):
            n = 1 << level
            size = trees * n
            cum = lh[1] - lh[0]  # the widths, summed in place below (shape: features, trees, n)
            if size <= 96:
                cum.cumsum(axis=0, out=cum)
            else:
                # The same additions in the same order, a whole row per call (numpy's cumulative
                # sum along the first axis is slower than that on rows this long).
                prev, *rows = cum
                for row in rows:
                    np.add(prev, row, out=row)
                    prev = row
            # Feature drawn with probability proportional to its width (inverse CDF).
            u = draws[pos : pos + size].reshape(trees, n) * cum[last]
            f = (cum <= u).sum(axis=0)
            np.minimum(f, last, out=f)
            at_index = f * multipliers + bases  # see _padded_order
            ab = lh.take(at_index[:2])  # low and high of feature f at every node
            a = ab[0]
            at = a + (ab[1] - a) * place[pos + size : pos + 2 * size].reshape(trees, n)
            pos += 2 * size
            features_by_level.append(f)
            thresholds_by_level.append(at)
            if level == height - 1:
                break  # the leaves' ranges are never used
            # Children: the left one's high[f] and the right one's low[f] become the split;
            # ``put`` repeats ``at`` over both blocks of indices.
            lh = np.concatenate((lh, lh), axis=3)
            lh.put(at_index[2:], at)
        feature = np.concatenate(features_by_level, axis=1).take(order.heap, axis=1)
        threshold = np.concatenate(thresholds_by_level, axis=1).take(order.heap, axis=1)
        return feature, threshold

    def _draw_work_range(self, rng: np.random.Generator, n_f: int) -> tuple[np.ndarray, np.ndarray]:
        """Like :meth:`_draw_padded` for the paper's rule (feature uniform, split at the mid-point).

        One level of every tree at a time: ``low``/``high`` hold the range of every node of the
        current level, shape (trees, nodes in level, features). ``Generator.integers`` may serve small
        ranges from halves of 64-bit draws buffered within one call, so merging its calls could shift
        the stream: its draws stay one call per level.
        """
        trees = self.n_trees
        s = rng.uniform(self._low, self._high, size=(trees, 1, n_f))
        r = 2.0 * np.maximum(s - self._low, self._high - s)
        low, high = s - r, s + r
        features_by_level, thresholds_by_level = [], []
        # Plain fancy indexing ``a[tree, node, f]`` reads and writes the same elements as
        # ``take_along_axis``/``put_along_axis`` with less overhead.
        tree_at = np.arange(trees)[:, None]
        for level in range(self.height):
            node_at = np.arange(low.shape[1])[None, :]
            f = rng.integers(n_f, size=low.shape[:2])
            a = low[tree_at, node_at, f]
            b = high[tree_at, node_at, f]
            at = 0.5 * (a + b)
            features_by_level.append(f)
            thresholds_by_level.append(at)
            if level == self.height - 1:
                break  # the leaves' ranges are never used
            # Children of node k of this level are 2k (left: high[f] = at) and 2k + 1 (right).
            low = np.repeat(low, 2, axis=1)
            high = np.repeat(high, 2, axis=1)
            high[tree_at, 2 * node_at, f] = at
            low[tree_at, 2 * node_at + 1, f] = at
        return np.concatenate(features_by_level, axis=1), np.concatenate(thresholds_by_level, axis=1)

    # ------------------------------------------------------------------ vector API
    def vectorize(self, x: Mapping[str, float]) -> np.ndarray:
        """Values of the tree features in ``x`` (missing/non-finite -> mid-point of the limits)."""
        if self.features is None:
            raise SettingsError("the trees are not built yet; learn one observation first")
        v = 0.5 * (self._low + self._high)
        names, values = split_features(x)
        index = self._index
        for name, value in zip(names, values):
            i = index.get(name)
            if i is not None:
                v[i] = value
        return v

    def _path(self, v: np.ndarray) -> np.ndarray:
        """Flat node index (``tree * n_nodes + node``) at every depth, shape ``(n_trees, height + 1)``."""
        # One vectorised comparison at every internal node of every tree, then a plain-Python
        # walk over the resulting bytes down to each tree's leaf: for trees this small that beats
        # ``height`` rounds of numpy gathers, which pay a fixed overhead per call.
        if v.shape != self._low.shape:
            raise SettingsError(f"expected a vector of {self._low.size} tree features, got shape {v.shape}")
        # ``take`` gathers the same values as ``v[feature]`` with less per-call overhead; comparing
        # them with the float32 thresholds widens those to float64 (exact). The model's own compact
        # arrays are used as they are: wider copies kept per model (intp indices, float64
        # thresholds) saved about 4 us a window but cost 40 KiB a model at the default 10 trees of
        # height 8, and memory per model is what a fleet pays for.
        if _c_walk is not None:
            path = np.empty((self.n_trees, self.height + 1), dtype=np.intp)
            _c_walk(np.ascontiguousarray(v, dtype=np.float64), self._feature, self._threshold, self.n_trees,
                    self.height, self.n_nodes, path)
            return path
        walk = self._walk
        if not walk or walk[0] is not self._feature or walk[1] is not self._threshold:
            height, n_internal, n_nodes = self.height, 2 ** self.height - 1, self.n_nodes
            walk = self._walk = (
                self._feature, self._threshold,
                tuple(range(-1, self.n_trees * n_internal - 1, n_internal)),  # each tree's bytes, minus 1
                range(height),
                np.arange(height, -1, -1, dtype=np.intp),  # depth d is the leaf's number >> (height - d)
                (np.arange(self.n_trees, dtype=np.intp) * n_nodes - 1)[:, None],
            )
        go_right = (v.take(walk[0]) >= walk[1]).tobytes()
        # Numbered from 1 in heap order (children of j: 2j, 2j + 1; node i of the 0-based heap is
        # j = i + 1), a node's number is its path's bits: the leaf gives every node above it.
        leaves = []
        append = leaves.append
        levels = walk[3]
        for base in walk[2]:
            j = 1
            for _ in levels:
                j = 2 * j + go_right[base + j]
            append(j)
        return (np.array(leaves, dtype=np.intp)[:, None] >> walk[4]) + walk[5]

    def _squashed_path(self, evidence: list, level_slots: list[int], change_slots: list[int],
                       scale: float) -> np.ndarray:
        """:meth:`_path` of the vector that is 0.5 everywhere but at the slots of scorable evidence.

        For each ``evidence[k]`` (anything with ``z``, ``change`` and ``scorable``) that is scorable and has
        ``level_slots[k] >= 0``: ``v[level_slots[k]] = 0.5 + 0.5 * tanh(z / scale)`` and
        ``v[change_slots[k]]`` the same of ``change``, in order. The service model's tree vector, built and
        walked in one C call where the accelerator is installed (the same floats: C's ``tanh`` is the one
        ``math.tanh`` calls).
        """
        if (_c_squash_walk is not None and type(evidence) is list and type(level_slots) is list
                and type(change_slots) is list):
            path = np.empty((self.n_trees, self.height + 1), dtype=np.intp)
            _c_squash_walk(evidence, level_slots, change_slots, len(self.features), scale, self._feature,
                           self._threshold, self.n_trees, self.height, self.n_nodes, path)
            return path
        v = [0.5] * len(self.features)  # missing -> the prediction itself -> 0.5
        tanh = math.tanh
        for e, a, b in zip(evidence, level_slots, change_slots, strict=True):
            if a >= 0 and e.scorable:
                v[a] = 0.5 + 0.5 * tanh(e.z / scale)
                v[b] = 0.5 + 0.5 * tanh(e.change / scale)
        return self._path(np.array(v, dtype=np.float64))

    def _score_path(self, path: np.ndarray) -> float:
        """Normalised score of paths of shape ``(..., n_trees, height + 1)``, summed per row."""
        if self._first_window:
            return 0.0
        if path.ndim == 2:
            # One window: a plain-Python walk over its few masses costs less than the array
            # operations of :meth:`_score_paths` (their fixed overhead per call dominates at this
            # size). The same integer sum, so the same float: node ``k`` of a tree adds
            # ``mass << k``, and the walk stops after the first node under the size limit.
            limit = self.size_limit
            r_mass = self._r_mass
            if _c_score_path is not None and r_mass.itemsize <= 2 and path.dtype == np.intp:
                # The same integer sum in C (models/_hstcore.c): exact, so the same float below.
                total = _c_score_path(r_mass, np.ascontiguousarray(path), self.n_trees, self.height, limit)
                return 1.0 - total / self.max_score
            total = 0
            for row in r_mass.ravel()[path].tolist():
                k = 0
                for mass in row:
                    total += mass << k
                    if mass < limit:
                        break
                    k += 1
            return 1.0 - total / self.max_score
        return float(self._score_paths(path[None])[0])

    def _score_paths(self, paths: np.ndarray) -> np.ndarray:
        # Integer arithmetic: the mass sum is exact, so one row scored alone or in a batch gives
        # bit-identical results.
        r = self._r_mass.ravel()[paths].astype(np.int64)
        # A node counts if every node above it on the path has at least ``size_limit`` mass: the
        # walk stops *after* adding the first node under the limit.
        keep = np.ones(r.shape, dtype=bool)
        np.logical_and.accumulate(r[..., :-1] >= self.size_limit, axis=-1, out=keep[..., 1:])
        total = (r * self._weights * keep).sum(axis=(-2, -1))
        return 1.0 - total / self.max_score

    def _learn_path(self, path: np.ndarray) -> None:
        if (_c_learn_path is not None and path.ndim == 2 and path.dtype == np.intp and self._l_mass.itemsize <= 4
                and path.flags.c_contiguous):
            _c_learn_path(self._l_mass, path, self.n_trees, self.height)  # the same increments, in C
        else:
            self._l_mass.ravel()[path] += 1  # a view: the mass arrays are C-contiguous
        self.counter += 1
        if self.counter == self.window_size:
            self._r_mass[...] = self._l_mass
            self._l_mass[...] = 0
            self._first_window = False
            self.counter = 0

    def score_vector(self, v: np.ndarray) -> float:
        """Score a vector from :meth:`vectorize` without learning it."""
        return self._score_path(self._path(v))

    def learn_vector(self, v: np.ndarray) -> None:
        """Learn a vector from :meth:`vectorize`."""
        self._learn_path(self._path(v))

    def score_learn_vector(self, v: np.ndarray) -> float:
        """Score, then learn, one vector; walks each tree once."""
        path = self._path(v)
        score = self._score_path(path)
        self._learn_path(path)
        return score

    def score_learn_batch(self, rows: np.ndarray) -> np.ndarray:
        """Score-then-learn every row of ``rows`` in order; identical to a loop over
        :meth:`score_learn_vector`, but vectorised.

        Within one mass window the reference masses do not change, so every row up to the next
        window swap can be walked and scored at once. Used to replay long recordings quickly.

        Parameters
        ----------
        rows
            Array of shape ``(n, len(features))`` in the order of :attr:`features`.
        """
        if self.features is None:
            raise SettingsError("the trees are not built yet; call build() first")
        rows = np.asarray(rows, dtype=np.float64)
        if rows.ndim != 2 or rows.shape[1] != len(self.features):
            raise SettingsError(f"rows must have shape (n, {len(self.features)})")
        out = np.empty(rows.shape[0])
        tree = np.arange(self.n_trees, dtype=np.intp)
        feature = self._feature.astype(np.intp)
        pos = 0
        while pos < rows.shape[0]:
            chunk = rows[pos : pos + self.window_size - self.counter]
            b = chunk.shape[0]
            node = np.zeros((b, self.n_trees), dtype=np.intp)
            paths = np.empty((b, self.n_trees, self.height + 1), dtype=np.intp)
            paths[..., 0] = 0
            row = np.arange(b, dtype=np.intp)[:, None]
            for d in range(1, self.height + 1):
                f = feature[tree, node]
                go_right = chunk[row, f] >= self._threshold[tree, node]
                node = 2 * node + 1 + go_right
                paths[..., d] = node
            paths += (tree * self.n_nodes)[:, None]
            out[pos : pos + b] = 0.0 if self._first_window else self._score_paths(paths)
            np.add.at(self._l_mass.ravel(), paths.ravel(), 1)
            self.counter += b
            if self.counter == self.window_size:
                self._r_mass[...] = self._l_mass
                self._l_mass[...] = 0
                self._first_window = False
                self.counter = 0
            pos += b
        return out

    # ------------------------------------------------------------------ Scorer protocol
    def learn_one(self, x: Mapping[str, float]) -> None:
        """Learn one observation; the first one fixes the feature set and builds the trees."""
        if self.features is None:
            self.build(split_features(x)[0])
        self.learn_vector(self.vectorize(x))

    def score_one(self, x: Mapping[str, float]) -> float:
        """Anomaly score in [0, 1] of ``x`` (0.0 until the first window is complete)."""
        if self.features is None or self._first_window:
            return 0.0
        return self.score_vector(self.vectorize(x))

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict[str, Any]:
        """Plain-dict state; the trees and masses are numpy arrays."""
        state: dict[str, Any] = {
            "n_trees": self.n_trees, "height": self.height, "window_size": self.window_size,
            "limits": {k: list(v) for k, v in self.limits.items()}, "seed": self.seed,
            "split": self.split, "features": None if self.features is None else list(self.features),
            "counter": self.counter, "first_window": self._first_window,
        }
        if self.features is not None:
            state.update(feature=self._feature.copy(), threshold=self._threshold.copy(),
                         l_mass=self._l_mass.copy(), r_mass=self._r_mass.copy())
        return state

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> HalfSpaceTrees:
        """Rebuild from :meth:`to_state` output; malformed states raise ``CorruptState``."""
        try:
            hst = cls(state["n_trees"], state["height"], state["window_size"],
                      limits={k: tuple(v) for k, v in state["limits"].items()},
                      seed=state["seed"], split=state["split"])
            features, counter, first = state["features"], state["counter"], state["first_window"]
            if not isinstance(first, bool) or isinstance(counter, bool) or not isinstance(counter, int):
                raise CorruptState("counter must be an int and first_window a bool")
            if not 0 <= counter < hst.window_size:
                raise CorruptState(f"counter {counter} outside [0, window_size)")
            if features is None:
                if counter or not first:
                    raise CorruptState("trees that were never built cannot have learned")
                return hst
            if not isinstance(features, list) or not all(isinstance(f, str) for f in features):
                raise CorruptState("features must be a list of names")
            # The split draws are not replayed: the stored arrays are the trees.
            names = tuple(sorted(set(features)))
            if not names or list(names) != features:
                raise CorruptState("features must be distinct, sorted and non-empty")
            internal = (hst.n_trees, 2 ** hst.height - 1)
            nodes = (hst.n_trees, 2 ** (hst.height + 1) - 1)
            mass = hst._l_mass.dtype  # the constructor's: _mass_dtype(window_size)
            feature = _state_array(state, "feature", internal, _feature_dtype(len(names)))
            threshold = _state_array(state, "threshold", internal, _FLOAT32)
            l_mass = _state_array(state, "l_mass", nodes, mass)
            r_mass = _state_array(state, "r_mass", nodes, mass)
        except (KeyError, TypeError, ValueError, AttributeError, SettingsError) as exc:
            raise CorruptState(f"malformed half-space-trees state: {exc}") from exc
        if feature.size and int(feature.max()) >= len(names):
            raise CorruptState("a split refers to a feature that does not exist")
        # One reduction instead of an isfinite mask: float32 values summed in float64 cannot
        # overflow, so the sum is finite exactly when every threshold is.
        if not math.isfinite(float(threshold.sum(dtype=np.float64))):
            raise CorruptState("split thresholds must be finite")
        hst.features = names
        hst._index = {n: i for i, n in enumerate(names)}
        if hst.limits:
            hst._low = np.array([hst.limits.get(n, (0.0, 1.0))[0] for n in names])
            hst._high = np.array([hst.limits.get(n, (0.0, 1.0))[1] for n in names])
        else:
            hst._low, hst._high = np.zeros(len(names)), np.ones(len(names))
        hst._feature, hst._threshold = feature, threshold
        hst._l_mass, hst._r_mass = l_mass, r_mass
        hst.counter, hst._first_window = counter, first
        return hst
