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

from models.base import PURE_PYTHON
from models.errors import CorruptState, ModelError, SettingsError

try:
    # EmpiricalCalibrator.learn's two searches and moves as one C call (models/_hstcore.c, beside the trees whose
    # scores it calibrates): the same arrays bit for bit; absent without a C compiler at install, off with
    # TIDEWATCH_PURE_PYTHON=1.
    from models._hstcore import history_learn as _c_history_learn
    # TailCalibrator.p_value where it is a rank (the bulk of the history), the same value; beyond the tail level
    # it answers None and the Python code fits the tail.
    from models._hstcore import tail_rank as _c_tail_rank
except ImportError:  # pragma: no cover - depends on the install
    _c_history_learn = _c_tail_rank = None
if PURE_PYTHON:
    _c_history_learn = _c_tail_rank = None

__all__ = ["PAIR_DEPENDENCE", "SCORE_POWER", "EmpiricalCalibrator", "TailCalibrator", "pair_tail",
           "surprise_score"]


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
        if _c_history_learn is not None:
            self._size, self._head = _c_history_learn(self._sorted, self._ring, self._size, self._head, raw)
            return
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


#: The calibrated score is ``1 - p ** SCORE_POWER`` for a tail probability ``p``. With 1/2 the
#: default threshold 0.99 means ``p <= 1e-4``: at five-minute windows (2016 a week) about one
#: chance alert onset every five weeks per service, which is what "rarely cries wolf" needs; 0.9
#: means ``p = 0.01``. The score keeps ranking far into the tail (it reaches 1 only below
#: ``p = 1e-12`` at six decimals), so a threshold sweep still sees an order.
SCORE_POWER = 0.5
#: Share of the history used as the tail, and the fewest tail values the fit uses.
TAIL_SHARE = 0.1
TAIL_MIN = 10
#: Below this many remembered raw scores nothing is surprising (``p = 1``).
MIN_HISTORY = 20


def surprise_score(p: float) -> float:
    """Calibrated score of a tail probability: ``1 - p ** SCORE_POWER``, in [0, 1].

    >>> surprise_score(1.0), surprise_score(0.01), surprise_score(1e-4), surprise_score(0.0)
    (0.0, 0.9, 0.99, 1.0)
    """
    if p <= 0.0:
        return 1.0
    return max(0.0, 1.0 - min(1.0, p) ** SCORE_POWER)


#: Allowance for the dependence of neighbouring windows in :func:`pair_tail`. Under independence
#: two of three windows each at tail probability ``x`` happen with chance ``3x^2 - 2x^3``; a
#: service's windows are not independent (a noisy hour makes several of them moderately rare), so
#: that chance understates how often it happens without an incident. The factor is a measured
#: allowance, not a derived one: on the demo fleet (12 services, 3 seeds, one week each) 5 gave
#: 13 / 8 / 10 false onsets (13 is over one per service-week), 10 gave 10 / 8 / 9 and 20 gave
#: 10 / 8 / 8 while catching fewer NAB windows (emitted standard score 50.6 against 55.2 at 10;
#: measured before the alert's tail lesson moved to its end, see BENCHMARKS.md).
#: With 10, two of three windows open an alert at the default threshold when each is rarer than
#: about 1.8e-3 (score 0.957): the run rules of control charts ("two of three points beyond two
#: sigma", Western Electric Statistical Quality Control Handbook, 1956) with a much stricter
#: point limit, as a page needs.
PAIR_DEPENDENCE = 10.0


