"""One online model per service: score a closed window, decide the alert state, then learn.

The pieces (``ModelSettings.kind`` chooses how the window's tail probability ``p`` is found):

* a :class:`~models.seasonal.SeasonalBaseline` per service predicts every feature (level, or
  hour-of-day / hour-of-week profile when the service has such cycles) and turns each window
  into per-feature evidence on the normal scale: deviation ``z``, first difference ``change``,
  and ``stuck`` (a value repeated by a feature that rarely repeats), with each feature's own
  tail probability ``Evidence.p`` (a normal tail widened by the extremes that feature has
  produced before). It gives the contributors for every kind;
* ``"adaptive_baseline"``: ``p = min(1, F * min_f p_f)`` over the ``F`` scorable features
  (Bonferroni): the per-feature tails are the service's calibration, so the same score means the
  same rarity on every service, whatever its metrics. Raw score: the normal deviate of
  ``min_f p_f`` (two-sided);
* ``"half_space_trees"``: half-space trees (:class:`~models.hst.HalfSpaceTrees`) over two
  coordinates per feature, ``0.5 + 0.5 * tanh(z / 3)`` and the same of ``change`` -- the
  baseline-normalised level and change of a metric are in [0, 1] however its range drifts, and
  a jump lands near 0 or 1; raw score = the trees' score, ``p`` = its tail probability among the
  service's last ``calibration_history`` raw scores (:class:`~models.calibration.TailCalibrator`).
  The trees' feature set is the first window's;
* ``"combined"`` (default): the baseline's ``p``, and for a service with at least
  ``_JOINT_MIN_FEATURES`` (4) scorable features also the trees', ``p = min(1, 2 * min(p_base, p_trees))``
  (Bonferroni over the two scorers). The trees see the metrics jointly (latency high *with* traffic
  low), which only exists when there are several metrics. Measured on the NAB development slice
  (BENCHMARKS.md), letting the trees vote on one- or two-metric series lowered the threshold-swept
  score from about 62 to 0-19 -- on one metric they add chance extremes, not incidents -- so they
  do not vote there. On the demo fleet (five to seven metrics a service) the gated vote changed
  (incidents caught, false alert onsets per service-week) from (8/12, 1.75) to (8/12, 1.50) for
  seed 7, (8/12, 1.50) to (7/12, 1.33) for seed 1 and (9/12, 1.42) to (9/12, 1.25) for seed 2.

After warm-up, the window's ``p`` is the smaller of its own and "two of the last three windows
this rare" (:func:`~models.calibration.pair_tail`: ``10 * (3x^2 - 2x^3)`` for the second smallest
``x`` of the three windows' own tail probabilities, when this window is one of the two rarest).
Evidence too weak for a page in one window is then enough in two out of three: at the default
threshold each must be rarer than about 1.8e-3.

The calibrated score is ``1 - sqrt(p)`` (:func:`~models.calibration.surprise_score`): at the
default threshold 0.99 a window must be rarer than 1 in 10 000 to open an alert.

Alert state (``Assessment.anomalous``), with hysteresis:

* an alert opens on a warmed-up window with ``score >= threshold``;
* while open, a window with ``score >= min(exit_level, threshold)`` resets the calm count and
  any other window adds one; the alert clears on the ``calm_windows``-th calm window in a row
  (that window is not anomalous). With the defaults (``exit_level`` 0.99, ``calm_windows`` 1)
  the hysteresis is the two-of-three evidence: after a window rarer than 1.8e-3 the next one
  keeps the alert open at that level too, so an incident that wobbles stays one alert, and the
  first window that is ordinary with its neighbours clears it;
* nothing is learned from a window while its alert is open (baseline, trees and calibration all
  stay as they were), so an incident never becomes the normal it is measured against. The
  alert's first window is counted once in the features' tails when the alert ends (so a kind of
  event that keeps recurring stops being surprising), not while the incident it came from is
  still being judged;
* an alert still open after ``adapt_after`` windows is a new normal (a deploy that moved a
  level): every prediction is moved by the mean deviation seen during the alert, the alert
  clears on that window and learning resumes. See ``ModelSettings.adapt_after`` for the reasons
  behind the default.

During the first ``warm_up`` windows a score is still produced but ``warming_up`` is true and the
window is never anomalous. ``at`` (the window start, seconds since the Unix epoch, UTC) drives
the seasonal profiles; without it only the level prediction is used.

Randomness comes only from the trees' seed, ``zlib.crc32(service) ^ settings.seed``, so the same
service, settings and inputs give the same scores in any process (Python's ``hash()`` is salted).

Examples
--------
>>> from models import ModelSettings, build_model
>>> model = build_model("checkout-api", ModelSettings(kind="adaptive_baseline", warm_up=20))
>>> for i in range(300):
...     result = model.assess({"latency_p95_ms.mean": 200.0 + (i % 5), "count": 12.0 + i % 3},
...                           at=1772409600.0 + 300.0 * i)
>>> result.warming_up, result.anomalous
(False, False)
>>> result = model.assess({"latency_p95_ms.mean": 450.0, "count": 13.0}, at=1772409600.0 + 300.0 * 300)
>>> result.anomalous, round(result.score, 6)
(True, 1.0)
>>> top = result.contributors[0]
>>> top.feature, top.observed, round(top.expected, 1), round(top.deviation, 1)
('latency_p95_ms.mean', 450.0, 202.1, 35.2)
>>> [model.assess({"latency_p95_ms.mean": 201.0 + i, "count": 12.0 + i % 3},
...               at=1772409600.0 + 300.0 * (301 + i)).anomalous for i in range(4)]
[False, False, False, False]
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from models.base import PURE_PYTHON, split_features
from models.calibration import TailCalibrator, pair_tail, surprise_score
from models.errors import CorruptState, SettingsError, StateError
from models.hst import HalfSpaceTrees
from models.seasonal import Evidence, SeasonalBaseline, tail_deviate
from models.settings import MODEL_KINDS, ModelSettings

try:
    # The smallest p, the scorable count and the contributors' order of a window in one C pass
    # (models/_baselinecore.c), the same as ServiceModel._summarise; off with TIDEWATCH_PURE_PYTHON=1.
    from models._baselinecore import summarise as _c_summarise
    # The window's Contribution list (the same objects in every field), built without each dataclass __init__.
    from models._baselinecore import contributions as _c_contributions
except ImportError:  # pragma: no cover - depends on the install
    _c_summarise = _c_contributions = None
if PURE_PYTHON:
    _c_summarise = _c_contributions = None

__all__ = [
    "Assessment",
    "Contribution",
    "MODEL_KINDS",
    "ServiceModel",
    "build_model",
    "service_seed",
]

#: Number of contributors reported per window.
MAX_CONTRIBUTORS = 5
#: ``z`` at which the squashed value is 0.5 ± 0.38 (tanh(1) / 2); three standard deviations
#: use most of the unit range without flattening moderate deviations.
SQUASH_Z = 3.0
#: Tree coordinates per feature: the squashed deviation and the squashed change.
_TREE_PARTS = ("level", "change")

#: Model state format. 3 added the baseline's drift statistics and tail clusters
#: (:data:`models.seasonal.NEW_IN_FORMAT_3`); 4 added each feature's held value and its count
#: of windows away from it (:data:`models.seasonal.NEW_IN_FORMAT_4`); 5 the repeats of a run in
#: progress, kept out of the repeat rate until the run ends (:data:`models.seasonal.NEW_IN_FORMAT_5`);
#: 6 the tail probabilities of the last two windows (``alert.recent_p``, for the two-of-three
#: evidence) and the open alert's first-window deviations still to be counted in the tails
#: (``alert.lesson_at``, ``alert.lesson``); 7 how often each feature's metric held still through a
#: whole window (:data:`models.seasonal.NEW_IN_FORMAT_7`). Formats 2 to 6 still load, with the
#: missing statistics at the values of a feature that is where it was, no recent windows
#: (``recent_p`` of 1.0: nothing rare), no lesson waiting (an older state's open alert already
#: taught it) and windows that hold still not known to be rare.
_STATE_FORMAT = 7
_READABLE_FORMATS = (2, 3, 4, 5, 6, 7)


@dataclass(slots=True)
class Contribution:
    """How far one feature of a window is from the service's baseline."""

    feature: str
    observed: float
    expected: float
    deviation: float  #: signed deviation (normal scale) from the prediction before this window


