"""One online model per service: score a closed window, decide, then learn from it.

Kinds (``ModelSettings.kind``):

``"adaptive_baseline"``
    raw score = the largest predictive deviation of the window's features from an exponentially
    weighted baseline, on the normal scale (:class:`~models.baseline.AdaptiveBaseline`; close to
    the largest ``|z|`` once the baseline has a few dozen windows).
``"half_space_trees"``
    every feature is squashed into [0, 1] as ``0.5 + 0.5 * tanh(z / 3)``, with ``z`` the
    predictive deviation from a *slow* baseline (half-life ``4 * half_life``), so a level that drifts stays inside
    the trees' fixed range while a jump lands near 0 or 1; raw score = the half-space-trees score
    (:class:`~models.hst.HalfSpaceTrees`). The trees' feature set is the first window's; a feature
    first seen later only reaches the baseline and the contributors, and a tree feature missing
    from a window is imputed with the slow baseline's mean (``z = 0``, i.e. 0.5).
``"combined"`` (default)
    both of the above; each raw score is calibrated on its own history, the combined raw score is
    the larger of the two calibrated scores, and that is calibrated again so the final score is
    uniform on the service's own history. The two inner calibrations divide by ``history + 1``
    (see :meth:`~models.calibration.EmpiricalCalibrator.score`): with the plain fraction, every
    "new maximum" of the short early histories would be exactly 1.0, those 1.0s would stay in the
    outer history for ``calibration_history`` windows, and a later, genuine maximum could never
    rank above them (on synthetic streams this hid most incidents of a model's first
    ``calibration_history`` windows).

Every kind keeps the baseline for the contributors: each feature's observed value, the
baseline mean *before* this window and the signed z-score, most deviating first.

The output score is the fraction of the service's past raw scores (last ``calibration_history``)
strictly below this window's raw score, computed before the window joins the history. A component
contributes nothing (and its history does not grow) until it can score: the baseline once a
feature has been seen twice, the trees once their first mass window is complete.

During the first ``warm_up`` windows a score is still produced but ``warming_up`` is true and the
window is never anomalous.

Randomness comes only from the trees' seed, ``zlib.crc32(service) ^ settings.seed``, so the same
service, settings and inputs give the same scores in any process (Python's ``hash()`` is salted).

Examples
--------
>>> from models import ModelSettings, build_model
>>> model = build_model("checkout-api", ModelSettings(kind="adaptive_baseline", warm_up=20))
>>> for i in range(60):
...     result = model.assess({"latency_p95_ms.mean": 200.0 + (i % 5), "count": 12.0 + i % 3})
>>> result.warming_up, result.anomalous
(False, False)
>>> result = model.assess({"latency_p95_ms.mean": 450.0, "count": 13.0})
>>> result.anomalous, result.score
(True, 1.0)
>>> top = result.contributors[0]
>>> top.feature, top.observed, round(top.expected, 1), round(top.deviation, 1)
('latency_p95_ms.mean', 450.0, 202.1, 173.6)
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from models.base import split_features
from models.baseline import AdaptiveBaseline
from models.calibration import EmpiricalCalibrator
from models.errors import CorruptState, SettingsError, StateError
from models.hst import HalfSpaceTrees
from models.settings import MODEL_KINDS, ModelSettings

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
#: The scaling baseline of the trees forgets this many times more slowly than the main one, so
#: that a shift lasting a few mass windows still looks unusual to the trees.
SLOW_FACTOR = 4.0
#: ``z`` at which the squashed value is 0.5 ± 0.38 (tanh(1) / 2); three standard deviations
#: use most of the unit range without flattening moderate deviations.
SQUASH_Z = 3.0

_STATE_FORMAT = 1


@dataclass(slots=True)
class Contribution:
    """How far one feature of a window is from the service's baseline."""

    feature: str
    observed: float
    expected: float
    deviation: float  #: signed z-score against the baseline before this window


@dataclass(slots=True)
class Assessment:
    """Outcome of :meth:`ServiceModel.assess` for one window."""

    score: float  #: calibrated, in [0, 1]
    raw: float  #: the model's raw score (higher = more unusual)
    anomalous: bool  #: ``score >= threshold`` and not warming up
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