def pair_tail(p_now: float, p_before: float, p_earlier: float) -> float:
    """Tail probability of "two of the last three windows this rare", or 1.0 if ``p_now`` is not one of them.

    ``x`` is the second smallest of the three windows' tail probabilities. If ``p_now`` is at most
    ``x`` (this window is one of the two rarest), the chance that at least two of three
    independent uniform tail probabilities are at most ``x`` is ``3x^2 - 2x^3`` -- the binomial
    upper tail ``P(Bin(3, x) >= 2)``, which is also Wilkinson's (1951) combination of the second
    smallest of three p-values, ``Beta(2, 2).cdf(x)``. It is multiplied by
    :data:`PAIR_DEPENDENCE` and capped at 1. Requiring ``p_now`` among the two rarest makes the
    evidence arrive with the window that completes it, never from two old windows alone.

    >>> round(pair_tail(1e-3, 1e-3, 0.5), 12)  # two windows at 1e-3: 10 * (3e-6 - 2e-9)
    2.998e-05
    >>> pair_tail(0.5, 1e-3, 1e-3)  # this window is calm: the old pair is not new evidence
    1.0
    >>> pair_tail(1e-6, 0.4, 0.6)   # one rare window alone is judged by its own p, not here
    1.0
    """
    # The second smallest of three, and whether p_now is at most it, without sorting.
    if p_before <= p_earlier:
        low, high = p_before, p_earlier
    else:
        low, high = p_earlier, p_before
    x = low if p_now <= low else (p_now if p_now <= high else high)
    if p_now > x:
        return 1.0
    tail = PAIR_DEPENDENCE * x * x * (3.0 - 2.0 * x)
    return tail if tail < 1.0 else 1.0


class TailCalibrator:
    """Tail probability of a raw score among the service's own recent raw scores.

    Inside the bulk of the history the probability is empirical, ``(#{h >= raw} + 1) / (n + 1)``
    (the window itself counted, so it is never 0). Beyond the top ``TAIL_SHARE`` of the history
    (at least ``TAIL_MIN`` values) it is extrapolated with an exponential tail fitted to the
    excesses over that level -- the peaks-over-threshold method with shape 0, i.e. an
    extreme-value tail (Pickands 1975; Balkema & de Haan 1974; from memory):
    ``p = (k + 1) / (n + 1) * exp(-(raw - u) / beta)`` with ``beta`` the mean excess. A rank
    alone cannot say anything below ``1 / n``; the tail fit can, which is what a base rate of one
    alert in thousands of windows needs.

    Parameters
    ----------
    capacity
        Number of most recent raw scores remembered.

    Examples
    --------
    >>> cal = TailCalibrator(capacity=1000)
    >>> for i in range(500):
    ...     cal.learn(float(i % 50) / 10.0)      # raw scores spread over [0, 4.9]
    >>> round(cal.p_value(2.0), 3), cal.p_value(4.9) > cal.p_value(7.0), cal.p_value(7.0) < 1e-3
    (0.601, True, True)
    """

    __slots__ = ("_cal",)

    def __init__(self, capacity: int = 1000) -> None:
        self._cal = EmpiricalCalibrator(capacity)

    @property
    def capacity(self) -> int:
        return self._cal.capacity

    def __len__(self) -> int:
        return len(self._cal)

    @property
    def history(self) -> np.ndarray:
        """Remembered raw scores, oldest first (a copy)."""
        return self._cal.history

    def p_value(self, raw: float) -> float:
        """Estimated chance of a raw score at least this high; 1.0 for a short history."""
        raw = float(raw)
        if math.isnan(raw):
            raise ModelError("cannot calibrate a NaN raw score")
        cal = self._cal
        n = cal._size
        if _c_tail_rank is not None:
            p = _c_tail_rank(cal._sorted, n, raw, MIN_HISTORY, TAIL_MIN, TAIL_SHARE)
            if p is not None:
                return p
        if n < MIN_HISTORY:
            return 1.0
        s = cal._sorted[:n]
        k = min(n - 1, max(TAIL_MIN, int(TAIL_SHARE * n)))
        u = float(s[n - k - 1])
        if raw <= u:
            above = n - int(np.searchsorted(s, raw, side="left"))
            return (above + 1) / (n + 1)
        beta = float(s[n - k:].mean()) - u
        # A tail of ties has no spread; a small floor keeps "just above the ties" from being
        # infinitely surprising.
        beta = max(beta, 0.02 * abs(u), 1e-9)
        return (k + 1) / (n + 1) * math.exp(-(raw - u) / beta)

    def learn(self, raw: float) -> None:
        """Add ``raw`` to the history, evicting the oldest value once full."""
        self._cal.learn(raw)

    def to_state(self) -> dict[str, Any]:
        """Plain-dict state: the capacity and the history, oldest first."""
        return self._cal.to_state()

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> TailCalibrator:
        """Rebuild from :meth:`to_state` output; malformed states raise ``CorruptState``."""
        out = cls.__new__(cls)
        out._cal = EmpiricalCalibrator.from_state(state)
        return out