@dataclass(slots=True)
class Assessment:
    """Outcome of :meth:`ServiceModel.assess` for one window."""

    score: float  #: calibrated, in [0, 1]: ``1 - sqrt(tail probability)``
    raw: float  #: the model's raw score (higher = more unusual)
    anomalous: bool  #: the alert state after this window (see the module docstring)
    warming_up: bool
    contributors: list[Contribution] = field(default_factory=list)


def service_seed(service: str, seed: int) -> int:
    """Stable per-service seed: CRC-32 of the UTF-8 name XOR the configured seed.

    >>> service_seed("checkout-api", 0) == service_seed("checkout-api", 0)
    True
    >>> service_seed("a", 0) != service_seed("b", 0)
    True
    """
    return zlib.crc32(service.encode("utf-8")) ^ seed


def _squash(z: float) -> float:
    return 0.5 + 0.5 * math.tanh(z / SQUASH_Z)


# "combined": the trees take part only for services with at least this many scorable features.
_JOINT_MIN_FEATURES = 4


class ServiceModel:
    """The online model of one service (see the module docstring).

    Build it with :func:`build_model`; restore it with :meth:`from_state`.
    """

    __slots__ = ("service", "settings", "kind", "windows_seen", "_baseline", "_trees",
                 "_cal_trees", "_alert_on", "_alert_len", "_calm",
                 "_shift", "_shift_n", "_last_at", "_tree_layout", "_known",
                 "_p_before", "_p_earlier", "_lesson")

    def __init__(self, service: str, settings: ModelSettings) -> None:
        if not isinstance(service, str) or not service:
            raise SettingsError(f"service must be a non-empty string, got {service!r}")
        if not isinstance(settings, ModelSettings):
            raise SettingsError(f"settings must be ModelSettings, got {type(settings).__name__}")
        self.service = service
        self.settings = settings
        self.kind = settings.kind
        self.windows_seen = 0
        self._baseline = SeasonalBaseline(settings.half_life)
        uses_trees = self.kind in ("half_space_trees", "combined")
        history = settings.calibration_history
        self._trees = (HalfSpaceTrees(settings.trees, settings.height, settings.mass_window,
                                      seed=service_seed(service, settings.seed))
                       if uses_trees else None)
        self._cal_trees = TailCalibrator(history) if uses_trees else None
        self._alert_on = False
        self._alert_len = 0
        self._calm = 0
        # Sum of (value - prediction) per feature position and prediction, over the open alert.
        self._shift: dict[int, list[float]] = {}
        self._shift_n = 0
        self._last_at = math.nan
        # The tail probabilities of the two windows before this one (after warm-up; 1.0 before
        # there were any), for the two-of-three evidence (:func:`models.calibration.pair_tail`).
        self._p_before = 1.0
        self._p_earlier = 1.0
        # The first window of the open alert: positions and their (z, drift), for the tails.
        self._lesson: list[tuple[int, float, float]] = []
        # (trees, names, level slots, change slots): the tree-vector positions of the features of the last
        # window, for those trees (a cache, rebuilt when the names or the trees change; not part of the state).
        self._tree_layout: tuple | None = None
        # (baseline, names, positions) of the last window's features (a cache of locate, likewise).
        self._known: tuple | None = None

    def __repr__(self) -> str:
        return (f"ServiceModel(service={self.service!r}, kind={self.kind!r}, "
                f"windows_seen={self.windows_seen})")

    @property
    def alerting(self) -> bool:
        """Whether an alert is open after the last window."""
        return self._alert_on

    # ------------------------------------------------------------------ scoring
    def assess(self, features: dict[str, float], at: float | None = None,
               steady: Mapping[str, bool] | None = None) -> Assessment:
        """Score this window's features, update the alert state, then learn (unless alerting).

        Call it exactly once per closed window, in time order. ``features`` is not modified;
        non-finite values are treated as missing; feature order does not matter. ``at`` is the
        window start in seconds since the Unix epoch (UTC), or None when unknown. ``steady``
        (optional) maps a feature whose metric was seen at least twice in the window to whether
        it held one value throughout (as :func:`service.windows.window_features` reports it); it
        sharpens the stuck-value evidence (:func:`models.seasonal.repeats`).
        """
        names, values = split_features(features)
        held_through = None if not steady else [steady.get(name) for name in names]
        if at is not None:
            at = float(at)
            if not math.isfinite(at):
                raise SettingsError(f"at must be a finite epoch time, got {at!r}")
        baseline = self._baseline
        if at is not None:
            if not math.isnan(self._last_at):
                baseline.observe_step(at - self._last_at)
            self._last_at = at
        known = self._known
        if known is not None and known[0] is baseline and known[1] == names:
            idx = known[2]  # the same features as the last window: the same positions
        else:
            idx = baseline.locate(names, add=True)
            self._known = (baseline, names, idx)
        evidence = baseline.compare(idx, values, at, held_through)
        summary = None
        if _c_summarise is not None and type(names) is list:
            summary = _c_summarise(evidence, names, MAX_CONTRIBUTORS)  # None where a p or a z is NaN
        # The smallest tail probability among the scorable features (the first smallest, as ``min``
        # picks it; 1.0 if none), their count, and the contributors' positions, in one pass.
        p_min, scorable, order = self._summarise(names, evidence) if summary is None else summary
        if _c_contributions is not None and type(names) is list and type(values) is list:
            contributors = _c_contributions(Contribution, names, values, evidence, order)
        else:
            contributors = [Contribution(names[i], values[i], evidence[i].expected, evidence[i].z) for i in order]

        p = 1.0
        raw = 0.0
        path = None
        ready_t = False
        tree_raw = None  # the trees' score of this window, once computed (learning reuses it)
        kind = self.kind
        if kind == "combined":
            # No scorable feature is no evidence (p = 1), not certainty: ``0 * p_min`` would read as
            # a score of 1.0 on a service's first windows and on a window of metrics never seen before.
            p = min(1.0, scorable * p_min) if scorable else 1.0
            raw = tail_deviate(0.5 * p_min)
            path = self._tree_path(names, evidence)
            if path is not None:
                ready_t = self._trees.ready
                if ready_t and scorable >= _JOINT_MIN_FEATURES:
                    # The trees see the metrics jointly; they may open an alert only where there are
                    # enough metrics for a joint pattern to exist (Bonferroni over the two scorers).
                    tree_raw = self._trees._score_path(path)
                    p_t = self._cal_trees.p_value(tree_raw)
                    p = min(1.0, 2.0 * min(p, p_t))
        elif self._trees is None:
            # Baseline kinds: each feature's own tail probability, Bonferroni-corrected for the
            # number of features compared (the window is as rare as its rarest feature, times
            # the number of chances it had to be that rare); none scorable: no evidence.
            p = min(1.0, scorable * p_min) if scorable else 1.0
            raw = tail_deviate(0.5 * p_min)
        else:
            path = self._tree_path(names, evidence)
            if path is not None:
                ready_t = self._trees.ready
                raw = self._trees._score_path(path)
                if ready_t:
                    p = self._cal_trees.p_value(raw)
        warming_up = self.windows_seen < self.settings.warm_up
        if not warming_up:
            # Two of the last three windows rare together are evidence that neither is alone (a
            # slow rise, a drop that wobbles). The window keeps its own p in the history; the
            # score takes the smaller of the two.
            p_own = p
            p_pair = pair_tail(p, self._p_before, self._p_earlier)
            if p_pair < p:
                p = p_pair
            self._p_earlier, self._p_before = self._p_before, p_own
        score = surprise_score(p)
        self.windows_seen += 1
        anomalous = self._decide(score, warming_up, idx, values, at)

        learn = not self._alert_on
        if anomalous and self._alert_len == 1:
            # The first window of an alert counts once in the features' tails: how often a
            # feature produces alert-sized deviations is what makes a routine one unsurprising.
            # It is counted when the alert ends: taught at once, one 17-sigma window made the
            # same incident's 11-sigma windows look routine (p about 4e-4), so they no longer
            # kept the alert open and it flapped.
            self._lesson = [(i, e.z, e.drift) for i, e in zip(idx, evidence)
                            if e.scorable and not e.held]
            # The run of deviations that opened the alert is spent: after the alert the drift
            # starts again from nothing, so one incident does not reopen as a "drift".
            baseline.reset_drift()
        if learn and self._lesson:
            lesson, self._lesson = self._lesson, []
            baseline.learn_tail([i for i, _, _ in lesson],
                                [Evidence(math.nan, z, 0.0, 0.0, True, drift=d) for _, z, d in lesson])
        baseline.update(idx, values, at, learn=learn, evidence=evidence, steady=held_through)
        if learn and path is not None:
            if ready_t:
                # Nothing between scoring and here changes the trees: a score already taken is
                # this window's score.
                if self.kind != "combined":
                    tree_raw = raw
                elif tree_raw is None:
                    tree_raw = self._trees._score_path(path)
                self._cal_trees.learn(tree_raw)
            self._trees._learn_path(path)
        return Assessment(score, raw, anomalous, warming_up, contributors)

    def _decide(self, score: float, warming_up: bool, idx: list[int], values: list[float],
                at: float | None) -> bool:
        s = self.settings
        if not self._alert_on:
            if warming_up or score < s.threshold:
                return False
            self._alert_on, self._alert_len, self._calm = True, 0, 0
            self._shift, self._shift_n = {}, 0
        else:
            self._calm = 0 if score >= min(s.exit_level, s.threshold) else self._calm + 1
            if self._calm >= s.calm_windows:
                self._alert_on = False
                return False
        self._alert_len += 1
        shift = self._shift
        for i, r in zip(idx, self._baseline.residuals(idx, values, at)):
            acc = shift.get(i)
            if acc is None:
                shift[i] = list(r)
            else:
                acc[0] += r[0]
                acc[1] += r[1]
                acc[2] += r[2]
        self._shift_n += 1
        if self._alert_len >= s.adapt_after:
            # A persistent shift: predict the level seen during the alert from now on.
            n = self._shift_n
            positions = sorted(shift)
            self._baseline.shift(positions, [tuple(v / n for v in shift[i]) for i in positions])
            # The windows before were judged against the old level: they are no evidence now.
            self._p_before = self._p_earlier = 1.0
            self._alert_on = False
            self._shift, self._shift_n = {}, 0
            return False
        return True

    def _tree_path(self, names: list[str], evidence: list[Evidence]) -> np.ndarray | None:
        trees = self._trees
        if trees.features is None:
            if not names:
                return None  # nothing to build the trees on yet
            trees.build([f"{n}|{part}" for n in names for part in _TREE_PARTS])
        layout = self._tree_layout
        if layout is None or layout[0] is not trees or layout[1] != names:
            # A service's windows nearly always carry the same features: their slots are looked up once.
            index = trees.feature_index
            level, change = [], []
            for name in names:
                i = index.get(f"{name}|level")
                level.append(-1 if i is None else i)
                change.append(-1 if i is None else index[f"{name}|change"])
            layout = self._tree_layout = (trees, names, level, change)
        # Each feature's level and change, squashed as _squash does (missing -> 0.5, the prediction itself).
        return trees._squashed_path(evidence, layout[2], layout[3], SQUASH_Z)

    @staticmethod
    def _summarise(names: list[str], evidence: list[Evidence]) -> tuple[float, int, list[int]]:
        """``(p_min, scorable, order)`` of :meth:`assess`: the Python form of the C ``summarise``.

        The smallest ``p`` of the scorable evidence (1.0 if none), how many are scorable, and the
        positions of the contributors: rarest first (each feature's own tail probability), then the
        strongest evidence; the name breaks ties so the list never depends on input order.
        ``Evidence.strength`` is computed once per feature here (the same ``max(|z|, stuck)``).
        """
        p_min = 1.0
        scorable = 0
        order = []
        keys = {}
        for i, e in enumerate(evidence):
            if e.scorable:
                pe = e.p
                if scorable == 0 or pe < p_min:
                    p_min = pe
                scorable += 1
                strength = max(abs(e.z), e.stuck)
                if strength > 0.0:
                    order.append(i)
                    keys[i] = (pe, -strength, names[i])
        order.sort(key=keys.__getitem__)
        return p_min, scorable, order[:MAX_CONTRIBUTORS]

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict[str, Any]:
        """Plain-dict state (str/int/float/bool/None/list/dict and numpy arrays)."""
        def opt(part: Any) -> Any:
            return None if part is None else part.to_state()

        positions = sorted(self._shift)
        return {
            "format": _STATE_FORMAT,
            "service": self.service,
            "settings": self.settings.to_dict(),
            "windows_seen": self.windows_seen,
            "baseline": self._baseline.to_state(),
            "trees": opt(self._trees),
            "calibration": {"trees": opt(self._cal_trees)},
            "alert": {
                "on": self._alert_on,
                "length": self._alert_len,
                "calm": self._calm,
                "shift_n": self._shift_n,
                "shift_at": np.array(positions, dtype=np.int64),
                "shift": np.array([self._shift[i] for i in positions],
                                  dtype=np.float64).reshape(len(positions), 3),
                "last_at": np.array([self._last_at], dtype=np.float64),
                "recent_p": np.array([self._p_earlier, self._p_before], dtype=np.float64),
                "lesson_at": np.array([i for i, _, _ in self._lesson], dtype=np.int64),
                "lesson": np.array([(z, d) for _, z, d in self._lesson],
                                   dtype=np.float64).reshape(len(self._lesson), 2),
            },
        }

    @classmethod
    def from_state(cls, state: dict) -> ServiceModel:
        """Rebuild a model from :meth:`to_state` output.

        Raises
        ------
        CorruptState
            The state is malformed or inconsistent with its own settings.
        """
        try:
            fmt = state["format"]
            if isinstance(fmt, bool) or fmt not in _READABLE_FORMATS:
                raise CorruptState(f"unknown model state format {fmt!r}")
            settings = ModelSettings.from_dict(state["settings"])
            model = cls(state["service"], settings)
            windows_seen = state["windows_seen"]
            if isinstance(windows_seen, bool) or not isinstance(windows_seen, int) or windows_seen < 0:
                raise CorruptState(f"windows_seen must be an int >= 0, got {windows_seen!r}")
            model.windows_seen = windows_seen
            model._baseline = cls._restore(SeasonalBaseline, state["baseline"], model._baseline,
                                           upgrade=fmt < _STATE_FORMAT)
            model._trees = cls._restore(HalfSpaceTrees, state["trees"], model._trees)
            model._cal_trees = cls._restore(TailCalibrator, state["calibration"]["trees"],
                                            model._cal_trees)
            alert = state["alert"]
            on, length, calm, shift_n = alert["on"], alert["length"], alert["calm"], alert["shift_n"]
            if not isinstance(on, bool) or any(isinstance(v, bool) or not isinstance(v, int) or v < 0
                                               for v in (length, calm, shift_n)):
                raise CorruptState("alert state must be a bool and three counts >= 0")
            at, shift, last_at = alert["shift_at"], alert["shift"], alert["last_at"]
            n_features = len(model._baseline.features)
            if (not isinstance(at, np.ndarray) or at.dtype != np.int64 or at.ndim != 1
                    or not isinstance(shift, np.ndarray) or shift.dtype != np.float64
                    or shift.shape != (at.size, 3) or not np.isfinite(shift).all()
                    or (at.size and (at.min() < 0 or at.max() >= n_features))
                    or not isinstance(last_at, np.ndarray) or last_at.shape != (1,)
                    or last_at.dtype != np.float64):
                raise CorruptState("malformed alert shift arrays")
            model._alert_on, model._alert_len, model._calm = on, length, calm
            model._shift = {int(i): row for i, row in zip(at.tolist(), shift.tolist())}
            model._shift_n = shift_n
            model._last_at = float(last_at[0])
            if fmt >= 6:
                recent = alert["recent_p"]
                if (not isinstance(recent, np.ndarray) or recent.dtype != np.float64
                        or recent.shape != (2,) or not ((recent >= 0.0) & (recent <= 1.0)).all()):
                    raise CorruptState("recent_p must be two tail probabilities in [0, 1]")
                model._p_earlier, model._p_before = float(recent[0]), float(recent[1])
                lesson_at, lesson = alert["lesson_at"], alert["lesson"]
                if (not isinstance(lesson_at, np.ndarray) or lesson_at.dtype != np.int64
                        or lesson_at.ndim != 1 or not isinstance(lesson, np.ndarray)
                        or lesson.dtype != np.float64 or lesson.shape != (lesson_at.size, 2)
                        or not np.isfinite(lesson).all()
                        or (lesson_at.size and (lesson_at.min() < 0 or lesson_at.max() >= n_features))):
                    raise CorruptState("malformed alert lesson arrays")
                model._lesson = [(int(i), float(z), float(d))
                                 for i, (z, d) in zip(lesson_at.tolist(), lesson.tolist())]
        except StateError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            # SettingsError is a ValueError: a state whose settings do not validate is corrupt.
            raise CorruptState(f"malformed model state: {exc!r}") from exc
        return model

    @staticmethod
    def _restore(kind: type, part: Any, fresh: Any, upgrade: bool = False) -> Any:
        """Restore one component and check it matches what the settings would build."""
        if (part is None) != (fresh is None):
            raise CorruptState(f"{kind.__name__} state does not match the model kind")
        if part is None:
            return None
        if not isinstance(part, Mapping):
            raise CorruptState(f"{kind.__name__} state must be a mapping")
        restored = kind.from_state(part, upgrade=True) if upgrade else kind.from_state(part)
        if kind is SeasonalBaseline:
            same = restored.half_life == fresh.half_life
        elif kind is HalfSpaceTrees:
            same = ((restored.n_trees, restored.height, restored.window_size, restored.seed,
                     restored.split)
                    == (fresh.n_trees, fresh.height, fresh.window_size, fresh.seed, fresh.split))
        else:
            same = restored.capacity == fresh.capacity
        if not same:
            raise CorruptState(f"{kind.__name__} state disagrees with the model settings")
        return restored


def build_model(service: str, settings: ModelSettings) -> ServiceModel:
    """A fresh model for ``service``.

    >>> build_model("search", ModelSettings()).kind
    'combined'
    """
    return ServiceModel(service, settings)
