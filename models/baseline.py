"""Adaptive baseline: exponentially weighted mean and variance per feature.

The baseline follows slow drift (a service whose latency creeps up over a week is not an incident)
while a sudden departure from the recent level stands out as a large standardised deviation.

Update rule (per feature, smoothing factor ``alpha``), the incremental form of an exponentially
weighted mean and *biased* variance::

    diff = x - mean
    mean = mean + alpha * diff
    var  = (1 - alpha) * (var + alpha * diff ** 2)

started from ``mean = x0, var = 0`` at a feature's first value. ``mean`` equals
``pandas.Series.ewm(alpha=alpha, adjust=False).mean()`` and ``var`` equals
``.var(bias=True)`` with the same arguments. For z-scores the variance is de-biased with the sum
of squared weights ``w2`` (``w2 = (1 - alpha) ** 2 * w2 + alpha ** 2``, starting at 1)::

    unbiased_var = var / (1 - w2)

which equals ``.var(bias=False)`` and, for two values, the ordinary sample variance. Without it the
first dozens of windows would have far too small a spread and every early window would look
extreme.

The raw score of a window is the largest absolute z-score among its features, so it reads in
"standard deviations" and always matches the first contributor of the window.

Examples
--------
>>> from models.baseline import AdaptiveBaseline
>>> baseline = AdaptiveBaseline(half_life=24.0)
>>> for latency in [200.0, 204.0, 198.0, 202.0, 199.0, 201.0]:
...     baseline.learn_one({"latency_ms": latency})
>>> round(baseline.score_one({"latency_ms": 201.0}), 2)
0.55
>>> round(baseline.score_one({"latency_ms": 260.0}), 1)
36.6
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from models.base import split_features
from models.errors import CorruptState, SettingsError

__all__ = ["AdaptiveBaseline", "EwmaChart", "ewma_chart", "alpha_from_half_life"]

# |z| is clipped here so one absurd value cannot turn a score or a contribution into inf/NaN.
Z_LIMIT = 1e6


def alpha_from_half_life(half_life: float) -> float:
    """EWMA smoothing factor whose weights halve every ``half_life`` updates.

    >>> alpha_from_half_life(1.0)
    0.5
    >>> round(alpha_from_half_life(24.0), 5)
    0.02847
    """
    if not (isinstance(half_life, (int, float)) and math.isfinite(half_life) and half_life > 0):
        raise SettingsError(f"half_life must be a finite number > 0, got {half_life!r}")
    return 1.0 - 0.5 ** (1.0 / float(half_life))


class AdaptiveBaseline:
    """Exponentially weighted mean and variance per feature, scored by the largest ``|z|``.

    Parameters
    ----------
    half_life
        Half-life of the weights, in updates (windows).
    absolute_floor, relative_floor
        The standard deviation used in z-scores is at least
        ``absolute_floor + relative_floor * |mean|``. A metric that has been perfectly flat has zero
        variance; the floor keeps its z-score finite (a change of 0.1 % of its level counts as
        one standard deviation with the default ``relative_floor``).

    Notes
    -----
    A feature's z-score is 0 until it has been seen twice (no spread is known yet). Features are
    added when first seen; features absent from a window are left untouched. Feature order in the
    input never matters.

    Examples
    --------
    >>> baseline = AdaptiveBaseline(half_life=2.0)
    >>> for x in [1.0, 2.0, 3.0]:
    ...     baseline.learn_one({"a": x})
    >>> mean, z = baseline.deviation("a", 3.0)
    >>> round(mean, 4), round(z, 4)
    (1.7929, 1.0987)
    """

    __slots__ = ("half_life", "alpha", "absolute_floor", "relative_floor",
                 "_names", "_index", "_mean", "_var", "_w2", "_count")

    def __init__(self, half_life: float = 24.0, *, absolute_floor: float = 1e-9,
                 relative_floor: float = 1e-3) -> None:
        self.alpha = alpha_from_half_life(half_life)
        self.half_life = float(half_life)
        if not (math.isfinite(absolute_floor) and absolute_floor > 0):
            raise SettingsError(f"absolute_floor must be > 0, got {absolute_floor!r}")
        if not (math.isfinite(relative_floor) and relative_floor >= 0):
            raise SettingsError(f"relative_floor must be >= 0, got {relative_floor!r}")
        self.absolute_floor = float(absolute_floor)
        self.relative_floor = float(relative_floor)
        self._names: list[str] = []
        self._index: dict[str, int] = {}
        self._mean = np.zeros(0, dtype=np.float64)
        self._var = np.zeros(0, dtype=np.float64)
        self._w2 = np.zeros(0, dtype=np.float64)
        self._count = np.zeros(0, dtype=np.int64)

    # ------------------------------------------------------------------ array-level API
    @property
    def features(self) -> tuple[str, ...]:
        """Feature names known so far, in the order they were first seen."""
        return tuple(self._names)

    def locate(self, names: Iterable[str], *, add: bool = False) -> np.ndarray:
        """Indices of ``names`` in the internal arrays; -1 for unknown ones unless ``add``.

        New features added here have no observation yet, so their z-score is 0 until learned.
        """
        index = self._index
        new = [n for n in names if n not in index] if add else []
        if new:
            for n in dict.fromkeys(new):  # dedupe, keep order
                index[n] = len(self._names)
                self._names.append(n)
            grow = len(self._names) - self._mean.size
            self._mean = np.concatenate([self._mean, np.zeros(grow)])
            self._var = np.concatenate([self._var, np.zeros(grow)])
            self._w2 = np.concatenate([self._w2, np.ones(grow)])
            self._count = np.concatenate([self._count, np.zeros(grow, dtype=np.int64)])
        return np.fromiter((index.get(n, -1) for n in names), dtype=np.intp)

    def expected(self, idx: np.ndarray) -> np.ndarray:
        """Current means at ``idx`` (NaN for unknown features or features never learned)."""
        known = idx >= 0
        out = np.full(idx.shape, np.nan)
        seen = known.copy()
        seen[known] = self._count[idx[known]] > 0
        out[seen] = self._mean[idx[seen]]
        return out

    def scale(self, idx: np.ndarray) -> np.ndarray:
        """Standard deviation used for z-scores at valid ``idx`` (de-biased, floored)."""
        denom = 1.0 - self._w2[idx]
        var = np.divide(self._var[idx], denom, out=np.zeros(idx.shape), where=denom > 0.0)
        floor = self.absolute_floor + self.relative_floor * np.abs(self._mean[idx])
        return np.maximum(np.sqrt(var), floor)

    def zscores(self, idx: np.ndarray, values: np.ndarray) -> np.ndarray:
        """Signed z-scores of ``values`` against the current baseline (0 where not yet defined)."""
        z = np.zeros(values.shape)
        ok = idx >= 0
        ok[ok] = self._count[idx[ok]] >= 2
        if ok.any():
            i = idx[ok]
            z[ok] = np.clip((values[ok] - self._mean[i]) / self.scale(i), -Z_LIMIT, Z_LIMIT)
        return z

    def update(self, idx: np.ndarray, values: np.ndarray) -> None:
        """Learn ``values`` at valid, distinct ``idx`` (as returned by ``locate(add=True)``)."""
        a = self.alpha
        first = self._count[idx] == 0
        if first.any():
            i = idx[first]
            self._mean[i] = values[first]
            self._var[i] = 0.0
            self._w2[i] = 1.0
        rest = ~first
        if rest.any():
            i = idx[rest]
            diff = values[rest] - self._mean[i]
            incr = a * diff
            self._mean[i] += incr
            self._var[i] = (1.0 - a) * (self._var[i] + diff * incr)
            self._w2[i] = (1.0 - a) ** 2 * self._w2[i] + a * a
        self._count[idx] += 1

    # ------------------------------------------------------------------ Scorer protocol
    def learn_one(self, x: Mapping[str, float]) -> None:
        """Update the baseline with one window's features (non-finite values are skipped)."""
        names, values = split_features(x)
        self.update(self.locate(names, add=True), values)

    def score_one(self, x: Mapping[str, float]) -> float:
        """Largest ``|z|`` among the known features of ``x``; 0.0 when none is scorable."""
        names, values = split_features(x)
        z = self.zscores(self.locate(names), values)
        return float(np.max(np.abs(z))) if z.size else 0.0

    def deviation(self, feature: str, value: float) -> tuple[float, float]:
        """``(expected, z)`` of one value of ``feature`` against the current baseline."""
        idx = self.locate([feature])
        expected = float(self.expected(idx)[0])
        return expected, float(self.zscores(idx, np.array([float(value)]))[0])

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict[str, Any]:
        """Plain-dict state (numpy arrays for the per-feature statistics)."""
        return {
            "half_life": self.half_life,
            "absolute_floor": self.absolute_floor,
            "relative_floor": self.relative_floor,
            "names": list(self._names),
            "mean": self._mean.copy(),
            "var": self._var.copy(),
            "w2": self._w2.copy(),
            "count": self._count.copy(),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> AdaptiveBaseline:
        """Rebuild a baseline from :meth:`to_state` output; malformed states raise ``CorruptState``."""
        try:
            model = cls(state["half_life"], absolute_floor=state["absolute_floor"],
                        relative_floor=state["relative_floor"])
            names = list(state["names"])
            if not all(isinstance(n, str) for n in names) or len(set(names)) != len(names):
                raise CorruptState("baseline feature names must be distinct strings")
            n = len(names)
            arrays = {}
            for key, dtype in (("mean", np.float64), ("var", np.float64), ("w2", np.float64),
                               ("count", np.int64)):
                arr = state[key]
                if not isinstance(arr, np.ndarray) or arr.shape != (n,) or arr.dtype != dtype:
                    raise CorruptState(f"baseline {key!r} must be a {np.dtype(dtype)} array of {n}")
                arrays[key] = arr.copy()
        except (KeyError, TypeError, ValueError, SettingsError) as exc:
            raise CorruptState(f"malformed baseline state: {exc}") from exc
        model._names = names
        model._index = {name: i for i, name in enumerate(names)}
        model._mean, model._var = arrays["mean"], arrays["var"]
        model._w2, model._count = arrays["w2"], arrays["count"]
        return model


@dataclass(slots=True)
class EwmaChart:
    """Result of :func:`ewma_chart`."""

    statistic: np.ndarray       #: EWMA statistic after each observation
    center: float               #: target (centre line)
    lower: float                #: lower control limit
    upper: float                #: upper control limit
    out_of_control: np.ndarray  #: boolean mask, statistic outside [lower, upper]


def ewma_chart(values: Sequence[float] | np.ndarray, lam: float, target: float, sigma: float,
               k: float = 3.0) -> EwmaChart:
    """EWMA control chart with asymptotic limits.

    ``EWMA_0 = target``, ``EWMA_t = lam * y_t + (1 - lam) * EWMA_{t-1}``, limits
    ``target ± k * sigma * sqrt(lam / (2 - lam))`` (the steady-state form given in the
    NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.4).

    Parameters
    ----------
    values
        Observations in time order.
    lam
        Weight of the newest observation, in (0, 1].
    target
        Process mean the chart is centred on.
    sigma
        Process standard deviation.
    k
        Width of the limits in asymptotic standard deviations of the statistic.

    Examples
    --------
    >>> chart = ewma_chart([50.0, 51.0, 58.0], lam=0.5, target=50.0, sigma=1.0, k=3.0)
    >>> chart.statistic.tolist()
    [50.0, 50.5, 54.25]
    >>> round(chart.upper, 4), chart.out_of_control.tolist()
    (51.7321, [False, False, True])
    """
    if not (0.0 < lam <= 1.0):
        raise SettingsError(f"lam must be in (0, 1], got {lam}")
    if not (math.isfinite(sigma) and sigma >= 0.0):
        raise SettingsError(f"sigma must be a finite number >= 0, got {sigma}")
    y = np.asarray(values, dtype=np.float64)
    stat = np.empty_like(y)
    level = float(target)
    # A plain loop: the recursion is sequential and charts are short.
    for t, v in enumerate(y):
        level = lam * v + (1.0 - lam) * level
        stat[t] = level
    half_width = k * sigma * math.sqrt(lam / (2.0 - lam))
    lower, upper = target - half_width, target + half_width
    return EwmaChart(stat, float(target), lower, upper, (stat < lower) | (stat > upper))
