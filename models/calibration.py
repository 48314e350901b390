"""Per-service calibration of raw scores into [0, 1].

A raw score (standard deviations, half-space-tree mass, ...) means little across services; its
rank among the service's own recent raw scores does. The calibrated score of ``raw`` is

    score(raw) = #{h in history : h < raw} / len(history)

over the last ``capacity`` raw scores -- the empirical CDF evaluated *strictly* below ``raw``.
Ties therefore count as not exceeded: a service that always produces the same raw score gets a
calibrated score of 0, never an alarm, and a score of 1.0 means "higher than every remembered
raw score". With an empty history the score is 0.0. The window being scored is added to the
history only after it has been scored, so it is never compared with itself.

The history is a ring buffer (oldest value is the next to go) plus a sorted copy, so scoring is a
binary search and an update is one removal and one insertion into a sorted array of at most
``capacity`` floats.

Examples
--------
>>> from models.calibration import EmpiricalCalibrator
>>> cal = EmpiricalCalibrator(capacity=4)
>>> [cal.score_learn(raw) for raw in [3.0, 1.0, 2.0, 2.0, 5.0, 2.0]]
[0.0, 0.0, 0.5, 0.3333333333333333, 1.0, 0.25]
>>> cal.history.tolist()  # the oldest two (3.0, 1.0) have left the ring
[2.0, 2.0, 5.0, 2.0]
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from models.errors import CorruptState, ModelError, SettingsError

__all__ = ["EmpiricalCalibrator"]


class EmpiricalCalibrator:
    """Empirical-CDF calibration over a bounded history of raw scores.

    Parameters
    ----------
    capacity
        Number of most recent raw scores remembered.
    """

    __slots__ = ("capacity", "_ring", "_sorted", "_size", "_head")

    def __init__(self, capacity: int = 1000) -> None:
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise SettingsError(f"capacity must be an integer >= 1, got {capacity!r}")
        self.capacity = capacity
        self._ring = np.zeros(capacity, dtype=np.float64)
        self._sorted = np.zeros(capacity, dtype=np.float64)
        self._size = 0
        self._head = 0  # next slot to write; when full, also the oldest value

    def __len__(self) -> int:
        return self._size

    @property
    def history(self) -> np.ndarray:
        """Remembered raw scores, oldest first (a copy)."""
        if self._size < self.capacity:
            return self._ring[: self._size].copy()
        return np.concatenate([self._ring[self._head:], self._ring[: self._head]])

    def score(self, raw: float, *, count_self: bool = False) -> float:
        """Fraction of the history strictly below ``raw`` (0.0 for an empty history).

        With ``count_self`` the denominator also counts the window being scored
        (``below / (len + 1)``), so the largest possible value, ``len / (len + 1)``, grows with
        the history. A "new maximum" of a short history then ranks below a new maximum of a long
        one, which matters when calibrated scores are themselves calibrated again (see
        :class:`models.service_model.ServiceModel`).

        >>> cal = EmpiricalCalibrator(10)
        >>> for raw in [1.0, 2.0, 3.0]:
        ...     cal.learn(raw)
        >>> cal.score(2.5), cal.score(9.0), cal.score(9.0, count_self=True)
        (0.6666666666666666, 1.0, 0.75)
        """
        raw = float(raw)
        if math.isnan(raw):
            raise ModelError("cannot calibrate a NaN raw score")
        n = self._size
        if n == 0:
            return 0.0
        below = int(np.searchsorted(self._sorted[:n], raw, side="left"))
        return below / (n + 1) if count_self else below / n

    def learn(self, raw: float) -> None:
        """Add ``raw`` to the history, evicting the oldest value once full."""
        raw = float(raw)
        if math.isnan(raw):
            raise ModelError("cannot add a NaN raw score to the calibration history")
        s, n = self._sorted, self._size
        if n == self.capacity:
            old = self._ring[self._head]
            # Any copy of an equal value is interchangeable, so the leftmost one is removed.
            j = int(np.searchsorted(s[:n], old, side="left"))
            s[j : n - 1] = s[j + 1 : n]
            n -= 1
        pos = int(np.searchsorted(s[:n], raw, side="right"))
        s[pos + 1 : n + 1] = s[pos:n]  # numpy handles the overlapping copy
        s[pos] = raw
        self._size = n + 1
        self._ring[self._head] = raw
        self._head = (self._head + 1) % self.capacity

    def score_learn(self, raw: float, *, count_self: bool = False) -> float:
        """:meth:`score` then :meth:`learn` -- the order used for every window."""
        p = self.score(raw, count_self=count_self)
        self.learn(raw)
        return p

    def to_state(self) -> dict[str, Any]:
        """Plain-dict state: the capacity and the history, oldest first."""
        return {"capacity": self.capacity, "history": self.history}

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> EmpiricalCalibrator:
        """Rebuild from :meth:`to_state` output; malformed states raise ``CorruptState``."""
        try:
            cal = cls(state["capacity"])
            history = state["history"]
        except (KeyError, TypeError, SettingsError) as exc:
            raise CorruptState(f"malformed calibration state: {exc}") from exc
        if (not isinstance(history, np.ndarray) or history.dtype != np.float64
                or history.ndim != 1 or history.size > cal.capacity
                or np.isnan(history).any()):
            raise CorruptState("calibration history must be a 1-d float64 array without NaN, "
                               "no longer than the capacity")
        n = history.size
        cal._ring[:n] = history
        cal._sorted[:n] = np.sort(history)
        cal._size = n
        cal._head = n % cal.capacity
        return cal
