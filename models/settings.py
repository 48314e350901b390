"""Settings shared by every per-service model.

Examples
--------
>>> from models.settings import ModelSettings
>>> ModelSettings().kind
'combined'
>>> ModelSettings(kind="adaptive_baseline", warm_up=10).warm_up
10
>>> ModelSettings(threshold=1.5)
Traceback (most recent call last):
...
models.errors.SettingsError: threshold must be in (0, 1], got 1.5
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any

from models.errors import SettingsError

__all__ = ["MODEL_KINDS", "ModelSettings"]

#: Names accepted by ``ModelSettings.kind``.
MODEL_KINDS: tuple[str, ...] = ("half_space_trees", "adaptive_baseline", "combined")

# Beyond this height a single tree holds 2**17 - 1 nodes per window buffer; the per-service state
# would no longer be small, which is the point of the array layout.
_MAX_HEIGHT = 16


def _check_int(name: str, value: Any, low: int, high: int | None = None) -> None:
    # bool is a subclass of int; ``trees=True`` is a mistake, not a count.
    if isinstance(value, bool) or not isinstance(value, int):
        raise SettingsError(f"{name} must be an integer, got {value!r}")
    if value < low or (high is not None and value > high):
        bound = f">= {low}" if high is None else f"in [{low}, {high}]"
        raise SettingsError(f"{name} must be {bound}, got {value}")


def _check_real(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SettingsError(f"{name} must be a number, got {value!r}")
    value = float(value)
    if not math.isfinite(value):
        raise SettingsError(f"{name} must be finite, got {value}")
    return value


@dataclass(frozen=True, slots=True)
class ModelSettings:
    """How a service's model is built.

    Parameters
    ----------
    kind
        ``"half_space_trees"``, ``"adaptive_baseline"`` or ``"combined"`` (both, see
        :func:`models.build_model`).
    threshold
        Calibrated score at or above which a warmed-up window opens an alert, in (0, 1]; the
        score is ``1 - sqrt(p)`` for the window's tail probability ``p``, so 0.99 is ``p <= 1e-4``.
    warm_up
        Number of windows that are learned before any window can be flagged.
    trees, height, mass_window
        Half-space trees: number of trees, depth of each tree and the number of windows per
        reference-mass window ("window size" in Tan, Ting & Liu 2011).
    half_life
        Half-life, in windows, of the exponentially weighted baseline; the smoothing factor is
        ``alpha = 1 - 0.5 ** (1 / half_life)``.
    calibration_history
        Number of past raw scores kept per service to calibrate new ones.
    seed
        Non-negative integer combined with a stable hash of the service name.
    exit_level
        Alert hysteresis: once alerting, a window scoring at least ``min(exit_level,
        threshold)`` is not calm; in (0, 1]. The default 0.99 (the default threshold) keeps an
        alert open exactly while the evidence that opens one is still there. The hysteresis
        comes from that evidence itself: a window's score includes "two of the last three windows
        rare" (:func:`models.calibration.pair_tail`), so once an alert-sized window has been seen
        the next one keeps the alert open at a tail probability of about 1.8e-3 (score 0.957),
        18 times likelier than the entry level. With the score alone, before that evidence, the
        default was 0.95: a level below the threshold was the only way to hold a wobbling
        incident, and it held every moderately off window of a frozen model for ``adapt_after``
        windows (with the two-of-three evidence and 0.95, the NAB development slice's emitted
        score fell from 55.2 to 44.5).
    calm_windows
        Alert hysteresis: the alert clears at the ``calm_windows``-th calm window in a row, so
        every alert lasts at least that long. The default 1 clears an alert on the first window
        that, with its two predecessors, is no longer alert-sized evidence; a single quiet window
        inside an incident is bridged when the windows around it are rare together. On the NAB
        development slice every flagged row after an anomaly window is charged: 2 gave an
        emitted score of 42.0, 1 gave 55.2 (before the alert's tail lesson moved to its end;
        BENCHMARKS.md), with the same demo detections and one incident of 36 split into two
        onsets.
    adapt_after
        An alert still on after this many windows is taken as a new normal: the baseline moves
        to the level seen during the alert, learning resumes and the alert clears. While an alert
        is on, nothing is learned (an incident must not become the baseline it is measured
        against). The default 36 windows (3 hours of five-minute windows; the same as
        ``warm_up``, the history already deemed enough to learn a service) is longer than a
        typical incident and short enough that a deploy that moved a level does not alert all
        day.
    """

    kind: str = "combined"
    threshold: float = 0.99
    warm_up: int = 36
    trees: int = 10
    height: int = 8
    mass_window: int = 36
    half_life: float = 24.0
    calibration_history: int = 1000
    seed: int = 0
    exit_level: float = 0.99
    calm_windows: int = 1
    adapt_after: int = 36

    def __post_init__(self) -> None:
        if self.kind not in MODEL_KINDS:
            raise SettingsError(f"kind must be one of {', '.join(MODEL_KINDS)}; got {self.kind!r}")
        threshold = _check_real("threshold", self.threshold)
        if not 0.0 < threshold <= 1.0:
            raise SettingsError(f"threshold must be in (0, 1], got {threshold}")
        half_life = _check_real("half_life", self.half_life)
        if half_life <= 0.0:
            raise SettingsError(f"half_life must be > 0 windows, got {half_life}")
        _check_int("warm_up", self.warm_up, 0)
        _check_int("trees", self.trees, 1)
        _check_int("height", self.height, 1, _MAX_HEIGHT)
        _check_int("mass_window", self.mass_window, 1)
        _check_int("calibration_history", self.calibration_history, 1)
        _check_int("seed", self.seed, 0)
        exit_level = _check_real("exit_level", self.exit_level)
        if not 0.0 < exit_level <= 1.0:
            raise SettingsError(f"exit_level must be in (0, 1], got {exit_level}")
        _check_int("calm_windows", self.calm_windows, 1)
        _check_int("adapt_after", self.adapt_after, 1)
        object.__setattr__(self, "exit_level", exit_level)
        # Store the real-valued fields as float so a saved state reads back identically.
        object.__setattr__(self, "threshold", threshold)
        object.__setattr__(self, "half_life", half_life)

    @property
    def alpha(self) -> float:
        """Smoothing factor of the baseline EWMA implied by ``half_life``.

        >>> round(ModelSettings(half_life=1.0).alpha, 3)
        0.5
        """
        return 1.0 - 0.5 ** (1.0 / self.half_life)

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form, used in saved states.

        >>> ModelSettings().to_dict()["trees"]
        10
        """
        # Every field is a plain str/int/float: a flat copy, not ``asdict``'s recursive deep copy.
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ModelSettings:
        """Inverse of :meth:`to_dict`; unknown keys are refused.

        >>> ModelSettings.from_dict({"kind": "adaptive_baseline"}).kind
        'adaptive_baseline'
        >>> ModelSettings.from_dict({"colour": "red"})
        Traceback (most recent call last):
        ...
        models.errors.SettingsError: unknown setting(s): colour
        """
        if not isinstance(data, dict):
            raise SettingsError(f"settings must be a mapping, got {type(data).__name__}")
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise SettingsError(f"unknown setting(s): {', '.join(map(str, unknown))}")
        return cls(**data)