class ServiceModel:
    """The online model of one service (see the module docstring).

    Build it with :func:`build_model`; restore it with :meth:`from_state`.
    """

    __slots__ = ("service", "settings", "kind", "windows_seen", "_baseline", "_scaler",
                 "_trees", "_cal_baseline", "_cal_trees", "_cal_combined")

    def __init__(self, service: str, settings: ModelSettings) -> None:
        if not isinstance(service, str) or not service:
            raise SettingsError(f"service must be a non-empty string, got {service!r}")
        if not isinstance(settings, ModelSettings):
            raise SettingsError(f"settings must be ModelSettings, got {type(settings).__name__}")
        self.service = service
        self.settings = settings
        self.kind = settings.kind
        self.windows_seen = 0
        self._baseline = AdaptiveBaseline(settings.half_life)
        uses_baseline = self.kind in ("adaptive_baseline", "combined")
        uses_trees = self.kind in ("half_space_trees", "combined")
        history = settings.calibration_history
        self._cal_baseline = EmpiricalCalibrator(history) if uses_baseline else None
        self._scaler = AdaptiveBaseline(SLOW_FACTOR * settings.half_life) if uses_trees else None
        self._trees = (HalfSpaceTrees(settings.trees, settings.height, settings.mass_window,
                                      seed=service_seed(service, settings.seed))
                       if uses_trees else None)
        self._cal_trees = EmpiricalCalibrator(history) if uses_trees else None
        self._cal_combined = EmpiricalCalibrator(history) if self.kind == "combined" else None

    def __repr__(self) -> str:
        return (f"ServiceModel(service={self.service!r}, kind={self.kind!r}, "
                f"windows_seen={self.windows_seen})")

    # ------------------------------------------------------------------ scoring
    def assess(self, features: dict[str, float]) -> Assessment:
        """Score this window's features, decide anomalous, then learn from them.

        Call it exactly once per closed window. ``features`` is not modified; non-finite values
        are treated as missing; feature order does not matter.
        """
        names, values = split_features(features)
        baseline = self._baseline
        idx = baseline.locate(names, add=True)
        expected, z, tail, scorable = baseline.compare(idx, values)
        contributors = self._contributors(names, values, expected, z, scorable)

        baseline_part = trees_part = None  # (raw, ready)
        if self._cal_baseline is not None:
            baseline_part = (max(map(abs, tail), default=0.0), any(scorable))
        if self._trees is not None:
            trees_part = self._score_learn_trees(names, values)
        baseline.update(idx, values)

        if self.kind == "adaptive_baseline":
            raw, score = self._calibrate(self._cal_baseline, *baseline_part)
        elif self.kind == "half_space_trees":
            raw, score = self._calibrate(self._cal_trees, *trees_part)
        else:
            _, p_baseline = self._calibrate(self._cal_baseline, *baseline_part, count_self=True)
            _, p_trees = self._calibrate(self._cal_trees, *trees_part, count_self=True)
            ready = baseline_part[1] or trees_part[1]
            raw, score = self._calibrate(self._cal_combined, max(p_baseline, p_trees), ready)

        warming_up = self.windows_seen < self.settings.warm_up
        self.windows_seen += 1
        anomalous = (not warming_up) and score >= self.settings.threshold
        return Assessment(score, raw, anomalous, warming_up, contributors)

    @staticmethod
    def _calibrate(calibrator: EmpiricalCalibrator, raw: float, ready: bool, *,
                   count_self: bool = False) -> tuple[float, float]:
        # A component that cannot score yet says nothing: score 0 and no history entry, so
        # placeholder zeros never dilute the calibration.
        if not ready:
            return raw, 0.0
        return raw, calibrator.score_learn(raw, count_self=count_self)

    def _score_learn_trees(self, names: list[str], values: list[float]) -> tuple[float, bool]:
        trees, scaler = self._trees, self._scaler
        sidx = scaler.locate(names, add=True)
        if trees.features is None:
            if not names:
                return 0.0, False  # nothing to build the trees on yet
            trees.build(names)
        _, _, z, _ = scaler.compare(sidx, values)
        v = np.full(len(trees.features), 0.5)  # missing -> slow-baseline mean -> z = 0
        index = trees.feature_index
        for name, zi in zip(names, z):
            i = index.get(name)
            if i is not None:
                v[i] = 0.5 + 0.5 * math.tanh(zi / SQUASH_Z)
        ready = trees.ready
        raw = trees.score_learn_vector(v)
        scaler.update(sidx, values)
        return raw, ready

    @staticmethod
    def _contributors(names: list[str], values: list[float], expected: list[float],
                      z: list[float], scorable: list[bool]) -> list[Contribution]:
        order = [i for i in range(len(names)) if scorable[i] and z[i] != 0.0]
        # Largest |z| first; the name breaks ties so the list never depends on input order.
        order.sort(key=lambda i: (-abs(z[i]), names[i]))
        return [Contribution(names[i], values[i], expected[i], z[i])
                for i in order[:MAX_CONTRIBUTORS]]

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict[str, Any]:
        """Plain-dict state (str/int/float/bool/None/list/dict and numpy arrays)."""
        def opt(part: Any) -> Any:
            return None if part is None else part.to_state()

        return {
            "format": _STATE_FORMAT,
            "service": self.service,
            "settings": self.settings.to_dict(),
            "windows_seen": self.windows_seen,
            "baseline": self._baseline.to_state(),
            "scaler": opt(self._scaler),
            "trees": opt(self._trees),
            "calibration": {
                "baseline": opt(self._cal_baseline),
                "trees": opt(self._cal_trees),
                "combined": opt(self._cal_combined),
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
            if state["format"] != _STATE_FORMAT:
                raise CorruptState(f"unknown model state format {state['format']!r}")
            settings = ModelSettings.from_dict(state["settings"])
            model = cls(state["service"], settings)
            windows_seen = state["windows_seen"]
            if isinstance(windows_seen, bool) or not isinstance(windows_seen, int) or windows_seen < 0:
                raise CorruptState(f"windows_seen must be an int >= 0, got {windows_seen!r}")
            model.windows_seen = windows_seen
            model._baseline = cls._restore(AdaptiveBaseline, state["baseline"], model._baseline)
            model._scaler = cls._restore(AdaptiveBaseline, state["scaler"], model._scaler)
            model._trees = cls._restore(HalfSpaceTrees, state["trees"], model._trees)
            calibration = state["calibration"]
            for key in ("baseline", "trees", "combined"):
                attr = f"_cal_{key}"
                setattr(model, attr, cls._restore(EmpiricalCalibrator, calibration[key],
                                                  getattr(model, attr)))
        except StateError:
            raise
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            # SettingsError is a ValueError: a state whose settings do not validate is corrupt.
            raise CorruptState(f"malformed model state: {exc!r}") from exc
        return model

    @staticmethod
    def _restore(kind: type, part: Any, fresh: Any) -> Any:
        """Restore one component and check it matches what the settings would build."""
        if (part is None) != (fresh is None):
            raise CorruptState(f"{kind.__name__} state does not match the model kind")
        if part is None:
            return None
        if not isinstance(part, Mapping):
            raise CorruptState(f"{kind.__name__} state must be a mapping")
        restored = kind.from_state(part)
        if kind is AdaptiveBaseline:
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
